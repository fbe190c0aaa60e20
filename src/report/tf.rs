//! Time–frequency maps: for each exported connectivity array with `freq` and `time` axes, one
//! figure per measure and chosen pair, with a panel per condition (sharing one colour bar) and a
//! panel for the condition difference (its own bar, diverging around zero).
//!
//! Also loads the drawable arrays once for this module and [`super::matrix`], deciding for each
//! whether its values are signed (baseline-normalised or both signs present), which selects the
//! diverging colour map centred on zero.

use super::axes::{self, GridAxis, PixelMap, Scale};
use super::colour::MapKind;
use super::cube::{self, Cube, NamedRange, Plane};
use super::input::{self, Exported, Manifest, RunOutput};
use super::quantity::{self, measure_title, Baseline};
use super::scene::{HAlign, Scene, VAlign};
use super::{
    units_text, AxisInfo, ColourBarInfo, CourseInfo, Ctx, Draft, FigureKind, PanelInfo, ReportError,
};

/// A drawable array: where it came from, its cube, and how to colour it.
pub(crate) struct Loaded {
    /// Subject id, `group`, or [`MEAN_OWNER`].
    pub owner: String,
    pub stage: String,
    pub units: String,
    pub cube: Cube,
    /// The baseline correction upstream, if any (its values are changes: diverging map).
    pub baseline: Option<Baseline>,
    /// The subjects averaged, for a mean over subjects made by the report.
    pub averaged: Vec<String>,
    /// SEM and n across subjects, cell by cell, for group-level arrays: the report's subject
    /// means, or the `sem` and `n` statistics of a group aggregate.
    pub spread: Option<Spread>,
}

/// The spread across subjects of a group-level array, in the cube's drawing order.
#[derive(Clone, Debug)]
pub(crate) struct Spread {
    /// Standard error of the mean (NaN where fewer than two subjects have a value).
    pub sem: ndarray::Array5<f64>,
    /// Number of subjects with a value.
    pub n: ndarray::Array5<f64>,
}

/// Owner name of the subject means the report computes.
pub(crate) const MEAN_OWNER: &str = "subject-mean";

impl Loaded {
    /// The colour map of measure `m` (see [`quantity`]).
    pub fn map(&self, m: usize) -> MapKind {
        let range = cube::finite_range(
            self.cube
                .values
                .slice(ndarray::s![.., m, .., .., ..])
                .iter()
                .copied(),
        );
        quantity::map_for(&self.cube.measures[m], self.baseline.is_some(), range)
    }

    /// `sub-01/norm`: the array's place in the output folder.
    pub fn source(&self) -> String {
        format!("{}/{}", self.owner, self.stage)
    }

    /// How titles name the array's owner.
    pub fn who(&self) -> String {
        match self.owner.as_str() {
            "group" => "group".to_string(),
            MEAN_OWNER => format!(
                "mean of {}",
                crate::words::count(self.averaged.len(), "subject", "subjects")
            ),
            s => format!("subject {s}"),
        }
    }

    /// Group-level arrays (aggregates, subject means) are drawn before per-subject ones.
    pub fn group_level(&self) -> bool {
        self.owner == "group" || self.owner == MEAN_OWNER
    }

    /// Puts the conditions (of the values and of the spread) in the pipeline's order.
    pub fn order_conditions(&mut self, order: &[String]) {
        let Some(idx) = super::story::condition_order(&self.cube.conditions, order) else {
            return;
        };
        super::story::order_conditions(&mut self.cube, order);
        if let Some(s) = &mut self.spread {
            s.sem = s.sem.select(ndarray::Axis(0), &idx);
            s.n = s.n.select(ndarray::Axis(0), &idx);
        }
    }

    /// The per-subject arrays a subject mean was made from, in folder order (empty for other
    /// arrays).
    pub fn members<'a>(&self, all: &'a [Loaded]) -> Vec<&'a Loaded> {
        all.iter()
            .filter(|x| {
                !x.group_level() && x.stage == self.stage && self.averaged.contains(&x.owner)
            })
            .collect()
    }
}

/// Reads every exported array that has a pair axis and a plane to draw on, and adds, for each
/// per-subject stage exported for several subjects with equal axes, their mean; records the rest.
pub(crate) fn load_cubes(ctx: &mut Ctx<'_>, run: &RunOutput) -> Vec<Loaded> {
    let mut out = Vec::new();
    for a in &run.arrays {
        if super::tmap::is_stat(&a.sidecar) {
            continue;
        }
        if !ctx.opts.stages.is_empty() && !ctx.opts.stages.contains(&a.stage) {
            ctx.not_drawn.push(format!(
                "{}/{}: not among the report block's stages",
                a.owner, a.stage
            ));
            continue;
        }
        let Some(plane) = Plane::of(&a.sidecar.dims) else {
            ctx.not_drawn.push(format!(
                "{}/{} (axes [{}]): not a connectivity array with pair and freq × time or band × window axes",
                a.owner,
                a.stage,
                a.sidecar.dims.join(", ")
            ));
            continue;
        };
        match load_one(a, plane, run) {
            Ok(mut l) => {
                l.order_conditions(&ctx.opts.condition_order);
                out.push(l)
            }
            Err(why) => ctx.not_drawn.push(why.to_string()),
        }
    }
    let means = subject_means(ctx, &out);
    means.into_iter().chain(out).collect()
}

