//! Bringing an exported connectivity array into the one shape the figures draw:
//! [condition, measure, pair, row, column], where (row, column) is (freq, time) for
//! time–frequency arrays or (band, window) for aggregated ones.
//!
//! Axes are found by name, wherever they are. A missing `condition` or `measure` axis becomes a
//! single entry; any other axis must have one entry, or be the `statistic` axis (its `mean` is
//! drawn) or the `subject` axis of a group aggregate (its `group` entry is drawn); otherwise the
//! array is not drawn, and the report says why.

use ndarray::{Array5, ArrayD, ArrayViewD, Axis, Ix5};
use phasewise_stages::array::Coord;
use phasewise_stages::range;

use super::axes::GridAxis;
use super::input::Sidecar;

/// The two axes that span a heat map.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Plane {
    /// `freq` (Hz) × `time` (s).
    FreqTime,
    /// `band` × `window`.
    BandWindow,
}

impl Plane {
    fn names(self) -> (&'static str, &'static str) {
        match self {
            Plane::FreqTime => ("freq", "time"),
            Plane::BandWindow => ("band", "window"),
        }
    }

    /// The plane an array of these dims can be drawn on, if any (needs a `pair` axis too).
    pub fn of(dims: &[String]) -> Option<Plane> {
        let has = |n: &str| dims.iter().any(|d| d == n);
        if !has("pair") {
            return None;
        }
        [Plane::FreqTime, Plane::BandWindow].into_iter().find(|p| {
            let (a, b) = p.names();
            has(a) && has(b)
        })
    }
}

/// A connectivity array in drawing order, values widened to f64.
#[derive(Clone, Debug)]
pub struct Cube {
    /// Condition names.
    pub conditions: Vec<String>,
    /// Measure names.
    pub measures: Vec<String>,
    /// Channel pairs.
    pub pairs: Vec<[String; 2]>,
    /// Row axis (frequency or band).
    pub rows: GridAxis,
    /// Column axis (time or window).
    pub cols: GridAxis,
    /// Values [condition, measure, pair, row, column].
    pub values: Array5<f64>,
    /// The plane.
    pub plane: Plane,
    /// Axes that were fixed to one entry, e.g. `statistic = mean`.
    pub fixed: Vec<String>,
}

const CANON: [&str; 3] = ["condition", "measure", "pair"];

/// Why an array's axes cannot be drawn as a connectivity map (what was expected of them).
#[derive(Debug, PartialEq, thiserror::Error)]
pub enum LayoutError {
    /// An axis the figure needs is missing.
    #[error("expected a `{0}` axis, the array has none")]
    MissingAxis(String),
    /// The sidecar lists fewer coordinates than axes.
    #[error("expected a coordinate list for each axis, the sidecar has fewer")]
    MissingCoords,
    /// An axis that is not drawn has several entries and none is the summary.
    #[error(
        "its `{axis}` axis has {len} entries and none of them is the one summary figures show \
         (expected `mean` of `statistic` or `group` of `subject`), so there is no single slice to draw"
    )]
    NoSummary {
        /// The axis.
        axis: String,
        /// Its number of entries.
        len: usize,
    },
    /// The `pair` axis holds labels.
    #[error("expected channel pairs on the `pair` axis, it holds labels")]
    PairLabels,
    /// A numeric axis is not increasing, or not finite.
    #[error("expected increasing finite numbers as `{0}` coordinates")]
    NotIncreasing(String),
    /// A frequency is zero or negative.
    #[error("expected positive frequencies (the frequency axis is drawn on a log scale)")]
    NonPositiveFreq,
    /// Statistics over other axes than the plane's.
    #[error("expected its statistics over the same axes as the maps")]
    StatisticAxes,
    /// No `statistic` axis, or one without labels.
    #[error("expected a labelled `statistic` axis")]
    NoStatistic,
}

