//! Validation of a raw pipeline into a [`ResolvedPipeline`], the form the planner and executor
//! take: ops looked up, params replaced by each op's effective params, inputs checked, stages in
//! topological order, group stages marked, paths made absolute.
//!
//! Path rules (documented in DEVELOPERS.md): `data.recordings` is a glob relative to the pipeline
//! file and may point anywhere (data are only read). `output` must be relative to the pipeline
//! file; after `.`/`..` are resolved it may climb at most one level above the pipeline's folder
//! (`../results/x` from `pipelines/`), so a pipeline cannot write into arbitrary places. Stage
//! names become file names, so they are restricted to letters, digits, `-` and `_`.

use std::path::{Component, Path, PathBuf};

use phasewise_stages::io::{Choice, EventSource};
use std::sync::Arc;

use phasewise_stages::{BoundOp, DynOp, StageError};
use serde_json::Value;

use super::raw::{self, Collector, Override, RawPipeline, RawStage};
use super::yaml::{self, split_path, Node, NodeKind, Origin, PathStep};
use super::{Diagnostic, PipelineError};
use crate::graph::StageGraph;
use crate::words::did_you_mean;

/// The name by which stages refer to the data source.
pub const SOURCE: &str = "recordings";

/// A validated pipeline.
#[derive(Clone)]
pub struct ResolvedPipeline {
    /// The pipeline file as given.
    pub file: PathBuf,
    /// Its folder (paths in the file are relative to it).
    pub dir: PathBuf,
    /// blake3 of the file's bytes.
    pub file_blake3: String,
    /// The pipeline's name (the file stem when the file gives none).
    pub name: String,
    /// The recordings glob, relative to `dir`.
    pub recordings: String,
    /// Line and column of the glob in the file, for errors about it.
    pub recordings_at: (usize, usize),
    /// Where events come from.
    pub events: EventSource,
    /// Which channels are read, and the rate they are resampled to (`data.channels`,
    /// `data.rate`); part of every source's key when not the default.
    pub choice: Choice,
    /// The output folder.
    pub output: PathBuf,
    /// Line and column of `output:` in the file, for errors about it.
    pub output_at: (usize, usize),
    /// Whether `run` also writes the HTML report.
    pub report: bool,
    /// The `report:` block, when one is written.
    pub report_spec: Option<crate::report::spec::ReportSpec>,
    /// The `--set` arguments as given.
    pub overrides: Vec<String>,
    /// The stages in topological order.
    pub stages: Vec<ResolvedStage>,
}

/// A validated stage.
#[derive(Clone)]
pub struct ResolvedStage {
    /// The stage's name.
    pub name: String,
    /// The op with its params, parsed and checked once ([`DynOp::bind`]). Its effective params
    /// (the op's defaults filled in) are what is hashed into keys: [`ResolvedStage::params`].
    pub op: Arc<dyn BoundOp>,
    /// Input stage indices into `ResolvedPipeline::stages`; `None` is the data source.
    pub inputs: Vec<Option<usize>>,
    /// Consumers (indices).
    pub consumers: Vec<usize>,
    /// Whether outputs are stored in the cache.
    pub cache: bool,
    /// True when the file says `cache:` for this stage.
    pub cache_given: bool,
    /// True when the runner's storage policy decided not to store it
    /// ([`crate::recipe::storage_policy`]).
    pub unstored_by_policy: bool,
    /// Whether outputs are exported (asked for, or consumed by nothing).
    pub export: bool,
    /// How exported outputs are written (`format:`).
    pub format: crate::output::ExportFormat,
    /// True when the op joins subjects.
    pub joins: bool,
    /// True for a group stage (joins, or is downstream of one).
    pub group: bool,
    /// The params as written (with overrides), to point errors at lines.
    pub params_node: Node,
}

impl ResolvedStage {
    /// The effective params (the op's defaults filled in), as JSON: for keys and the manifest.
    pub fn params(&self) -> &Value {
        self.op.params()
    }
}

impl ResolvedPipeline {
    /// The stage called `name`.
    pub fn stage_index(&self, name: &str) -> Option<usize> {
        self.stages.iter().position(|s| s.name == name)
    }

