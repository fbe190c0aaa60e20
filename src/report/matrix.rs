//! Channel × channel matrices: for each connectivity array, one figure per measure, band and
//! window, with a panel per condition and one for the condition difference.
//!
//! Aggregated arrays bring their own `band` and `window` axes. Time–frequency arrays are
//! averaged over each band (Hz) × window (s), inclusive, taken from the options, else from the
//! `bands` and `windows` params of an `aggregate` stage in the manifest, else the whole range.

use serde_json::Value;

use super::axes::{self, GridAxis, Scale};
use super::colour::MapKind;
use super::cube::{self, NamedRange, Plane};
use super::input::Manifest;
use super::quantity::{self, measure_title};
use super::scene::{HAlign, VAlign, GREY};
use super::tf::{self, HeatFigure, Loaded, BAR_TOTAL, PLOT_TOP};
use super::{units_text, AxisInfo, Ctx, Draft, FigureKind, PanelInfo, ReportError};

/// One matrix panel: a title and one value per pair of the array.
struct MatrixPanel {
    label: String,
    by_pair: Vec<f64>,
}

/// Draws the matrices of one array.
pub(crate) fn matrix_figures(
    ctx: &mut Ctx<'_>,
    l: &Loaded,
    manifest: &Manifest,
    all: &[Loaded],
) -> Result<(), ReportError> {
    if l.cube.plane == Plane::FreqTime {
        // Averaged over bands and windows first, by the one rule of `to_band_window`.
        return match to_band_window(ctx, l, manifest, all) {
            Some(bw) => matrix_figures(ctx, &bw, manifest, all),
            None => Ok(()),
        };
    }
    let slices = slices(l);
    let diff = tf::contrast(ctx, &l.cube.conditions, &l.source());
    for m in 0..l.cube.measures.len() {
        let all: Vec<Vec<MatrixPanel>> = slices
            .iter()
            .map(|(_, values)| panels_for(l, m, values, diff))
            .collect();
        // One scale per measure over every band × window: the figure group.
        let n_cond = l.cube.conditions.len();
        let shared = (
            cube::finite_range(
                all.iter()
                    .flat_map(|ps| ps[..n_cond].iter().flat_map(|p| p.by_pair.iter().copied())),
            ),
            cube::finite_range(
                all.iter()
                    .flat_map(|ps| ps[n_cond..].iter().flat_map(|p| p.by_pair.iter().copied())),
            ),
        );
        // With a difference and several band × window slices, the one where it is largest.
        let best = diff.filter(|_| slices.len() > 1).map(|_| {
            let score = |ps: &Vec<MatrixPanel>| {
                ps[n_cond..]
                    .iter()
                    .flat_map(|p| p.by_pair.iter())
                    .filter(|v| v.is_finite())
                    .fold(0.0f64, |a, v| a.max(v.abs()))
            };
            (0..all.len())
                .max_by(|&a, &b| score(&all[a]).total_cmp(&score(&all[b])).then(b.cmp(&a)))
                .unwrap_or(0)
        });
        if best.is_some() {
            ctx.not_drawn.push(format!(
                "{}: {} matrices of {} other band × window slices (only the one with the \
                 largest difference is drawn; the tables hold every value)",
                l.source(),
                l.cube.measures[m],
                slices.len() - 1
            ));
        }
        for (i, ((label, _), panels)) in slices.iter().zip(&all).enumerate() {
            if best.is_some_and(|b| b != i) {
                continue;
            }
            let what = format!("{}: matrices, {} {label}", l.source(), l.cube.measures[m]);
            if !ctx.room_for(FigureKind::Matrix, &what) {
                return Ok(());
            }
            let mut d = matrix_figure(l, m, label, panels, diff.is_some(), shared);
            if best.is_some() {
                d.caption.push_str(&format!(
                    " Of the {} band × window slices, this one holds the largest |difference|.",
                    slices.len()
                ));
            }
            ctx.emit(d)?;
        }
    }
    Ok(())
}

/// Value of (condition, measure, pair) in one band × window.
type Slice<'a> = Box<dyn Fn(usize, usize, usize) -> f64 + 'a>;

