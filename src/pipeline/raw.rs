//! The raw pipeline model: the fields of a pipeline file as written, with their positions.
//!
//! This step checks only the *shape* of the file (known keys, the right kinds of values); whether
//! an op exists, whether its params are valid and whether inputs name real stages is decided in
//! [`resolve`](super::resolve). `--set` overrides are applied here, to the raw params, so that
//! the op validates an overridden value exactly like one written in the file.

use std::path::{Path, PathBuf};

use super::yaml::{self, file_position, Node, NodeKind, Origin};
use super::Diagnostic;
use crate::words::did_you_mean;

/// Keys allowed at the top of a pipeline file.
pub const TOP_KEYS: &[&str] = &["name", "data", "output", "stages", "report"];
/// Keys allowed under `data`.
pub const DATA_KEYS: &[&str] = &[
    "recordings",
    "events",
    "channels",
    "rate",
    "series",
    "format",
];
/// Keys allowed in a stage.
pub const STAGE_KEYS: &[&str] = &["op", "input", "params", "cache", "export", "format"];

/// A value with the place it came from.
#[derive(Clone, Debug, PartialEq)]
pub struct Spanned<T> {
    /// The value.
    pub value: T,
    /// Where it was written.
    pub origin: Origin,
}

/// A pipeline file as written.
#[derive(Clone, Debug, PartialEq)]
pub struct RawPipeline {
    /// The file it came from.
    pub file: PathBuf,
    /// Free text for the manifest.
    pub name: Option<String>,
    /// The recordings glob, relative to the file.
    pub recordings: Option<Spanned<String>>,
    /// `sidecar` or `annotations`.
    pub events: Option<Spanned<String>>,
    /// What to read of each recording (`data.channels`, `data.rate`, `data.series`,
    /// `data.format`), as written: the field name and its value.
    pub choice: Vec<(String, Node)>,
    /// The output folder, relative to the file.
    pub output: Option<Spanned<String>>,
    /// Whether `run` also writes the HTML report (`<output>/report.html`).
    pub report: bool,
    /// The `report:` block, when one is written (src/report/spec.rs).
    pub report_spec: Option<crate::report::spec::ReportSpec>,
    /// The stages, in file order.
    pub stages: Vec<RawStage>,
    /// Where the `stages` mapping is (for "no stages" errors).
    pub stages_origin: Origin,
}

/// One stage as written.
#[derive(Clone, Debug, PartialEq)]
pub struct RawStage {
    /// The stage's name (its key under `stages`).
    pub name: Spanned<String>,
    /// The op name.
    pub op: Option<Spanned<String>>,
    /// The input names (one string or a list).
    pub inputs: Vec<Spanned<String>>,
    /// The params mapping (an empty mapping when absent).
    pub params: Node,
    /// Whether the output is stored in the cache.
    pub cache: bool,
    /// True when the file says `cache:` for this stage (else the runner's storage policy may
    /// decide, [`crate::recipe::storage_policy`]).
    pub cache_given: bool,
    /// Whether the output is exported.
    pub export: bool,
    /// How it is exported (`format:`), with where the key was written when it was.
    pub format: crate::output::ExportFormat,
    /// Where `format:` was written, if it was.
    pub format_origin: Option<Origin>,
}

/// One `--set STAGE.PARAM=VALUE` argument.
#[derive(Clone, Debug, PartialEq)]
pub struct Override {
    /// The argument as given.
    pub text: String,
    /// The stage.
    pub stage: String,
    /// The dotted path inside the stage's params.
    pub path: Vec<String>,
    /// The value, parsed as YAML.
    pub value: Node,
}

/// Collects diagnostics for one file.
pub struct Collector<'a> {
    file: &'a Path,
    overrides: &'a [Override],
    /// What was found so far.
    pub diagnostics: Vec<Diagnostic>,
}

impl<'a> Collector<'a> {
    /// A collector for `file`, whose override origins refer to `overrides`.
    pub fn new(file: &'a Path, overrides: &'a [Override]) -> Self {
        Collector {
            file,
            overrides,
            diagnostics: Vec::new(),
        }
    }