/// Same axes (names, coordinates, fixed slices): arrays that can be averaged cell by cell.
fn same_axes(a: &Cube, b: &Cube) -> bool {
    a.plane == b.plane
        && a.conditions == b.conditions
        && a.measures == b.measures
        && a.pairs == b.pairs
        && a.rows == b.rows
        && a.cols == b.cols
        && a.fixed == b.fixed
}

/// The mean over subjects of each per-subject stage with two or more subjects, cell by cell,
/// with its SEM and n (subjects in folder order, f64; a subject without a value drops out of
/// that cell, the rule of [`cube`]).
fn subject_means(ctx: &mut Ctx<'_>, loaded: &[Loaded]) -> Vec<Loaded> {
    let mut stages: Vec<&str> = Vec::new();
    for l in loaded.iter().filter(|l| !l.group_level()) {
        if !stages.contains(&l.stage.as_str()) {
            stages.push(&l.stage);
        }
    }
    let mut out = Vec::new();
    for stage in stages {
        let members: Vec<&Loaded> = loaded
            .iter()
            .filter(|l| !l.group_level() && l.stage == stage)
            .collect();
        let Some(first) = members.first() else {
            continue;
        };
        if members.len() < 2 {
            continue;
        }
        if members.iter().any(|m| !same_axes(&m.cube, &first.cube)) {
            ctx.not_drawn.push(format!(
                "mean over subjects of stage {stage}: not computed, the subjects' arrays have different axes"
            ));
            continue;
        }
        out.push(mean_of(&members));
    }
    out
}

/// Mean, SEM and n over `members` of every cell of a 5-axis array, each cell by
/// [`cube::across_subjects`].
pub(crate) fn across<'a>(
    dim: ndarray::Ix5,
    value: impl Fn(usize, (usize, usize, usize, usize, usize)) -> f64 + 'a,
    n_members: usize,
) -> (ndarray::Array5<f64>, Spread) {
    let stats = ndarray::Array5::from_shape_fn(dim, |i| {
        cube::across_subjects((0..n_members).map(|k| value(k, i)))
    });
    (
        stats.mapv(|s| s[0]),
        Spread {
            sem: stats.mapv(|s| s[1]),
            n: stats.mapv(|s| s[2]),
        },
    )
}

fn mean_of(members: &[&Loaded]) -> Loaded {
    let first = members[0];
    let (mean, spread) = across(
        first.cube.values.raw_dim(),
        |k, (c, m, p, r, t)| members[k].cube.values[[c, m, p, r, t]],
        members.len(),
    );
    let mut cube = first.cube.clone();
    cube.values = mean;
    Loaded {
        owner: MEAN_OWNER.to_string(),
        stage: first.stage.clone(),
        units: first.units.clone(),
        cube,
        baseline: first.baseline.clone(),
        averaged: members.iter().map(|m| m.owner.clone()).collect(),
        spread: Some(spread),
    }
}

fn load_one(a: &Exported, plane: Plane, run: &RunOutput) -> Result<Loaded, input::LoadError> {
    let values = input::read_values(a)?;
    let cube = cube::build(&a.sidecar, &values, plane).map_err(|e| a.layout_error(e))?;
    let units = a.sidecar.units.clone();
    let mut baseline = quantity::baseline_of(&run.manifest, &a.stage);
    if baseline.is_none() && matches!(units.as_str(), "%" | "dB" | "z") {
        // Normalised units without a recorded baseline stage: still changes, still signed.
        baseline = Some(Baseline {
            mode: units.clone(),
            window: None,
        });
    }
    // A group aggregate carries its own SEM and n beside the mean.
    let spread = if a.sidecar.dims.iter().any(|d| d == "statistic") {
        let cut = |name: &str| {
            super::tmap::cut_statistic(&a.sidecar, &values, name, plane)
                .ok()
                .flatten()
                .map(|c| c.values)
        };
        cut("sem")
            .zip(cut("n"))
            .filter(|(s, _)| s.raw_dim() == cube.values.raw_dim())
            .map(|(sem, n)| Spread { sem, n })
    } else {
        None
    };
    Ok(Loaded {
        owner: a.owner.clone(),
        stage: a.stage.clone(),
        units,
        cube,
        baseline,
        averaged: Vec::new(),
        spread,
    })
}

