//! What the report is about: which condition difference it draws, in which direction, and which
//! channel pairs it shows — each choice with the reason that every caption repeats.
//!
//! The difference: the `report:` block's `contrast`, else the `compare` of a `contrast` stage,
//! else the first two conditions in the order the pipeline's epoch stage lists them.
//! The pairs: the block's `pairs`, else the pairs with significant clusters of a `contrast`
//! stage, else, per measure, the pairs with the largest group difference (in any band × window of
//! a group aggregate, else at the peak of the 3 × 3-cell mean of the freq × time difference map
//! of the subjects' mean).

use super::cube::{Cube, NamedRange, Plane};
use super::quantity::measure_title;
use super::tf::Loaded;
use super::tmap::StatArray;
use super::ReportOptions;

/// One chosen pair.
#[derive(Clone, Debug)]
pub(crate) struct Picked {
    /// The channels.
    pub pair: [String; 2],
    /// The measure it was chosen for; `None`: every measure.
    pub measure: Option<String>,
    /// Why, for captions.
    pub why: String,
    /// The number behind the choice, short, for the findings' list.
    pub short: String,
}

/// The report's choices.
#[derive(Clone, Debug, Default)]
pub(crate) struct Choice {
    /// The difference drawn, first − second.
    pub contrast: Option<[String; 2]>,
    /// Why that difference, for captions.
    pub contrast_why: String,
    /// The pairs drawn.
    pub pairs: Vec<Picked>,
    /// How the pairs were chosen, one sentence for the findings.
    pub pairs_how: String,
    /// The frequency and time range of the first pick's significant points, for matrices and
    /// heads of time–frequency arrays when no aggregate gives bands and windows.
    pub focus: Option<(NamedRange, NamedRange)>,
}

impl Choice {
    /// The picks that apply to `measure`.
    pub fn for_measure<'a>(&'a self, measure: &'a str) -> impl Iterator<Item = &'a Picked> + 'a {
        self.pairs
            .iter()
            .filter(move |p| p.measure.as_deref().is_none_or(|m| m == measure))
    }
}

/// Puts the conditions of a cube in the pipeline's order (names it does not list keep their
/// place after the listed ones).
pub(crate) fn order_conditions(cube: &mut Cube, order: &[String]) {
    if let Some(idx) = condition_order(&cube.conditions, order) {
        cube.values = cube.values.select(ndarray::Axis(0), &idx);
        cube.conditions = idx.iter().map(|&i| cube.conditions[i].clone()).collect();
    }
}

/// The indices that put `conditions` in the pipeline's `order`; `None` when they already are.
pub(crate) fn condition_order(conditions: &[String], order: &[String]) -> Option<Vec<usize>> {
    if order.is_empty() || conditions.len() < 2 {
        return None;
    }
    let rank = |c: &String| order.iter().position(|o| o == c).unwrap_or(usize::MAX);
    let mut idx: Vec<usize> = (0..conditions.len()).collect();
    idx.sort_by_key(|&i| (rank(&conditions[i]), i));
    if idx.iter().enumerate().all(|(k, &i)| k == i) {
        return None;
    }
    Some(idx)
}

/// Decides the difference and the pairs.
pub(crate) fn choose(opts: &ReportOptions, loaded: &[Loaded], stats: &[StatArray]) -> Choice {
    let mut choice = Choice::default();
    let first_conds: Vec<String> = loaded
        .iter()
        .find(|l| l.cube.conditions.len() >= 2)
        .map(|l| l.cube.conditions.clone())
        .unwrap_or_default();
    if let Some(c) = &opts.contrast {
        choice.contrast = Some(c.clone());
        choice.contrast_why = "named in the pipeline's report block".to_string();
    } else if let Some((s, c)) = stats.iter().find_map(|s| s.compare.clone().map(|c| (s, c))) {
        choice.contrast_why = format!(
            "as the contrast stage {} compares them: compare: [{}, {}]",
            s.stage, c[0], c[1]
        );
        choice.contrast = Some(c);
    } else if first_conds.len() >= 2 {
        choice.contrast = Some([first_conds[0].clone(), first_conds[1].clone()]);
        choice.contrast_why = if opts.condition_order.is_empty() {
            "the first two conditions of the exported arrays".to_string()
        } else {
            "the first two conditions in the order the pipeline's epoch stage lists them"
                .to_string()
        };
    }
    if !opts.pairs.is_empty() {
        choice.pairs = opts
            .pairs
            .iter()
            .map(|p| Picked {
                pair: p.clone(),
                measure: None,
                why: "pair named in the pipeline's report block".to_string(),
                short: "named".to_string(),
            })
            .collect();
        choice.pairs_how = "Pairs named in the pipeline's report block.".to_string();
        return choice;
    }
    let significant = significant_pairs(stats);
    choice.focus = stats.iter().find_map(|s| {
        let first = significant.first()?;
        let m =
            s.t.measures
                .iter()
                .position(|x| Some(x) == first.measure.as_ref())?;
        let p = super::tmap::find_pair(&s.t.pairs, &first.pair)?;
        let (f0, f1, t0, t1) = s.extent(m, p)?;
        Some((
            NamedRange {
                name: "cluster band".to_string(),
                lo: f0,
                hi: f1,
            },
            NamedRange {
                name: "cluster window".to_string(),
                lo: t0,
                hi: t1,
            },
        ))
    });
    if !significant.is_empty() {
        choice.pairs_how = "Pairs with a significant cluster in the contrast stage.".to_string();
        choice.pairs = significant;
        return choice;
    }
    if let Some(c) = &choice.contrast {
        choice.pairs = largest_difference(loaded, c, opts.strongest);
        choice.pairs_how = format!(
            "No contrast stage found a significant cluster, so for each measure the {} with the \
             largest {} − {} difference of the group {} shown; a largest difference is not \
             evidence of an effect.",
            crate::words::count(opts.strongest, "pair", "pairs"),
            c[0],
            c[1],
            if opts.strongest == 1 { "is" } else { "are" }
        );
    }
    choice
}

