//! Tidy tables from labelled arrays, and the text form of coordinates and numbers.
//!
//! [`tidy_tsv`] writes one row per array element (per element of all axes but `statistic`, when
//! there is one): one column per axis holding that element's coordinate, then the value. A
//! `statistic` axis (as `aggregate` with `over: subjects` writes: `mean`, `sem`, `n`) is pivoted
//! into one column per statistic, so a group table reads like a results table of a paper.
//! The same text forms ([`coord_text`], [`number_text`]) name array positions in error messages.
//!
//! Tables name things as BIDS tables do: a `pair` axis is two columns, `channel_a` and
//! `channel_b` (never a joined label, which a bipolar channel name such as `F3-C3` would make
//! ambiguous), and a `subject` axis holds BIDS subject names (`sub-01`; the group rows
//! `group`), which no reader takes for numbers.

use std::fmt::Write as _;

use ndarray::ArrayD;
use num_complex::Complex32;
use rayon::prelude::*;

use crate::array::{Coord, LabelledArray, Layout, Values};

/// The axis whose entries become columns instead of rows.
const PIVOT_AXIS: &str = "statistic";

/// A number as table text: the shortest form that reads back to the same `f32`; NaN is `n/a`
/// (the BIDS convention for a missing value). Very small or large magnitudes use exponent form
/// so that a value is never a long run of zeros.
pub fn number_text(x: f64) -> String {
    let mut text = String::new();
    push_number(&mut text, x);
    text
}

/// [`number_text`], appended to `out` (no allocation of its own).
fn push_number(out: &mut String, x: f64) {
    if x.is_nan() {
        out.push_str("n/a");
        return;
    }
    let x = x as f32;
    let plain = (1e-4..1e7).contains(&x.abs());
    if plain {
        // The text of `std`'s `Display` (checked against it in the tests), written by `ryu`,
        // which is quicker at it (`stages/benches/table.rs`; figures in BENCHMARKS.md). In this range
        // `ryu` writes the plain decimal form as `Display` does, but a whole number with a
        // trailing `.0`.
        //
        // The two differ only on a tie: when `x` lies exactly halfway between the two nearest
        // shortest candidates, `ryu` takes the one with the even last digit and `Display` the
        // larger (59.5078125 is `59.507812` to `ryu`, `59.507813` to `Display`). A tie needs
        // `x`'s exact decimal expansion to end one digit after the shortest text's last, and
        // a binary fraction of f bits has exactly f decimals; those few numbers go to
        // `Display` itself.
        let mut digits = ryu::Buffer::new();
        let text = digits.format_finite(x);
        match text.split_once('.') {
            Some((whole, "0")) => {
                out.push_str(whole);
                return;
            }
            Some((_, decimals)) if fraction_bits(x) != decimals.len() as u32 + 1 => {
                out.push_str(text);
                return;
            }
            _ => {}
        }
    }
    let _ = if plain || x == 0.0 || x.is_infinite() {
        write!(out, "{x}")
    } else {
        write!(out, "{x:e}")
    };
}

/// The number of binary digits after the point that `x` needs (0 for a whole number): `x` is
/// an odd integer times 2^−that.
fn fraction_bits(x: f32) -> u32 {
    let bits = x.to_bits();
    let (exponent, fraction) = ((bits >> 23) & 0xff, bits & 0x7f_ffff);
    let (mantissa, scale) = match exponent {
        0 => (fraction, -149),
        e => (fraction | 0x80_0000, e as i32 - 150),
    };
    if mantissa == 0 {
        return 0;
    }
    (-(scale + mantissa.trailing_zeros() as i32)).max(0) as u32
}

/// Entry `i` of an axis as text: labels as they are (tabs and line breaks replaced by spaces,
/// which would break the table), pairs as `a-b`, numbers via [`number_text`].
pub fn coord_text(coord: &Coord, i: usize) -> String {
    let text = match coord {
        Coord::Labels(v) => v.get(i).cloned(),
        Coord::Numbers(v) => v.get(i).map(|x| number_text(*x)),
        Coord::Pairs(v) => v.get(i).map(|[a, b]| format!("{a}-{b}")),
    };
    text.unwrap_or_else(|| "?".into())
        .replace(['\t', '\n', '\r'], " ")
}