/// The (a, b) condition indices of the report's difference, if this array has both.
pub(crate) fn contrast(
    ctx: &mut Ctx<'_>,
    conditions: &[String],
    source: &str,
) -> Option<(usize, usize)> {
    let [a, b] = ctx.choice.contrast.clone()?;
    let ia = conditions.iter().position(|c| *c == a);
    let ib = conditions.iter().position(|c| *c == b);
    match (ia, ib) {
        (Some(ia), Some(ib)) => Some((ia, ib)),
        _ => {
            ctx.not_drawn.push(format!(
                "{source}: the difference {a} − {b} is not drawn, its conditions are [{}]",
                conditions.join(", ")
            ));
            None
        }
    }
}

/// The chosen pairs present in this array for measure `m`, with why each was chosen.
pub(crate) fn picked_pairs(ctx: &mut Ctx<'_>, l: &Loaded, m: usize) -> Vec<(usize, String)> {
    let mut out: Vec<(usize, String)> = Vec::new();
    let picks: Vec<_> = ctx
        .choice
        .for_measure(&l.cube.measures[m])
        .cloned()
        .collect();
    for pk in picks {
        match super::tmap::find_pair(&l.cube.pairs, &pk.pair) {
            Some(i) if !out.iter().any(|o| o.0 == i) => out.push((i, pk.why)),
            Some(_) => {}
            None => ctx.not_drawn.push(format!(
                "{}: pair {}–{} is not in this array",
                l.source(),
                pk.pair[0],
                pk.pair[1]
            )),
        }
    }
    out
}

/// The value ranges that a figure group's condition panels and difference panels share.
pub(crate) type SharedRanges = (Option<(f64, f64)>, Option<(f64, f64)>);

/// Range over the chosen pairs' condition panels and difference panels of one measure: the
/// scales that the figures of this measure share.
fn shared_ranges(
    l: &Loaded,
    m: usize,
    pairs: &[(usize, String)],
    diff: Option<(usize, usize)>,
) -> SharedRanges {
    let v = &l.cube.values;
    let conds = cube::finite_range(
        pairs
            .iter()
            .flat_map(|(p, _)| v.slice(ndarray::s![.., m, *p, .., ..]).to_owned())
            .collect::<Vec<_>>()
            .into_iter(),
    );
    let diffs = diff.and_then(|(a, b)| {
        cube::finite_range(
            pairs
                .iter()
                .flat_map(|(p, _)| {
                    let d = &v.slice(ndarray::s![a, m, *p, .., ..])
                        - &v.slice(ndarray::s![b, m, *p, .., ..]);
                    d.into_iter()
                })
                .collect::<Vec<_>>()
                .into_iter(),
        )
    });
    (conds, diffs)
}

/// Draws the time–frequency figures of one group-level array: the chosen pairs, per measure,
/// each map with its band's time course and SEM under it when the subjects' arrays are at hand.
pub(crate) fn tf_figures(
    ctx: &mut Ctx<'_>,
    l: &Loaded,
    manifest: &Manifest,
    all: &[Loaded],
) -> Result<(), ReportError> {
    if l.cube.plane != Plane::FreqTime {
        return Ok(());
    }
    let diff = contrast(ctx, &l.cube.conditions, &l.source());
    let members = l.members(all);
    for m in 0..l.cube.measures.len() {
        let pairs = picked_pairs(ctx, l, m);
        let shared = shared_ranges(l, m, &pairs, diff);
        let courses: Vec<Vec<Course>> = pairs
            .iter()
            .map(|(p, _)| courses_for(ctx, l, manifest, &members, m, *p, diff))
            .collect();
        let course_ranges = course_ranges(&courses, l.cube.conditions.len());
        for ((p, why), courses) in pairs.into_iter().zip(courses) {
            let what = format!(
                "{}: time–frequency maps, {} {}–{}",
                l.source(),
                l.cube.measures[m],
                l.cube.pairs[p][0],
                l.cube.pairs[p][1]
            );
            if !ctx.room_for(FigureKind::TimeFrequency, &what) {
                return Ok(());
            }
            let mut draft = tf_figure(l, m, p, diff, shared, &why);
            if !courses.is_empty() {
                add_courses(&mut draft, l, m, &courses, course_ranges);
            }
            ctx.emit(draft)?;
        }
    }
    Ok(())
}

/// Draws one subject's maps of one chosen pair: in the pick's measure, or the array's first
/// measure for a pair named for every measure.
pub(crate) fn subject_figures(
    ctx: &mut Ctx<'_>,
    l: &Loaded,
    pick: &super::story::Picked,
) -> Result<(), ReportError> {
    if l.cube.plane != Plane::FreqTime {
        return Ok(());
    }
    let m = match &pick.measure {
        Some(name) => match l.cube.measures.iter().position(|x| x == name) {
            Some(m) => m,
            None => return Ok(()),
        },
        None => 0,
    };
    let Some(p) = super::tmap::find_pair(&l.cube.pairs, &pick.pair) else {
        ctx.not_drawn.push(format!(
            "{}: pair {}–{} is not in this array",
            l.source(),
            pick.pair[0],
            pick.pair[1]
        ));
        return Ok(());
    };
    let what = format!(
        "{}: time–frequency maps, {} {}–{}",
        l.source(),
        l.cube.measures[m],
        pick.pair[0],
        pick.pair[1]
    );
    if !ctx.room_for(FigureKind::SubjectMap, &what) {
        return Ok(());
    }
    let diff = contrast(ctx, &l.cube.conditions, &l.source());
    let pairs = [(p, pick.why.clone())];
    let shared = shared_ranges(l, m, &pairs, diff);
    let mut draft = tf_figure(l, m, p, diff, shared, &pick.why);
    draft.kind = FigureKind::SubjectMap;
    ctx.emit(draft)
}