    /// A diagnostic about the recordings glob.
    pub fn recordings_diagnostic(&self, message: String) -> Diagnostic {
        Diagnostic {
            file: Some(self.file.clone()),
            line: self.recordings_at.0,
            col: self.recordings_at.1,
            field: "data.recordings".into(),
            message,
        }
    }

    /// A diagnostic about the output folder (`output:`).
    pub fn output_diagnostic(&self, message: String) -> Diagnostic {
        Diagnostic {
            file: Some(self.file.clone()),
            line: self.output_at.0,
            col: self.output_at.1,
            field: "output".into(),
            message,
        }
    }

    /// A diagnostic for an op's error about stage `stage`, pointing at the param's line.
    pub fn stage_diagnostic(&self, stage: usize, error: &StageError) -> Diagnostic {
        let overrides: Vec<Override> = raw::parse_overrides(&self.overrides).0;
        let mut c = Collector::new(&self.file, &overrides);
        let s = &self.stages[stage];
        report_stage_error(&mut c, &s.name, &s.params_node, error);
        c.diagnostics.pop().unwrap_or_else(|| Diagnostic {
            file: Some(self.file.clone()),
            line: 0,
            col: 0,
            field: format!("stages.{}", s.name),
            message: error.to_string(),
        })
    }
}

/// The UTF-8 byte order mark, which some editors write at the start of a text file.
const BOM: char = '\u{feff}';

/// Load, check and resolve a pipeline file with `--set` overrides against the given ops.
pub fn load(
    file: &Path,
    overrides: &[String],
    ops: &[&dyn DynOp],
) -> Result<ResolvedPipeline, PipelineError> {
    let bytes = std::fs::read(file).map_err(|source| PipelineError::Read {
        path: file.to_path_buf(),
        source,
    })?;
    let (parsed, mut problems) = raw::parse_overrides(overrides);
    let text = String::from_utf8_lossy(&bytes);
    // A byte order mark that an editor put at the start is no part of the first key.
    let text = text.strip_prefix(BOM).unwrap_or(&text);
    let root = yaml::parse(text, |line, col| Origin::File { line, col }).map_err(|e| {
        PipelineError::Invalid(vec![Diagnostic {
            file: Some(file.to_path_buf()),
            line: e.line,
            col: e.col,
            field: "(YAML)".into(),
            message: e.message,
        }])
    })?;
    let mut c = Collector::new(file, &parsed);
    let mut raw = raw::read(&root, file, &mut c);
    raw::apply_overrides(&mut raw, &parsed, &mut c);
    let resolved = resolve(&raw, &bytes, overrides, ops, &mut c);
    problems.append(&mut c.diagnostics);
    match resolved {
        Some(p) if problems.is_empty() => Ok(p),
        _ => Err(PipelineError::Invalid(problems)),
    }
}

fn resolve(
    raw: &RawPipeline,
    bytes: &[u8],
    overrides: &[String],
    ops: &[&dyn DynOp],
    c: &mut Collector<'_>,
) -> Option<ResolvedPipeline> {
    let dir = raw.file.parent().map(Path::to_path_buf).unwrap_or_default();
    let recordings = required(&raw.recordings, "data.recordings", raw.stages_origin, c);
    let events = events(raw, c);
    let choice = choice(raw, c);
    let output = output_path(raw, &dir, c);
    let stages = resolve_stages(raw, ops, c);
    if raw.stages.is_empty() {
        c.at(raw.stages_origin, "stages", "expected at least one stage");
    }
    let name = raw.name.clone().unwrap_or_else(|| {
        raw.file
            .file_stem()
            .map(|s| s.to_string_lossy().into_owned())
            .unwrap_or_default()
    });
    Some(ResolvedPipeline {
        file: raw.file.clone(),
        dir,
        file_blake3: blake3::hash(bytes).to_hex().to_string(),
        name,
        recordings: recordings?,
        recordings_at: raw
            .recordings
            .as_ref()
            .map_or((0, 0), |r| yaml::file_position(r.origin)),
        events: events?,
        choice: choice?,
        output: output?,
        output_at: raw
            .output
            .as_ref()
            .map_or((0, 0), |o| yaml::file_position(o.origin)),
        report: raw.report,
        report_spec: raw.report_spec.clone(),
        overrides: overrides.to_vec(),
        stages: stages?,
    })
}

