//! Connectivity on a head outline, for band × window results (a group aggregate): for each
//! measure, one head per band × window, seen from above (nose up, left ear left), the sensors
//! placed from their positions by an azimuthal equidistant projection (the angle from the
//! vertex becomes the distance from the centre; the equator of the sphere is the head's
//! outline), and a line for every pair whose value passes the threshold the caption states,
//! coloured (and widened) by its value.
//!
//! Positions come from the exported arrays' metadata (`meta.positions`, DESIGN §4b), else from
//! the standard 10-20 / 10-10 label (phasewise_stages::spatial::standard). Pairs of a channel
//! without a position are left out and named.

use std::collections::BTreeMap;
use std::f64::consts::FRAC_PI_2;

use serde_json::Value;

use super::axes::{self, GridAxis};
use super::colour::MapKind;
use super::cube::{Cube, Plane};
use super::input::RunOutput;
use super::quantity::{map_for, measure_title, scale_for};
use super::scene::{HAlign, Scene, VAlign, GREY, INK};
use super::tf::{Loaded, Spread};
use super::{units_text, ColourBarInfo, Ctx, Draft, FigureKind, PanelInfo, ReportError};

/// Every channel position the output folder knows: from any array's metadata.
pub(crate) fn positions(run: &RunOutput) -> BTreeMap<String, [f64; 3]> {
    let mut out = BTreeMap::new();
    for a in &run.arrays {
        if let Some(Value::Object(map)) = a
            .sidecar
            .meta
            .get("positions")
            .and_then(|p| p.get("by_channel"))
        {
            for (name, v) in map {
                let xyz: Option<Vec<f64>> = v
                    .as_array()
                    .map(|l| l.iter().filter_map(Value::as_f64).collect());
                if let Some(x) = xyz.filter(|x| x.len() == 3) {
                    out.entry(name.clone()).or_insert([x[0], x[1], x[2]]);
                }
            }
        }
    }
    out
}

/// The drawing position (unit disc, x right, y up = towards the nose) of a channel.
fn projected(name: &str, known: &BTreeMap<String, [f64; 3]>) -> Option<(f64, f64)> {
    let p = known
        .get(name)
        .copied()
        .or_else(|| phasewise_stages::spatial::standard::position(name))?;
    let r = (p[0] * p[0] + p[1] * p[1] + p[2] * p[2]).sqrt();
    if r == 0.0 || !r.is_finite() {
        return None;
    }
    let theta = (p[2] / r).clamp(-1.0, 1.0).acos();
    let phi = p[1].atan2(p[0]);
    let d = theta / FRAC_PI_2;
    Some((d * phi.cos(), d * phi.sin()))
}

const HEAD_R: f64 = 84.0;
const CELL: f64 = 2.0 * HEAD_R + 56.0;
const TOP: f64 = 64.0;
const LEFT: f64 = 70.0;

/// Share of pairs drawn: the top 2 % by |value| over the figure (our choice, for a readable
/// network figure of ~20 lines in the demo; stated in every caption with its value).
const TOP_SHARE: f64 = 0.02;

