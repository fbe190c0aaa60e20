//! The report's section on a sweep (`phasewise sweep`, DESIGN §6): one quantity across the
//! sweep's variants, read from `<output>/sweep.tsv` alone.
//!
//! The quantity is the group value of one measure, pair, band and window. The pair and measure
//! are the report's own first pick ([`super::story`]: named in the report block, else a
//! significant cluster, else the largest condition difference), unless the report block's
//! `sweep:` names them; the band and window are the ones the block names, else those where the
//! report's condition difference is largest in the first variant (the largest |value| when the
//! table has no conditions). The figure shows, per variant, the group mean of every condition
//! with ± 1 SEM across subjects when the table holds it; the table beside it repeats the TSV's
//! cells unchanged; when the sweep has a `contrast` stage, a column says which variants keep a
//! significant cluster on that measure and pair. Without `sweep.tsv` there is no section.

use std::path::Path;

use serde::Serialize;

use super::axes::{y_numeric_axis, PixelMap, LABEL_PX, TICK_PX};
use super::scene::{HAlign, Scene, VAlign, GREY, INK};
use super::{Ctx, Draft, FigureKind, ReportError};

/// The file a sweep leaves in the output folder ([`crate::sweep`]).
pub const SWEEP_TABLE: &str = "sweep.tsv";

/// `sweep.tsv` as read: its header and rows, cells as text.
#[derive(Clone, Debug)]
pub struct SweepTable {
    /// Column names.
    pub header: Vec<String>,
    /// Rows.
    pub rows: Vec<Vec<String>>,
}

impl SweepTable {
    /// Reads `<dir>/sweep.tsv`; `None` when there is none (no sweep ran into this folder).
    pub fn read(dir: &Path) -> Option<Result<SweepTable, ReportError>> {
        let path = dir.join(SWEEP_TABLE);
        if !path.is_file() {
            return None;
        }
        Some(
            std::fs::read_to_string(&path)
                .map_err(|e| ReportError::Io { path, source: e })
                .map(|text| {
                    let mut lines = text.lines();
                    let split = |l: &str| l.split('\t').map(str::to_string).collect::<Vec<_>>();
                    SweepTable {
                        header: lines.next().map(split).unwrap_or_default(),
                        rows: lines.filter(|l| !l.is_empty()).map(split).collect(),
                    }
                }),
        )
    }

    fn col(&self, name: &str) -> Option<usize> {
        self.header.iter().position(|h| h == name)
    }

    /// The varied params: the columns between `variant` and `stage`.
    pub fn params(&self) -> Vec<String> {
        match (self.col("variant"), self.col("stage")) {
            (Some(v), Some(s)) if s > v => self.header[v + 1..s].to_vec(),
            _ => Vec::new(),
        }
    }

    /// The variants in the table's (the grid's) order.
    pub fn variants(&self) -> Vec<String> {
        let mut out: Vec<String> = Vec::new();
        if let Some(v) = self.col("variant") {
            for r in &self.rows {
                if let Some(name) = r.get(v) {
                    if !out.contains(name) {
                        out.push(name.clone());
                    }
                }
            }
        }
        out
    }

    fn cell<'a>(&self, row: &'a [String], name: &str) -> Option<&'a str> {
        row.get(self.col(name)?).map(String::as_str)
    }
}

/// The report block's `sweep:` choice (each part optional).
pub use super::spec::SweepSpec;

/// One point of the figure: a variant's group value of one condition.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct SweepPoint {
    /// The variant (its name in `sweep.tsv`).
    pub variant: String,
    /// Its value of each varied param, as `sweep.tsv` writes it.
    pub values: Vec<String>,
    /// The condition, empty when the table has none.
    pub condition: String,
    /// The `mean` cell as written in `sweep.tsv`.
    pub mean: String,
    /// The `sem` cell (`n/a` when the table has none).
    pub sem: String,
    /// The `n` cell (`n/a` when the table has none).
    pub n: String,
    /// Where the point is drawn (layout pixels), `None` when its value is not a number.
    pub at: Option<(f64, f64)>,
    /// Its colour.
    pub colour: [u8; 3],
}