/// One time course: a label, the band, and mean, SEM and n per time column.
pub(crate) struct Course {
    label: String,
    band: NamedRange,
    why_band: String,
    stats: Vec<[f64; 3]>,
}

/// The band of the time courses of pair `p`: of the bands matrices use (an aggregate's, the
/// significant clusters' range, or all frequencies), the one holding the largest |value| of the
/// difference map (of the first condition without a difference), with why.
fn course_band(
    ctx: &Ctx<'_>,
    l: &Loaded,
    manifest: &Manifest,
    m: usize,
    p: usize,
    diff: Option<(usize, usize)>,
) -> Option<(NamedRange, String)> {
    let GridAxis::Numeric { centres: f, .. } = &l.cube.rows else {
        return None;
    };
    let GridAxis::Numeric { centres: t, .. } = &l.cube.cols else {
        return None;
    };
    let (bands, _) = super::matrix::ranges(ctx, manifest, f, t);
    if bands.len() == 1 {
        return Some((
            bands[0].clone(),
            "the one band this report uses".to_string(),
        ));
    }
    let v = &l.cube.values;
    let value = |r: usize, c: usize| match diff {
        Some((a, b)) => v[[a, m, p, r, c]] - v[[b, m, p, r, c]],
        None => v[[0, m, p, r, c]],
    };
    let mut best: Option<(f64, usize)> = None;
    for r in 0..f.len() {
        for c in 0..t.len() {
            let x = value(r, c).abs();
            if x.is_finite() && best.is_none_or(|b| x > b.0) {
                best = Some((x, r));
            }
        }
    }
    let (_, r) = best?;
    let band = bands
        .iter()
        .find(|b| phasewise_stages::range::contains([b.lo, b.hi], f[r]))?;
    Some((
        band.clone(),
        format!(
            "the band holding the largest |{}| of this map ({} Hz)",
            if diff.is_some() {
                "difference"
            } else {
                "value"
            },
            axes::fmt_num(f[r])
        ),
    ))
}

/// The time courses of pair `p` under a group map: each condition's and the difference's, from
/// the subjects' own band means (the rule of [`cube`]), mean ± SEM across subjects. Empty when
/// the subjects' arrays are not at hand (a group aggregate read as it is).
fn courses_for(
    ctx: &Ctx<'_>,
    l: &Loaded,
    manifest: &Manifest,
    members: &[&Loaded],
    m: usize,
    p: usize,
    diff: Option<(usize, usize)>,
) -> Vec<Course> {
    if members.len() < 2 || members.len() != l.averaged.len() {
        return Vec::new();
    }
    let Some((band, why_band)) = course_band(ctx, l, manifest, m, p, diff) else {
        return Vec::new();
    };
    let per_subject: Vec<Vec<Vec<f64>>> = members
        .iter()
        .map(|s| {
            (0..s.cube.conditions.len())
                .map(|c| cube::band_course(&s.cube, c, m, p, &band))
                .collect()
        })
        .collect();
    let nt = l.cube.cols.len();
    let stats = |value: &dyn Fn(&Vec<Vec<f64>>, usize) -> f64| -> Vec<[f64; 3]> {
        (0..nt)
            .map(|j| cube::across_subjects(per_subject.iter().map(|s| value(s, j))))
            .collect()
    };
    let mut out: Vec<Course> = (0..l.cube.conditions.len())
        .map(|c| Course {
            label: l.cube.conditions[c].clone(),
            band: band.clone(),
            why_band: why_band.clone(),
            stats: stats(&|s, j| s[c][j]),
        })
        .collect();
    if let Some((a, b)) = diff {
        // Paired: the SEM of the subjects' own differences.
        out.push(Course {
            label: format!("{} \u{2212} {}", l.cube.conditions[a], l.cube.conditions[b]),
            band: band.clone(),
            why_band,
            stats: stats(&|s, j| s[a][j] - s[b][j]),
        });
    }
    out
}

/// The vertical ranges (mean ± SEM) that the condition courses share, and the difference's.
fn course_ranges(courses: &[Vec<Course>], n_cond: usize) -> SharedRanges {
    let span = |cs: &mut dyn Iterator<Item = &Course>| {
        cube::finite_range(cs.flat_map(|c| {
            c.stats.iter().flat_map(|[mu, se, _]| {
                let se = if se.is_finite() { *se } else { 0.0 };
                [mu - se, mu + se]
            })
        }))
    };
    (
        span(&mut courses.iter().flat_map(|cs| cs.iter().take(n_cond))),
        span(&mut courses.iter().flat_map(|cs| cs.iter().skip(n_cond))),
    )
}

