//! Tidy tables from labelled arrays, and the text form of coordinates and numbers.
//!
//! [`tidy_tsv`] writes one row per array element (per element of all axes but `statistic`, when
//! there is one): one column per axis holding that element's coordinate, then the value. A
//! `statistic` axis (as `aggregate` with `over: subjects` writes: `mean`, `sem`, `n`) is pivoted
//! into one column per statistic, so a group table reads like a results table of a paper.
//! The same text forms ([`coord_text`], [`number_text`]) name array positions in error messages.

use std::fmt::Write as _;

use ndarray::{ArrayD, IxDyn};
use num_complex::Complex32;

use crate::array::{Coord, LabelledArray, Layout, Values};

/// The axis whose entries become columns instead of rows.
const PIVOT_AXIS: &str = "statistic";

/// A number as table text: the shortest form that reads back to the same `f32`; NaN is `n/a`
/// (the BIDS convention for a missing value). Very small or large magnitudes use exponent form
/// so that a value is never a long run of zeros.
pub fn number_text(x: f64) -> String {
    if x.is_nan() {
        return "n/a".into();
    }
    let x = x as f32;
    let magnitude = x.abs();
    if x == 0.0 || x.is_infinite() || (1e-4..1e7).contains(&magnitude) {
        format!("{x}")
    } else {
        format!("{x:e}")
    }
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

/// A tab-separated table with a header and one row per element: one column per axis holding its
/// coordinate, then the value (`value`, or `real` and `imag` for complex arrays). A `statistic`
/// axis is pivoted into one column per statistic. Rows follow the array's (row-major) order.
pub fn tidy_tsv(array: &LabelledArray) -> String {
    let layout = &array.layout;
    let pivot = layout.dims.iter().position(|d| d == PIVOT_AXIS);
    let row_axes: Vec<usize> = (0..layout.dims.len())
        .filter(|&a| Some(a) != pivot)
        .collect();
    let mut out = String::new();
    let mut header: Vec<String> = row_axes.iter().map(|&a| layout.dims[a].clone()).collect();
    header.extend(value_columns(array, pivot));
    let _ = writeln!(out, "{}", header.join("\t"));
    let row_shape: Vec<usize> = row_axes.iter().map(|&a| axis_len(array, a)).collect();
    let pivot_len = pivot.map_or(1, |p| axis_len(array, p));
    for_each_index(&row_shape, |row| {
        let mut cells: Vec<String> = row_axes
            .iter()
            .zip(row)
            .map(|(&a, &i)| coord_text(&layout.coords[a], i))
            .collect();
        for k in 0..pivot_len {
            let mut full: Vec<usize> = row.to_vec();
            if let Some(p) = pivot {
                full.insert(p, k);
            }
            cells.extend(value_cells(&array.values, &full));
        }
        let _ = writeln!(out, "{}", cells.join("\t"));
    });
    out
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

/// The text cells of one element.
fn value_cells(values: &Values, index: &[usize]) -> Vec<String> {
    match values {
        Values::Real(a) => vec![real_at(a, index)],
        Values::Complex(a) => complex_at(a, index),
    }
}

fn real_at(a: &ArrayD<f32>, index: &[usize]) -> String {
    a.get(IxDyn(index))
        .map_or_else(|| "n/a".into(), |&x| number_text(f64::from(x)))
}

fn complex_at(a: &ArrayD<Complex32>, index: &[usize]) -> Vec<String> {
    match a.get(IxDyn(index)) {
        Some(z) => vec![number_text(z.re.into()), number_text(z.im.into())],
        None => vec!["n/a".into(), "n/a".into()],
    }
}

/// Calls `f` with every index of `shape` in row-major order (once with `[]` for a 0-d shape).
fn for_each_index(shape: &[usize], mut f: impl FnMut(&[usize])) {
    if shape.contains(&0) {
        return;
    }
    let mut index = vec![0usize; shape.len()];
    loop {
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
    use ndarray::ArrayD;

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

    #[test]
    fn a_statistic_axis_becomes_columns() {
        let layout = Layout {
            dims: ["statistic", "subject", "pair", "band"]
                .map(String::from)
                .to_vec(),
            coords: vec![
                labels(&["mean", "sem", "n"]),
                labels(&["sub-01", "group"]),
                Coord::Pairs(vec![["F3".into(), "P4".into()]]),
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
        let expected = "subject\tpair\tband\tmean\tsem\tn\n\
                        sub-01\tF3-P4\ttheta\t0\t100\t200\n\
                        sub-01\tF3-P4\talpha\t1\tn/a\t201\n\
                        group\tF3-P4\ttheta\t10\t110\t210\n\
                        group\tF3-P4\talpha\t11\t111\t211\n";
        assert_eq!(tidy_tsv(&array), expected);
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
}
