//! The stage graph as recorded in the manifest: one box per stage, arrows from each stage to
//! the stages that consumed its output, and for each stage how many of its units were computed
//! in this run and how many came from the cache.
//!
//! Edges are recovered from the units' input keys (a key produced by another unit links the two
//! stages; any other key is an input file, drawn as the `input files` source). Stages are laid
//! out left to right in layers by their longest path from a source.

use std::collections::BTreeMap;

use super::colour::Rgb;
use super::input::Manifest;
use super::scene::{HAlign, Scene, VAlign, GREY, INK};
use super::{Ctx, Draft, FigureKind, ReportError};

/// Name of the node standing for the input files.
const SOURCE: &str = "input files";

/// Stages in order of first appearance, and edges (from, to) between their indices.
struct Graph {
    stages: Vec<String>,
    edges: Vec<(usize, usize)>,
    has_source: bool,
}

fn build(manifest: &Manifest) -> Graph {
    let mut stages: Vec<String> = Vec::new();
    let mut by_key: BTreeMap<&str, usize> = BTreeMap::new();
    for u in &manifest.units {
        let i = stages
            .iter()
            .position(|s| *s == u.stage)
            .unwrap_or_else(|| {
                stages.push(u.stage.clone());
                stages.len() - 1
            });
        if !u.key.is_empty() {
            by_key.insert(&u.key, i);
        }
    }
    let src = stages.len();
    let mut edges = Vec::new();
    let mut has_source = false;
    for u in &manifest.units {
        let Some(to) = stages.iter().position(|s| *s == u.stage) else {
            continue;
        };
        for k in &u.inputs {
            let from = by_key.get(k.as_str()).copied().unwrap_or_else(|| {
                has_source = true;
                src
            });
            if from != to && !edges.contains(&(from, to)) {
                edges.push((from, to));
            }
        }
    }
    if has_source {
        stages.push(SOURCE.to_string());
    }
    Graph {
        stages,
        edges,
        has_source,
    }
}

/// Units of `stage` and of every stage upstream of it, nearest first (breadth-first).
pub fn upstream_units<'m>(manifest: &'m Manifest, stage: &str) -> Vec<&'m super::input::Unit> {
    let g = build(manifest);
    let Some(start) = g.stages.iter().position(|s| s == stage) else {
        return Vec::new();
    };
    let mut seen = vec![start];
    let mut i = 0;
    while i < seen.len() {
        let node = seen[i];
        for &(from, to) in &g.edges {
            if to == node && !seen.contains(&from) {
                seen.push(from);
            }
        }
        i += 1;
    }
    let mut out = Vec::new();
    for s in seen {
        out.extend(manifest.units.iter().filter(|u| u.stage == g.stages[s]));
    }
    out
}

/// Longest-path layer of each node (sources at 0); cycles, which a valid run cannot have, are
/// cut by capping the depth at the number of nodes.
fn layers(g: &Graph) -> Vec<usize> {
    let n = g.stages.len();
    let mut layer = vec![0usize; n];
    for _ in 0..n {
        let mut changed = false;
        for &(from, to) in &g.edges {
            if layer[to] < layer[from] + 1 && layer[from] < n {
                layer[to] = layer[from] + 1;
                changed = true;
            }
        }
        if !changed {
            break;
        }
    }
    layer
}

const NODE_W: f64 = 190.0;
const NODE_H: f64 = 56.0;
const COL_GAP: f64 = 30.0;
const ROW_GAP: f64 = 26.0;
const LEGEND_W: f64 = 230.0;
const COMPUTED: Rgb = [250, 215, 160];
const CACHED: Rgb = [205, 222, 238];
const SOURCE_FILL: Rgb = [236, 236, 236];