/// Height of a time-course panel and the room above it (for the map's time axis).
const COURSE_H: f64 = 110.0;
const COURSE_GAP: f64 = 56.0;
/// Shading of ± 1 SEM: a light blue-grey that none of the lines or texts use.
pub(crate) const SEM_SHADE: [u8; 3] = [188, 208, 232];

/// Adds, under each heat panel of a group map, its time course with a shaded band of ± 1 SEM.
fn add_courses(
    d: &mut Draft,
    l: &Loaded,
    m: usize,
    courses: &[Course],
    (cond_range, diff_range): SharedRanges,
) {
    let n_cond = l.cube.conditions.len();
    let unit = units_text(&l.units);
    let name = measure_title(&l.cube.measures[m]);
    d.scene.height += COURSE_GAP + COURSE_H;
    let edges = l.cube.cols.edges();
    for (i, (course, panel)) in courses.iter().zip(d.panels.clone()).enumerate() {
        let rect = [
            panel.rect[0],
            panel.rect[3] + COURSE_GAP,
            panel.rect[2],
            panel.rect[3] + COURSE_GAP + COURSE_H,
        ];
        let range = if i < n_cond { cond_range } else { diff_range };
        let (lo, hi) = padded(range);
        let xm = axes::axis_map(&edges, rect[0], rect[2], false);
        let ym = PixelMap {
            lo,
            hi,
            p0: rect[3],
            p1: rect[1],
            log: false,
        };
        draw_course(&mut d.scene, rect, (&xm, &ym), &edges, course);
        axes::x_numeric_axis(&mut d.scene, rect, &xm, "time (s)");
        axes::y_numeric_axis(
            &mut d.scene,
            rect,
            &ym,
            (i == 0).then_some(format!("{name} ({unit})").as_str()),
        );
        let ns: Vec<f64> = course.stats.iter().map(|s| s[2]).collect();
        let (nlo, nhi) = cube::finite_range(ns.iter().copied()).unwrap_or((0.0, 0.0));
        let n_text = if nlo == nhi {
            format!("n = {}", axes::fmt_num(nhi))
        } else {
            format!("n = {}–{}", axes::fmt_num(nlo), axes::fmt_num(nhi))
        };
        d.scene.text(
            (rect[0], rect[1] - 3.0),
            format!(
                "{}: {}–{} Hz, mean ± SEM, {n_text}",
                course.label,
                axes::fmt_num(course.band.lo),
                axes::fmt_num(course.band.hi)
            ),
            axes::TICK_PX,
            (HAlign::Left, VAlign::Bottom),
        );
        d.courses.push(CourseInfo {
            label: course.label.clone(),
            band: course.band.clone(),
            rect,
            x: AxisInfo {
                name: "time".to_string(),
                lo: xm.lo,
                hi: xm.hi,
                log: false,
            },
            y: AxisInfo {
                name: l.cube.measures[m].clone(),
                lo,
                hi,
                log: false,
            },
            times: match &l.cube.cols {
                GridAxis::Numeric { centres, .. } => centres.clone(),
                GridAxis::Categories(_) => Vec::new(),
            },
            mean: course.stats.iter().map(|s| s[0]).collect(),
            sem: course.stats.iter().map(|s| s[1]).collect(),
            n: ns,
        });
    }
    if let Some(c) = courses.first() {
        let ns: Vec<f64> = c.stats.iter().map(|s| s[2]).collect();
        let full = l.averaged.len() as f64;
        let fewer = ns.iter().filter(|&&n| n < full).count();
        let fewer = if fewer > 0 {
            format!(
                " At {fewer} of {} times fewer subjects had a value (a NaN inside the band drops \
                 that subject's time point, as in `op: aggregate`); n is printed in each panel.",
                ns.len()
            )
        } else {
            String::new()
        };
        d.caption.push_str(&format!(
            " Under each map: its mean over {} ({}–{} Hz; {}) by time, the line the mean of the \
             {} subjects' own band means and the shaded band ± 1 SEM across subjects (sd with \
             ddof 1 over √n; the difference's SEM is that of the subjects' own differences).{fewer}",
            c.band.name,
            axes::fmt_num(c.band.lo),
            axes::fmt_num(c.band.hi),
            c.why_band,
            l.averaged.len()
        ));
    }
}

/// A value range with 6 % room above and below (and a unit range around a single value).
fn padded(range: Option<(f64, f64)>) -> (f64, f64) {
    match range {
        Some((lo, hi)) if hi > lo => {
            let pad = 0.06 * (hi - lo);
            (lo - pad, hi + pad)
        }
        Some((v, _)) => (v - 1.0, v + 1.0),
        None => (0.0, 1.0),
    }
}