/// What the sweep section shows (in [`super::ReportSummary`]).
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct SweepSection {
    /// The figure's id.
    pub figure: String,
    /// The stage whose table the values come from.
    pub stage: String,
    /// The measure.
    pub measure: String,
    /// The pair.
    pub pair: [String; 2],
    /// The band.
    pub band: String,
    /// The window.
    pub window: String,
    /// Why this quantity (the caption says the same).
    pub why: String,
    /// The varied params (columns of the table).
    pub params: Vec<String>,
    /// The points, variant by variant, conditions in the report's order.
    pub points: Vec<SweepPoint>,
    /// Per variant, whether a significant cluster of this measure and pair was found; `None`
    /// when the sweep has no contrast stage.
    pub clusters: Option<Vec<(String, String)>>,
}

/// Colours of the conditions (our own, distinct for colour-blind readers in pairs).
const SERIES: [[u8; 3]; 4] = [[36, 96, 178], [214, 118, 22], [54, 142, 76], [140, 72, 160]];

/// The quantity chosen, with its reason.
struct Pick {
    stage: String,
    measure: String,
    pair: [String; 2],
    band: String,
    window: String,
    why: String,
}

fn choose(ctx: &Ctx<'_>, t: &SweepTable) -> Option<Pick> {
    let spec = &ctx.opts.sweep;
    let value_rows: Vec<&Vec<String>> = t
        .rows
        .iter()
        .filter(|r| t.cell(r, "mean").is_some() && t.cell(r, "measure").is_some())
        // Group rows of a table (a contrast's findings have no subject and no mean).
        .filter(|r| match t.col("subject") {
            Some(_) => t.cell(r, "subject") == Some("group"),
            None => t.cell(r, "mean").is_some_and(|m| m.parse::<f64>().is_ok()),
        })
        .collect();
    let key = |r: &Vec<String>, name: &str| t.cell(r, name).unwrap_or_default().to_string();
    let pair_of = |r: &Vec<String>| [key(r, "channel_a"), key(r, "channel_b")];
    let has = |m: &str, p: &[String; 2]| {
        value_rows
            .iter()
            .any(|r| key(r, "measure") == m && pair_of(r) == *p)
    };
    let first = value_rows.first()?;
    let (measure, pair, why_pair) = match (&spec.measure, &spec.pair) {
        (Some(m), Some(p)) => (
            m.clone(),
            p.clone(),
            "named in the report block's sweep".into(),
        ),
        _ => {
            let pick = ctx.choice.pairs.iter().find_map(|p| {
                let m = spec
                    .measure
                    .clone()
                    .or_else(|| p.measure.clone())
                    .unwrap_or_else(|| key(first, "measure"));
                let pair = spec.pair.clone().unwrap_or_else(|| p.pair.clone());
                has(&m, &pair).then(|| (m, pair, p.why.clone()))
            });
            pick.unwrap_or_else(|| {
                (
                    spec.measure
                        .clone()
                        .unwrap_or_else(|| key(first, "measure")),
                    spec.pair.clone().unwrap_or_else(|| pair_of(first)),
                    "the first measure and pair of sweep.tsv (the report picked none that the \
                     sweep holds)"
                        .into(),
                )
            })
        }
    };
    let rows: Vec<&Vec<String>> = value_rows
        .iter()
        .copied()
        .filter(|r| key(r, "measure") == measure && pair_of(r) == pair)
        .collect();
    let first_variant = t.variants().into_iter().next()?;
    let stage = key(rows.first()?, "stage");
    // (band, window) cells of the first variant.
    let mut cells: Vec<(String, String)> = Vec::new();
    for r in &rows {
        let bw = (key(r, "band"), key(r, "window"));
        if key(r, "variant") == first_variant && !cells.contains(&bw) {
            cells.push(bw);
        }
    }
    let value = |band: &str, window: &str, cond: Option<&str>| -> f64 {
        rows.iter()
            .find(|r| {
                key(r, "variant") == first_variant
                    && key(r, "band") == band
                    && key(r, "window") == window
                    && cond.is_none_or(|c| key(r, "condition") == c)
            })
            .and_then(|r| key(r, "mean").parse::<f64>().ok())
            .unwrap_or(f64::NAN)
    };
    let contrast = ctx
        .choice
        .contrast
        .clone()
        .filter(|_| t.col("condition").is_some());
    let score = |(b, w): &(String, String)| match &contrast {
        Some([a, c]) => (value(b, w, Some(a)) - value(b, w, Some(c))).abs(),
        None => value(b, w, None).abs(),
    };
    let (band, window, why_cell) = match (&spec.band, &spec.window) {
        (Some(b), Some(w)) => (
            b.clone(),
            w.clone(),
            "named in the report block's sweep".into(),
        ),
        _ => {
            let best = cells
                .iter()
                .filter(|(b, w)| {
                    spec.band.as_ref().is_none_or(|x| x == b)
                        && spec.window.as_ref().is_none_or(|x| x == w)
                })
                .filter(|c| score(c).is_finite())
                .max_by(|x, y| score(x).total_cmp(&score(y)))
                .or_else(|| cells.first())?
                .clone();
            let how = match &contrast {
                Some([a, c]) => format!("largest |{a} − {c}|"),
                None => "largest |value|".to_string(),
            };
            (
                best.0,
                best.1,
                format!("the band × window with the {how} in the first variant ({first_variant})"),
            )
        }
    };
    let why = format!("pair and measure: {why_pair}; band and window: {why_cell}");
    Some(Pick {
        stage,
        measure,
        pair,
        band,
        window,
        why,
    })
}

