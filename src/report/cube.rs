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

/// Builds the cube, or says why this array cannot be drawn.
pub fn build(sidecar: &Sidecar, values: &ArrayD<f32>, plane: Plane) -> Result<Cube, String> {
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
        let coord = sidecar
            .coords
            .get(i)
            .ok_or("sidecar has fewer coordinates than axes")?;
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
                .ok_or(format!("no `{o}` axis"))
        })
        .collect::<Result<_, _>>()?;
    let five = view
        .permuted_axes(perm)
        .into_dimensionality::<Ix5>()
        .map_err(|e| format!("unexpected axes ({e})"))?;
    Ok(Cube {
        conditions: labels_or(sidecar, "condition", "all")?,
        measures: labels_or(sidecar, "measure", "value")?,
        pairs: pairs_of(sidecar)?,
        rows: grid_axis(sidecar, rname)?,
        cols: grid_axis(sidecar, cname)?,
        values: five.mapv(f64::from),
        plane,
        fixed,
    })
}

/// The entry to draw of an axis that is not part of the figure.
fn pick_entry(dim: &str, coord: &Coord) -> Result<(usize, String), String> {
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
    Err(format!(
        "its `{dim}` axis has {} entries and none of them is the one summary figures show \
         (`mean` of `statistic`, `group` of `subject`), so there is no single slice to draw",
        coord.len()
    ))
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

fn labels_or(s: &Sidecar, dim: &str, default: &str) -> Result<Vec<String>, String> {
    match coord_of(s, dim) {
        None => Ok(vec![default.to_string()]),
        Some(c) => Ok((0..c.len()).map(|i| coord_label(c, i)).collect()),
    }
}

fn pairs_of(s: &Sidecar) -> Result<Vec<[String; 2]>, String> {
    match coord_of(s, "pair") {
        Some(Coord::Pairs(p)) => Ok(p.to_vec()),
        Some(_) => Err("its `pair` axis holds labels, not channel pairs".to_string()),
        None => Err("it has no `pair` axis".to_string()),
    }
}

fn grid_axis(s: &Sidecar, dim: &str) -> Result<GridAxis, String> {
    match coord_of(s, dim) {
        Some(Coord::Numbers(v)) => {
            let increasing = v.windows(2).all(|w| w[1] > w[0]);
            if !increasing || v.iter().any(|x| !x.is_finite()) {
                return Err(format!(
                    "its `{dim}` coordinates are not increasing finite numbers"
                ));
            }
            if dim == "freq" && v.first().is_some_and(|f| *f <= 0.0) {
                return Err("its frequencies must be positive for a log-frequency axis".to_string());
            }
            Ok(GridAxis::Numeric {
                centres: v.clone(),
                log: dim == "freq",
            })
        }
        Some(c) => Ok(GridAxis::Categories(
            (0..c.len()).map(|i| coord_label(c, i)).collect(),
        )),
        None => Err(format!("it has no `{dim}` axis")),
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

/// Mean over the cells of `rows` × `cols` inside the band and window (inclusive, NaN skipped,
/// f64 accumulation in index order), for one condition, measure and pair. NaN when no cell is in.
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
            let v = cube.values[[c, m, p, i, j]];
            if range::contains([win.lo, win.hi], *tv) && v.is_finite() {
                sum += v;
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

/// Smallest and largest finite value of an iterator, or None when there is none.
pub fn finite_range(values: impl Iterator<Item = f64>) -> Option<(f64, f64)> {
    values
        .filter(|v| v.is_finite())
        .fold(None, |acc, v| match acc {
            None => Some((v, v)),
            Some((lo, hi)) => Some((lo.min(v), hi.max(v))),
        })
}