/// The shading (one rectangle per time cell, spanning the cell as the map above does), the
/// zero line, the onset line and the mean line of one course.
fn draw_course(
    scene: &mut Scene,
    rect: [f64; 4],
    (xm, ym): (&PixelMap, &PixelMap),
    edges: &[f64],
    course: &Course,
) {
    for (j, [mu, se, _]) in course.stats.iter().enumerate() {
        if mu.is_finite() && se.is_finite() {
            scene.fill(
                [
                    xm.to_px(edges[j]),
                    ym.to_px(mu + se),
                    xm.to_px(edges[j + 1]),
                    ym.to_px(mu - se),
                ],
                SEM_SHADE,
            );
        }
    }
    scene.frame(rect, super::scene::GREY);
    if ym.lo < 0.0 && ym.hi > 0.0 {
        let y0 = ym.to_px(0.0);
        scene.line((rect[0], y0), (rect[2], y0), super::scene::GREY, 0.8);
    }
    if xm.lo < 0.0 && xm.hi > 0.0 {
        let x0 = xm.to_px(0.0);
        scene.dashed((x0, rect[1]), (x0, rect[3]), [40, 40, 48], 4.0);
    }
    // The mean as a polyline through the cell centres, broken where there is no value.
    let centres: Vec<f64> = edges.windows(2).map(|e| (e[0] + e[1]) / 2.0).collect();
    let mut run: Vec<(f64, f64)> = Vec::new();
    for (j, [mu, _, _]) in course.stats.iter().enumerate() {
        if mu.is_finite() {
            run.push((xm.to_px(centres[j]), ym.to_px(*mu)));
        } else if !run.is_empty() {
            scene.polyline(std::mem::take(&mut run), super::scene::INK, 1.4);
        }
    }
    if !run.is_empty() {
        scene.polyline(run, super::scene::INK, 1.4);
    }
}

/// Layout constants of a time–frequency figure, in layout pixels.
const PLOT_W: f64 = 240.0;
const PLOT_H: f64 = 190.0;
const LEFT: f64 = 66.0;
const GAP: f64 = 48.0;
const TOP: f64 = 54.0;
const BAR_GAP: f64 = 12.0;
const BAR_W: f64 = 14.0;
const BAR_ROOM: f64 = 76.0;

/// One panel's data: a title and a value function over (row, column).
pub(crate) struct PanelData<'a> {
    pub label: String,
    pub value: Box<dyn Fn(usize, usize) -> f64 + 'a>,
}

fn tf_figure(
    l: &Loaded,
    m: usize,
    p: usize,
    diff: Option<(usize, usize)>,
    shared: SharedRanges,
    why: &str,
) -> Draft {
    let cube = &l.cube;
    let measure = &cube.measures[m];
    let name = measure_title(measure);
    let pair = &cube.pairs[p];
    let conds: Vec<PanelData<'_>> = (0..cube.conditions.len())
        .map(|c| PanelData {
            label: cube.conditions[c].clone(),
            value: Box::new(move |r, col| cube.values[[c, m, p, r, col]]),
        })
        .collect();
    let diff_panel = diff.map(|(a, b)| PanelData {
        label: format!("{} \u{2212} {}", cube.conditions[a], cube.conditions[b]),
        value: Box::new(move |r, col| {
            cube.values[[a, m, p, r, col]] - cube.values[[b, m, p, r, col]]
        }),
    });
    let unit = units_text(&l.units);
    let changed = l
        .baseline
        .as_ref()
        .map(|b| format!(", {}", b.adjective()))
        .unwrap_or_default();
    let title = format!("{name}, {}–{}: {}{changed}", pair[0], pair[1], l.who());
    let mut fig = HeatFigure::new(
        &title,
        &cube.fixed,
        conds.len() + usize::from(diff_panel.is_some()),
        2,
    );
    fig.baseline = l.baseline.as_ref().and_then(|b| b.window);
    let map = l.map(m);
    fig.group(
        cube,
        &conds,
        map,
        &format!("{name} ({unit})"),
        &l.units,
        Some(quantity::scale_for(map, shared.0)),
    );
    if let Some(d) = &diff_panel {
        let label = format!("{} ({unit})", d.label);
        fig.group(
            cube,
            std::slice::from_ref(d),
            MapKind::Diverging,
            &label,
            &l.units,
            Some(quantity::scale_for(MapKind::Diverging, shared.1)),
        );
    }
    let diff_note = if diff_panel.is_some() {
        " The difference panel has its own diverging scale."
    } else {
        ""
    };
    let caption =
        format!(
        "{name} between {} and {}, {}, by time (s, 0 = event onset, dashed) and frequency (Hz, \
         log scale). Pair shown because: {why}. Colour: {}; the scales are shared by every {name} \
         map of this array.{diff_note}{}{}",
        pair[0],
        pair[1],
        l.who(),
        map.name(),
        l.baseline.as_ref().map(|b| b.sentence()).unwrap_or_default(),
        mean_note(l)
    );
    let mut d = fig.finish(
        FigureKind::TimeFrequency,
        &format!(
            "tf-{}-{}-{measure}-{}-{}",
            l.owner, l.stage, pair[0], pair[1]
        ),
        l.source(),
        caption,
    );
    d.pair = Some(pair.clone());
    d.measure = Some(measure.clone());
    d.why = why.to_string();
    d
}