/// Draws the sweep's figure and returns the section's content, or `None` when the output folder
/// holds no sweep.
pub(crate) fn sweep_section(
    ctx: &mut Ctx<'_>,
    dir: &Path,
    condition_order: &[String],
) -> Result<Option<SweepSection>, ReportError> {
    let t = match SweepTable::read(dir) {
        None => return Ok(None),
        Some(Err(e)) => {
            ctx.not_drawn.push(format!("{SWEEP_TABLE}: {e}"));
            return Ok(None);
        }
        Some(Ok(t)) => t,
    };
    let Some(pick) = choose(ctx, &t) else {
        ctx.not_drawn.push(format!(
            "{SWEEP_TABLE}: no group values (rows with a measure, a pair and a mean) to draw \
             across the variants"
        ));
        return Ok(None);
    };
    let key = |r: &Vec<String>, name: &str| t.cell(r, name).unwrap_or_default().to_string();
    let variants = t.variants();
    let rows: Vec<&Vec<String>> = t
        .rows
        .iter()
        .filter(|r| {
            key(r, "stage") == pick.stage
                && key(r, "measure") == pick.measure
                && [key(r, "channel_a"), key(r, "channel_b")] == pick.pair
                && key(r, "band") == pick.band
                && key(r, "window") == pick.window
                && t.cell(r, "mean").is_some()
        })
        .collect();
    let mut conditions: Vec<String> = Vec::new();
    for r in &rows {
        let c = key(r, "condition");
        if !conditions.contains(&c) {
            conditions.push(c);
        }
    }
    let rank = |c: &String| {
        condition_order
            .iter()
            .position(|o| o == c)
            .unwrap_or(usize::MAX)
    };
    conditions.sort_by_key(|c| rank(c));
    let params = t.params();
    let mut points: Vec<SweepPoint> = Vec::new();
    for v in &variants {
        for (k, c) in conditions.iter().enumerate() {
            if let Some(r) = rows
                .iter()
                .find(|r| key(r, "variant") == *v && key(r, "condition") == *c)
            {
                points.push(SweepPoint {
                    variant: v.clone(),
                    values: params.iter().map(|p| key(r, p)).collect(),
                    condition: c.clone(),
                    mean: key(r, "mean"),
                    sem: t.cell(r, "sem").unwrap_or("n/a").to_string(),
                    n: t.cell(r, "n").unwrap_or("n/a").to_string(),
                    at: None,
                    colour: SERIES[k % SERIES.len()],
                });
            }
        }
    }
    let clusters = t.col("significant").map(|_| {
        variants
            .iter()
            .map(|v| {
                let found: Vec<&Vec<String>> = t
                    .rows
                    .iter()
                    .filter(|r| {
                        key(r, "variant") == *v
                            && key(r, "significant") == "true"
                            && key(r, "measure") == pick.measure
                            && [key(r, "channel_a"), key(r, "channel_b")] == pick.pair
                    })
                    .collect();
                let text = match found.first() {
                    None => "no".to_string(),
                    Some(r) => format!(
                        "yes: {} (p = {}, {}–{} Hz, {}–{} s)",
                        crate::words::count(found.len(), "cluster", "clusters"),
                        key(r, "p"),
                        key(r, "freq_from"),
                        key(r, "freq_to"),
                        key(r, "time_from"),
                        key(r, "time_to")
                    ),
                };
                (v.clone(), text)
            })
            .collect()
    });
    let id = format!("sweep-{}-{}-{}", pick.measure, pick.pair[0], pick.pair[1]);
    let title = format!(
        "{} of {}–{}, {} × {}, across the sweep's variants",
        super::quantity::measure_title(&pick.measure),
        pick.pair[0],
        pick.pair[1],
        pick.band,
        pick.window
    );
    let labels: Vec<String> = variants.iter().map(|v| short_label(v, &t)).collect();
    let scene = draw(
        &mut points,
        &variants,
        (&labels, &params),
        &conditions,
        &pick,
    );
    let has_sem = points.iter().any(|p| p.sem.parse::<f64>().is_ok());
    let caption = format!(
        "{title}: the group mean{} (stage {}) of each condition in each variant ({}). Chosen: {}.",
        if has_sem {
            " ± 1 SEM across subjects"
        } else {
            ""
        },
        pick.stage,
        if params.is_empty() {
            "sweep.tsv".to_string()
        } else {
            format!("varied: {}", params.join(", "))
        },
        pick.why
    );
    let figure_id = id.clone();
    ctx.emit(Draft {
        kind: FigureKind::Sweep,
        id,
        title,
        source: format!("{SWEEP_TABLE}/{}", pick.stage),
        caption,
        scene,
        panels: Vec::new(),
        colour_bars: Vec::new(),
        pair: Some(pick.pair.clone()),
        measure: Some(pick.measure.clone()),
        why: pick.why.clone(),
        outlined: false,
        courses: Vec::new(),
    })?;
    let figure = ctx.figures.last().map_or(figure_id, |f| f.info.id.clone());
    Ok(Some(SweepSection {
        figure,
        stage: pick.stage,
        measure: pick.measure,
        pair: pick.pair,
        band: pick.band,
        window: pick.window,
        why: pick.why,
        params,
        points,
        clusters,
    }))
}