/// A position of an array as `axis=coordinate` items, for messages
/// (`condition=A, pair=F3-P4, time=0.5`).
pub fn position_text(layout: &Layout, index: &[usize]) -> String {
    layout
        .dims
        .iter()
        .zip(&layout.coords)
        .zip(index)
        .map(|((dim, coord), &i)| format!("{dim}={}", coord_text(coord, i)))
        .collect::<Vec<_>>()
        .join(", ")
}

/// The BIDS name of a subject label: `sub-<label>` (a label that already is one, and the
/// group rows' `group`, unchanged).
pub fn bids_subject(label: &str) -> String {
    if label == "group" || label.starts_with("sub-") {
        label.to_string()
    } else {
        format!("sub-{label}")
    }
}

/// The table columns of axis `dim`: `channel_a` and `channel_b` for channel pairs, else the
/// axis name.
fn axis_columns(dim: &str, coord: &Coord) -> Vec<String> {
    match coord {
        Coord::Pairs(_) => vec!["channel_a".into(), "channel_b".into()],
        _ => vec![dim.to_string()],
    }
}

/// The cell(s) of entry `i` of axis `dim` in a table row (tab-separated when the axis has two
/// columns): pairs as their two channels, subjects by their BIDS name, the rest as
/// [`coord_text`].
fn cell_text(dim: &str, coord: &Coord, i: usize) -> String {
    let clean = |s: &str| s.replace(['\t', '\n', '\r'], " ");
    match coord {
        Coord::Pairs(v) => v
            .get(i)
            .map(|[a, b]| format!("{}\t{}", clean(a), clean(b)))
            .unwrap_or_else(|| "?\t?".into()),
        Coord::Labels(v) if dim == "subject" => v
            .get(i)
            .map_or_else(|| "?".into(), |s| clean(&bids_subject(s))),
        _ => coord_text(coord, i),
    }
}