/// Says how a subject mean was made (empty for arrays read as they are).
pub(crate) fn mean_note(l: &Loaded) -> String {
    if l.averaged.is_empty() {
        return String::new();
    }
    let how = match l.cube.plane {
        Plane::FreqTime => "cell by cell (a subject without a value drops out of that cell)",
        Plane::BandWindow => {
            "from each subject's own band × window means (empty when a cell inside is), then \
             across the subjects with a value"
        }
    };
    format!(
        " Mean over the {} subjects {} (n = {}), computed by the report {how}, as `op: aggregate` \
         does.",
        l.averaged.len(),
        l.averaged.join(", "),
        l.averaged.len()
    )
}

/// A row of heat-map panels in groups, each group followed by its colour bar.
pub(crate) struct HeatFigure {
    pub scene: Scene,
    pub title: String,
    pub panels: Vec<PanelInfo>,
    pub bars: Vec<ColourBarInfo>,
    x: f64,
    /// Plot size of each panel (matrices set their own).
    pub plot: (f64, f64),
    /// A baseline window (s) to mark along the time axis of time–frequency panels.
    pub baseline: Option<(f64, f64)>,
}

impl HeatFigure {
    /// A figure for `n_panels` time–frequency panels in `n_groups` groups.
    pub fn new(title: &str, fixed: &[String], n_panels: usize, n_groups: usize) -> Self {
        let width = LEFT
            + n_panels as f64 * PLOT_W
            + (n_panels.saturating_sub(1)) as f64 * GAP
            + n_groups as f64 * (BAR_GAP + BAR_W + BAR_ROOM)
            + 10.0;
        Self::with_size(
            title,
            fixed,
            (width, TOP + PLOT_H + 50.0),
            (PLOT_W, PLOT_H),
            LEFT,
        )
    }

    /// A figure of a given size, panel plot size and left margin.
    pub fn with_size(
        title: &str,
        fixed: &[String],
        size: (f64, f64),
        plot: (f64, f64),
        left: f64,
    ) -> Self {
        let mut scene = Scene::new(size.0, size.1);
        scene.text((16.0, 10.0), title, 15.0, (HAlign::Left, VAlign::Top));
        if !fixed.is_empty() {
            let note = format!("({})", fixed.join(", "));
            scene.text_in(
                (size.0 - 10.0, 12.0),
                note,
                axes::TICK_PX,
                (HAlign::Right, VAlign::Top),
                super::scene::GREY,
            );
        }
        HeatFigure {
            scene,
            title: title.to_string(),
            panels: Vec::new(),
            bars: Vec::new(),
            x: left,
            plot,
            baseline: None,
        }
    }