/// Draws the head figures of a band × window array.
pub(crate) fn head_figures(
    ctx: &mut Ctx<'_>,
    l: &Loaded,
    run: &RunOutput,
) -> Result<(), ReportError> {
    if l.cube.plane != Plane::BandWindow {
        return Ok(());
    }
    let cube = &l.cube;
    let (GridAxis::Categories(bands), GridAxis::Categories(wins)) = (&cube.rows, &cube.cols) else {
        return Ok(());
    };
    let known = positions(run);
    let at: Vec<Option<(f64, f64)>> = cube
        .pairs
        .iter()
        .flatten()
        .map(|n| projected(n, &known))
        .collect();
    let missing: Vec<&String> = cube
        .pairs
        .iter()
        .flatten()
        .zip(&at)
        .filter(|(_, a)| a.is_none())
        .map(|(n, _)| n)
        .collect();
    // Nothing to draw on a head when no pair has both channels placed (fewer than two channels
    // with a position, as for SEEG contacts recorded without positions): no figure, one note.
    if !at.chunks(2).any(|ends| ends.iter().all(Option::is_some)) {
        let mut placed: Vec<&String> = cube
            .pairs
            .iter()
            .flatten()
            .zip(&at)
            .filter(|(_, a)| a.is_some())
            .map(|(n, _)| n)
            .collect();
        placed.sort();
        placed.dedup();
        let mut all: Vec<&String> = cube.pairs.iter().flatten().collect();
        all.sort();
        all.dedup();
        let why = if placed.len() < 2 {
            format!(
                "{} of its {} channels {} a position",
                placed.len(),
                all.len(),
                if placed.len() == 1 { "has" } else { "have" }
            )
        } else {
            "no pair joins two channels that have a position".to_string()
        };
        ctx.not_drawn.push(format!(
            "{}: no head figures, since {why} (none in the recordings' metadata, and the labels \
             are not standard 10-20 / 10-10 names)",
            l.source()
        ));
        return Ok(());
    }
    if !missing.is_empty() {
        let mut m: Vec<&String> = missing;
        m.sort();
        m.dedup();
        ctx.not_drawn.push(format!(
            "{}: head figures leave out the pairs of channels without a position ({})",
            l.source(),
            m.iter().map(|s| s.as_str()).collect::<Vec<_>>().join(", ")
        ));
    }
    let diff = ctx.choice.contrast.as_ref().and_then(|c| {
        Some((
            cube.conditions.iter().position(|x| *x == c[0])?,
            cube.conditions.iter().position(|x| *x == c[1])?,
        ))
    });
    for m in 0..cube.measures.len() {
        let what = format!("{}: head figure {}", l.source(), cube.measures[m]);
        if !ctx.room_for(FigureKind::Head, &what) {
            return Ok(());
        }
        let value = |b: usize, w: usize, p: usize| match diff {
            Some((a, bb)) => cube.values[[a, m, p, b, w]] - cube.values[[bb, m, p, b, w]],
            None => cube.values[[0, m, p, b, w]],
        };
        let draft = head_figure(l, m, (bands, wins), &value, diff, &at, l.spread.as_ref());
        ctx.emit(draft)?;
    }
    Ok(())
}

type Value3<'a> = &'a dyn Fn(usize, usize, usize) -> f64;