/// The column dictionary of the table [`write_tidy_tsv`] writes for an array of `layout`, in
/// the form of a BIDS tabular-file sidecar: one entry per column, `{"Description": ...}` with
/// `Units` where a column has them and `Levels` where its entries are named ranges (bands,
/// windows).
pub fn column_dictionary(layout: &Layout) -> serde_json::Map<String, serde_json::Value> {
    use crate::ops::contrast::{FINDINGS_COLUMNS, TABLE_FORM};
    use serde_json::{json, Value};
    let findings = layout.meta.extra.get("table_form") == Some(&json!(TABLE_FORM));
    let names: Vec<String> = match findings {
        true => FINDINGS_COLUMNS.iter().map(|c| c.to_string()).collect(),
        false => {
            let pivot = layout.dims.iter().position(|d| d == PIVOT_AXIS);
            let mut names: Vec<String> = (0..layout.dims.len())
                .filter(|&a| Some(a) != pivot)
                .flat_map(|a| axis_columns(&layout.dims[a], &layout.coords[a]))
                .collect();
            let per_value: &[&str] = if layout.complex {
                &["real", "imag"]
            } else {
                &["value"]
            };
            match pivot {
                None => names.extend(per_value.iter().map(|v| v.to_string())),
                Some(p) => {
                    let coord = &layout.coords[p];
                    for k in 0..coord.len() {
                        let stat = coord_text(coord, k);
                        match layout.complex {
                            false => names.push(stat),
                            true => names.extend(per_value.iter().map(|v| format!("{stat}_{v}"))),
                        }
                    }
                }
            }
            names
        }
    };
    // Named ranges of the metadata (`bands` in Hz, `windows` in s) as the levels of a column.
    let levels = |key: &str, unit: &str| -> Option<Value> {
        let ranges = layout.meta.extra.get(key)?.as_object()?;
        let text = ranges.iter().map(|(name, range)| {
            let r: Vec<String> = range
                .as_array()
                .map(|r| {
                    r.iter()
                        .filter_map(Value::as_f64)
                        .map(number_text)
                        .collect()
                })
                .unwrap_or_default();
            (name.clone(), json!(format!("{} {unit}", r.join(" to "))))
        });
        Some(Value::Object(text.collect()))
    };
    let values = json!(layout.units);
    names
        .into_iter()
        .map(|name| {
            let mut entry = serde_json::Map::new();
            // A complex value's statistic columns (`mean_real`) are described as the statistic.
            let base = name
                .strip_suffix("_real")
                .or_else(|| name.strip_suffix("_imag"))
                .unwrap_or(&name);
            let (description, units, named) = match base {
                "subject" => ("Subject, by its BIDS name (sub-<label>); `group` on the rows that summarise all subjects", None, None),
                "channel_a" => ("First channel of the pair", None, None),
                "channel_b" => ("Second channel of the pair", None, None),
                "condition" => ("Condition: a named set of event labels of the epoch stage", None, None),
                "measure" => ("Phase-synchronization measure", None, None),
                "band" => ("Frequency band, as named in the pipeline (the mean over its frequencies, inclusive)", None, levels("bands", "Hz")),
                "window" => ("Time window, as named in the pipeline (the mean over its times, inclusive)", None, levels("windows", "s")),
                "freq" | "freq_from" | "freq_to" => ("Frequency (cluster extent for freq_from, freq_to)", Some(json!("Hz")), None),
                "time" | "time_from" | "time_to" => ("Time relative to the event (cluster extent for time_from, time_to)", Some(json!("s")), None),
                "trial" => ("Trial number", None, None),
                "value" => ("Value", Some(values.clone()), None),
                "real" | "imag" => ("Real or imaginary part of the value", Some(values.clone()), None),
                "mean" => ("Mean over subjects on `group` rows; the subject's own value on a subject's rows", Some(values.clone()), None),
                "sem" => ("Standard error of the mean over subjects (sd with ddof 1 over sqrt(n)); n/a on a subject's rows", Some(values.clone()), None),
                "n" => ("Number of finite values the row summarises", None, None),
                "cluster" => ("Cluster id within the measure and pair (n/a without cluster correction)", None, None),
                "mass" => ("Cluster mass: the sum of t over its points", None, None),
                "peak_t" => ("The t of largest magnitude in the cluster", None, None),
                "p" => ("Corrected p value", None, None),
                "significant" => ("Whether p is at or below the contrast's alpha", None, None),
                _ => ("", None, None),
            };
            let mut description = if description.is_empty() {
                format!("Coordinate or statistic `{name}`")
            } else {
                description.to_string()
            };
            if base != name {
                description.push_str(&format!(" ({} part)", &name[base.len() + 1..]));
            }
            entry.insert("Description".into(), json!(description));
            if let Some(units) = units {
                entry.insert("Units".into(), units);
            }
            if let Some(levels) = named {
                entry.insert("Levels".into(), levels);
            }
            (name, Value::Object(entry))
        })
        .collect()
}

/// The pivoted axis (if any), the axes that become row columns, and the header.
fn columns(array: &LabelledArray) -> (Option<usize>, Vec<usize>, Vec<String>) {
    let layout = &array.layout;
    let pivot = layout.dims.iter().position(|d| d == PIVOT_AXIS);
    let row_axes: Vec<usize> = (0..layout.dims.len())
        .filter(|&a| Some(a) != pivot)
        .collect();
    let mut header: Vec<String> = row_axes
        .iter()
        .flat_map(|&a| axis_columns(&layout.dims[a], &layout.coords[a]))
        .collect();
    header.extend(value_columns(array, pivot));
    (pivot, row_axes, header)
}

/// A tab-separated table with a header and one row per element: one column per axis holding its
/// coordinate, then the value (`value`, or `real` and `imag` for complex arrays). A `statistic`
/// axis is pivoted into one column per statistic. Rows follow the array's (row-major) order.
pub fn tidy_tsv(array: &LabelledArray) -> String {
    let mut out = String::new();
    let done: Result<(), std::convert::Infallible> = write_tidy_tsv(array, &mut |piece| {
        out.push_str(piece);
        Ok(())
    });
    match done {
        Ok(()) => out,
        Err(never) => match never {},
    }
}