    /// Record a problem at `origin`.
    pub fn at(&mut self, origin: Origin, field: impl Into<String>, message: impl Into<String>) {
        let field = field.into();
        let message = message.into();
        let diagnostic = match origin {
            Origin::File { line, col } => Diagnostic {
                file: Some(self.file.to_path_buf()),
                line,
                col,
                field,
                message,
            },
            Origin::Override(i) => Diagnostic {
                file: None,
                line: 0,
                col: 0,
                field: format!(
                    "--set {}",
                    self.overrides.get(i).map_or("?", |o| o.text.as_str())
                ),
                message: format!("{field}: {message}"),
            },
        };
        self.diagnostics.push(diagnostic);
    }
}

/// Parse `--set` arguments; problems are reported as command-line diagnostics.
pub fn parse_overrides(args: &[String]) -> (Vec<Override>, Vec<Diagnostic>) {
    let mut overrides = Vec::new();
    let mut problems = Vec::new();
    for (i, text) in args.iter().enumerate() {
        match parse_override(i, text) {
            Ok(o) => overrides.push(o),
            Err(e) => problems.push(Diagnostic {
                file: None,
                line: 0,
                col: 0,
                field: format!("--set {text}"),
                message: e.to_string(),
            }),
        }
    }
    (overrides, problems)
}

/// Why a `--set` argument was refused (reported as a command-line diagnostic).
#[derive(Clone, Debug, PartialEq, thiserror::Error)]
pub enum OverrideError {
    /// No `=`.
    #[error("expected STAGE.PARAM=VALUE, found no `=`")]
    NoEquals,
    /// The left side is not a stage name and a dotted path.
    #[error("expected STAGE.PARAM=VALUE with a dotted path, found `{lhs}`")]
    NotDotted {
        /// The left side as written.
        lhs: String,
    },
    /// The right side is not YAML.
    #[error("the value `{rhs}` is not valid YAML: {}", .source.message)]
    NotYaml {
        /// The right side as written.
        rhs: String,
        /// The YAML reader's error (its position is within the value).
        source: yaml::YamlError,
    },
    /// The path goes through a value that is not a mapping.
    #[error("cannot set `{key}` inside {kind}, which is not a mapping")]
    NotAMapping {
        /// The path's next key.
        key: String,
        /// What the value there is (`a list`, `a scalar`).
        kind: &'static str,
    },
}

fn parse_override(index: usize, text: &str) -> Result<Override, OverrideError> {
    let (lhs, rhs) = text.split_once('=').ok_or(OverrideError::NoEquals)?;
    let mut parts = lhs.trim().split('.');
    let stage = parts.next().unwrap_or_default().to_string();
    let path: Vec<String> = parts.map(str::to_string).collect();
    if stage.is_empty() || path.is_empty() || path.iter().any(String::is_empty) {
        return Err(OverrideError::NotDotted {
            lhs: lhs.to_string(),
        });
    }
    let value =
        yaml::parse(rhs, |_, _| Origin::Override(index)).map_err(|e| OverrideError::NotYaml {
            rhs: rhs.to_string(),
            source: e,
        })?;
    // An empty value parses as an empty document; treat it as an explicit null.
    let value = if rhs.trim().is_empty() {
        Node {
            origin: Origin::Override(index),
            kind: NodeKind::Scalar {
                text: String::new(),
                plain: true,
            },
        }
    } else {
        value
    };
    Ok(Override {
        text: text.to_string(),
        stage,
        path,
        value,
    })
}

/// Read the tree of a pipeline file into the raw model.
pub fn read(root: &Node, file: &Path, c: &mut Collector<'_>) -> RawPipeline {
    let mut raw = RawPipeline {
        file: file.to_path_buf(),
        name: None,
        recordings: None,
        events: None,
        choice: Vec::new(),
        output: None,
        report: false,
        report_spec: None,
        stages: Vec::new(),
        stages_origin: root.origin,
    };
    let Some(entries) = expect_map(root, "(top level)", c) else {
        return raw;
    };
    for (key, value) in entries {
        let k = key.as_str().unwrap_or_default();
        match k {
            "name" => raw.name = text(value, "name", c).map(|s| s.value),
            "data" => read_data(value, &mut raw, c),
            "output" => raw.output = text(value, "output", c),
            "report" => (raw.report, raw.report_spec) = crate::report::spec::read(value, c),
            "stages" => {
                raw.stages_origin = value.origin;
                raw.stages = read_stages(value, c);
            }
            _ => unknown_key(key, k, "", TOP_KEYS, c),
        }
    }
    raw
}