/// The band × window slices to draw, each with its label.
fn slices(l: &Loaded) -> Vec<(String, Slice<'_>)> {
    let cube = &l.cube;
    let mut out: Vec<(String, Slice<'_>)> = Vec::new();
    if let (GridAxis::Categories(bands), GridAxis::Categories(wins)) = (&cube.rows, &cube.cols) {
        for (b, band) in bands.iter().enumerate() {
            for (w, win) in wins.iter().enumerate() {
                let v = &cube.values;
                out.push((
                    format!("{band} × {win}"),
                    Box::new(move |c, m, p| v[[c, m, p, b, w]]),
                ));
            }
        }
    }
    out
}

/// A time–frequency array averaged over the bands and windows of [`ranges`]: the same array on
/// band × window axes, for matrices and heads. The report's one place for such means, by the
/// rule of [`cube`] (as `op: aggregate` computes them): for a mean over subjects, each
/// subject's band × window mean first (NaN when a cell inside is NaN), then mean, SEM and n
/// across the subjects with a value.
pub(crate) fn to_band_window(
    ctx: &Ctx<'_>,
    l: &Loaded,
    manifest: &Manifest,
    all: &[Loaded],
) -> Option<Loaded> {
    let cube = &l.cube;
    let (GridAxis::Numeric { centres: f, .. }, GridAxis::Numeric { centres: t, .. }) =
        (&cube.rows, &cube.cols)
    else {
        return None;
    };
    let (bands, wins) = ranges(ctx, manifest, f, t);
    let label = |r: &NamedRange, unit: &str| {
        format!(
            "{} ({}–{} {unit})",
            r.name,
            axes::fmt_num(r.lo),
            axes::fmt_num(r.hi)
        )
    };
    let (nc, nm, np) = (cube.conditions.len(), cube.measures.len(), cube.pairs.len());
    let dim = ndarray::Ix5(nc, nm, np, bands.len(), wins.len());
    let members = l.members(all);
    let (values, spread) = if members.len() == l.averaged.len() && members.len() >= 2 {
        let (mean, spread) = tf::across(
            dim,
            |k, i| cube::range_mean(&members[k].cube, i.0, i.1, i.2, &bands[i.3], &wins[i.4]),
            members.len(),
        );
        (mean, Some(spread))
    } else {
        let values = ndarray::Array5::from_shape_fn(dim, |i| {
            cube::range_mean(cube, i.0, i.1, i.2, &bands[i.3], &wins[i.4])
        });
        (values, None)
    };
    let mut c2 = cube.clone();
    c2.rows = GridAxis::Categories(bands.iter().map(|b| label(b, "Hz")).collect());
    c2.cols = GridAxis::Categories(wins.iter().map(|w| label(w, "s")).collect());
    c2.values = values;
    c2.plane = Plane::BandWindow;
    Some(Loaded {
        owner: l.owner.clone(),
        stage: l.stage.clone(),
        units: l.units.clone(),
        cube: c2,
        baseline: l.baseline.clone(),
        averaged: l.averaged.clone(),
        spread,
    })
}

/// Bands and windows for a time–frequency array.
pub(crate) fn ranges(
    ctx: &Ctx<'_>,
    manifest: &Manifest,
    f: &[f64],
    t: &[f64],
) -> (Vec<NamedRange>, Vec<NamedRange>) {
    let whole = |name: &str, v: &[f64]| NamedRange {
        name: name.to_string(),
        lo: v.first().copied().unwrap_or(0.0),
        hi: v.last().copied().unwrap_or(0.0),
    };
    let pick = |given: &Vec<NamedRange>, key: &str, fallback: NamedRange| {
        if !given.is_empty() {
            return given.clone();
        }
        let from_manifest = aggregate_ranges(manifest, key);
        if from_manifest.is_empty() {
            vec![fallback]
        } else {
            from_manifest
        }
    };
    let (fb, fw) = match &ctx.choice.focus {
        Some((b, w)) => (b.clone(), w.clone()),
        None => (whole("all frequencies", f), whole("whole epoch", t)),
    };
    (
        pick(&ctx.opts.bands, "bands", fb),
        pick(&ctx.opts.windows, "windows", fw),
    )
}

/// `{name: [lo, hi]}` ranges from the params of the first `aggregate` unit that has them.
fn aggregate_ranges(manifest: &Manifest, key: &str) -> Vec<NamedRange> {
    for u in manifest.units.iter().filter(|u| u.op == "aggregate") {
        if let Some(Value::Object(map)) = u.params.get(key) {
            let r: Vec<NamedRange> = map
                .iter()
                .filter_map(|(name, v)| {
                    let a = v.as_array()?;
                    Some(NamedRange {
                        name: name.clone(),
                        lo: a.first()?.as_f64()?,
                        hi: a.get(1)?.as_f64()?,
                    })
                })
                .collect();
            if !r.is_empty() {
                return r;
            }
        }
    }
    Vec::new()
}

fn panels_for(
    l: &Loaded,
    m: usize,
    value: &Slice<'_>,
    diff: Option<(usize, usize)>,
) -> Vec<MatrixPanel> {
    let np = l.cube.pairs.len();
    let mut panels: Vec<MatrixPanel> = l
        .cube
        .conditions
        .iter()
        .enumerate()
        .map(|(c, name)| MatrixPanel {
            label: name.clone(),
            by_pair: (0..np).map(|p| value(c, m, p)).collect(),
        })
        .collect();
    if let Some((a, b)) = diff {
        panels.push(MatrixPanel {
            label: format!("{} \u{2212} {}", l.cube.conditions[a], l.cube.conditions[b]),
            by_pair: (0..np).map(|p| value(a, m, p) - value(b, m, p)).collect(),
        });
    }
    panels
}

/// Channels in order of first appearance in the pairs.
fn channels(pairs: &[[String; 2]]) -> Vec<String> {
    let mut out: Vec<String> = Vec::new();
    for name in pairs.iter().flatten() {
        if !out.contains(name) {
            out.push(name.clone());
        }
    }
    out
}

/// Square matrix [row][col] of a panel: both triangles hold the pair's value; NaN elsewhere.
fn square(chans: &[String], pairs: &[[String; 2]], by_pair: &[f64]) -> Vec<Vec<f64>> {
    let n = chans.len();
    let mut m = vec![vec![f64::NAN; n]; n];
    let idx = |name: &String| chans.iter().position(|c| c == name);
    for (pair, v) in pairs.iter().zip(by_pair) {
        if let (Some(a), Some(b)) = (idx(&pair[0]), idx(&pair[1])) {
            m[a][b] = *v;
            m[b][a] = *v;
        }
    }
    m
}

fn matrix_figure(
    l: &Loaded,
    m: usize,
    slice: &str,
    panels: &[MatrixPanel],
    has_diff: bool,
    shared: tf::SharedRanges,
) -> Draft {
    let chans = channels(&l.cube.pairs);
    let n = chans.len().max(1);
    let cell = (240.0 / n as f64).clamp(8.0, 30.0);
    let side = cell * n as f64;
    let label_w = label_width(&chans);
    let n_cond = panels.len() - usize::from(has_diff);
    let groups = 1 + usize::from(has_diff);
    let width =
        label_w + panels.len() as f64 * (side + label_w + 10.0) + groups as f64 * BAR_TOTAL + 16.0;
    // Column labels stand upright when a cell is too narrow for them (see axes::category_labels).
    let below = if label_w - 12.0 + 2.0 <= cell {
        24.0
    } else {
        label_w + 8.0
    };
    // Room under the colour bar for its "no value" legend.
    let height = PLOT_TOP + side + below.max(40.0) + 8.0;
    let measure = &l.cube.measures[m];
    let name = measure_title(measure);
    let changed = l
        .baseline
        .as_ref()
        .map(|b| format!(", {}", b.adjective()))
        .unwrap_or_default();
    let title = format!("{name}, every pair: {}{changed}, {slice}", l.who());
    let mut fig = HeatFigure::with_size(
        &title,
        &l.cube.fixed,
        (width, height),
        (side, side),
        label_w,
    );
    let unit = units_text(&l.units);
    let map = l.map(m);
    let (cond, diff) = panels.split_at(n_cond);
    group(
        &mut fig,
        &chans,
        l,
        cond,
        quantity::scale_for(map, shared.0),
        &format!("{name} ({unit})"),
    );
    if let Some(d) = diff.first() {
        group(
            &mut fig,
            &chans,
            l,
            diff,
            quantity::scale_for(MapKind::Diverging, shared.1),
            &format!("{} ({unit})", d.label),
        );
    }
    let caption = format!(
        "{name} between every pair of channels, {} (stage {}), {slice}. Rows and columns are \
         channels; hatched: no value (the diagonal, or a pair not computed). Colour: {}; the \
         scales are shared by every {name} matrix of this array.{}{}{}",
        l.who(),
        l.stage,
        map.name(),
        l.baseline
            .as_ref()
            .map(|b| b.sentence())
            .unwrap_or_default()
            .replace(", marked by a black bar along the time axis", ""),
        tf::mean_note(l),
        cube::no_value_note(
            panels.iter().flat_map(|p| p.by_pair.iter().copied()),
            "pair values drawn"
        )
    );
    let id = format!("matrix-{}-{}-{measure}-{slice}", l.owner, l.stage);
    let mut d = fig.finish(FigureKind::Matrix, &id, l.source(), caption);
    d.measure = Some(measure.clone());
    d
}

/// Room for the channel labels beside and under a matrix.
fn label_width(chans: &[String]) -> f64 {
    chans
        .iter()
        .map(|c| axes::estimate_width(c, axes::TICK_PX))
        .fold(0.0, f64::max)
        + 12.0
}

/// Draws matrix panels sharing one colour bar.
fn group(
    fig: &mut HeatFigure,
    chans: &[String],
    l: &Loaded,
    panels: &[MatrixPanel],
    scale: Scale,
    label: &str,
) {
    let range = cube::finite_range(panels.iter().flat_map(|p| p.by_pair.iter().copied()));
    let bar = fig.bars.len();
    for p in panels {
        let rect = fig.next_rect(label_width(chans) + 10.0);
        let info = matrix_panel(fig, rect, chans, l, p, &scale, bar);
        fig.panels.push(info);
    }
    fig.bar(scale, label, &l.units, range);
}

fn matrix_panel(
    fig: &mut HeatFigure,
    rect: [f64; 4],
    chans: &[String],
    l: &Loaded,
    p: &MatrixPanel,
    scale: &Scale,
    bar: usize,
) -> PanelInfo {
    let sq = square(chans, &l.cube.pairs, &p.by_pair);
    let axis = GridAxis::Categories(chans.to_vec());
    let value = |r: usize, c: usize| sq[r][c];
    axes::draw_cells(&mut fig.scene, rect, &axis, &axis, &value, scale);
    fig.scene.frame(rect, GREY);
    axes::category_labels(&mut fig.scene, rect, chans, true);
    axes::category_labels(&mut fig.scene, rect, chans, false);
    let mid = (rect[0] + rect[2]) / 2.0;
    fig.scene.text(
        (mid, rect[1] - 6.0),
        p.label.clone(),
        axes::TITLE_PX,
        (HAlign::Centre, VAlign::Bottom),
    );
    let n = chans.len() as f64;
    let axis_info = || AxisInfo {
        name: "channel".to_string(),
        lo: 0.0,
        hi: n,
        log: false,
    };
    let best = p
        .by_pair
        .iter()
        .enumerate()
        .filter(|(_, v)| v.is_finite())
        .max_by(|a, b| a.1.total_cmp(b.1).then(b.0.cmp(&a.0)));
    let peak = best.and_then(|(i, _)| {
        let pair = l.cube.pairs.get(i)?;
        let a = chans.iter().position(|c| *c == pair[0])?;
        let b = chans.iter().position(|c| *c == pair[1])?;
        Some((b as f64, a as f64))
    });
    PanelInfo {
        label: p.label.clone(),
        rect,
        x: axis_info(),
        y: axis_info(),
        colour_bar: bar,
        data_range: cube::finite_range(p.by_pair.iter().copied()),
        peak,
        lines: Vec::new(),
    }
}