/// A variant's label under the axis: its values of the varied params (`6`, `6, zscore`).
fn short_label(variant: &str, t: &SweepTable) -> String {
    let params = t.params();
    let Some(row) = t
        .rows
        .iter()
        .find(|r| t.cell(r, "variant") == Some(variant))
    else {
        return variant.to_string();
    };
    let values: Vec<&str> = params.iter().filter_map(|p| t.cell(row, p)).collect();
    if values.is_empty() {
        variant.to_string()
    } else {
        values.join(", ")
    }
}

const LEFT: f64 = 74.0;
const TOP: f64 = 44.0;
const PLOT_H: f64 = 220.0;
const SLOT_W: f64 = 84.0;
const LEGEND_W: f64 = 150.0;
const BOTTOM: f64 = 64.0;
const MARK: f64 = 4.0;

/// The figure: one slot per variant, in it one mark per condition (side by side), with a
/// whisker of ± 1 SEM. Fills each point's pixel position.
fn draw(
    points: &mut [SweepPoint],
    variants: &[String],
    (labels, params): (&[String], &[String]),
    conditions: &[String],
    pick: &Pick,
) -> Scene {
    let plot_w = (SLOT_W * variants.len() as f64).max(240.0);
    let width = LEFT + plot_w + LEGEND_W;
    let height = TOP + PLOT_H + BOTTOM;
    let rect = [LEFT, TOP, LEFT + plot_w, TOP + PLOT_H];
    let mut scene = Scene::new(width, height);
    let num = |s: &str| s.parse::<f64>().ok().filter(|v| v.is_finite());
    let (mut lo, mut hi) = (f64::INFINITY, f64::NEG_INFINITY);
    for p in points.iter() {
        if let Some(m) = num(&p.mean) {
            let s = num(&p.sem).unwrap_or(0.0);
            lo = lo.min(m - s);
            hi = hi.max(m + s);
        }
    }
    if !lo.is_finite() {
        (lo, hi) = (0.0, 1.0);
    }
    let pad = if hi > lo { 0.08 * (hi - lo) } else { 1.0 };
    let ym = PixelMap {
        lo: lo - pad,
        hi: hi + pad,
        p0: rect[3],
        p1: rect[1],
        log: false,
    };
    scene.text(
        (LEFT, 14.0),
        format!(
            "{}, {}–{}, {} × {} (stage {})",
            super::quantity::measure_title(&pick.measure),
            pick.pair[0],
            pick.pair[1],
            pick.band,
            pick.window,
            pick.stage
        ),
        LABEL_PX,
        (HAlign::Left, VAlign::Top),
    );
    scene.frame(rect, GREY);
    if ym.lo < 0.0 && ym.hi > 0.0 {
        let y0 = ym.to_px(0.0);
        scene.line((rect[0], y0), (rect[2], y0), GREY, 0.8);
    }
    y_numeric_axis(&mut scene, rect, &ym, Some("group mean"));
    let slot = plot_w / variants.len().max(1) as f64;
    let nc = conditions.len().max(1) as f64;
    for (i, label) in labels.iter().enumerate() {
        let x = rect[0] + slot * (i as f64 + 0.5);
        scene.line((x, rect[3]), (x, rect[3] + 4.0), INK, 1.0);
        scene.text(
            (x, rect[3] + 6.0),
            label.clone(),
            TICK_PX,
            (HAlign::Centre, VAlign::Top),
        );
    }
    scene.text(
        ((rect[0] + rect[2]) / 2.0, rect[3] + 26.0),
        if params.is_empty() {
            "variant".to_string()
        } else {
            format!("variant: {}", params.join(", "))
        },
        LABEL_PX,
        (HAlign::Centre, VAlign::Top),
    );
    // Where each point goes: conditions side by side inside their variant's slot.
    for p in points.iter_mut() {
        let (Some(i), Some(k), Some(m)) = (
            variants.iter().position(|v| *v == p.variant),
            conditions.iter().position(|c| *c == p.condition),
            num(&p.mean),
        ) else {
            continue;
        };
        let x = rect[0] + slot * (i as f64 + (k as f64 + 1.0) / (nc + 1.0));
        p.at = Some((x, ym.to_px(m)));
    }
    // Each condition's points joined across variants (a trend reads at a glance), under the
    // whiskers and marks.
    for (k, c) in conditions.iter().enumerate() {
        let line: Vec<(f64, f64)> = points
            .iter()
            .filter(|p| p.condition == *c)
            .filter_map(|p| p.at)
            .collect();
        if line.len() > 1 {
            scene.polyline(line, SERIES[k % SERIES.len()], 0.8);
        }
    }
    for p in points.iter() {
        let (Some((x, y)), Some(m)) = (p.at, num(&p.mean)) else {
            continue;
        };
        if let Some(s) = num(&p.sem) {
            scene.line((x, ym.to_px(m - s)), (x, ym.to_px(m + s)), p.colour, 1.4);
            for v in [m - s, m + s] {
                scene.line(
                    (x - 3.0, ym.to_px(v)),
                    (x + 3.0, ym.to_px(v)),
                    p.colour,
                    1.4,
                );
            }
        }
        scene.fill([x - MARK, y - MARK, x + MARK, y + MARK], p.colour);
    }
    for (k, c) in conditions.iter().enumerate() {
        let y = TOP + 10.0 + 20.0 * k as f64;
        let x = rect[2] + 18.0;
        scene.fill([x, y - 5.0, x + 10.0, y + 5.0], SERIES[k % SERIES.len()]);
        let name = if c.is_empty() { "value" } else { c.as_str() };
        scene.text((x + 16.0, y), name, TICK_PX, (HAlign::Left, VAlign::Middle));
    }
    scene
}