/// [`tidy_tsv`], handed to `sink` piece by piece in order (the pieces joined are exactly that
/// text) instead of built whole: a group table of a large study is tens of MB, and building it
/// whole first costs as much as writing it. Blocks of rows are formatted in parallel a batch at
/// a time, the next batch while `sink` takes the last, into buffers that are reused; the first
/// error of `sink` stops the writing and is returned.
pub fn write_tidy_tsv<E: Send>(
    array: &LabelledArray,
    sink: &mut (dyn FnMut(&str) -> Result<(), E> + Send),
) -> Result<(), E> {
    if let Some(text) = crate::ops::contrast::findings_tsv(array) {
        return sink(&text);
    }
    let layout = &array.layout;
    let (pivot, row_axes, header) = columns(array);
    let row_shape: Vec<usize> = row_axes.iter().map(|&a| axis_len(array, a)).collect();
    let pivot_len = pivot.map_or(1, |p| axis_len(array, p));
    // Each coordinate's text once, not once per row.
    let coord_texts: Vec<Vec<String>> = row_axes
        .iter()
        .zip(&row_shape)
        .map(|(&a, &n)| {
            (0..n)
                .map(|i| cell_text(&layout.dims[a], &layout.coords[a], i))
                .collect()
        })
        .collect();
    // Row-major element strides of the values (read in standard layout).
    let shape = array.values.shape();
    let mut strides = vec![1usize; shape.len()];
    for a in (0..shape.len().saturating_sub(1)).rev() {
        strides[a] = strides[a + 1] * shape[a + 1];
    }
    let pivot_stride = pivot.map_or(0, |p| strides[p]);
    let flat = Flat::of(&array.values);
    let rows: usize = row_shape.iter().product();
    let blocks = rows.div_ceil(ROWS_PER_BLOCK);
    let format_block = |out: &mut String, block: usize| {
        out.clear();
        let range = block * ROWS_PER_BLOCK..((block + 1) * ROWS_PER_BLOCK).min(rows);
        for_each_index_in(&row_shape, range, |row| {
            let mut base = 0;
            let mut first = true;
            for (k, (&a, &i)) in row_axes.iter().zip(row).enumerate() {
                base += i * strides[a];
                if !first {
                    out.push('\t');
                }
                first = false;
                out.push_str(&coord_texts[k][i]);
            }
            for j in 0..pivot_len {
                flat.push_cells(out, base + j * pivot_stride, &mut first);
            }
            out.push('\n');
        });
    };
    // Blocks `from …` of one batch, one buffer each (buffers past the last block left empty).
    let format_batch = |bufs: &mut [String], from: usize| {
        bufs.par_iter_mut().enumerate().for_each(|(i, buf)| {
            buf.clear();
            if from + i < blocks {
                format_block(buf, from + i);
            }
        });
    };
    sink(&format!("{}\n", header.join("\t")))?;
    let mut ready = vec![String::new(); BLOCKS_PER_BATCH];
    let mut next = vec![String::new(); BLOCKS_PER_BATCH];
    format_batch(&mut ready, 0);
    let mut from = 0;
    while from < blocks {
        let (written, ()) = rayon::join(
            || ready.iter().try_for_each(|piece| sink(piece)),
            || format_batch(&mut next, from + BLOCKS_PER_BATCH),
        );
        written?;
        std::mem::swap(&mut ready, &mut next);
        from += BLOCKS_PER_BATCH;
    }
    Ok(())
}

/// Rows per parallel piece of [`write_tidy_tsv`].
const ROWS_PER_BLOCK: usize = 4096;

/// Blocks formatted (in parallel) per batch of [`write_tidy_tsv`]: about 1.6 MB of a group
/// table's text.
const BLOCKS_PER_BATCH: usize = 8;