fn read_data(node: &Node, raw: &mut RawPipeline, c: &mut Collector<'_>) {
    let Some(entries) = expect_map(node, "data", c) else {
        return;
    };
    for (key, value) in entries {
        let k = key.as_str().unwrap_or_default();
        match k {
            "recordings" => raw.recordings = text(value, "data.recordings", c),
            "events" => raw.events = text(value, "data.events", c),
            "channels" | "rate" | "series" | "format" => {
                raw.choice.push((k.to_string(), value.clone()))
            }
            _ => unknown_key(key, k, "data.", DATA_KEYS, c),
        }
    }
}

fn read_stages(node: &Node, c: &mut Collector<'_>) -> Vec<RawStage> {
    let Some(entries) = expect_map(node, "stages", c) else {
        return Vec::new();
    };
    let mut stages: Vec<RawStage> = Vec::new();
    for (key, value) in entries {
        let duplicate = stages
            .iter()
            .any(|s| Some(s.name.value.as_str()) == key.as_str());
        if let Some(stage) = read_stage(key, value, c).filter(|_| !duplicate) {
            stages.push(stage);
        }
    }
    stages
}

fn read_stage(key: &Node, node: &Node, c: &mut Collector<'_>) -> Option<RawStage> {
    let name = key.as_str().unwrap_or_default().to_string();
    let field = format!("stages.{name}");
    let entries = expect_map(node, &field, c)?;
    let mut stage = RawStage {
        name: Spanned {
            value: name,
            origin: key.origin,
        },
        op: None,
        inputs: Vec::new(),
        params: Node {
            origin: node.origin,
            kind: NodeKind::Map(Vec::new()),
        },
        cache: true,
        cache_given: false,
        export: false,
        format: Default::default(),
        format_origin: None,
    };
    for (key, value) in entries {
        let k = key.as_str().unwrap_or_default();
        let sub = format!("{field}.{k}");
        match k {
            "op" => stage.op = text(value, &sub, c),
            "input" => stage.inputs = inputs(value, &sub, c),
            "params" => {
                if expect_map(value, &sub, c).is_some() {
                    stage.params = value.clone();
                }
            }
            "cache" => {
                stage.cache = boolean(value, &sub, c).unwrap_or(true);
                stage.cache_given = true;
            }
            "export" => stage.export = boolean(value, &sub, c).unwrap_or(false),
            "format" => {
                stage.format_origin = Some(value.origin);
                stage.format = export_format(value, &sub, c).unwrap_or_default();
            }
            _ => unknown_key(key, k, &format!("{field}."), STAGE_KEYS, c),
        }
    }
    Some(stage)
}

fn inputs(node: &Node, field: &str, c: &mut Collector<'_>) -> Vec<Spanned<String>> {
    match &node.kind {
        NodeKind::Seq(items) => items.iter().filter_map(|i| text(i, field, c)).collect(),
        _ => text(node, field, c).into_iter().collect(),
    }
}

fn expect_map<'n>(
    node: &'n Node,
    field: &str,
    c: &mut Collector<'_>,
) -> Option<&'n [(Node, Node)]> {
    let Some(entries) = node.as_map() else {
        c.at(
            node.origin,
            field,
            format!("expected a mapping, found {}", node.kind_name()),
        );
        return None;
    };
    report_duplicates(entries, field, c);
    Some(entries)
}

/// A key written twice is a mistake whichever value was meant, so each repeat is reported.
fn report_duplicates(entries: &[(Node, Node)], field: &str, c: &mut Collector<'_>) {
    for (i, (key, _)) in entries.iter().enumerate() {
        let earlier = entries[..i]
            .iter()
            .find(|(k, _)| k.as_str() == key.as_str());
        if let Some((first, _)) = earlier {
            let name = key.as_str().unwrap_or_default();
            let what = if field == "stages" { "stage" } else { "key" };
            c.at(
                key.origin,
                format!("{field}.{name}"),
                format!(
                    "duplicate {what} `{name}` (first at line {})",
                    line_of(first.origin)
                ),
            );
        }
    }
}