fn head_figure(
    l: &Loaded,
    m: usize,
    (bands, wins): (&[String], &[String]),
    value: Value3<'_>,
    diff: Option<(usize, usize)>,
    at: &[Option<(f64, f64)>],
    spread: Option<&Spread>,
) -> Draft {
    let cube = &l.cube;
    let measure = &cube.measures[m];
    let np = cube.pairs.len();
    let drawable = |p: usize| at[2 * p].is_some() && at[2 * p + 1].is_some();
    let mut mags: Vec<f64> = Vec::new();
    for b in 0..bands.len() {
        for w in 0..wins.len() {
            mags.extend(
                (0..np)
                    .filter(|&p| drawable(p))
                    .map(|p| value(b, w, p).abs())
                    .filter(|v| v.is_finite()),
            );
        }
    }
    mags.sort_by(|a, b| b.total_cmp(a));
    let k = ((mags.len() as f64 * TOP_SHARE).ceil() as usize).clamp(1, mags.len().max(1));
    let threshold = mags.get(k - 1).copied().unwrap_or(f64::INFINITY);
    let range = super::cube::finite_range(mags.iter().map(|v| -*v).chain(mags.iter().copied()));
    let map = match diff {
        Some(_) => MapKind::Diverging,
        None => map_for(measure, l.baseline.is_some(), range),
    };
    let vals_range = super::cube::finite_range(
        (0..bands.len())
            .flat_map(|b| (0..wins.len()).flat_map(move |w| (0..np).map(move |p| (b, w, p))))
            .map(|(b, w, p)| value(b, w, p)),
    );
    let scale = scale_for(map, vals_range);
    let width = LEFT + wins.len() as f64 * CELL + super::tf::BAR_TOTAL + 20.0;
    let height = TOP + bands.len() as f64 * CELL + 10.0;
    let quantity = match diff {
        Some((a, b)) => format!("{} \u{2212} {}", cube.conditions[a], cube.conditions[b]),
        None => cube.conditions[0].clone(),
    };
    let title = format!(
        "{} on the head, {}: {}{}",
        measure_title(measure),
        l.who(),
        quantity,
        l.baseline
            .as_ref()
            .map(|b| format!(" ({})", b.adjective()))
            .unwrap_or_default()
    );
    // Wide enough for the title when there are few heads.
    let width = width.max(axes::estimate_width(&title, 15.0) + 40.0);
    let mut scene = Scene::new(width, height);
    scene.text((16.0, 10.0), &title, 15.0, (HAlign::Left, VAlign::Top));
    let mut panels = Vec::new();
    let mut strongest: Vec<(f64, usize, usize, usize)> = Vec::new();
    for (b, band) in bands.iter().enumerate() {
        for (w, win) in wins.iter().enumerate() {
            let cx = LEFT + w as f64 * CELL + CELL / 2.0;
            let cy = TOP + b as f64 * CELL + CELL / 2.0;
            head_outline(&mut scene, (cx, cy));
            let px = |i: usize| at[i].map(|(x, y)| (cx + x * HEAD_R, cy - y * HEAD_R));
            // Weakest first, so that the strongest lines lie on top.
            let mut shown: Vec<(f64, usize)> = (0..np)
                .filter(|&p| drawable(p))
                .map(|p| (value(b, w, p), p))
                .filter(|(v, _)| v.is_finite() && v.abs() >= threshold)
                .collect();
            shown.sort_by(|x, y| x.0.abs().total_cmp(&y.0.abs()));
            let top = scale.vmax.abs().max(scale.vmin.abs()).max(1e-300);
            for &(v, p) in &shown {
                if let (Some(a), Some(c)) = (px(2 * p), px(2 * p + 1)) {
                    scene.line(a, c, scale.colour(v), 1.2 + 3.0 * v.abs() / top);
                }
                strongest.push((v.abs(), p, b, w));
            }
            let mut names_done: Vec<&String> = Vec::new();
            // Sensors without a line in grey, so that the lines stand out.
            for (i, name) in cube.pairs.iter().flatten().enumerate() {
                if names_done.contains(&name) {
                    continue;
                }
                names_done.push(name);
                if let Some((x, y)) = px(i) {
                    scene.fill([x - 2.0, y - 2.0, x + 2.0, y + 2.0], INK);
                    scene.text_in(
                        (x, y + 3.0),
                        name.clone(),
                        7.5,
                        (HAlign::Centre, VAlign::Top),
                        GREY,
                    );
                }
            }
            // On two lines when one would run past the head's cell (long cluster ranges).
            let one = format!("{band} × {win}");
            let lines = if axes::estimate_width(&one, axes::TITLE_PX) > CELL - 8.0 {
                vec![format!("{band} ×"), win.clone()]
            } else {
                vec![one]
            };
            for (k, line) in lines.iter().rev().enumerate() {
                scene.text(
                    (cx, cy - HEAD_R - 18.0 - k as f64 * (axes::TITLE_PX + 3.0)),
                    line.clone(),
                    axes::TITLE_PX,
                    (HAlign::Centre, VAlign::Bottom),
                );
            }
            let shown_max = shown.last().map(|s| s.0);
            panels.push(PanelInfo {
                label: format!("{band} × {win}"),
                rect: [cx - HEAD_R, cy - HEAD_R, cx + HEAD_R, cy + HEAD_R],
                x: super::AxisInfo {
                    name: "head x".to_string(),
                    lo: -1.0,
                    hi: 1.0,
                    log: false,
                },
                y: super::AxisInfo {
                    name: "head y".to_string(),
                    lo: -1.0,
                    hi: 1.0,
                    log: false,
                },
                colour_bar: 0,
                data_range: super::cube::finite_range((0..np).map(|p| value(b, w, p))),
                peak: shown_max.map(|_| (w as f64, b as f64)),
                lines: shown
                    .iter()
                    .map(|&(v, p)| (cube.pairs[p].clone(), v))
                    .collect(),
            });
        }
    }
    let bx = LEFT + wins.len() as f64 * CELL + 12.0;
    let bar_rect = [
        bx,
        TOP + 10.0,
        bx + 14.0,
        TOP + 10.0 + (bands.len() as f64 * CELL - 60.0).max(120.0),
    ];
    let unit = units_text(&l.units);
    let bar_label = format!("{quantity} ({unit})");
    axes::colour_bar(&mut scene, bar_rect, &scale, &bar_label);
    strongest.sort_by(|x, y| y.0.total_cmp(&x.0));
    let stat_note = top_lines(cube, m, &strongest, diff, spread)
        + &super::cube::no_value_note(
            (0..bands.len())
                .flat_map(|b| (0..wins.len()).flat_map(move |w| (0..np).map(move |p| (b, w, p))))
                .filter(|&(_, _, p)| drawable(p))
                .map(|(b, w, p)| value(b, w, p)),
            "pair × band × window values",
        );
    let caption = format!(
        "{} between sensors seen from above (nose up), one head per band × window, {} of {}. \
         A line joins each pair whose |{}| is at least {} — the top {} % of all pairs, bands and \
         windows of this figure; colour and width by value ({}, scale shared by every head). \
         Sensor positions: {}.{}",
        measure_title(measure),
        quantity,
        l.who(),
        quantity,
        axes::fmt_num(threshold),
        (TOP_SHARE * 100.0).round(),
        map.name(),
        "from the recordings' electrode positions where recorded, else derived from the standard \
         10-20 label (README, \"Electrode positions\"), projected azimuthally (angle from the \
         vertex → distance from the centre)",
        stat_note
    );
    Draft {
        kind: FigureKind::Head,
        id: format!("head-{}-{}-{measure}", l.owner, l.stage),
        title,
        source: l.source(),
        caption,
        scene,
        panels,
        colour_bars: vec![ColourBarInfo {
            label: bar_label,
            units: l.units.clone(),
            map: scale.map,
            vmin: scale.vmin,
            vmax: scale.vmax,
            data_range: vals_range,
        }],
        pair: None,
        measure: Some(measure.clone()),
        why: format!(
            "lines: the top {} % by |value|",
            (TOP_SHARE * 100.0).round()
        ),
        outlined: false,
        courses: Vec::new(),
    }
}