/// The values in row-major order (borrowed when they already are).
enum Flat<'a> {
    Real(std::borrow::Cow<'a, [f32]>),
    Complex(std::borrow::Cow<'a, [Complex32]>),
}

impl<'a> Flat<'a> {
    fn of(values: &'a Values) -> Self {
        match values {
            Values::Real(a) => Flat::Real(standard(a)),
            Values::Complex(a) => Flat::Complex(standard(a)),
        }
    }

    /// The text cells of element `i`, each after a tab unless it is the row's first.
    fn push_cells(&self, out: &mut String, i: usize, first: &mut bool) {
        let mut cell = |out: &mut String, x: f64| {
            if !*first {
                out.push('\t');
            }
            *first = false;
            push_number(out, x);
        };
        match self {
            Flat::Real(v) => cell(out, v.get(i).map_or(f64::NAN, |&x| f64::from(x))),
            Flat::Complex(v) => {
                let z = v.get(i).copied();
                cell(out, z.map_or(f64::NAN, |z| f64::from(z.re)));
                cell(out, z.map_or(f64::NAN, |z| f64::from(z.im)));
            }
        }
    }
}

fn standard<T: Clone>(a: &ArrayD<T>) -> std::borrow::Cow<'_, [T]> {
    match a.as_slice() {
        Some(s) => std::borrow::Cow::Borrowed(s),
        None => std::borrow::Cow::Owned(a.iter().cloned().collect()),
    }
}

/// Length of axis `a` as the values have it (the coordinates should agree; the values decide).
fn axis_len(array: &LabelledArray, a: usize) -> usize {
    array.values.shape().get(a).copied().unwrap_or(0)
}

/// Header names of the value columns.
fn value_columns(array: &LabelledArray, pivot: Option<usize>) -> Vec<String> {
    let per_value: Vec<&str> = match array.values {
        Values::Real(_) => vec!["value"],
        Values::Complex(_) => vec!["real", "imag"],
    };
    let Some(p) = pivot else {
        return per_value.iter().map(|s| s.to_string()).collect();
    };
    let coord = &array.layout.coords[p];
    let mut names = Vec::new();
    for k in 0..axis_len(array, p) {
        let stat = coord_text(coord, k);
        match array.values {
            Values::Real(_) => names.push(stat),
            Values::Complex(_) => names.extend(per_value.iter().map(|v| format!("{stat}_{v}"))),
        }
    }
    names
}

/// Calls `f` with every index of `shape` in row-major order (once with `[]` for a 0-d shape).
#[cfg(test)]
fn for_each_index(shape: &[usize], f: impl FnMut(&[usize])) {
    for_each_index_in(shape, 0..shape.iter().product(), f);
}