fn text(node: &Node, field: &str, c: &mut Collector<'_>) -> Option<Spanned<String>> {
    match (&node.kind, node.to_json()) {
        (NodeKind::Scalar { text, .. }, serde_json::Value::String(_)) => Some(Spanned {
            value: text.clone(),
            origin: node.origin,
        }),
        _ => {
            c.at(
                node.origin,
                field,
                format!("expected text, found {}", node.kind_name()),
            );
            None
        }
    }
}

fn boolean(node: &Node, field: &str, c: &mut Collector<'_>) -> Option<bool> {
    match node.to_json() {
        serde_json::Value::Bool(b) if matches!(node.kind, NodeKind::Scalar { .. }) => Some(b),
        _ => {
            c.at(
                node.origin,
                field,
                format!("expected true or false, found {}", node.kind_name()),
            );
            None
        }
    }
}

/// A stage's `format:` value: one of [`crate::output::ExportFormat::NAMES`].
fn export_format(
    node: &Node,
    field: &str,
    c: &mut Collector<'_>,
) -> Option<crate::output::ExportFormat> {
    use crate::output::ExportFormat;
    let name = text(node, field, c)?;
    let format = ExportFormat::from_name(&name.value);
    if format.is_none() {
        c.at(
            node.origin,
            field,
            format!(
                "unknown export format `{}`, expected one of: {}{}",
                name.value,
                ExportFormat::NAMES.join(", "),
                did_you_mean(&name.value, ExportFormat::NAMES)
            ),
        );
    }
    format
}

fn unknown_key(key: &Node, name: &str, prefix: &str, allowed: &[&str], c: &mut Collector<'_>) {
    c.at(
        key.origin,
        format!("{prefix}{name}"),
        format!(
            "unknown key `{name}`, expected one of: {}{}",
            allowed.join(", "),
            did_you_mean(name, allowed.iter().copied())
        ),
    );
}

/// Apply `--set` overrides to the stages' params; an override of an unknown stage is reported.
pub fn apply_overrides(raw: &mut RawPipeline, overrides: &[Override], c: &mut Collector<'_>) {
    for (i, o) in overrides.iter().enumerate() {
        let Some(stage) = raw.stages.iter_mut().find(|s| s.name.value == o.stage) else {
            let names: Vec<&str> = raw.stages.iter().map(|s| s.name.value.as_str()).collect();
            c.at(
                Origin::Override(i),
                o.stage.clone(),
                format!(
                    "no stage `{}`; the stages are: {}{}",
                    o.stage,
                    names.join(", "),
                    did_you_mean(&o.stage, names.iter().copied())
                ),
            );
            continue;
        };
        if let Err(e) = set_path(&mut stage.params, &o.path, o.value.clone(), i) {
            c.at(Origin::Override(i), o.path.join("."), e.to_string());
        }
    }
}

fn set_path(
    node: &mut Node,
    path: &[String],
    value: Node,
    index: usize,
) -> Result<(), OverrideError> {
    let Some((first, rest)) = path.split_first() else {
        *node = value;
        return Ok(());
    };
    let NodeKind::Map(entries) = &mut node.kind else {
        return Err(OverrideError::NotAMapping {
            key: first.clone(),
            kind: node.kind_name(),
        });
    };
    let position = entries.iter().position(|(k, _)| k.as_str() == Some(first));
    let slot = match position {
        Some(p) => &mut entries[p].1,
        None => {
            let origin = Origin::Override(index);
            let key = Node {
                origin,
                kind: NodeKind::Scalar {
                    text: first.clone(),
                    plain: false,
                },
            };
            let empty = Node {
                origin,
                kind: NodeKind::Map(Vec::new()),
            };
            entries.push((key, empty));
            let last = entries.len() - 1;
            &mut entries[last].1
        }
    };
    set_path(slot, rest, value, index)
}

/// The line of an origin, for messages that refer to another place ("first defined at line 3").
pub fn line_of(origin: Origin) -> usize {
    file_position(origin).0
}
