//! The statistics of a `contrast` stage (DESIGN §4c): for each chosen pair and tested measure, the
//! mean difference across subjects and the paired t, with the significant points (corrected
//! p ≤ α) outlined in both panels.
//!
//! A contrast array has dims [statistic, measure, pair, freq, time] with statistic coords `t`,
//! `p`, `cluster`, `mean`, `sem`; each statistic is cut out into its own [`Cube`].

use ndarray::{ArrayD, Axis};
use phasewise_stages::array::Coord;
use serde_json::Value;

use super::axes::{self, GridAxis};
use super::colour::MapKind;
use super::cube::{self, Cube, LayoutError, Plane};
use super::input::{self, Exported, RunOutput, Sidecar};
use super::quantity::{measure_title, scale_for};
use super::scene::Scene;
use super::tf::{HeatFigure, PanelData};
use super::{units_text, Ctx, FigureKind, ReportError};

/// The exported result of a `contrast` stage.
pub(crate) struct StatArray {
    /// Stage name.
    pub stage: String,
    /// `group/contrast`.
    pub source: String,
    /// Point-wise t.
    pub t: Cube,
    /// Corrected p (NaN where not tested or outside any cluster).
    pub p: Cube,
    /// Mean difference over subjects.
    pub mean: Cube,
    /// Its SEM.
    pub sem: Option<Cube>,
    /// Unit of the mean difference.
    pub units: String,
    /// `[a, b]` of a paired difference a − b.
    pub compare: Option<[String; 2]>,
    /// `condition` tested against 0.
    pub condition: Option<String>,
    /// Significance level.
    pub alpha: f64,
    /// Correction name.
    pub correction: String,
    /// Number of subjects.
    pub subjects: Option<u64>,
    /// Sign-flip patterns used.
    pub patterns: Option<u64>,
}

impl StatArray {
    /// Smallest p and largest |t| among the significant points of (measure, pair), if any.
    pub fn significance(&self, m: usize, p: usize) -> Option<(f64, f64)> {
        let mut out: Option<(f64, f64)> = None;
        let (nr, nc) = (self.t.rows.len(), self.t.cols.len());
        for r in 0..nr {
            for c in 0..nc {
                if self.significant(m, p, r, c) {
                    let pv = self.p.values[[0, m, p, r, c]];
                    let tv = self.t.values[[0, m, p, r, c]].abs();
                    out = Some(match out {
                        None => (pv, tv),
                        Some((a, b)) => (a.min(pv), b.max(tv)),
                    });
                }
            }
        }
        out
    }

    /// Frequency and time extent (Hz, Hz, s, s) of the significant points of (measure, pair).
    pub fn extent(&self, m: usize, p: usize) -> Option<(f64, f64, f64, f64)> {
        let (GridAxis::Numeric { centres: f, .. }, GridAxis::Numeric { centres: t, .. }) =
            (&self.t.rows, &self.t.cols)
        else {
            return None;
        };
        let mut e: Option<(f64, f64, f64, f64)> = None;
        for (r, fv) in f.iter().enumerate() {
            for (c, tv) in t.iter().enumerate() {
                if self.significant(m, p, r, c) {
                    e = Some(match e {
                        None => (*fv, *fv, *tv, *tv),
                        Some((a, b, x, y)) => (a.min(*fv), b.max(*fv), x.min(*tv), y.max(*tv)),
                    });
                }
            }
        }
        e
    }

    /// True when the point is significant (corrected p ≤ α).
    pub fn significant(&self, m: usize, p: usize, r: usize, c: usize) -> bool {
        let v = self.p.values[[0, m, p, r, c]];
        v.is_finite() && v <= self.alpha
    }

    /// `left − right` or `left vs 0`.
    pub fn what(&self) -> String {
        match (&self.compare, &self.condition) {
            (Some(c), _) => format!("{} \u{2212} {}", c[0], c[1]),
            (None, Some(c)) => format!("{c} against 0"),
            _ => "the tested effect".to_string(),
        }
    }
}

/// True for an exported contrast result (a `statistic` axis with `t` and `p`).
pub(crate) fn is_stat(sidecar: &Sidecar) -> bool {
    let Some(i) = sidecar.dims.iter().position(|d| d == "statistic") else {
        return false;
    };
    sidecar
        .coords
        .get(i)
        .and_then(Coord::labels)
        .is_some_and(|l| l.iter().any(|s| s == "t") && l.iter().any(|s| s == "p"))
}

/// Reads every contrast result; records the ones that cannot be drawn.
pub(crate) fn load_stats(ctx: &mut Ctx<'_>, run: &RunOutput) -> Vec<StatArray> {
    let mut out = Vec::new();
    for a in run.arrays.iter().filter(|a| is_stat(&a.sidecar)) {
        if !ctx.opts.stages.is_empty() && !ctx.opts.stages.contains(&a.stage) {
            continue;
        }
        match load_stat(a) {
            Ok(s) => out.push(s),
            Err(why) => ctx.not_drawn.push(why.to_string()),
        }
    }
    out
}