/// Builds the cube, or says why this array cannot be drawn.
pub fn build(sidecar: &Sidecar, values: &ArrayD<f32>, plane: Plane) -> Result<Cube, LayoutError> {
    let (rname, cname) = plane.names();
    let keep = |d: &str| CANON.contains(&d) || d == rname || d == cname;
    let mut fixed = Vec::new();
    let mut view: ArrayViewD<'_, f32> = values.view();
    let mut names: Vec<String> = sidecar.dims.clone();
    // Fix the other axes from the last to the first so earlier indices stay valid.
    for i in (0..sidecar.dims.len()).rev() {
        let d = &sidecar.dims[i];
        if keep(d) {
            continue;
        }
        let coord = sidecar.coords.get(i).ok_or(LayoutError::MissingCoords)?;
        let (idx, what) = pick_entry(d, coord)?;
        fixed.push(what);
        view = view.index_axis_move(Axis(i), idx);
        names.remove(i);
    }
    for d in ["condition", "measure"] {
        if !names.iter().any(|n| n == d) {
            let at = Axis(view.ndim());
            view = view.insert_axis(at);
            names.push(d.to_string());
        }
    }
    let order = [CANON[0], CANON[1], CANON[2], rname, cname];
    let perm: Vec<usize> = order
        .iter()
        .map(|o| {
            names
                .iter()
                .position(|n| n == o)
                .ok_or(LayoutError::MissingAxis(o.to_string()))
        })
        .collect::<Result<_, _>>()?;
    let five = view
        .permuted_axes(perm)
        .into_dimensionality::<Ix5>()
        .map_err(|_| LayoutError::MissingCoords)?;
    Ok(Cube {
        conditions: labels_or(sidecar, "condition", "all"),
        measures: labels_or(sidecar, "measure", "value"),
        pairs: pairs_of(sidecar)?,
        rows: grid_axis(sidecar, rname)?,
        cols: grid_axis(sidecar, cname)?,
        values: five.mapv(f64::from),
        plane,
        fixed,
    })
}

/// The entry to draw of an axis that is not part of the figure.
fn pick_entry(dim: &str, coord: &Coord) -> Result<(usize, String), LayoutError> {
    if coord.len() == 1 {
        return Ok((0, format!("{dim} = {}", coord_label(coord, 0))));
    }
    // An aggregate over subjects has `statistic` [mean, sem, n] and `subject` [ids…, group]:
    // the group mean is what a summary figure shows.
    let wanted = match dim {
        "statistic" => "mean",
        "subject" => "group",
        _ => "",
    };
    if let Some(i) = coord
        .labels()
        .and_then(|l| l.iter().position(|s| s == wanted))
    {
        return Ok((i, format!("{dim} = {wanted}")));
    }
    Err(LayoutError::NoSummary {
        axis: dim.to_string(),
        len: coord.len(),
    })
}

fn coord_label(c: &Coord, i: usize) -> String {
    match c {
        Coord::Labels(l) => l.get(i).cloned().unwrap_or_default(),
        Coord::Numbers(n) => n.get(i).map(|v| v.to_string()).unwrap_or_default(),
        Coord::Pairs(p) => p
            .get(i)
            .map(|p| format!("{}–{}", p[0], p[1]))
            .unwrap_or_default(),
    }
}

fn coord_of<'a>(s: &'a Sidecar, dim: &str) -> Option<&'a Coord> {
    let i = s.dims.iter().position(|d| d == dim)?;
    s.coords.get(i)
}

fn labels_or(s: &Sidecar, dim: &str, default: &str) -> Vec<String> {
    match coord_of(s, dim) {
        None => vec![default.to_string()],
        Some(c) => (0..c.len()).map(|i| coord_label(c, i)).collect(),
    }
}

fn pairs_of(s: &Sidecar) -> Result<Vec<[String; 2]>, LayoutError> {
    match coord_of(s, "pair") {
        Some(Coord::Pairs(p)) => Ok(p.to_vec()),
        Some(_) => Err(LayoutError::PairLabels),
        None => Err(LayoutError::MissingAxis("pair".to_string())),
    }
}