    /// Draws a group of time–frequency panels sharing one colour bar.
    pub fn group(
        &mut self,
        cube: &Cube,
        panels: &[PanelData<'_>],
        map: MapKind,
        bar_label: &str,
        units: &str,
        shared: Option<Scale>,
    ) {
        let (nr, nc) = (cube.rows.len(), cube.cols.len());
        let range = cube::finite_range(
            panels
                .iter()
                .flat_map(|pd| (0..nr).flat_map(move |r| (0..nc).map(move |c| (pd.value)(r, c)))),
        );
        let scale = shared.unwrap_or_else(|| quantity::scale_for(map, range));
        let bar = self.bars.len();
        for pd in panels {
            let first = self.panels.is_empty();
            let rect = self.next_rect(GAP);
            let info = tf_panel(&mut self.scene, rect, cube, pd, &scale, bar, first);
            if let Some((b0, b1)) = self.baseline {
                mark_baseline(&mut self.scene, rect, cube, (b0, b1));
            }
            self.panels.push(info);
        }
        self.bar(scale, bar_label, units, range);
    }

    /// Draws the colour bar of the panels just drawn.
    pub fn bar(&mut self, scale: Scale, label: &str, units: &str, range: Option<(f64, f64)>) {
        let rect = [
            self.x + BAR_GAP,
            TOP,
            self.x + BAR_GAP + BAR_W,
            TOP + self.plot.1,
        ];
        axes::colour_bar(&mut self.scene, rect, &scale, label);
        self.bars.push(ColourBarInfo {
            label: label.to_string(),
            units: units.to_string(),
            map: scale.map,
            vmin: scale.vmin,
            vmax: scale.vmax,
            data_range: range,
        });
        self.x += BAR_GAP + BAR_W + BAR_ROOM;
    }

    /// The figure as a draft.
    pub fn finish(self, kind: FigureKind, id: &str, source: String, caption: String) -> Draft {
        Draft {
            kind,
            id: id.to_string(),
            title: self.title,
            source,
            caption,
            scene: self.scene,
            panels: self.panels,
            colour_bars: self.bars,
            pair: None,
            measure: None,
            why: String::new(),
            outlined: false,
            courses: Vec::new(),
        }
    }

    /// Reserves room for the next panel after a gap of `gap` and returns its plot rectangle.
    pub fn next_rect(&mut self, gap: f64) -> [f64; 4] {
        if !self.panels.is_empty() {
            self.x += gap;
        }
        let rect = [self.x, TOP, self.x + self.plot.0, TOP + self.plot.1];
        self.x += self.plot.0;
        rect
    }
}

/// A black bar along the bottom of a time–frequency panel over the baseline window.
fn mark_baseline(scene: &mut Scene, rect: [f64; 4], cube: &Cube, (b0, b1): (f64, f64)) {
    let GridAxis::Numeric { centres, .. } = &cube.cols else {
        return;
    };
    let edges = cube.cols.edges();
    let (lo, hi) = (edges[0], edges[edges.len() - 1]);
    if centres.is_empty() || hi <= lo {
        return;
    }
    let px = |t: f64| rect[0] + (t.clamp(lo, hi) - lo) / (hi - lo) * (rect[2] - rect[0]);
    scene.fill([px(b0), rect[3] - 4.0, px(b1), rect[3]], [0, 0, 0]);
}

/// Top of the plot rectangles.
pub(crate) const PLOT_TOP: f64 = TOP;
/// Width a colour bar with its labels takes.
pub(crate) const BAR_TOTAL: f64 = BAR_GAP + BAR_W + BAR_ROOM;

fn tf_panel(
    scene: &mut Scene,
    rect: [f64; 4],
    cube: &Cube,
    pd: &PanelData<'_>,
    scale: &Scale,
    bar: usize,
    first: bool,
) -> PanelInfo {
    let (xm, ym) = axes::draw_cells(
        scene,
        rect,
        &cube.cols,
        &cube.rows,
        &|r, c| (pd.value)(r, c),
        scale,
    );
    scene.frame(rect, super::scene::GREY);
    if xm.lo < 0.0 && xm.hi > 0.0 {
        // The onset line must stand out from the map's own colours: white on the dark-to-light
        // sequential map, dark on the diverging map whose centre is near white.
        let ink = match scale.map {
            MapKind::Sequential => [255, 255, 255],
            MapKind::Diverging => [40, 40, 48],
        };
        let x0 = xm.to_px(0.0);
        scene.dashed((x0, rect[1]), (x0, rect[3]), ink, 4.0);
    }
    axes::x_numeric_axis(scene, rect, &xm, "time (s)");
    axes::y_numeric_axis(scene, rect, &ym, first.then_some("frequency (Hz)"));
    let mid = (rect[0] + rect[2]) / 2.0;
    scene.text(
        (mid, rect[1] - 6.0),
        pd.label.clone(),
        axes::TITLE_PX,
        (HAlign::Centre, VAlign::Bottom),
    );
    panel_info(
        &pd.label,
        rect,
        cube,
        &|r, c| (pd.value)(r, c),
        bar,
        (&xm, &ym),
    )
}

/// Summary of a drawn panel: its rectangle, axes, value range and the place of its maximum.
pub(crate) fn panel_info(
    label: &str,
    rect: [f64; 4],
    cube: &Cube,
    value: &dyn Fn(usize, usize) -> f64,
    bar: usize,
    maps: (&PixelMap, &PixelMap),
) -> PanelInfo {
    let (nr, nc) = (cube.rows.len(), cube.cols.len());
    let mut best: Option<(f64, usize, usize)> = None;
    for r in 0..nr {
        for c in 0..nc {
            let v = value(r, c);
            if v.is_finite() && best.is_none_or(|b| v > b.0) {
                best = Some((v, r, c));
            }
        }
    }
    let centre = |axis: &GridAxis, i: usize| match axis {
        GridAxis::Numeric { centres, .. } => centres.get(i).copied().unwrap_or(f64::NAN),
        GridAxis::Categories(_) => i as f64,
    };
    let axis_info = |name: &str, m: &PixelMap| AxisInfo {
        name: name.to_string(),
        lo: m.lo,
        hi: m.hi,
        log: m.log,
    };
    let (xname, yname) = match cube.plane {
        Plane::FreqTime => ("time", "freq"),
        Plane::BandWindow => ("window", "band"),
    };
    PanelInfo {
        label: label.to_string(),
        rect,
        x: axis_info(xname, maps.0),
        y: axis_info(yname, maps.1),
        colour_bar: bar,
        data_range: cube::finite_range(
            (0..nr)
                .flat_map(|r| (0..nc).map(move |c| (r, c)))
                .map(|(r, c)| value(r, c)),
        ),
        peak: best.map(|(_, r, c)| (centre(&cube.cols, c), centre(&cube.rows, r))),
        lines: Vec::new(),
    }
}
