//! The report page: one self-contained HTML file (inline CSS, PNGs as data URIs, no scripts, no
//! external resources), with one `<section id=…>` per part of the report.
//!
//! Sections, in order: `caution`, `contents` (links to the rest), `findings` (what was tested,
//! what is significant, how the pairs were chosen, the key figures), `statistics` (t-maps and
//! the cluster table), `tf-maps`, `heads`, `matrices`, `subjects`, `tables`, then, folded in
//! one `<details id="provenance">`: `summary` (manifest), `stages` (graph and unit list),
//! `epochs`, `warnings`, `not-drawn`. Images are marked `loading="lazy"` and
//! `decoding="async"`. Every figure links its
//! SVG and PNG files, and every colour bar is stated in text with its limits as data attributes
//! (`data-vmin`, `data-vmax`), so the numbers behind the colours can be read and checked.

use std::collections::{BTreeMap, BTreeSet};
use std::fmt::Write;
use std::path::Path;

use serde_json::Value;

use super::input::{str_of, Manifest, RunOutput, Table};
use super::quantity::measure_title;
use super::tmap::StatArray;
use super::{Ctx, FigureKind, Rendered};

/// The research-use caution (DESIGN §9).
pub const CAUTION: &str = "phasewise is research software, not a clinical device: its results are \
    not a clinical measurement and must not be used for diagnosis or treatment decisions. \
    Connectivity between sensors is affected by volume conduction and by the reference.";

/// Escapes text for HTML content and attribute values.
pub fn esc(s: &str) -> String {
    let mut out = String::with_capacity(s.len());
    for c in s.chars() {
        match c {
            '&' => out.push_str("&amp;"),
            '<' => out.push_str("&lt;"),
            '>' => out.push_str("&gt;"),
            '"' => out.push_str("&quot;"),
            '\'' => out.push_str("&#39;"),
            c => out.push(c),
        }
    }
    out
}