fn required(
    value: &Option<raw::Spanned<String>>,
    field: &str,
    fallback: Origin,
    c: &mut Collector<'_>,
) -> Option<String> {
    if value.is_none() {
        let origin = match fallback {
            Origin::File { .. } => Origin::File { line: 1, col: 1 },
            other => other,
        };
        c.at(origin, field, "missing; expected a value here");
    }
    value.as_ref().map(|v| v.value.clone())
}

fn events(raw: &RawPipeline, c: &mut Collector<'_>) -> Option<EventSource> {
    let Some(events) = &raw.events else {
        return Some(EventSource::Sidecar);
    };
    match events.value.as_str() {
        "sidecar" => Some(EventSource::Sidecar),
        "annotations" => Some(EventSource::Annotations),
        other => {
            c.at(
                events.origin,
                "data.events",
                format!("expected `sidecar` or `annotations`, found `{other}`"),
            );
            None
        }
    }
}

/// `data.channels` (a list of names), `data.rate` (Hz), `data.series` (NWB) and `data.format`,
/// each checked at its line.
fn choice(raw: &RawPipeline, c: &mut Collector<'_>) -> Option<Choice> {
    let mut choice = Choice::default();
    let mut ok = true;
    for (key, node) in &raw.choice {
        let field = format!("data.{key}");
        let value = node.to_json();
        let parsed = match key.as_str() {
            "channels" => serde_json::from_value(value)
                .map(|v| choice.channels = Some(v))
                .map_err(|_| "expected a list of channel names, e.g. [Fz, Cz, Pz]".to_string()),
            "series" => serde_json::from_value(value)
                .map(|v| choice.series = Some(v))
                .map_err(|_| "expected the name or path of an NWB ElectricalSeries".to_string()),
            "format" => serde_json::from_value(value)
                .map(|v| choice.format = Some(v))
                .map_err(|_| "expected `edf`, `brainvision` or `nwb`".to_string()),
            _ => serde_json::from_value(value)
                .map(|v| choice.rate = Some(v))
                .map_err(|_| "expected a sampling rate in Hz, e.g. 500".to_string()),
        };
        if let Err(message) = parsed {
            c.at(node.origin, field, message);
            ok = false;
        }
    }
    if let Err(e) = choice.check() {
        let (field, message) = match &e {
            StageError::Param { field, message } => (field.clone(), message.clone()),
            other => ("data".to_string(), other.to_string()),
        };
        let key = field.trim_start_matches("data.");
        let origin = raw
            .choice
            .iter()
            .find(|(k, _)| k == key)
            .map(|(_, n)| n.origin);
        c.at(origin.unwrap_or(raw.stages_origin), field, message);
        ok = false;
    }
    ok.then_some(choice)
}

fn output_path(raw: &RawPipeline, dir: &Path, c: &mut Collector<'_>) -> Option<PathBuf> {
    let written = required(&raw.output, "output", raw.stages_origin, c)?;
    let origin = raw.output.as_ref().map_or(raw.stages_origin, |o| o.origin);
    match check_output(&written) {
        Ok(relative) => Some(dir.join(relative)),
        Err(e) => {
            c.at(origin, "output", e.to_string());
            None
        }
    }
}

/// Why an `output:` path was refused.
#[derive(Clone, Debug, PartialEq, Eq, thiserror::Error)]
pub enum OutputPathError {
    /// An absolute path.
    #[error("expected a path relative to the pipeline file, found the absolute path `{written}`")]
    Absolute {
        /// The path as written.
        written: String,
    },
    /// More than one `..` beyond the pipeline's folder.
    #[error(
        "`{written}` climbs {ups} levels above the pipeline's folder; at most one (`../results/x`) is allowed"
    )]
    TooHigh {
        /// The path as written.
        written: String,
        /// How many levels it climbs.
        ups: usize,
    },
    /// The pipeline's folder itself, or its parent.
    #[error("`{written}` is the pipeline's folder or its parent; expected a folder of its own")]
    NotOwnFolder {
        /// The path as written.
        written: String,
    },
}