/// Draws the stage graph (nothing when the manifest has no units).
pub(crate) fn stage_graph(ctx: &mut Ctx<'_>, manifest: &Manifest) -> Result<(), ReportError> {
    let g = build(manifest);
    if g.stages.is_empty() {
        return Ok(());
    }
    let layer = layers(&g);
    let n_layers = layer.iter().max().map_or(1, |m| m + 1);
    let mut rows = vec![0usize; n_layers];
    let mut pos = vec![(0usize, 0usize); g.stages.len()];
    for (i, &l) in layer.iter().enumerate() {
        pos[i] = (l, rows[l]);
        rows[l] += 1;
    }
    let max_rows = rows.iter().copied().max().unwrap_or(1);
    let width = 20.0 + max_rows as f64 * (NODE_W + COL_GAP) + LEGEND_W;
    let height = 44.0 + n_layers as f64 * (NODE_H + ROW_GAP);
    let mut scene = Scene::new(width, height.max(120.0));
    // Layer l is row l; nodes of one layer sit side by side.
    let at = |i: usize| -> (f64, f64) {
        let (l, r) = pos[i];
        (
            20.0 + r as f64 * (NODE_W + COL_GAP),
            40.0 + l as f64 * (NODE_H + ROW_GAP),
        )
    };
    scene.text(
        (20.0, 10.0),
        "Stages of this run",
        15.0,
        (HAlign::Left, VAlign::Top),
    );
    for &(from, to) in &g.edges {
        arrow(&mut scene, at(from), at(to));
    }
    for (i, name) in g.stages.iter().enumerate() {
        node(
            &mut scene,
            manifest,
            name,
            at(i),
            g.has_source && i == g.stages.len() - 1,
        );
    }
    legend(&mut scene, width - LEGEND_W + 10.0);
    ctx.emit(Draft {
        kind: FigureKind::StageGraph,
        id: "stage-graph".to_string(),
        title: "Stage graph".to_string(),
        source: String::new(),
        caption: "Each box is a stage, with its op and how many of its units (one per subject, \
                  or one for the group) were computed in this run or taken from the cache. \
                  Arrows point from a stage to the stages that read its output."
            .to_string(),
        scene,
        panels: Vec::new(),
        colour_bars: Vec::new(),
        pair: None,
        measure: None,
        why: String::new(),
        outlined: false,
        courses: Vec::new(),
    })
}

fn node(scene: &mut Scene, manifest: &Manifest, name: &str, (x, y): (f64, f64), source: bool) {
    let units: Vec<_> = manifest.units.iter().filter(|u| u.stage == name).collect();
    let computed = units.iter().filter(|u| u.status == "computed").count();
    let cached = units.iter().filter(|u| u.status == "cached").count();
    let other = units.len() - computed - cached;
    let fill = if source {
        SOURCE_FILL
    } else if computed > 0 {
        COMPUTED
    } else {
        CACHED
    };
    let rect = [x, y, x + NODE_W, y + NODE_H];
    scene.fill(rect, fill);
    scene.frame(rect, GREY);
    let cx = x + NODE_W / 2.0;
    scene.text((cx, y + 7.0), name, 13.0, (HAlign::Centre, VAlign::Top));
    if source {
        scene.text_in(
            (cx, y + 28.0),
            "recordings, events",
            11.0,
            (HAlign::Centre, VAlign::Top),
            GREY,
        );
        return;
    }
    let op = units.first().map(|u| u.op.as_str()).unwrap_or("");
    scene.text_in(
        (cx, y + 24.0),
        format!("op: {op}"),
        11.0,
        (HAlign::Centre, VAlign::Top),
        GREY,
    );
    let mut status = format!("{computed} computed · {cached} cached");
    if other > 0 {
        status.push_str(&format!(" · {other} other"));
    }
    scene.text((cx, y + 40.0), status, 10.5, (HAlign::Centre, VAlign::Top));
}

fn arrow(scene: &mut Scene, from: (f64, f64), to: (f64, f64)) {
    let a = (from.0 + NODE_W / 2.0, from.1 + NODE_H);
    let b = (to.0 + NODE_W / 2.0, to.1);
    scene.line(a, b, INK, 1.2);
    let (dx, dy) = (b.0 - a.0, b.1 - a.1);
    let len = (dx * dx + dy * dy).sqrt().max(1e-9);
    let (ux, uy) = (dx / len, dy / len);
    // Arrowhead: two strokes 8 px long at ±25° from the line.
    let (c, s) = (25f64.to_radians().cos(), 25f64.to_radians().sin());
    for sign in [-1.0, 1.0] {
        let hx = -(ux * c - sign * uy * s) * 8.0;
        let hy = -(uy * c + sign * ux * s) * 8.0;
        scene.line(b, (b.0 + hx, b.1 + hy), INK, 1.2);
    }
}

fn legend(scene: &mut Scene, x: f64) {
    let mut y = 44.0;
    for (fill, text) in [
        (COMPUTED, "computed in this run"),
        (CACHED, "all units taken from the cache"),
    ] {
        scene.fill([x, y, x + 14.0, y + 14.0], fill);
        scene.frame([x, y, x + 14.0, y + 14.0], GREY);
        scene.text(
            (x + 20.0, y + 7.0),
            text,
            11.0,
            (HAlign::Left, VAlign::Middle),
        );
        y += 22.0;
    }
}