fn load_stat(a: &Exported) -> Result<StatArray, input::LoadError> {
    let values = input::read_values(a)?;
    let cut = |name: &str| {
        cut_statistic(&a.sidecar, &values, name, Plane::FreqTime).map_err(|e| a.layout_error(e))
    };
    let needed = |name: &str| {
        cut(name)?
            .ok_or_else(|| a.layout_error(LayoutError::MissingAxis(format!("statistic = {name}"))))
    };
    let t = needed("t")?;
    let p = needed("p")?;
    let mean = cut("mean")?.unwrap_or_else(|| t.clone());
    let sem = cut("sem")?;
    let extra = a.sidecar.meta.get("extra").cloned().unwrap_or(Value::Null);
    let compare = extra.get("compare").and_then(|c| {
        let l = c.as_array()?;
        Some([
            l.first()?.as_str()?.to_string(),
            l.get(1)?.as_str()?.to_string(),
        ])
    });
    Ok(StatArray {
        stage: a.stage.clone(),
        source: format!("{}/{}", a.owner, a.stage),
        t,
        p,
        mean,
        sem,
        units: a.sidecar.units.clone(),
        compare,
        condition: extra
            .get("condition")
            .and_then(Value::as_str)
            .map(str::to_string),
        alpha: extra.get("alpha").and_then(Value::as_f64).unwrap_or(0.05),
        correction: extra
            .get("correction")
            .and_then(Value::as_str)
            .unwrap_or("corrected")
            .to_string(),
        subjects: extra.get("subjects").and_then(Value::as_u64),
        patterns: extra.get("patterns").and_then(Value::as_u64),
    })
}

/// The cube of one entry (`t`, `sem`, `n`, …) of the `statistic` axis; `None` when the array
/// has no such entry.
pub(crate) fn cut_statistic(
    sidecar: &Sidecar,
    values: &ArrayD<f32>,
    name: &str,
    plane: Plane,
) -> Result<Option<Cube>, LayoutError> {
    let si = sidecar
        .dims
        .iter()
        .position(|d| d == "statistic")
        .ok_or(LayoutError::NoStatistic)?;
    let labels = sidecar
        .coords
        .get(si)
        .and_then(|c| c.labels())
        .ok_or(LayoutError::NoStatistic)?;
    let Some(k) = labels.iter().position(|l| l == name) else {
        return Ok(None);
    };
    let mut sc = sidecar.clone();
    sc.dims.remove(si);
    sc.coords.remove(si);
    let v: ArrayD<f32> = values.index_axis(Axis(si), k).to_owned();
    if Plane::of(&sc.dims) != Some(plane) {
        return Err(LayoutError::StatisticAxes);
    }
    cube::build(&sc, &v, plane).map(Some)
}

