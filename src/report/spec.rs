//! The pipeline's `report:` block: what the report shows, chosen by the study's author.
//!
//! ```yaml
//! report:
//!   pairs: [[F3, P4]]          # the pairs whose maps are drawn (default: see below)
//!   contrast: [left, right]    # the difference drawn, first − second (default: the contrast
//!                              # stage's `compare`, else the first two conditions in the
//!                              # order the epoch stage lists them)
//!   stages: [norm, group]      # the exported stages drawn (default: all)
//!   figures: 12                # at most this many figures per section
//!   sweep:                     # the value drawn across a sweep's variants (each optional)
//!     { measure: ppc, pair: [F3, P4], band: theta, window: late }
//! ```
//! `report: true` writes the report after every `run` with the defaults; a block does too.
//! Without `pairs`, the report draws the pairs with significant clusters of a `contrast` stage,
//! else the pairs with the largest condition difference, and says so in every caption.

use serde::Deserialize;

use super::ReportOptions;
use crate::pipeline::raw::Collector;
use crate::pipeline::resolve::ResolvedPipeline;
use crate::pipeline::yaml::{Node, NodeKind};

/// The `report:` block as written.
#[derive(Clone, Debug, Default, PartialEq, Deserialize, phasewise_stages::schemars::JsonSchema)]
#[schemars(crate = "phasewise_stages::schemars")]
#[serde(deny_unknown_fields)]
pub struct ReportSpec {
    /// Channel pairs to draw.
    #[serde(default)]
    pub pairs: Vec<[String; 2]>,
    /// The condition difference to draw, `[a, b]` for a − b.
    #[serde(default)]
    pub contrast: Option<[String; 2]>,
    /// Exported stages to draw; empty: all.
    #[serde(default)]
    pub stages: Vec<String>,
    /// At most this many figures per section.
    #[serde(default)]
    pub figures: Option<usize>,
    /// The quantity drawn across a sweep's variants (when the output folder holds a sweep).
    #[serde(default)]
    pub sweep: Option<SweepSpec>,
}

/// The report block's `sweep:`: which group value the sweep section draws across the
/// variants. Each part left out is chosen as the report chooses it (src/report/variants.rs).
#[derive(Clone, Debug, Default, PartialEq, Deserialize, phasewise_stages::schemars::JsonSchema)]
#[schemars(crate = "phasewise_stages::schemars")]
#[serde(deny_unknown_fields)]
pub struct SweepSpec {
    /// The measure (`ppc`, `wpli`, ...).
    #[serde(default)]
    pub measure: Option<String>,
    /// The channel pair.
    #[serde(default)]
    pub pair: Option<[String; 2]>,
    /// The band (a name of the aggregate's `bands`).
    #[serde(default)]
    pub band: Option<String>,
    /// The window (a name of the aggregate's `windows`).
    #[serde(default)]
    pub window: Option<String>,
}

/// Reads `report:` — `true`/`false` or a block. Returns (write after run, the block).
pub fn read(node: &Node, c: &mut Collector<'_>) -> (bool, Option<ReportSpec>) {
    match &node.kind {
        NodeKind::Map(_) => match serde_json::from_value::<ReportSpec>(node.to_json()) {
            Ok(spec) => {
                if spec.figures == Some(0) {
                    c.at(
                        node.origin,
                        "report.figures",
                        "expected at least 1 figure per section",
                    );
                }
                (true, Some(spec))
            }
            Err(e) => {
                let known = ["pairs", "contrast", "stages", "figures", "sweep"];
                let msg = e.to_string();
                let hint = msg
                    .split('`')
                    .nth(1)
                    .map(|k| crate::words::did_you_mean(k, known.iter().copied()))
                    .unwrap_or_default();
                c.at(
                    node.origin,
                    "report",
                    format!(
                        "{msg}{hint} (expected pairs: [[a, b], ...], contrast: [a, b], stages: [...], \
                         figures: N, sweep: {{measure, pair, band, window}})"
                    ),
                );
                (false, None)
            }
        },
        _ => match node.to_json() {
            serde_json::Value::Bool(b) => (b, None),
            _ => {
                c.at(
                    node.origin,
                    "report",
                    format!(
                        "expected true, false or a block, found {}",
                        node.kind_name()
                    ),
                );
                (false, None)
            }
        },
    }
}

/// The report's options for a resolved pipeline: its `report:` block and the conditions in the
/// order the pipeline's `epoch` stage lists them.
pub fn options_for(p: &ResolvedPipeline) -> ReportOptions {
    let mut o = ReportOptions::default();
    for s in &p.stages {
        if s.op.name() != "epoch" {
            continue;
        }
        if let NodeKind::Map(entries) = &s.params_node.kind {
            for (k, v) in entries {
                if k.as_str() != Some("conditions") {
                    continue;
                }
                if let NodeKind::Map(conds) = &v.kind {
                    for (name, _) in conds {
                        if let Some(n) = name.as_str() {
                            if !o.condition_order.iter().any(|c| c == n) {
                                o.condition_order.push(n.to_string());
                            }
                        }
                    }
                }
            }
        }
    }
    if let Some(spec) = &p.report_spec {
        o.pairs = spec.pairs.clone();
        o.contrast = spec.contrast.clone();
        o.stages = spec.stages.clone();
        if let Some(n) = spec.figures {
            o.per_section = n.max(1);
        }
        o.sweep = spec.sweep.clone().unwrap_or_default();
    }
    o
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::pipeline::yaml::{parse, Origin};
    use std::path::Path;

    fn read_text(text: &str) -> ((bool, Option<ReportSpec>), Vec<String>) {
        let root = parse(text, |line, col| Origin::File { line, col }).unwrap();
        let NodeKind::Map(entries) = &root.kind else {
            panic!("not a map")
        };
        let node = &entries[0].1;
        let mut c = Collector::new(Path::new("p.yaml"), &[]);
        let out = read(node, &mut c);
        (out, c.diagnostics.iter().map(|d| d.to_string()).collect())
    }

    #[test]
    fn a_block_or_a_boolean() {
        let ((on, spec), errs) = read_text(
            "report:\n  pairs: [[F3, P4]]\n  contrast: [right, left]\n  stages: [norm]\n  figures: 4\n",
        );
        assert!(on && errs.is_empty(), "{errs:?}");
        let spec = spec.unwrap();
        assert_eq!(spec.pairs, vec![["F3".to_string(), "P4".to_string()]]);
        assert_eq!(
            spec.contrast,
            Some(["right".to_string(), "left".to_string()])
        );
        assert_eq!(spec.stages, vec!["norm".to_string()]);
        assert_eq!(spec.figures, Some(4));
        assert_eq!(read_text("report: true\n").0, (true, None));
        assert_eq!(read_text("report: false\n").0, (false, None));
    }

    #[test]
    fn a_wrong_block_names_the_line_and_the_closest_key() {
        let ((on, _), errs) = read_text("report:\n  pair: [[F3, P4]]\n");
        assert!(!on);
        let e = errs.join("\n");
        assert!(e.contains("p.yaml:2:"), "{e}");
        assert!(
            e.contains("unknown field `pair`") && e.contains("pairs"),
            "{e}"
        );
        let (_, errs) = read_text("report: 3\n");
        assert!(
            errs.join("").contains("expected true, false or a block"),
            "{errs:?}"
        );
    }
}