/// (measure, pair) with a significant point, smallest p first, then largest |t|.
fn significant_pairs(stats: &[StatArray]) -> Vec<Picked> {
    let mut found: Vec<(f64, f64, Picked)> = Vec::new();
    for s in stats {
        for m in 0..s.t.measures.len() {
            for p in 0..s.t.pairs.len() {
                let Some((pmin, tmax)) = s.significance(m, p) else {
                    continue;
                };
                let pair = s.t.pairs[p].clone();
                let dir = s
                    .compare
                    .as_ref()
                    .map(|c| format!("{} − {}, ", c[0], c[1]))
                    .unwrap_or_default();
                found.push((
                    pmin,
                    -tmax,
                    Picked {
                        why: format!(
                            "significant cluster of {} in stage {} ({dir}{} p = {} ≤ α = {})",
                            measure_title(&s.t.measures[m]),
                            s.stage,
                            s.correction,
                            super::axes::fmt_num(pmin),
                            super::axes::fmt_num(s.alpha)
                        ),
                        short: format!("p = {}", super::axes::fmt_num(pmin)),
                        pair,
                        measure: Some(s.t.measures[m].clone()),
                    },
                ));
            }
        }
    }
    found.sort_by(|a, b| a.0.total_cmp(&b.0).then(a.1.total_cmp(&b.1)));
    found.into_iter().map(|f| f.2).collect()
}

/// Per measure, the `k` pairs with the largest |a − b| of the first group-level array.
fn largest_difference(loaded: &[Loaded], c: &[String; 2], k: usize) -> Vec<Picked> {
    let source = loaded
        .iter()
        .filter(|l| l.group_level())
        .find(|l| l.cube.plane == Plane::BandWindow)
        .or_else(|| loaded.iter().find(|l| l.group_level()))
        .or_else(|| loaded.first());
    let Some(l) = source else {
        return Vec::new();
    };
    let cube = &l.cube;
    let (Some(a), Some(b)) = (
        cube.conditions.iter().position(|x| *x == c[0]),
        cube.conditions.iter().position(|x| *x == c[1]),
    ) else {
        return Vec::new();
    };
    let mut out = Vec::new();
    for m in 0..cube.measures.len() {
        let mut scores: Vec<(usize, f64, String)> = (0..cube.pairs.len())
            .map(|p| {
                let (s, at) = peak_difference(cube, m, p, a, b);
                (p, s, at)
            })
            .filter(|x| x.1.is_finite())
            .collect();
        scores.sort_by(|x, y| y.1.total_cmp(&x.1).then(x.0.cmp(&y.0)));
        let n = cube.pairs.len();
        for (rank, (p, s, at)) in scores.into_iter().take(k).enumerate() {
            out.push(Picked {
                short: format!("|Δ| = {}{at}", super::axes::fmt_num(s)),
                pair: cube.pairs[p].clone(),
                measure: Some(cube.measures[m].clone()),
                why: format!(
                    "the {} largest {} − {} difference of {} among {n} pairs, {} (stage {}): \
                     |Δ| = {}{at}",
                    ordinal(rank + 1),
                    c[0],
                    c[1],
                    measure_title(&cube.measures[m]),
                    l.who(),
                    l.stage,
                    super::axes::fmt_num(s)
                ),
            });
        }
    }
    out
}

fn ordinal(k: usize) -> &'static str {
    match k {
        1 => "1st",
        2 => "2nd",
        3 => "3rd",
        _ => "next",
    }
}

/// The largest |a − b| of one measure and pair: over band × window cells, or over the 3 × 3-cell
/// means of a freq × time map (NaN cells left out); with where it is.
fn peak_difference(cube: &Cube, m: usize, p: usize, a: usize, b: usize) -> (f64, String) {
    let (nr, nc) = (cube.rows.len(), cube.cols.len());
    let d = |r: usize, col: usize| cube.values[[a, m, p, r, col]] - cube.values[[b, m, p, r, col]];
    let smooth = cube.plane == Plane::FreqTime;
    let mut best = (f64::NAN, 0usize, 0usize);
    for r in 0..nr {
        for col in 0..nc {
            let v = if smooth {
                let (mut s, mut n) = (0.0, 0usize);
                for rr in r.saturating_sub(1)..(r + 2).min(nr) {
                    for cc in col.saturating_sub(1)..(col + 2).min(nc) {
                        let x = d(rr, cc);
                        if x.is_finite() {
                            s += x;
                            n += 1;
                        }
                    }
                }
                if n == 0 {
                    f64::NAN
                } else {
                    (s / n as f64).abs()
                }
            } else {
                d(r, col).abs()
            };
            if v.is_finite() && (best.0.is_nan() || v > best.0) {
                best = (v, r, col);
            }
        }
    }
    let at = match (&cube.rows, &cube.cols) {
        (super::axes::GridAxis::Categories(rs), super::axes::GridAxis::Categories(cs))
            if best.0.is_finite() =>
        {
            format!(" in {} × {}", rs[best.1], cs[best.2])
        }
        (
            super::axes::GridAxis::Numeric { centres: f, .. },
            super::axes::GridAxis::Numeric { centres: t, .. },
        ) if best.0.is_finite() => format!(
            " near {} Hz, {} s",
            super::axes::fmt_num(f[best.1]),
            super::axes::fmt_num(t[best.2])
        ),
        _ => String::new(),
    };
    (best.0, at)
}