const STYLE: &str = "
body{margin:0;background:#f4f4f1;color:#222228;font:15px/1.45 'DejaVu Sans',system-ui,sans-serif}
main{max-width:1160px;margin:0 auto;padding:18px 26px 60px;background:#fff;min-height:100vh}
h1{font-size:1.55em;margin:.3em 0 .1em}h2{font-size:1.2em;margin:1.6em 0 .5em;padding-bottom:.2em;border-bottom:2px solid #d9d3c3}
h3{font-size:1em;margin:1.2em 0 .4em;color:#45454d}
.sub{color:#66666e;margin:0 0 .8em}
.caution{border-left:6px solid #c7782a;background:#fbf1e4;padding:.7em 1em;margin:1em 0}
table{border-collapse:collapse;font-size:13px;margin:.4em 0}td,th{border:1px solid #dcdcd6;padding:3px 8px;text-align:left}
th{background:#efece4}td.n{text-align:right;font-variant-numeric:tabular-nums}
.computed{background:#fbe6c4}.cached{background:#dfe9f3}
figure{margin:1em 0 1.6em;padding:10px;border:1px solid #e2e0da;border-radius:4px;overflow-x:auto}
figure img{display:block;max-width:100%;height:auto}
figcaption{font-size:13px;color:#45454d;margin-top:.5em}
.scale{display:inline-block;margin-right:1.2em;font-variant-numeric:tabular-nums}
.files a{margin-right:.8em}
dl.kv{display:grid;grid-template-columns:max-content auto;gap:2px 14px;font-size:14px}dl.kv dt{color:#66666e}dl.kv dd{margin:0;word-break:break-all}
.scroll{max-height:420px;overflow:auto;border:1px solid #e2e0da}
footer{margin-top:3em;color:#808088;font-size:12px}
nav.toc ol{margin:.2em 0;padding-left:1.4em;columns:2}
.finding{background:#eef5ee;border-left:6px solid #4a8a4a;padding:.5em 1em;margin:.6em 0}
.nofinding{background:#f3f3f0;border-left:6px solid #a0a09a;padding:.5em 1em;margin:.6em 0}
details.prov{margin-top:2em;border-top:2px solid #d9d3c3}details.prov>summary{font-size:1.2em;font-weight:bold;cursor:pointer;padding:.6em 0}
tr.sig td{background:#e3f0e3;font-weight:bold}
";

/// The page and the ids of its sections.
pub(crate) fn page(
    run: &RunOutput,
    ctx: &Ctx<'_>,
    html_dir: &Path,
    stats: &[StatArray],
    sweep: Option<&super::variants::SweepSection>,
) -> (String, Vec<String>) {
    let m = &run.manifest;
    let name = m
        .raw
        .get("pipeline")
        .map(|p| str_of(p, "name"))
        .unwrap_or_default();
    let name = if name.is_empty() {
        str_of(&m.raw, "name")
    } else {
        name
    };
    let key = key_figures(ctx);
    let mut parts: Vec<(&str, &str, String)> = Vec::new();
    parts.push((
        "findings",
        "Findings",
        findings(run, ctx, stats, &key, html_dir),
    ));
    let stat_html = format!(
        "{}{}",
        figures_except(ctx, FigureKind::TMap, html_dir, &key),
        cluster_tables(run, stats, ctx.opts.max_table_rows)
    );
    parts.push(("statistics", "Statistics: t-maps and clusters", stat_html));
    for (id, title, kind) in [
        (
            "tf-maps",
            "Time–frequency maps (group)",
            FigureKind::TimeFrequency,
        ),
        ("heads", "Connectivity on the head", FigureKind::Head),
        ("matrices", "Channel × channel matrices", FigureKind::Matrix),
        ("subjects", "Each subject", FigureKind::SubjectMap),
    ] {
        parts.push((id, title, figures_except(ctx, kind, html_dir, &key)));
    }
    if let Some(s) = sweep {
        let figures = figures_of(ctx, FigureKind::Sweep, html_dir);
        parts.push((
            "sweep",
            "Across the sweep's variants",
            super::variants::section_html(s, &figures),
        ));
    }
    parts.push((
        "tables",
        "Tables",
        tables(&run.tables, ctx.opts.max_table_rows),
    ));
    let prov: Vec<(&str, &str, String)> = vec![
        ("summary", "Run summary (manifest)", summary(m, &run.dir)),
        ("stages", "Stages and units", stages(m, ctx, html_dir)),
        ("epochs", "Epoch counts", epochs(m)),
        ("warnings", "Warnings", warnings(m)),
        ("not-drawn", "Not drawn", not_drawn(&ctx.not_drawn)),
    ];
    let mut ids = vec!["caution".to_string(), "contents".to_string()];
    let mut body = format!(
        "<section id=\"caution\"><p class=\"caution\">{}</p></section>\n",
        esc(CAUTION)
    );
    let mut toc = String::from("<section id=\"contents\"><nav class=\"toc\"><ol>");
    for (id, title, _) in parts.iter().chain(&prov) {
        let _ = write!(toc, "<li><a href=\"#{id}\">{}</a></li>", esc(title));
    }
    toc.push_str("</ol></nav></section>\n");
    body.push_str(&toc);
    let section =
        |body: &mut String, ids: &mut Vec<String>, (id, title, content): &(&str, &str, String)| {
            let _ = write!(
                body,
                "<section id=\"{id}\"><h2>{}</h2>\n{content}</section>\n",
                esc(title)
            );
            ids.push(id.to_string());
        };
    for p in &parts {
        section(&mut body, &mut ids, p);
    }
    body.push_str(
        "<details class=\"prov\" id=\"provenance\"><summary>Provenance: manifest, stages, epoch \
         counts, warnings, what was not drawn</summary>\n",
    );
    ids.push("provenance".to_string());
    for p in &prov {
        section(&mut body, &mut ids, p);
    }
    body.push_str("</details>\n");
    let title = if name.is_empty() {
        "phasewise run report".to_string()
    } else {
        format!("phasewise run report: {name}")
    };
    let html = format!(
        "<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">\
         <meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">\
         <title>{t}</title><style>{STYLE}</style></head>\n<body><main>\n<h1>{t}</h1>\
         <p class=\"sub\">Output folder: {dir}</p>\n{body}<footer>Written by phasewise {v} from the \
         output folder's manifest, arrays and tables.</footer>\n</main></body></html>\n",
        t = esc(&title),
        dir = esc(&run.dir.display().to_string()),
        v = env!("CARGO_PKG_VERSION"),
    );
    (html, ids)
}

/// The figures shown in the findings: the first t-map (else the first group time–frequency
/// figure) and the first head figure.
fn key_figures(ctx: &Ctx<'_>) -> Vec<String> {
    let top = ctx.choice.pairs.first();
    let matches = |f: &&Rendered| {
        top.is_none_or(|t| t.measure.is_none() || f.info.measure == t.measure)
            && (f.info.pair.is_none() || top.is_none_or(|t| f.info.pair.as_ref() == Some(&t.pair)))
    };
    let first = |k: FigureKind| {
        let of_kind = || ctx.figures.iter().filter(move |f| f.info.kind == k);
        of_kind()
            .find(matches)
            .or_else(|| of_kind().next())
            .map(|f| f.info.id.clone())
    };
    let mut out = Vec::new();
    out.extend(first(FigureKind::TMap).or_else(|| first(FigureKind::TimeFrequency)));
    out.extend(first(FigureKind::Head));
    out
}

/// What was tested, what is significant, how the pairs were chosen, and the key figures.
fn findings(
    run: &RunOutput,
    ctx: &Ctx<'_>,
    stats: &[StatArray],
    key: &[String],
    html_dir: &Path,
) -> String {
    let mut out = String::new();
    let c = &ctx.choice;
    if stats.is_empty() {
        out.push_str(
            "<p class=\"nofinding\">No statistics: the pipeline has no exported <code>contrast</code> \
             stage, so nothing here is tested; the figures describe the data.</p>",
        );
    }
    for s in stats {
        let measures: Vec<String> = s.t.measures.iter().map(|m| measure_title(m)).collect();
        let _ = write!(
            out,
            "<p>Tested in stage <code>{}</code>: {} across {}, for {} over {} pairs, {}-corrected \
             at α = {}.</p>",
            esc(&s.stage),
            esc(&s.what()),
            s.subjects
                .map(|n| format!("{n} subjects"))
                .unwrap_or_else(|| "subjects".to_string()),
            esc(&measures.join(", ")),
            s.t.pairs.len(),
            esc(&s.correction),
            super::axes::fmt_num(s.alpha)
        );
        let sig = significant_rows(run, &s.stage);
        match sig {
            Some((header, rows)) if !rows.is_empty() => {
                let _ = write!(
                    out,
                    "<p class=\"finding\">Significant: {}.</p>",
                    esc(&rows
                        .iter()
                        .map(|r| describe_row(&header, r))
                        .collect::<Vec<_>>()
                        .join("; "))
                );
            }
            _ => out.push_str(
                "<p class=\"nofinding\">No cluster or point is significant at this α.</p>",
            ),
        }
    }
    if let Some([a, b]) = &c.contrast {
        let _ = write!(
            out,
            "<p>Differences are drawn as {} − {} ({}).</p>",
            esc(a),
            esc(b),
            esc(&c.contrast_why)
        );
    }
    if !c.pairs_how.is_empty() {
        let _ = write!(out, "<p>{}</p>", esc(&c.pairs_how));
    }
    if !c.pairs.is_empty() {
        // One line per pair, with the measures it was chosen for.
        let mut order: Vec<&[String; 2]> = Vec::new();
        for p in &c.pairs {
            if !order.contains(&&p.pair) {
                order.push(&p.pair);
            }
        }
        out.push_str("<ul>");
        for pair in order {
            let why: Vec<String> = c
                .pairs
                .iter()
                .filter(|p| &p.pair == pair)
                .map(|p| match &p.measure {
                    Some(m) => format!("{} ({})", measure_title(m), p.short),
                    None => p.short.clone(),
                })
                .collect();
            let _ = write!(
                out,
                "<li><b>{}–{}</b>: {}</li>",
                esc(&pair[0]),
                esc(&pair[1]),
                esc(&why.join("; "))
            );
        }
        out.push_str("</ul>");
    }
    for id in key {
        if let Some(f) = ctx.figures.iter().find(|f| &f.info.id == id) {
            out.push_str(&figure(f, html_dir));
        }
    }
    out
}

/// One sentence for a row of a findings table.
fn describe_row(header: &[String], row: &[String]) -> String {
    let get = |k: &str| {
        header
            .iter()
            .position(|h| h == k)
            .and_then(|i| row.get(i))
            .map(String::as_str)
            .unwrap_or("?")
    };
    let num = |k: &str| {
        get(k)
            .parse::<f64>()
            .map(super::axes::fmt_num)
            .unwrap_or_else(|_| get(k).to_string())
    };
    format!(
        "{} {}–{}, {}–{} Hz, {}–{} s (mass {}, peak t {}, p = {})",
        measure_title(get("measure")),
        get("channel_a"),
        get("channel_b"),
        num("freq_from"),
        num("freq_to"),
        num("time_from"),
        num("time_to"),
        num("mass"),
        num("peak_t"),
        num("p")
    )
}

/// The rows of a contrast stage's table marked significant.
fn significant_rows(run: &RunOutput, stage: &str) -> Option<(Vec<String>, Vec<Vec<String>>)> {
    let t = run
        .tables
        .iter()
        .find(|t| t.owner.is_none() && t.stage == stage)?;
    let col = t.header.iter().position(|h| h == "significant")?;
    let rows = t
        .rows
        .iter()
        .filter(|r| r.get(col).is_some_and(|v| v == "true"))
        .cloned()
        .collect();
    Some((t.header.clone(), rows))
}

/// The cluster table of each contrast stage, significant rows first and marked.
fn cluster_tables(run: &RunOutput, stats: &[StatArray], max_rows: usize) -> String {
    let mut out = String::new();
    for s in stats {
        let Some(t) = run
            .tables
            .iter()
            .find(|t| t.owner.is_none() && t.stage == s.stage)
        else {
            continue;
        };
        let col = t.header.iter().position(|h| h == "significant");
        let is_sig = |r: &Vec<String>| col.is_some_and(|c| r.get(c).is_some_and(|v| v == "true"));
        let mut rows: Vec<&Vec<String>> = t.rows.iter().filter(|r| is_sig(r)).collect();
        let n_sig = rows.len();
        rows.extend(t.rows.iter().filter(|r| !is_sig(r)));
        let _ = write!(
            out,
            "<h3>Clusters of stage {} ({} significant of {})</h3>",
            esc(&s.stage),
            n_sig,
            t.rows.len()
        );
        if rows.len() > max_rows {
            let _ = write!(
                out,
                "<p>First {max_rows} of {} rows shown, significant ones first; {} holds all.</p>",
                rows.len(),
                esc(&t.path.display().to_string())
            );
        }
        out.push_str("<div class=\"scroll\"><table><tr>");
        for h in &t.header {
            let _ = write!(out, "<th>{}</th>", esc(h));
        }
        out.push_str("</tr>\n");
        for (i, r) in rows.iter().take(max_rows).enumerate() {
            out.push_str(if i < n_sig {
                "<tr class=\"sig\">"
            } else {
                "<tr>"
            });
            for cell in r.iter() {
                let _ = write!(out, "<td>{}</td>", esc(cell));
            }
            out.push_str("</tr>\n");
        }
        out.push_str("</table></div>\n");
    }
    out
}

fn summary(m: &Manifest, dir: &Path) -> String {
    let mut rows: Vec<(String, String)> = Vec::new();
    let raw = &m.raw;
    let format = format!(
        "{} v{}",
        str_of(raw, "format"),
        str_of(raw, "format_version")
    );
    rows.push(("format".into(), format));
    for part in ["tool", "pipeline", "platform"] {
        scalars(raw.get(part), part, &mut rows);
        if part == "pipeline" {
            rows.push(("run with overrides (--set)".into(), overrides(raw)));
        }
    }
    if let Some(inputs) = raw.get("inputs").and_then(Value::as_array) {
        let bytes: u64 = inputs
            .iter()
            .filter_map(|i| i.get("size").and_then(Value::as_u64))
            .sum();
        rows.push((
            "input files".into(),
            format!("{} ({} bytes in all)", inputs.len(), bytes),
        ));
    }
    let computed = m.units.iter().filter(|u| u.status == "computed").count();
    let cached = m.units.iter().filter(|u| u.status == "cached").count();
    rows.push((
        "units".into(),
        format!("{} ({computed} computed, {cached} cached)", m.units.len()),
    ));
    rows.push(("warnings".into(), m.warnings.len().to_string()));
    for k in ["started", "finished"] {
        rows.push((k.into(), str_of(raw, k)));
    }
    rows.push((
        "manifest".into(),
        dir.join("manifest.json").display().to_string(),
    ));
    let mut out = String::from("<dl class=\"kv\">");
    for (k, v) in rows.iter().filter(|(_, v)| !v.trim().is_empty()) {
        let _ = write!(out, "<dt>{}</dt><dd>{}</dd>", esc(k), esc(v));
    }
    out.push_str("</dl>\n");
    out
}

/// The run's `--set` overrides as the manifest lists them (`pipeline.overrides`), one after
/// another, or `none`.
fn overrides(raw: &Value) -> String {
    match raw.pointer("/pipeline/overrides").and_then(Value::as_array) {
        None => "not recorded in the manifest".to_string(),
        Some(list) if list.is_empty() => "none".to_string(),
        Some(list) => list
            .iter()
            .map(|v| v.as_str().map_or_else(|| v.to_string(), str::to_string))
            .collect::<Vec<_>>()
            .join("; "),
    }
}

/// `part.field: value` for the scalar fields of an object (nested objects one level down).
fn scalars(v: Option<&Value>, prefix: &str, rows: &mut Vec<(String, String)>) {
    match v {
        Some(Value::Object(map)) => {
            for (k, v) in map {
                match v {
                    Value::Object(_) => scalars(Some(v), &format!("{prefix}.{k}"), rows),
                    Value::Array(_) | Value::Null => {}
                    Value::String(s) => rows.push((format!("{prefix}.{k}"), s.clone())),
                    other => rows.push((format!("{prefix}.{k}"), other.to_string())),
                }
            }
        }
        Some(Value::String(s)) => rows.push((prefix.to_string(), s.clone())),
        _ => {}
    }
}

fn stages(m: &Manifest, ctx: &Ctx<'_>, html_dir: &Path) -> String {
    let mut out = figures_of(ctx, FigureKind::StageGraph, html_dir);
    if m.units.is_empty() {
        out.push_str("<p>The manifest lists no units.</p>");
        return out;
    }
    out.push_str(
        "<h3>Units</h3><div class=\"scroll\"><table><tr><th>stage</th><th>subject</th><th>op</th>\
         <th>status</th><th>seconds</th><th>output shape</th></tr>\n",
    );
    for u in &m.units {
        let shape: Vec<String> = u.shapes.iter().map(|s| format!("{s:?}")).collect();
        let secs = u.seconds.map(|s| format!("{s:.2}")).unwrap_or_default();
        let _ = writeln!(
            out,
            "<tr class=\"{cls}\"><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td class=\"n\">{}</td><td>{}</td></tr>",
            esc(&u.stage),
            esc(u.subject.as_deref().unwrap_or("group")),
            esc(&u.op),
            esc(&u.status),
            secs,
            esc(&shape.join(", ")),
            cls = if u.status == "cached" { "cached" } else { "computed" },
        );
    }
    out.push_str("</table></div>\n");
    out
}

/// One row of the epoch table: the keys that locate it and its counts.
type EpochRow = (Vec<String>, Vec<(String, f64)>);

/// Flattens the manifest's epoch record, whatever its nesting: objects of numbers become rows
/// located by the keys above them; lists of objects split into text (keys) and number fields.
fn epoch_rows(v: &Value, path: &mut Vec<String>, out: &mut Vec<EpochRow>) {
    match v {
        Value::Object(map) if !map.is_empty() && map.values().all(Value::is_number) => {
            let counts = map
                .iter()
                .filter_map(|(k, n)| Some((k.clone(), n.as_f64()?)))
                .collect();
            out.push((path.clone(), counts));
        }
        Value::Object(map) => {
            for (k, child) in map {
                path.push(k.clone());
                epoch_rows(child, path, out);
                path.pop();
            }
        }
        Value::Array(items) => {
            for item in items {
                let Value::Object(map) = item else { continue };
                let mut keys = path.clone();
                let mut counts = Vec::new();
                for (k, f) in map {
                    match f {
                        Value::Number(n) => counts.extend(n.as_f64().map(|n| (k.clone(), n))),
                        Value::String(s) => keys.push(s.clone()),
                        _ => {}
                    }
                }
                out.push((keys, counts));
            }
        }
        _ => {}
    }
}

/// Names the key columns: a column whose values are all subjects is `subject`, all stages is
/// `stage`; otherwise the last is `condition` and the others are numbered.
fn key_names(rows: &[EpochRow], m: &Manifest) -> Vec<String> {
    let depth = rows.iter().map(|r| r.0.len()).max().unwrap_or(0);
    let subjects: BTreeSet<&str> = m
        .units
        .iter()
        .filter_map(|u| u.subject.as_deref())
        .collect();
    let stages: BTreeSet<&str> = m.units.iter().map(|u| u.stage.as_str()).collect();
    (0..depth)
        .map(|i| {
            let col: Vec<&str> = rows
                .iter()
                .filter_map(|r| r.0.get(i).map(String::as_str))
                .collect();
            if !col.is_empty()
                && col
                    .iter()
                    .all(|c| subjects.contains(c) || c.starts_with("sub-"))
            {
                "subject".to_string()
            } else if !col.is_empty() && col.iter().all(|c| stages.contains(c)) {
                "stage".to_string()
            } else if i + 1 == depth {
                "condition".to_string()
            } else {
                format!("key {}", i + 1)
            }
        })
        .collect()
}

fn epochs(m: &Manifest) -> String {
    let mut rows = Vec::new();
    epoch_rows(&m.epochs, &mut Vec::new(), &mut rows);
    if rows.is_empty() {
        return if m.epochs.is_null() {
            "<p>The manifest records no epoch counts.</p>".to_string()
        } else {
            format!(
                "<pre>{}</pre>",
                esc(&serde_json::to_string_pretty(&m.epochs).unwrap_or_default())
            )
        };
    }
    let keys = key_names(&rows, m);
    let mut counts: Vec<String> = Vec::new();
    for (_, c) in &rows {
        for (k, _) in c {
            if !counts.contains(k) {
                counts.push(k.clone());
            }
        }
    }
    let mut out = String::from("<div class=\"scroll\"><table><tr>");
    for h in keys.iter().chain(&counts) {
        let _ = write!(out, "<th>{}</th>", esc(h));
    }
    out.push_str("</tr>\n");
    for (k, c) in &rows {
        out.push_str("<tr>");
        for i in 0..keys.len() {
            let _ = write!(
                out,
                "<td>{}</td>",
                esc(k.get(i).map(String::as_str).unwrap_or(""))
            );
        }
        for name in &counts {
            let v = c
                .iter()
                .find(|(n, _)| n == name)
                .map(|(_, v)| super::axes::fmt_num(*v));
            let _ = write!(out, "<td class=\"n\">{}</td>", v.unwrap_or_default());
        }
        out.push_str("</tr>\n");
    }
    out.push_str("</table></div>\n");
    out
}

fn warnings(m: &Manifest) -> String {
    if m.warnings.is_empty() {
        return "<p>The run recorded no warnings.</p>".to_string();
    }
    let items: String = m
        .warnings
        .iter()
        .map(|w| format!("<li>{}</li>\n", esc(w)))
        .collect();
    format!("<ul>\n{items}</ul>\n")
}

fn not_drawn(list: &[String]) -> String {
    if list.is_empty() {
        return "<p>Every exported array was drawn.</p>".to_string();
    }
    let items: String = list
        .iter()
        .map(|w| format!("<li>{}</li>\n", esc(w)))
        .collect();
    format!("<p>Found in the output folder but not drawn:</p><ul>\n{items}</ul>\n")
}

fn figures_of(ctx: &Ctx<'_>, kind: FigureKind, html_dir: &Path) -> String {
    figures_except(ctx, kind, html_dir, &[])
}

/// The figures of one kind, without those already shown (the findings' key figures, which
/// are linked instead).
fn figures_except(ctx: &Ctx<'_>, kind: FigureKind, html_dir: &Path, shown: &[String]) -> String {
    let mut out = String::new();
    let mut last_source: Option<String> = None;
    for f in ctx.figures.iter().filter(|f| f.info.kind == kind) {
        if shown.contains(&f.info.id) {
            let _ = writeln!(
                out,
                "<p>“{}”: shown under <a href=\"#fig-{}\">Findings</a>.</p>",
                esc(&f.info.title),
                esc(&f.info.id)
            );
            continue;
        }
        // Subjects' maps come pair by pair (every subject's first pair, then the next): one
        // heading per pair and measure; other figures: one per array.
        let group = match (kind, &f.info.pair, &f.info.measure) {
            (FigureKind::SubjectMap, Some(p), Some(m)) => {
                let stage = f.info.source.split_once('/').map_or("", |s| s.1);
                format!(
                    "{}, {}–{}, stage {stage}: subject by subject",
                    super::quantity::measure_title(m),
                    p[0],
                    p[1]
                )
            }
            _ => heading(&f.info.source),
        };
        if kind != FigureKind::StageGraph && last_source.as_ref() != Some(&group) {
            let _ = writeln!(out, "<h3>{}</h3>", esc(&group));
            last_source = Some(group);
        }
        out.push_str(&figure(f, html_dir));
    }
    if out.is_empty() {
        out.push_str("<p>None in this report (see “Not drawn” under Provenance).</p>\n");
    }
    out
}

/// `subject · stage` heading of an array's figures.
fn heading(source: &str) -> String {
    let (owner, stage) = source.split_once('/').unwrap_or((source, ""));
    match owner {
        super::tf::MEAN_OWNER => format!("Mean over subjects, stage {stage}"),
        "group" => format!("Group, stage {stage}"),
        s => format!("Subject {s}, stage {stage}"),
    }
}

fn rel(path: &Path, base: &Path) -> String {
    path.strip_prefix(base)
        .unwrap_or(path)
        .display()
        .to_string()
}

fn figure(f: &Rendered, html_dir: &Path) -> String {
    let i = &f.info;
    let mut scales = String::new();
    for b in &i.colour_bars {
        let (dlo, dhi) = b.data_range.unwrap_or((f64::NAN, f64::NAN));
        let _ = write!(
            scales,
            "<span class=\"scale\" data-vmin=\"{}\" data-vmax=\"{}\" data-data-min=\"{}\" data-data-max=\"{}\" \
             data-map=\"{}\" data-units=\"{}\">{}: {} to {}</span>",
            b.vmin,
            b.vmax,
            dlo,
            dhi,
            match b.map {
                super::MapKind::Sequential => "sequential",
                super::MapKind::Diverging => "diverging",
            },
            esc(&b.units),
            esc(&b.label),
            super::axes::fmt_num(b.vmin),
            super::axes::fmt_num(b.vmax),
        );
    }
    format!(
        "<figure id=\"fig-{id}\" data-figure=\"{id}\"><img loading=\"lazy\" decoding=\"async\" src=\"data:image/png;base64,{png}\" \
         width=\"{w}\" height=\"{h}\" alt=\"{alt}\">\n<figcaption>{cap}<br>{scales}\
         <span class=\"files\">Files: <a href=\"{svg}\">SVG</a><a href=\"{pngf}\">PNG</a></span>\
         </figcaption></figure>\n",
        id = esc(&i.id),
        png = f.png_base64,
        w = i.size.0.round(),
        h = i.size.1.round(),
        alt = esc(&i.title),
        cap = esc(&f.caption),
        svg = esc(&rel(&i.svg, html_dir)),
        pngf = esc(&rel(&i.png, html_dir)),
    )
}

fn tables(list: &[Table], max_rows: usize) -> String {
    if list.is_empty() {
        return "<p>The output folder holds no tables.</p>".to_string();
    }
    let mut out = String::new();
    for t in list {
        let name = t
            .path
            .file_name()
            .map(|n| n.to_string_lossy().into_owned())
            .unwrap_or_default();
        let shown = match &t.owner {
            Some(o) => format!("{o}/{name}"),
            None => name,
        };
        let _ = write!(
            out,
            "<h3>{} ({})</h3>",
            esc(&shown),
            crate::words::count(t.rows.len(), "row", "rows")
        );
        let (header, rows) = match group_rows(t) {
            Some(p) => {
                out.push_str(
                    "<p>The group rows (<code>subject = group</code>); the file also holds every \
                     subject's own rows.</p>",
                );
                p
            }
            None => (t.header.clone(), t.rows.clone()),
        };
        if rows.len() > max_rows {
            let _ = write!(
                out,
                "<p>First {max_rows} of {} lines shown; the file holds all of them.</p>",
                rows.len()
            );
        }
        out.push_str(&html_table(&header, &rows[..rows.len().min(max_rows)]));
    }
    out
}

fn html_table(header: &[String], rows: &[Vec<String>]) -> String {
    let mut out = String::from("<div class=\"scroll\"><table><tr>");
    for h in header {
        let _ = write!(out, "<th>{}</th>", esc(h));
    }
    out.push_str("</tr>\n");
    for r in rows {
        out.push_str("<tr>");
        for cell in r {
            let cls = if cell.parse::<f64>().is_ok() {
                " class=\"n\""
            } else {
                ""
            };
            let _ = write!(out, "<td{cls}>{}</td>", esc(cell));
        }
        out.push_str("</tr>\n");
    }
    out.push_str("</table></div>\n");
    out
}

/// The group rows of an aggregate's tidy table (those with `subject = group`), without the
/// subject column; a long-form `statistic` column (value last) is spread into one column per
/// statistic. `None` for tables without group rows.
fn group_rows(t: &Table) -> Option<(Vec<String>, Vec<Vec<String>>)> {
    let subj = t.header.iter().position(|h| h == "subject")?;
    let group: Vec<&Vec<String>> = t
        .rows
        .iter()
        .filter(|r| r.get(subj).is_some_and(|s| s == "group"))
        .collect();
    if group.is_empty() {
        return None;
    }
    if let Some(stat) = t.header.iter().position(|h| h == "statistic") {
        return spread_statistic(t, &group, subj, stat);
    }
    let keep: Vec<usize> = (0..t.header.len()).filter(|&i| i != subj).collect();
    let pick = |r: &Vec<String>| {
        keep.iter()
            .map(|&i| r.get(i).cloned().unwrap_or_default())
            .collect()
    };
    Some((pick(&t.header), group.into_iter().map(pick).collect()))
}

fn spread_statistic(
    t: &Table,
    group: &[&Vec<String>],
    subj: usize,
    stat: usize,
) -> Option<(Vec<String>, Vec<Vec<String>>)> {
    let val = t.header.len().checked_sub(1)?;
    let keys: Vec<usize> = (0..val).filter(|&i| i != stat && i != subj).collect();
    let mut stats: Vec<String> = Vec::new();
    let mut order: Vec<Vec<String>> = Vec::new();
    let mut cells: BTreeMap<Vec<String>, BTreeMap<String, String>> = BTreeMap::new();
    for r in group {
        let key: Vec<String> = keys
            .iter()
            .map(|&i| r.get(i).cloned().unwrap_or_default())
            .collect();
        let (s, v) = (r.get(stat)?.clone(), r.get(val)?.clone());
        if !stats.contains(&s) {
            stats.push(s.clone());
        }
        if !cells.contains_key(&key) {
            order.push(key.clone());
        }
        cells.entry(key).or_default().insert(s, v);
    }
    let mut header: Vec<String> = keys.iter().map(|&i| t.header[i].clone()).collect();
    header.extend(stats.iter().cloned());
    let rows = order
        .into_iter()
        .map(|k| {
            let by_stat = cells.get(&k).cloned().unwrap_or_default();
            let mut row = k;
            row.extend(
                stats
                    .iter()
                    .map(|s| by_stat.get(s).cloned().unwrap_or_default()),
            );
            row
        })
        .collect();
    Some((header, rows))
}