/// Normalise an output path lexically and check that it stays near the pipeline file.
pub fn check_output(written: &str) -> Result<PathBuf, OutputPathError> {
    let path = Path::new(written);
    let written = written.to_string();
    if path.is_absolute() {
        return Err(OutputPathError::Absolute { written });
    }
    let mut kept: Vec<String> = Vec::new();
    let mut ups = 0usize;
    for component in path.components() {
        match component {
            Component::Normal(part) => kept.push(part.to_string_lossy().into_owned()),
            Component::ParentDir if kept.pop().is_none() => ups += 1,
            _ => {}
        }
    }
    if ups > 1 {
        return Err(OutputPathError::TooHigh { written, ups });
    }
    if kept.is_empty() {
        return Err(OutputPathError::NotOwnFolder { written });
    }
    let mut out: PathBuf = std::iter::repeat_n("..", ups).collect();
    out.extend(kept);
    Ok(out)
}

/// A stage checked on its own, before the graph is known.
struct Partial {
    bound: Option<Box<dyn BoundOp>>,
    inputs: Vec<Option<usize>>,
}

fn resolve_stages(
    raw: &RawPipeline,
    ops: &[&dyn DynOp],
    c: &mut Collector<'_>,
) -> Option<Vec<ResolvedStage>> {
    let mut ok = true;
    let mut partial: Vec<Partial> = Vec::new();
    for stage in &raw.stages {
        ok &= check_name(stage, c);
        let op = find_op(stage, ops, c);
        let bound = op.and_then(|op| bind_params(stage, op, c));
        let inputs = resolve_inputs(stage, raw, c);
        ok &= op.is_some() && bound.is_some() && inputs.is_some();
        partial.push(Partial {
            bound,
            inputs: inputs.unwrap_or_default(),
        });
    }
    let edges: Vec<Vec<usize>> = partial
        .iter()
        .map(|p| p.inputs.iter().flatten().copied().collect())
        .collect();
    let graph = match StageGraph::build(&edges) {
        Ok(g) => g,
        Err(cycle) => {
            report_cycle(raw, &cycle.0, c);
            return None;
        }
    };
    if !ok {
        return None;
    }
    finish_stages(raw, partial, &graph, c)
}

/// Put stages in topological order, renumber inputs, mark group and exported stages.
fn finish_stages(
    raw: &RawPipeline,
    partial: Vec<Partial>,
    graph: &StageGraph,
    c: &mut Collector<'_>,
) -> Option<Vec<ResolvedStage>> {
    let mut position = vec![0; partial.len()];
    for (new, &old) in graph.order.iter().enumerate() {
        position[old] = new;
    }
    let (mut slots, inputs): (Vec<_>, Vec<_>) =
        partial.into_iter().map(|p| (p.bound, p.inputs)).unzip();
    let mut stages: Vec<ResolvedStage> = Vec::new();
    let mut ok = true;
    for &old in &graph.order {
        let op: Arc<dyn BoundOp> = Arc::from(slots[old].take()?);
        let r = &raw.stages[old];
        let joins = op.joins_subjects();
        let inputs: Vec<Option<usize>> =
            inputs[old].iter().map(|i| i.map(|o| position[o])).collect();
        let group = joins || inputs.iter().flatten().any(|&i| stages[i].group);
        let consumers: Vec<usize> = graph.consumers[old].iter().map(|&c| position[c]).collect();
        let export = r.export || consumers.is_empty();
        if !r.cache && export {
            c.at(
                r.name.origin,
                format!("stages.{}.cache", r.name.value),
                "a stage with `cache: false` must feed another stage and not be exported (its output is never stored)",
            );
            ok = false;
        }
        if let (Some(origin), false) = (r.format_origin, export) {
            c.at(
                origin,
                format!("stages.{}.format", r.name.value),
                "`format` says how an exported stage is written, and this stage is not \
                 exported (another stage consumes it): add `export: true`",
            );
            ok = false;
        }
        stages.push(ResolvedStage {
            name: r.name.value.clone(),
            op,
            inputs,
            consumers,
            cache: r.cache,
            cache_given: r.cache_given,
            unstored_by_policy: false,
            export,
            format: r.format,
            joins,
            group,
            params_node: r.params.clone(),
        });
    }
    crate::recipe::storage_policy(&mut stages);
    ok.then_some(stages)
}