fn grid_axis(s: &Sidecar, dim: &str) -> Result<GridAxis, LayoutError> {
    match coord_of(s, dim) {
        Some(Coord::Numbers(v)) => {
            let increasing = v.windows(2).all(|w| w[1] > w[0]);
            if !increasing || v.iter().any(|x| !x.is_finite()) {
                return Err(LayoutError::NotIncreasing(dim.to_string()));
            }
            if dim == "freq" && v.first().is_some_and(|f| *f <= 0.0) {
                return Err(LayoutError::NonPositiveFreq);
            }
            Ok(GridAxis::Numeric {
                centres: v.clone(),
                log: dim == "freq",
            })
        }
        Some(c) => Ok(GridAxis::Categories(
            (0..c.len()).map(|i| coord_label(c, i)).collect(),
        )),
        None => Err(LayoutError::MissingAxis(dim.to_string())),
    }
}

/// A named inclusive range (a band in Hz or a window in s).
#[derive(Clone, Debug, PartialEq, serde::Serialize)]
pub struct NamedRange {
    /// Name shown in titles.
    pub name: String,
    /// Lower end (inclusive).
    pub lo: f64,
    /// Upper end (inclusive).
    pub hi: f64,
}

// Cells without a value. The report follows the `aggregate` op's rule (stages/src/ops/
// aggregate.rs; DESIGN §4 says no more), so that a matrix or head the report averages from a
// time–frequency array shows what `op: aggregate` writes for the same bands and windows:
// - within one array (one subject, or an array read as it is), a mean over a band × window, or
//   over a band at one time, is NaN when any cell inside is NaN: a NaN there is a fault
//   upstream, not averaged away ([`range_mean`], [`band_course`]);
// - across subjects, a subject without a value drops out of that cell's mean, SEM and n
//   ([`across_subjects`], the op's own `mean_sem_n`).
// Captions say when a drawn cell had no value (see [`no_value_note`]).

/// Mean over the cells of `rows` × `cols` inside the band and window (inclusive, f64
/// accumulation in index order), for one condition, measure and pair: NaN when any cell inside
/// is NaN or no cell is inside (the rule above).
pub fn range_mean(
    cube: &Cube,
    c: usize,
    m: usize,
    p: usize,
    band: &NamedRange,
    win: &NamedRange,
) -> f64 {
    let (GridAxis::Numeric { centres: f, .. }, GridAxis::Numeric { centres: t, .. }) =
        (&cube.rows, &cube.cols)
    else {
        return f64::NAN;
    };
    let mut sum = 0.0;
    let mut n = 0usize;
    for (i, fv) in f.iter().enumerate() {
        if !range::contains([band.lo, band.hi], *fv) {
            continue;
        }
        for (j, tv) in t.iter().enumerate() {
            if range::contains([win.lo, win.hi], *tv) {
                sum += cube.values[[c, m, p, i, j]];
                n += 1;
            }
        }
    }
    if n == 0 {
        f64::NAN
    } else {
        sum / n as f64
    }
}

/// The mean over the frequencies inside `band` (inclusive) at each time column, for one
/// condition, measure and pair: NaN at a time where a cell inside is NaN (the rule above).
pub fn band_course(cube: &Cube, c: usize, m: usize, p: usize, band: &NamedRange) -> Vec<f64> {
    let GridAxis::Numeric { centres: f, .. } = &cube.rows else {
        return vec![f64::NAN; cube.cols.len()];
    };
    let inside: Vec<usize> = (0..f.len())
        .filter(|&i| range::contains([band.lo, band.hi], f[i]))
        .collect();
    (0..cube.cols.len())
        .map(|j| {
            if inside.is_empty() {
                return f64::NAN;
            }
            let sum: f64 = inside.iter().map(|&i| cube.values[[c, m, p, i, j]]).sum();
            sum / inside.len() as f64
        })
        .collect()
}

/// Mean, SEM (sd with ddof 1 over √n) and n of one cell across subjects, over the subjects with
/// a value (the rule above): the `aggregate` op's own function, so both agree to the bit.
pub fn across_subjects(values: impl Iterator<Item = f64>) -> [f64; 3] {
    phasewise_stages::ops::aggregate::mean_sem_n(values)
}