/// The section's HTML: a sentence, the figure (drawn by the caller's figure list) and the table.
pub(crate) fn section_html(s: &SweepSection, figure_html: &str) -> String {
    use super::html::esc;
    let mut out = String::new();
    out.push_str(&format!(
        "<p>The output folder holds a sweep ({}): every variant is the same pipeline with \
         these params changed, its results under <code>variants/</code>. Shown: {} of {}–{}, \
         band {}, window {} (stage {}); {}.</p>\n",
        esc(SWEEP_TABLE),
        esc(&super::quantity::measure_title(&s.measure)),
        esc(&s.pair[0]),
        esc(&s.pair[1]),
        esc(&s.band),
        esc(&s.window),
        esc(&s.stage),
        esc(&s.why)
    ));
    out.push_str(figure_html);
    let mut header: Vec<String> = vec!["variant".into()];
    header.extend(s.params.iter().cloned());
    header.extend(["condition", "mean", "sem", "n"].map(String::from));
    if s.clusters.is_some() {
        header.push("significant cluster".into());
    }
    let mut table = String::from("<div class=\"scroll\"><table class=\"sweep\"><tr>");
    for h in &header {
        table.push_str(&format!("<th>{}</th>", esc(h)));
    }
    table.push_str("</tr>\n");
    for p in &s.points {
        let mut cells: Vec<String> = vec![p.variant.clone()];
        cells.extend(p.values.iter().cloned());
        cells.extend([
            p.condition.clone(),
            p.mean.clone(),
            p.sem.clone(),
            p.n.clone(),
        ]);
        if let Some(c) = &s.clusters {
            let found = c
                .iter()
                .find(|(v, _)| *v == p.variant)
                .map(|(_, t)| t.clone());
            cells.push(found.unwrap_or_default());
        }
        table.push_str("<tr>");
        for (i, cell) in cells.iter().enumerate() {
            let cls = if (i > s.params.len() + 1) && cell.parse::<f64>().is_ok() {
                " class=\"n\""
            } else {
                ""
            };
            table.push_str(&format!("<td{cls}>{}</td>", esc(cell)));
        }
        table.push_str("</tr>\n");
    }
    table.push_str("</table></div>\n");
    out.push_str(&table);
    if let Some(c) = &s.clusters {
        let kept: Vec<&str> = c
            .iter()
            .filter(|(_, t)| t.starts_with("yes"))
            .map(|(v, _)| v.as_str())
            .collect();
        out.push_str(&format!(
            "<p>Significant cluster of {} on {}–{} (contrast stage): kept in {} of {} variants{}.</p>\n",
            esc(&super::quantity::measure_title(&s.measure)),
            esc(&s.pair[0]),
            esc(&s.pair[1]),
            kept.len(),
            c.len(),
            if kept.is_empty() {
                String::new()
            } else {
                format!(" ({})", esc(&kept.join("; ")))
            }
        ));
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::report::{story, ReportOptions};

    /// A sweep of two variants with a contrast stage: the significant cluster on F3–P4 ppc
    /// survives the first variant only.
    const TABLE: &str = "variant\ttf.cycles\tstage\tsubject\tcondition\tmeasure\tchannel_a\tchannel_b\tband\twindow\tmean\tsem\tn\tcluster\tfreq_from\tfreq_to\ttime_from\ttime_to\tmass\tpeak_t\tp\tsignificant\n\
tf.cycles=4\t4\tgroup\tgroup\tleft\tppc\tF3\tP4\ttheta\tlate\t0.30\t0.02\t6\tn/a\tn/a\tn/a\tn/a\tn/a\tn/a\tn/a\tn/a\tn/a\n\
tf.cycles=4\t4\tgroup\tgroup\tright\tppc\tF3\tP4\ttheta\tlate\t0.05\t0.02\t6\tn/a\tn/a\tn/a\tn/a\tn/a\tn/a\tn/a\tn/a\tn/a\n\
tf.cycles=4\t4\tgroup\tgroup\tleft\tppc\tF3\tP4\talpha\tlate\t0.10\t0.02\t6\tn/a\tn/a\tn/a\tn/a\tn/a\tn/a\tn/a\tn/a\tn/a\n\
tf.cycles=4\t4\tgroup\tgroup\tright\tppc\tF3\tP4\talpha\tlate\t0.09\t0.02\t6\tn/a\tn/a\tn/a\tn/a\tn/a\tn/a\tn/a\tn/a\tn/a\n\
tf.cycles=8\t8\tgroup\tgroup\tleft\tppc\tF3\tP4\ttheta\tlate\t0.12\tn/a\t6\tn/a\tn/a\tn/a\tn/a\tn/a\tn/a\tn/a\tn/a\tn/a\n\
tf.cycles=8\t8\tgroup\tgroup\tright\tppc\tF3\tP4\ttheta\tlate\t0.07\t0.03\t6\tn/a\tn/a\tn/a\tn/a\tn/a\tn/a\tn/a\tn/a\tn/a\n\
tf.cycles=4\t4\tstats\tn/a\tn/a\tppc\tF3\tP4\tn/a\tn/a\tn/a\tn/a\tn/a\t1\t4\t8\t0.3\t0.7\t41.5\t5.2\t0.03125\ttrue\n";

    #[test]
    fn the_largest_difference_is_drawn_and_the_cluster_column_says_where_it_survives() {
        let dir = tempfile::tempdir().unwrap();
        std::fs::write(dir.path().join(SWEEP_TABLE), TABLE).unwrap();
        let opts = ReportOptions::default();
        let mut ctx = Ctx {
            opts: &opts,
            choice: story::Choice {
                contrast: Some(["left".into(), "right".into()]),
                ..story::Choice::default()
            },
            fig_dir: dir.path().to_path_buf(),
            figures: Vec::new(),
            not_drawn: Vec::new(),
        };
        let order = ["left".to_string(), "right".to_string()];
        let s = sweep_section(&mut ctx, dir.path(), &order)
            .unwrap()
            .unwrap();
        // theta: |0.30 − 0.05| = 0.25 beats alpha's 0.01 in the first variant.
        assert_eq!((s.band.as_str(), s.window.as_str()), ("theta", "late"));
        assert_eq!((s.measure.as_str(), s.stage.as_str()), ("ppc", "group"));
        assert!(s.why.contains("largest |left − right|"), "{}", s.why);
        let cells: Vec<(&str, &str, &str, &str)> = s
            .points
            .iter()
            .map(|p| {
                (
                    p.variant.as_str(),
                    p.condition.as_str(),
                    p.mean.as_str(),
                    p.sem.as_str(),
                )
            })
            .collect();
        assert_eq!(
            cells,
            [
                ("tf.cycles=4", "left", "0.30", "0.02"),
                ("tf.cycles=4", "right", "0.05", "0.02"),
                ("tf.cycles=8", "left", "0.12", "n/a"),
                ("tf.cycles=8", "right", "0.07", "0.03"),
            ]
        );
        let clusters = s.clusters.clone().unwrap();
        assert_eq!(clusters[1], ("tf.cycles=8".to_string(), "no".to_string()));
        assert!(
            clusters[0]
                .1
                .starts_with("yes: 1 cluster (p = 0.03125, 4–8 Hz, 0.3–0.7 s)"),
            "{clusters:?}"
        );
        let html = section_html(&s, "");
        assert!(
            html.contains("kept in 1 of 2 variants (tf.cycles=4)"),
            "{html}"
        );
        assert_eq!(ctx.figures.len(), 1);
        // A higher mean is drawn higher (pixel y grows downwards).
        let y = |v: &str, c: &str| {
            s.points
                .iter()
                .find(|p| p.variant == v && p.condition == c)
                .and_then(|p| p.at)
                .unwrap()
                .1
        };
        assert!(y("tf.cycles=4", "left") < y("tf.cycles=8", "left"));
        // Named in the report block: that band is drawn.
        let named = ReportOptions {
            sweep: crate::report::spec::SweepSpec {
                band: Some("alpha".into()),
                window: Some("late".into()),
                ..Default::default()
            },
            ..ReportOptions::default()
        };
        ctx.opts = &named;
        let s = sweep_section(&mut ctx, dir.path(), &order)
            .unwrap()
            .unwrap();
        assert_eq!(s.band, "alpha");
        assert!(s.why.contains("band and window: named"), "{}", s.why);
        // No sweep.tsv, no section.
        let empty = tempfile::tempdir().unwrap();
        assert!(sweep_section(&mut ctx, empty.path(), &order)
            .unwrap()
            .is_none());
    }
}