/// Calls `f` with the indices of `shape` whose row-major positions are in `range`, in order.
fn for_each_index_in(shape: &[usize], range: std::ops::Range<usize>, mut f: impl FnMut(&[usize])) {
    let total: usize = shape.iter().product();
    if range.start >= range.end.min(total) {
        return;
    }
    // The index of position `range.start`, last axis fastest.
    let mut index = vec![0usize; shape.len()];
    let mut rest = range.start;
    for (i, &n) in index.iter_mut().zip(shape).rev() {
        *i = rest % n;
        rest /= n;
    }
    for _ in range.start..range.end.min(total) {
        f(&index);
        // Odometer increment from the last axis.
        let mut a = shape.len();
        loop {
            if a == 0 {
                return;
            }
            a -= 1;
            index[a] += 1;
            if index[a] < shape[a] {
                break;
            }
            index[a] = 0;
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::{ArrayD, IxDyn};

    fn labels(v: &[&str]) -> Coord {
        Coord::Labels(v.iter().map(|s| s.to_string()).collect())
    }

    #[test]
    fn numbers_round_trip_f32_and_nan_is_na() {
        // "n/a" is BIDS's missing-value marker (Gorgolewski et al. 2016); round trip is checked
        // against Rust's own f32 parser, which follows IEEE 754 correct rounding.
        for x in [
            0.1f32,
            -0.3,
            1.0 / 3.0,
            6.02e23,
            1.5e-7,
            123456.79,
            0.0,
            7.0,
        ] {
            let text = number_text(f64::from(x));
            assert_eq!(text.parse::<f32>().unwrap(), x, "{text}");
        }
        assert_eq!(number_text(0.25), "0.25");
        assert_eq!(number_text(6.0), "6");
        assert_eq!(number_text(1.5e-7), "1.5e-7");
        assert_eq!(number_text(f64::NAN), "n/a");
    }

    /// The number text, the way `std` alone writes it: `Display` (shortest digits that read
    /// back to the same `f32`, in plain decimal form) for magnitudes in [1e-4, 1e7) and zero and
    /// infinity, `LowerExp` for the rest.
    fn std_number_text(x: f32) -> String {
        if x.is_nan() {
            "n/a".into()
        } else if x == 0.0 || x.is_infinite() || (1e-4..1e7).contains(&x.abs()) {
            format!("{x}")
        } else {
            format!("{x:e}")
        }
    }

    /// Every `step`-th bit pattern of `f32` (both signs, NaNs, infinities, subnormals) is written
    /// as `std` writes it.
    fn numbers_match_std(step: usize) {
        let patterns = u32::MAX as usize / step + 1;
        (0..patterns).into_par_iter().for_each(|i| {
            let bits = (i * step) as u32;
            let x = f32::from_bits(bits);
            let mut text = String::new();
            push_number(&mut text, f64::from(x));
            assert_eq!(text, std_number_text(x), "bits {bits:#010x}");
        });
    }

    /// The fast number text is `std`'s own (Rust's `f32` formatting, which writes the shortest
    /// digits that read back to the same value, is the reference): 4.2 million bit patterns
    /// spread over every binade, and the whole numbers and powers of ten around the edges of
    /// the plain decimal range.
    #[test]
    fn number_text_is_std_formatting() {
        numbers_match_std(1021);
        let edges = [1e-4f32, 1e7, 0.5, 1.0, 10.0, 100.0, 1e6, 16_777_216.0];
        for edge in edges {
            let mut x = edge;
            for _ in 0..64 {
                for y in [x, -x] {
                    assert_eq!(number_text(f64::from(y)), std_number_text(y));
                }
                x = f32::from_bits(x.to_bits() - 1);
            }
        }
        for n in (1..10_000_000).step_by(997) {
            let x = n as f32;
            assert_eq!(number_text(f64::from(x)), n.to_string());
        }
    }

    /// [`number_text_is_std_formatting`] for every `f32` (4.3 billion values, about 12 minutes
    /// on two cores in a release build): `cargo test --release -p phasewise-stages -- --ignored every_f32`.
    #[test]
    #[ignore = "slow: every f32; run by hand after a change to the number text"]
    fn number_text_is_std_formatting_for_every_f32() {
        numbers_match_std(1);
    }

    #[test]
    fn a_statistic_axis_becomes_columns() {
        let layout = Layout {
            dims: ["statistic", "subject", "pair", "band"]
                .map(String::from)
                .to_vec(),
            coords: vec![
                labels(&["mean", "sem", "n"]),
                labels(&["01", "group"]),
                Coord::Pairs(vec![["F3-C3".into(), "P4".into()]].into()),
                labels(&["theta", "alpha"]),
            ],
            units: "1".into(),
            ..Layout::default()
        };
        // value = 100·statistic + 10·subject + band, so each cell shows where it came from.
        let values =
            ArrayD::from_shape_fn(layout.shape(), |i| (100 * i[0] + 10 * i[1] + i[3]) as f32);
        let mut values = values;
        values[[1, 0, 0, 1]] = f32::NAN;
        let array = LabelledArray::real(layout, values).unwrap();
        // Subjects by their BIDS names, the pair as two columns (a bipolar name stays whole).
        let expected = "subject\tchannel_a\tchannel_b\tband\tmean\tsem\tn\n\
                        sub-01\tF3-C3\tP4\ttheta\t0\t100\t200\n\
                        sub-01\tF3-C3\tP4\talpha\t1\tn/a\t201\n\
                        group\tF3-C3\tP4\ttheta\t10\t110\t210\n\
                        group\tF3-C3\tP4\talpha\t11\t111\t211\n";
        assert_eq!(tidy_tsv(&array), expected);
    }

    /// The column dictionary names exactly the table's columns, each with a description, and
    /// gives the units of the values and of the numeric axes.
    #[test]
    fn the_column_dictionary_names_every_column() {
        for complex in [false, true] {
            let layout = Layout {
                dims: ["statistic", "subject", "pair", "freq"]
                    .map(String::from)
                    .to_vec(),
                coords: vec![
                    labels(&["mean", "sem", "n"]),
                    labels(&["01", "group"]),
                    Coord::Pairs(vec![["F3".into(), "P4".into()]].into()),
                    Coord::Numbers(vec![4.0, 8.0]),
                ],
                units: "V".into(),
                complex,
                ..Layout::default()
            };
            let values = ArrayD::from_shape_fn(layout.shape(), |i| i[3] as f32);
            let values = match complex {
                false => Values::Real(values),
                true => Values::Complex(values.mapv(|x| Complex32::new(x, 0.0))),
            };
            let array = LabelledArray::checked(layout.clone(), values).unwrap();
            let table = tidy_tsv(&array);
            let header: Vec<&str> = table.lines().next().unwrap().split('\t').collect();
            let dictionary = column_dictionary(&layout);
            let mut names: Vec<&str> = dictionary.keys().map(String::as_str).collect();
            let mut sorted = header.clone();
            sorted.sort();
            names.sort();
            assert_eq!(names, sorted);
            assert!(dictionary.values().all(|e| e["Description"].is_string()));
            assert_eq!(dictionary["freq"]["Units"], "Hz");
            let mean = if complex { "mean_real" } else { "mean" };
            assert_eq!(dictionary[mean]["Units"], "V");
        }
    }

    #[test]
    fn one_row_per_element_without_statistic() {
        let layout = Layout {
            dims: ["condition", "time"].map(String::from).to_vec(),
            coords: vec![
                labels(&["cue\tleft", "B"]),
                Coord::Numbers(vec![-0.5, 0.25]),
            ],
            units: "1".into(),
            ..Layout::default()
        };
        let values = ArrayD::from_shape_vec(vec![2, 2], vec![0.5, -1.0, 2.0, 1e-9]).unwrap();
        let array = LabelledArray::real(layout, values).unwrap();
        assert_eq!(
            tidy_tsv(&array),
            "condition\ttime\tvalue\ncue left\t-0.5\t0.5\ncue left\t0.25\t-1\n\
             B\t-0.5\t2\nB\t0.25\t1e-9\n"
        );
    }

    /// The table as the previous writer built it, cell by cell (`coord_text` for every
    /// coordinate of every row, `number_text` of `get(index)` for every value): the oracle of
    /// the fast writer.
    fn plain_tsv(array: &LabelledArray) -> String {
        let layout = &array.layout;
        let (pivot, row_axes, header) = columns(array);
        let mut out = format!("{}\n", header.join("\t"));
        let row_shape: Vec<usize> = row_axes.iter().map(|&a| axis_len(array, a)).collect();
        let pivot_len = pivot.map_or(1, |p| axis_len(array, p));
        for_each_index(&row_shape, |row| {
            let mut cells: Vec<String> = row_axes
                .iter()
                .zip(row)
                .map(|(&a, &i)| cell_text(&layout.dims[a], &layout.coords[a], i))
                .collect();
            for k in 0..pivot_len {
                let mut full = row.to_vec();
                if let Some(p) = pivot {
                    full.insert(p, k);
                }
                let at = ndarray::IxDyn(&full);
                match &array.values {
                    Values::Real(a) => cells.push(number_text(f64::from(a[&at]))),
                    Values::Complex(a) => {
                        cells.push(number_text(a[&at].re.into()));
                        cells.push(number_text(a[&at].im.into()));
                    }
                }
            }
            out.push_str(&cells.join("\t"));
            out.push('\n');
        });
        out
    }

    #[test]
    fn index_ranges_continue_the_full_sequence() {
        for shape in [vec![], vec![5], vec![3, 4, 2], vec![2, 0, 3], vec![1, 7, 1]] {
            let mut all = Vec::new();
            for_each_index(&shape, |i| all.push(i.to_vec()));
            assert_eq!(all.len(), shape.iter().product::<usize>());
            for (a, b) in [(0, 0), (0, 1), (1, 5), (5, 24), (23, 30), (7, 3)] {
                let mut part = Vec::new();
                for_each_index_in(&shape, a..b, |i| part.push(i.to_vec()));
                let lo = a.min(all.len());
                let want = &all[lo..b.min(all.len()).max(lo)];
                assert_eq!(part, want, "{shape:?} {a}..{b}");
            }
        }
    }

    #[test]
    fn a_table_of_many_blocks_equals_the_cell_by_cell_one() {
        // 72000 rows: 18 blocks of ROWS_PER_BLOCK in three batches (the last one short),
        // formatted in parallel and handed on in order.
        let (n, m) = (12000usize, 2usize);
        assert!(3 * n * m > 2 * BLOCKS_PER_BATCH * ROWS_PER_BLOCK);
        let layout = Layout {
            dims: ["condition", "trial", "time"].map(String::from).to_vec(),
            coords: vec![
                labels(&["A", "B", "C"]),
                Coord::Numbers((0..n).map(|t| t as f64).collect()),
                Coord::Numbers(vec![-0.5, 0.25]),
            ],
            units: "1".into(),
            ..Layout::default()
        };
        let values = ArrayD::from_shape_fn(IxDyn(&[3, n, m]), |i| {
            (i[0] * 7 + i[1] * 3 + i[2]) as f32 * 0.013 - 1.0
        });
        let array = LabelledArray::checked(layout, Values::Real(values)).unwrap();
        assert_eq!(tidy_tsv(&array), plain_tsv(&array));
        // The first error of the sink ends the writing: nothing is handed on after it.
        let mut pieces = 0;
        let done = write_tidy_tsv(&array, &mut |_| {
            pieces += 1;
            if pieces == 3 {
                Err("disk full")
            } else {
                Ok(())
            }
        });
        assert_eq!(done, Err("disk full"));
        assert_eq!(pieces, 3, "pieces handed on after the error");
    }

    #[test]
    fn the_fast_writer_equals_the_cell_by_cell_one() {
        for (pivot_at, complex, transposed) in [
            (Some(0), false, false),
            (Some(2), false, false),
            (None, true, false),
            (Some(1), true, false),
            (Some(0), false, true),
        ] {
            let shape = [3usize, 4, 3, 2];
            let mut dims: Vec<String> = ["condition", "pair", "band", "time"]
                .map(String::from)
                .to_vec();
            let mut coords = vec![
                labels(&["A", "B", "C"]),
                Coord::Pairs(
                    vec![
                        ["F3".into(), "P4".into()],
                        ["Fz".into(), "Cz".into()],
                        ["a".into(), "b".into()],
                        ["c".into(), "d".into()],
                    ]
                    .into(),
                ),
                labels(&["theta", "alpha", "beta"]),
                Coord::Numbers(vec![-0.25, 1e-9]),
            ];
            if let Some(p) = pivot_at {
                dims[p] = PIVOT_AXIS.into();
                coords[p] = labels(&["mean", "sem", "n", "x"][..shape[p]]);
            }
            let layout = Layout {
                dims,
                coords,
                units: "1".into(),
                complex,
                ..Layout::default()
            };
            let real = ArrayD::from_shape_fn(IxDyn(&shape), |i| {
                let k = (i[0] * 1000 + i[1] * 100 + i[2] * 10 + i[3]) as f32;
                if k as usize % 7 == 3 {
                    f32::NAN
                } else {
                    k * 1.37e-6 - 0.01
                }
            });
            let values = if complex {
                Values::Complex(real.mapv(|x| Complex32::new(x, -2.5 * x)))
            } else if transposed {
                // A non-standard memory order (values equal, laid out differently).
                let mut t = ArrayD::<f32>::zeros(IxDyn(&[2, 3, 4, 3]));
                t.assign(&real.view().reversed_axes());
                Values::Real(t.reversed_axes())
            } else {
                Values::Real(real)
            };
            let array = LabelledArray::checked(layout, values).unwrap();
            assert_eq!(
                tidy_tsv(&array),
                plain_tsv(&array),
                "{pivot_at:?} {complex}"
            );
        }
    }
}