/// Stage names that would give an export the name of a file phasewise writes itself in the
/// output folder: a table's column dictionary `<output>/<stage>.json` would be the manifest
/// (`manifest.json`), and a table `<output>/<stage>.tsv` or its dictionary the sweep's table
/// (`sweep.tsv`, `sweep.json`).
pub const RESERVED_STAGE_NAMES: [&str; 2] = ["manifest", "sweep"];

/// The longest stage name: a file system allows names of 255 bytes, and the longest name made
/// from a stage's is the temporary name ([`crate::fsio::TEMP_NAME_EXTRA`] more bytes) of a Zarr
/// store set aside, `old-<stage>.zarr`.
pub const MAX_STAGE_NAME: usize = 255 - crate::fsio::TEMP_NAME_EXTRA - "old-.zarr".len();

fn check_name(stage: &RawStage, c: &mut Collector<'_>) -> bool {
    let name = &stage.name.value;
    let safe = !name.is_empty()
        && name
            .chars()
            .all(|ch| ch.is_ascii_alphanumeric() || ch == '-' || ch == '_')
        && name
            .chars()
            .next()
            .is_some_and(|ch| ch.is_ascii_alphanumeric());
    if !safe {
        c.at(
            stage.name.origin,
            format!("stages.{name}"),
            "a stage name becomes a file name: expected letters, digits, `-` and `_`, starting with a letter or digit",
        );
    } else if name == SOURCE {
        c.at(
            stage.name.origin,
            format!("stages.{name}"),
            format!("`{SOURCE}` names the data source; choose another stage name"),
        );
        return false;
    } else if RESERVED_STAGE_NAMES.contains(&name.as_str()) {
        c.at(
            stage.name.origin,
            format!("stages.{name}"),
            format!(
                "`{name}` would name an export like a file phasewise writes in the output folder \
                 (`{name}.json`); choose another stage name"
            ),
        );
        return false;
    } else if name.len() > MAX_STAGE_NAME {
        c.at(
            stage.name.origin,
            format!("stages.{name}"),
            format!(
                "a stage name becomes a file name: expected at most {MAX_STAGE_NAME} characters, \
                 found {}",
                name.len()
            ),
        );
        return false;
    }
    safe
}

fn find_op<'o>(
    stage: &RawStage,
    ops: &[&'o dyn DynOp],
    c: &mut Collector<'_>,
) -> Option<&'o dyn DynOp> {
    let field = format!("stages.{}.op", stage.name.value);
    let Some(op) = &stage.op else {
        c.at(
            stage.name.origin,
            field,
            "missing; expected the name of an op",
        );
        return None;
    };
    let found = ops.iter().find(|o| o.name() == op.value).copied();
    if found.is_none() {
        let names: Vec<&str> = ops.iter().map(|o| o.name()).collect();
        c.at(
            op.origin,
            field,
            format!(
                "unknown op `{}`; the ops are: {}{}",
                op.value,
                names.join(", "),
                did_you_mean(&op.value, names.iter().copied())
            ),
        );
    }
    found
}

/// Bind the stage's params to its op: parsed and checked here, once.
fn bind_params(
    stage: &RawStage,
    op: &dyn DynOp,
    c: &mut Collector<'_>,
) -> Option<Box<dyn BoundOp>> {
    match op.bind(&stage.params.to_json()) {
        Ok(bound) => Some(bound),
        Err(e) => {
            report_stage_error(c, &stage.name.value, &stage.params, &e);
            None
        }
    }
}

/// Point an op's error at the line of the param it names (or of the params mapping).
fn report_stage_error(c: &mut Collector<'_>, stage: &str, params: &Node, error: &StageError) {
    match error {
        StageError::Param { field, message } => {
            let mut steps = split_path(field);
            if let Some(unknown) = unknown_field(message) {
                steps.push(PathStep::Key(unknown));
            }
            let node = deepest_key_or_value(params, &steps);
            let value = params.at(&split_path(field));
            let message = with_found_value(message, value);
            let message = with_suggestion(message);
            let message = with_list_hint(message, value, &format!("{stage}.{field}"));
            let dotted = if field.is_empty() {
                format!("stages.{stage}.params")
            } else {
                format!("stages.{stage}.params.{field}")
            };
            c.at(node, dotted, message);
        }
        other => c.at(params.origin, format!("stages.{stage}"), other.to_string()),
    }
}