/// Draws the t-maps of the chosen pairs, for each measure the contrast tested.
pub(crate) fn tmap_figures(ctx: &mut Ctx<'_>, s: &StatArray) -> Result<(), ReportError> {
    for m in 0..s.t.measures.len() {
        let measure = s.t.measures[m].clone();
        let picks: Vec<_> = ctx.choice.for_measure(&measure).cloned().collect();
        // One scale for every map of this measure: the figure group.
        let idx: Vec<(usize, String)> = picks
            .iter()
            .filter_map(|pk| Some((find_pair(&s.t.pairs, &pk.pair)?, pk.why.clone())))
            .collect();
        let all = |c: &Cube| {
            cube::finite_range(
                idx.iter()
                    .flat_map(|(p, _)| c.values.slice(ndarray::s![0, m, *p, .., ..]).to_owned())
                    .collect::<Vec<_>>()
                    .into_iter(),
            )
        };
        let (mean_range, t_range) = (all(&s.mean), all(&s.t));
        for (p, why) in idx {
            let pair = &s.t.pairs[p];
            let what = format!("{}: t-map {} {}–{}", s.source, measure, pair[0], pair[1]);
            if !ctx.room_for(FigureKind::TMap, &what) {
                return Ok(());
            }
            let title = format!(
                "{}, {}–{}: {} across {}",
                measure_title(&measure),
                pair[0],
                pair[1],
                s.what(),
                s.subjects
                    .map(|n| format!("n = {n} subjects"))
                    .unwrap_or_else(|| "subjects".to_string())
            );
            let mut fig = HeatFigure::new(&title, &[], 2, 2);
            let mean_panel = PanelData {
                label: format!("mean difference ({})", s.what()),
                value: Box::new(|r, c| s.mean.values[[0, m, p, r, c]]),
            };
            let t_panel = PanelData {
                label: "paired t".to_string(),
                value: Box::new(|r, c| s.t.values[[0, m, p, r, c]]),
            };
            let mask = |r: usize, c: usize| s.significant(m, p, r, c);
            let unit = units_text(&s.units);
            fig.group(
                &s.mean,
                std::slice::from_ref(&mean_panel),
                MapKind::Diverging,
                &format!("{} ({unit})", s.what()),
                &s.units,
                Some(scale_for(MapKind::Diverging, mean_range)),
            );
            fig.group(
                &s.t,
                std::slice::from_ref(&t_panel),
                MapKind::Diverging,
                "t (no unit)",
                "1",
                Some(scale_for(MapKind::Diverging, t_range)),
            );
            for k in 0..fig.panels.len() {
                let rect = fig.panels[k].rect;
                outline(&mut fig.scene, rect, &s.t.cols, &s.t.rows, &mask);
            }
            let sig = s.significance(m, p);
            let sem_note = s
                .sem
                .as_ref()
                .map(|_| {
                    " The SEM of the mean difference is in the exported array (statistic sem)."
                })
                .unwrap_or("");
            let caption = format!(
                "{} between {} and {}: left, the mean over subjects of the per-subject difference \
                 {}; right, the paired t of those differences. Outlined (black): points whose \
                 {}-corrected p ≤ {}{}{}. Pair shown because: {why}. Colour: {}, both scales \
                 shared by every {} t-map of this report.{sem_note}",
                measure_title(&measure),
                pair[0],
                pair[1],
                s.what(),
                s.correction,
                axes::fmt_num(s.alpha),
                s.patterns
                    .map(|n| format!(" ({n} sign-flip patterns)"))
                    .unwrap_or_default(),
                match sig {
                    Some((pv, tv)) => format!(
                        "; smallest p here {}, largest |t| {}",
                        axes::fmt_num(pv),
                        axes::fmt_num(tv)
                    ),
                    None => "; no point of this pair is significant".to_string(),
                },
                MapKind::Diverging.name(),
                measure_title(&measure)
            );
            let mut draft = fig.finish(
                FigureKind::TMap,
                &format!("tmap-{}-{measure}-{}-{}", s.stage, pair[0], pair[1]),
                s.source.clone(),
                caption,
            );
            draft.pair = Some(pair.clone());
            draft.measure = Some(measure.clone());
            draft.why = why.clone();
            draft.outlined = sig.is_some();
            ctx.emit(draft)?;
        }
    }
    Ok(())
}

/// Index of a pair in either order.
pub(crate) fn find_pair(pairs: &[[String; 2]], want: &[String; 2]) -> Option<usize> {
    pairs
        .iter()
        .position(|p| (p[0] == want[0] && p[1] == want[1]) || (p[0] == want[1] && p[1] == want[0]))
}

/// Outline colour of significant regions.
pub(crate) const OUTLINE: super::colour::Rgb = [0, 0, 0];

/// Draws the border of the cells where `mask` holds: every cell edge between a masked cell and an
/// unmasked (or outside) one.
pub(crate) fn outline(
    scene: &mut Scene,
    rect: [f64; 4],
    x: &GridAxis,
    y: &GridAxis,
    mask: &dyn Fn(usize, usize) -> bool,
) {
    let xe = x.edges();
    let ye = y.edges();
    let xm = axes::axis_map(&xe, rect[0], rect[2], x.is_log());
    // Numeric rows grow upwards, as draw_cells draws them.
    let ym = axes::axis_map(&ye, rect[3], rect[1], y.is_log());
    let xp: Vec<f64> = xe.iter().map(|&v| xm.to_px(v)).collect();
    let yp: Vec<f64> = ye.iter().map(|&v| ym.to_px(v)).collect();
    let (nr, nc) = (y.len(), x.len());
    let on = |r: isize, c: isize| {
        r >= 0 && c >= 0 && (r as usize) < nr && (c as usize) < nc && mask(r as usize, c as usize)
    };
    for r in 0..nr {
        for c in 0..nc {
            if !mask(r, c) {
                continue;
            }
            let (ri, ci) = (r as isize, c as isize);
            let (x0, x1, y0, y1) = (xp[c], xp[c + 1], yp[r], yp[r + 1]);
            if !on(ri - 1, ci) {
                scene.line((x0, y0), (x1, y0), OUTLINE, 1.6);
            }
            if !on(ri + 1, ci) {
                scene.line((x0, y1), (x1, y1), OUTLINE, 1.6);
            }
            if !on(ri, ci - 1) {
                scene.line((x0, y0), (x0, y1), OUTLINE, 1.6);
            }
            if !on(ri, ci + 1) {
                scene.line((x1, y0), (x1, y1), OUTLINE, 1.6);
            }
        }
    }
}