/// " 3 of 40 cells had no value (hatched): …" for a caption, or empty when every cell has one.
pub fn no_value_note(values: impl Iterator<Item = f64>, what: &str) -> String {
    let (mut total, mut missing) = (0usize, 0usize);
    for v in values {
        total += 1;
        if !v.is_finite() {
            missing += 1;
        }
    }
    if missing == 0 {
        return String::new();
    }
    format!(
        " {missing} of {total} {what} had no value (hatched or left out): a mean over a band × \
         window is empty when any cell inside is (as `op: aggregate` writes it), and a subject \
         without a value drops out of n."
    )
}

/// Smallest and largest finite value of an iterator, or None when there is none.
pub fn finite_range(values: impl Iterator<Item = f64>) -> Option<(f64, f64)> {
    values
        .filter(|v| v.is_finite())
        .fold(None, |acc, v| match acc {
            None => Some((v, v)),
            Some((lo, hi)) => Some((lo.min(v), hi.max(v))),
        })
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::Array5;

    /// One condition, measure and pair; freqs 4, 6, 10 Hz; times 0, 0.1, 0.2 s.
    fn cube(values: [[f64; 3]; 3]) -> Cube {
        Cube {
            conditions: vec!["a".into()],
            measures: vec!["plv".into()],
            pairs: vec![["C3".into(), "C4".into()]],
            rows: GridAxis::Numeric {
                centres: vec![4.0, 6.0, 10.0],
                log: true,
            },
            cols: GridAxis::Numeric {
                centres: vec![0.0, 0.1, 0.2],
                log: false,
            },
            values: Array5::from_shape_fn((1, 1, 1, 3, 3), |(_, _, _, r, c)| values[r][c]),
            plane: Plane::FreqTime,
            fixed: Vec::new(),
        }
    }

    fn range(lo: f64, hi: f64) -> NamedRange {
        NamedRange {
            name: "r".into(),
            lo,
            hi,
        }
    }

    // The rule is the aggregate op's: within one array a NaN inside a band × window makes the
    // mean NaN (np.mean propagates, as tests/reference/gen_norm.py computes the op's fixture);
    // a NaN outside it changes nothing.
    #[test]
    fn a_nan_inside_the_range_makes_the_mean_empty() {
        let c = cube([[1.0, 2.0, f64::NAN], [3.0, 4.0, 5.0], [9.0, 9.0, 9.0]]);
        // 4–8 Hz × 0–0.1 s: cells 1, 2, 3, 4 → 2.5 (the NaN at 0.2 s lies outside).
        assert_eq!(
            range_mean(&c, 0, 0, 0, &range(4.0, 8.0), &range(0.0, 0.1)),
            2.5
        );
        assert!(range_mean(&c, 0, 0, 0, &range(4.0, 8.0), &range(0.0, 0.2)).is_nan());
        // No cell inside: NaN too.
        assert!(range_mean(&c, 0, 0, 0, &range(12.0, 20.0), &range(0.0, 0.2)).is_nan());
        // By time: NaN only where the band holds the NaN.
        let course = band_course(&c, 0, 0, 0, &range(4.0, 8.0));
        assert_eq!(&course[..2], &[2.0, 3.0]);
        assert!(course[2].is_nan());
    }

    // Across subjects a subject without a value drops out of n: mean of 1 and 3 is 2, SEM
    // sd(ddof 1) / √n = √2 / √2 = 1 (the textbook standard error of the mean).
    #[test]
    fn across_subjects_leaves_out_the_missing() {
        let [m, s, n] = across_subjects([1.0, f64::NAN, 3.0].into_iter());
        assert_eq!((m, n), (2.0, 2.0));
        assert!((s - 1.0).abs() < 1e-15);
        assert!(no_value_note([1.0, 2.0].into_iter(), "cells").is_empty());
        let note = no_value_note([1.0, f64::NAN, 2.0].into_iter(), "cells");
        assert!(note.contains("1 of 3 cells had no value"), "{note}");
    }
}