/// Ops do not always repeat the offending value; a message that lacks it gets it appended.
fn with_found_value(message: &str, node: Option<&Node>) -> String {
    let found = match node.map(|n| (&n.kind, n.to_json())) {
        Some((NodeKind::Scalar { text, .. }, _)) => text.clone(),
        Some((_, json)) => json.to_string(),
        None => return message.to_string(),
    };
    if found.is_empty() || found.len() > 80 || message.contains(&found) {
        message.to_string()
    } else {
        format!("{message} (found `{found}`)")
    }
}

/// A `--set` value written as `-0.2,-0.1` is one string to YAML; where the op wanted a list
/// (serde: "invalid type: string ..., expected a sequence / tuple / array"), say how a list is
/// written: `--set norm.window=[-0.2,-0.1]`.
fn with_list_hint(message: String, node: Option<&Node>, param: &str) -> String {
    let Some(node) = node else { return message };
    let NodeKind::Scalar { text, .. } = &node.kind else {
        return message;
    };
    let wants_list = ["sequence", "tuple", "array"].iter().any(|w| {
        message.contains(&format!("expected a {w}"))
            || message.contains(&format!("expected an {w}"))
    });
    if !matches!(node.origin, Origin::Override(_))
        || !text.contains(',')
        || !message.starts_with("invalid type: string")
        || !wants_list
    {
        return message;
    }
    format!("{message}; a list is written in brackets: --set {param}=[{text}]")
}

/// The origin of the deepest node on `steps`; for a final key, the key itself rather than its value.
fn deepest_key_or_value(params: &Node, steps: &[PathStep]) -> Origin {
    if let Some((PathStep::Key(last), parent)) = steps.split_last() {
        let parent_node = params.deepest(parent);
        if let NodeKind::Map(entries) = &parent_node.kind {
            if let Some((k, v)) = entries.iter().find(|(k, _)| k.as_str() == Some(last)) {
                return if matches!(v.origin, Origin::Override(_)) {
                    v.origin
                } else {
                    k.origin
                };
            }
        }
    }
    params.deepest(steps).origin
}

/// serde's message for a key that `deny_unknown_fields` rejects: "unknown field `x`, expected …".
fn unknown_field(message: &str) -> Option<String> {
    let rest = message.strip_prefix("unknown field `")?;
    Some(rest[..rest.find('`')?].to_string())
}

/// serde's message for an unknown field or enum variant ("unknown field `x`, expected one of
/// `a`, `b`"; "unknown variant `x`, expected `a` or `b`") with the closest expected name offered.
fn with_suggestion(message: String) -> String {
    let Some((_, rest)) = ["unknown field `", "unknown variant `"]
        .iter()
        .find_map(|prefix| message.split_once(prefix))
    else {
        return message;
    };
    let Some((found, expected)) = rest.split_once('`') else {
        return message;
    };
    // serde quotes each expected name in backticks: every other piece is one (up to the value
    // `with_found_value` may have appended).
    let expected = expected.split_once(", expected").map_or("", |(_, e)| e);
    let expected = expected.split(" (found `").next().unwrap_or_default();
    let names = expected.split('`').skip(1).step_by(2);
    let hint = did_you_mean(found, names);
    if hint.is_empty() {
        message
    } else {
        format!("{message}{hint}")
    }
}

fn resolve_inputs(
    stage: &RawStage,
    raw: &RawPipeline,
    c: &mut Collector<'_>,
) -> Option<Vec<Option<usize>>> {
    let field = format!("stages.{}.input", stage.name.value);
    if stage.inputs.is_empty() {
        c.at(
            stage.name.origin,
            field,
            format!("missing; expected `{SOURCE}` or the name of another stage"),
        );
        return None;
    }
    let mut inputs = Vec::new();
    let mut ok = true;
    for input in &stage.inputs {
        if input.value == SOURCE {
            inputs.push(None);
        } else if let Some(i) = raw.stages.iter().position(|s| s.name.value == input.value) {
            inputs.push(Some(i));
        } else {
            let names: Vec<&str> = std::iter::once(SOURCE)
                .chain(raw.stages.iter().map(|s| s.name.value.as_str()))
                .collect();
            c.at(
                input.origin,
                field.clone(),
                format!(
                    "unknown stage `{}`; expected one of: {}{}",
                    input.value,
                    names.join(", "),
                    did_you_mean(&input.value, names.iter().copied())
                ),
            );
            ok = false;
        }
    }
    ok.then_some(inputs)
}