/// "F3–P4 in theta × late: left 0.25 ± 0.03, right 0.02 ± 0.02 (mean ± SEM, n = 6)" for the three
/// strongest lines.
fn top_lines(
    cube: &Cube,
    m: usize,
    strongest: &[(f64, usize, usize, usize)],
    diff: Option<(usize, usize)>,
    spread: Option<&Spread>,
) -> String {
    let mut parts = Vec::new();
    for &(_, p, b, w) in strongest.iter().take(3) {
        let pair = &cube.pairs[p];
        let conds: Vec<usize> = match diff {
            Some((a, bb)) => vec![a, bb],
            None => vec![0],
        };
        let cells: Vec<String> = conds
            .iter()
            .map(|&c| {
                let v = cube.values[[c, m, p, b, w]];
                let s = spread.map(|s| s.sem[[c, m, p, b, w]]);
                match s {
                    Some(s) if s.is_finite() => format!(
                        "{} {} ± {}",
                        cube.conditions[c],
                        axes::fmt_num(v),
                        axes::fmt_num(s)
                    ),
                    _ => format!("{} {}", cube.conditions[c], axes::fmt_num(v)),
                }
            })
            .collect();
        let nn = spread
            .map(|s| s.n[[conds[0], m, p, b, w]])
            .filter(|v| v.is_finite())
            .map(|v| format!(", n = {}", axes::fmt_num(v)))
            .unwrap_or_default();
        let (GridAxis::Categories(bs), GridAxis::Categories(ws)) = (&cube.rows, &cube.cols) else {
            continue;
        };
        parts.push(format!(
            "{}–{} in {} × {}: {} (mean{}{nn})",
            pair[0],
            pair[1],
            bs[b],
            ws[w],
            cells.join(", "),
            if spread.is_some() { " ± SEM" } else { "" }
        ));
    }
    if parts.is_empty() {
        String::new()
    } else {
        format!(" Strongest lines: {}.", parts.join("; "))
    }
}

/// Head circle, nose and ears around `c`.
fn head_outline(scene: &mut Scene, c: (f64, f64)) {
    let n = 72;
    let pts: Vec<(f64, f64)> = (0..=n)
        .map(|i| {
            let a = i as f64 / n as f64 * std::f64::consts::TAU;
            (c.0 + HEAD_R * a.cos(), c.1 + HEAD_R * a.sin())
        })
        .collect();
    for w in pts.windows(2) {
        scene.line(w[0], w[1], GREY, 1.2);
    }
    let nose = [
        (c.0 - 10.0, c.1 - HEAD_R + 1.0),
        (c.0, c.1 - HEAD_R - 12.0),
        (c.0 + 10.0, c.1 - HEAD_R + 1.0),
    ];
    scene.line(nose[0], nose[1], GREY, 1.2);
    scene.line(nose[1], nose[2], GREY, 1.2);
    for side in [-1.0, 1.0] {
        let x = c.0 + side * HEAD_R;
        scene.line((x, c.1 - 14.0), (x + side * 7.0, c.1 - 10.0), GREY, 1.2);
        scene.line(
            (x + side * 7.0, c.1 - 10.0),
            (x + side * 7.0, c.1 + 10.0),
            GREY,
            1.2,
        );
        scene.line((x + side * 7.0, c.1 + 10.0), (x, c.1 + 14.0), GREY, 1.2);
    }
}