fn report_cycle(raw: &RawPipeline, cycle: &[usize], c: &mut Collector<'_>) {
    let names: Vec<&str> = cycle
        .iter()
        .map(|&i| raw.stages[i].name.value.as_str())
        .collect();
    let Some(&first) = cycle.first() else {
        return;
    };
    let stage = &raw.stages[first];
    c.at(
        stage.name.origin,
        format!("stages.{}.input", stage.name.value),
        format!("the stages form a cycle: {}", names.join(" → ")),
    );
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn output_paths_may_climb_one_level_only() {
        assert_eq!(
            check_output("../results/x").unwrap(),
            PathBuf::from("../results/x")
        );
        assert_eq!(
            check_output("out/./a/../b").unwrap(),
            PathBuf::from("out/b")
        );
        assert!(check_output("../../etc").is_err());
        assert!(check_output("/tmp/x").is_err());
        assert!(check_output("a/..").is_err());
    }

    #[test]
    fn a_byte_order_mark_at_the_start_of_the_file_is_ignored() {
        let dir = tempfile::tempdir().unwrap();
        let file = dir.path().join("bom.yaml");
        let text = "# a comment first\nname: bom\ndata:\n  recordings: \"data/*.edf\"\n\
                    output: results\nstages:\n  line:\n    op: notch\n    input: recordings\n\
                    \x20   params: { freqs: [50] }\n";
        std::fs::write(&file, format!("{BOM}{text}")).unwrap();
        let ops = phasewise_stages::registry::all();
        let loaded = load(&file, &[], &ops).unwrap_or_else(|e| panic!("{e}"));
        assert_eq!(loaded.name, "bom");
        // The file's hash is that of its bytes, the mark included.
        let bytes = std::fs::read(&file).unwrap();
        assert_eq!(
            loaded.file_blake3,
            blake3::hash(&bytes).to_hex().to_string()
        );
        // Without a leading comment the mark sat before the first key.
        let bare = text.trim_start_matches("# a comment first\n");
        std::fs::write(&file, format!("{BOM}{bare}")).unwrap();
        assert_eq!(
            load(&file, &[], &ops).map(|p| p.name).ok().as_deref(),
            Some("bom")
        );
    }

    #[test]
    fn unknown_field_names_are_taken_from_serde_messages() {
        assert_eq!(
            unknown_field("unknown field `cycels`, expected one of `a`, `b`").as_deref(),
            Some("cycels")
        );
        assert_eq!(unknown_field("invalid type"), None);
    }

    #[test]
    fn serde_messages_get_the_closest_expected_name() {
        // The message forms of serde's derive (`unknown_field`, `unknown_variant` in serde::de).
        assert_eq!(
            with_suggestion("unknown field `cycels`, expected one of `freqs`, `cycles`".into()),
            "unknown field `cycels`, expected one of `freqs`, `cycles`; did you mean `cycles`?"
        );
        assert_eq!(
            with_suggestion("unknown variant `wpl`, expected `plv` or `wpli`".into()),
            "unknown variant `wpl`, expected `plv` or `wpli`; did you mean `wpli`?"
        );
        assert_eq!(
            with_suggestion("unknown field `cylces`, expected `cycles` (found `6`)".into()),
            "unknown field `cylces`, expected `cycles` (found `6`); did you mean `cycles`?"
        );
        assert_eq!(
            with_suggestion("unknown field `x`, expected `freqs` (found `y`)".into()),
            "unknown field `x`, expected `freqs` (found `y`)"
        );
        assert_eq!(
            with_suggestion("unknown field `zzzzzz`, expected `freqs`".into()),
            "unknown field `zzzzzz`, expected `freqs`"
        );
        assert_eq!(
            with_suggestion("invalid type: string".into()),
            "invalid type: string"
        );
    }
}
