//! `phasewise sweep PIPELINE --vary STAGE.PARAM=[V1, V2, ...]...` (DESIGN §6, §7): the answer
//! to "does it hold with 6 cycles?". Each `--vary` is a YAML list of alternative values for one
//! param; several combine as a grid (the first `--vary` changes slowest). Every variant runs as
//! if with `--set STAGE.PARAM=V` (after the sweep's own `--set`s) into
//! `<output>/variants/<name>/`, `<name>` being the readable `tf.cycles=6` (joined with `,` on a
//! grid), with its own manifest; all variants share one cache, so a unit whose key a variant
//! does not change is computed once. Then `<output>/sweep.tsv` lines up what the variants
//! found: the group rows of every group-level table (the rows whose `subject` is `group`) and,
//! of a `contrast` findings table, the significant rows; one row per variant and table row,
//! led by the variant's name, one column per varied param and the stage, with a column
//! dictionary `sweep.json` beside it.
//!
//! Every variant is opened as `plan` opens a pipeline (loaded, its params checked, the study
//! prepared and every stage's layout derived from the recordings' headers) before any runs, so a
//! `--vary` on an unknown stage or param, with a value the op refuses, or with one that does not
//! fit the data (a baseline window outside the time axis) stops it before anything runs. The
//! variants run into a staging folder and move into `variants/` only once all have run, so a
//! variant that fails while computing (where a layout is known only once the trials are
//! counted, or a stage fails on a subject's values) leaves no variant folder and no `sweep.tsv`
//! either, only what the cache gained. The new `sweep.tsv` replaces the old (atomically) after
//! every variant ran.

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

use serde_json::{json, Value};

use crate::pipeline::yaml::{self, NodeKind, Origin};
use crate::session::{self, Env, Options, RunSummary};
use crate::study::RunError;

/// Why a sweep could not run or did not finish.
#[derive(Debug, thiserror::Error)]
pub enum SweepError {
    /// A `--vary` argument is malformed.
    #[error("--vary {text}: {reason}")]
    Vary {
        /// The argument as given.
        text: String,
        /// What is wrong with it.
        reason: String,
    },
    /// A variant's pipeline is wrong (unknown stage or param, a value the op refuses).
    #[error("variant {variant}: {source}")]
    Pipeline {
        /// The variant's name.
        variant: String,
        /// The pipeline's problems.
        source: crate::pipeline::PipelineError,
    },
    /// A variant's study could not be prepared (its recordings, a layout the plan derives), or
    /// its run failed; no variant is moved into place and `sweep.tsv` is not written.
    #[error("variant {variant}: {source}")]
    Run {
        /// The variant's name.
        variant: String,
        /// What failed.
        source: RunError,
    },
    /// A variant's table could not be read, or `sweep.tsv` not written.
    #[error("{path}: {message}")]
    Io {
        /// The file.
        path: PathBuf,
        /// What went wrong.
        message: String,
    },
}

impl SweepError {
    /// The exit status: 2 for a wrong command line or pipeline, else the run's own.
    pub fn exit_code(&self) -> i32 {
        match self {
            SweepError::Vary { .. } | SweepError::Pipeline { .. } => 2,
            SweepError::Run { source, .. } => source.exit_code(),
            SweepError::Io { .. } => 1,
        }
    }
}

/// The name of the folder the variants run in (followed by the process id), beside `variants/`.
const STAGING: &str = ".tmp-sweep-";

/// One `--vary STAGE.PARAM=[...]`: the param's dotted name and its alternative values.
#[derive(Clone, Debug, PartialEq)]
pub struct Vary {
    /// `stage.param` as given.
    pub param: String,
    /// Each value: (its label in names and tables, its text for `--set`).
    pub values: Vec<(String, String)>,
}

/// Parse one `--vary` argument: `STAGE.PARAM=` followed by a non-empty YAML list.
pub fn parse_vary(text: &str) -> Result<Vary, SweepError> {
    let bad = |reason: String| SweepError::Vary {
        text: text.to_string(),
        reason,
    };
    let (lhs, rhs) = text
        .split_once('=')
        .ok_or_else(|| bad("expected STAGE.PARAM=[V1, V2, ...], found no `=`".into()))?;
    let param = lhs.trim();
    let mut parts = param.split('.');
    if parts.next().is_none_or(str::is_empty)
        || parts.clone().next().is_none()
        || parts.any(str::is_empty)
    {
        return Err(bad(format!(
            "expected STAGE.PARAM before `=`, found `{param}`"
        )));
    }
    let node = yaml::parse(rhs, |_, _| Origin::Override(0)).map_err(|e| {
        bad(format!(
            "the values `{rhs}` are not valid YAML: {}",
            e.message
        ))
    })?;
    let NodeKind::Seq(items) = &node.kind else {
        return Err(bad(format!(
            "expected a YAML list of values, e.g. {param}=[4, 6, 8]; found {}",
            node.kind_name()
        )));
    };
    if items.is_empty() {
        return Err(bad("the list of values is empty".into()));
    }
    let mut values: Vec<(String, String)> = Vec::new();
    for item in items {
        let json = item.to_json();
        // JSON is YAML 1.2 flow text that the `--set` parser reads back to the same value.
        let set_text = json.to_string();
        let label = match &json {
            Value::String(s) => s.clone(),
            other => other.to_string(),
        };
        if values.iter().any(|(l, _)| *l == label) {
            return Err(bad(format!("the value {label} is listed twice")));
        }
        values.push((label, set_text));
    }
    Ok(Vary {
        param: param.to_string(),
        values,
    })
}

/// One variant of a sweep.
#[derive(Clone, Debug, PartialEq)]
pub struct Variant {
    /// Its readable name, which is also its folder: `tf.cycles=6`, `tf.cycles=6,norm.mode=ratio`.
    pub name: String,
    /// The value label of each varied param, in `--vary` order.
    pub labels: Vec<String>,
    /// The `--set` arguments it adds.
    pub sets: Vec<String>,
}

/// The grid of variants, the first `--vary` changing slowest.
pub fn variants(varies: &[Vary]) -> Vec<Variant> {
    let mut grid = vec![Variant {
        name: String::new(),
        labels: Vec::new(),
        sets: Vec::new(),
    }];
    for vary in varies {
        grid = grid
            .iter()
            .flat_map(|v| {
                vary.values.iter().map(move |(label, set)| {
                    let mut next = v.clone();
                    let part = format!("{}={}", vary.param, label);
                    next.name = if next.name.is_empty() {
                        part
                    } else {
                        format!("{},{part}", next.name)
                    };
                    next.labels.push(label.clone());
                    next.sets.push(format!("{}={set}", vary.param));
                    next
                })
            })
            .collect();
    }
    grid
}

/// A folder name for a variant: its name with `/` (and NUL) replaced, so it stays one folder.
fn folder_name(name: &str) -> String {
    name.chars()
        .map(|c| if c == '/' || c == '\0' { '_' } else { c })
        .collect()
}

/// What a sweep did: each variant's run, and the table written.
#[derive(Debug)]
pub struct SweepSummary {
    /// Each variant with its run's summary, in grid order.
    pub runs: Vec<(Variant, RunSummary)>,
    /// `<output>/sweep.tsv`.
    pub table: PathBuf,
    /// Its number of data rows.
    pub rows: usize,
}

/// Run every variant, then write `sweep.tsv` and `sweep.json`. `base` carries the sweep's own
/// `--set`s, cache, jobs and progress; its output and subject selection are ignored.
pub fn sweep(
    pipeline: &Path,
    base: &Options,
    vary_args: &[String],
    env: Env<'_>,
) -> Result<SweepSummary, SweepError> {
    let varies = vary_args
        .iter()
        .map(|a| parse_vary(a))
        .collect::<Result<Vec<_>, _>>()?;
    if varies.is_empty() {
        return Err(SweepError::Vary {
            text: String::new(),
            reason: "give at least one --vary STAGE.PARAM=[V1, V2, ...]".into(),
        });
    }
    for (i, v) in varies.iter().enumerate() {
        if varies[..i].iter().any(|w| w.param == v.param) {
            return Err(SweepError::Vary {
                text: v.param.clone(),
                reason: "this param is varied twice: give all its values in one list".into(),
            });
        }
    }
    let grid = variants(&varies);
    // Open every variant first, as `plan` would (params, the study, every stage's layout): a
    // variant wrong in a way the plan can see stops the sweep before anything is written.
    let mut output = None;
    for variant in &grid {
        let options = variant_options(base, variant, None);
        let study = session::open(pipeline, &options, env).map_err(|source| match source {
            RunError::Pipeline(source) => SweepError::Pipeline {
                variant: variant.name.clone(),
                source,
            },
            source => SweepError::Run {
                variant: variant.name.clone(),
                source,
            },
        })?;
        output.get_or_insert_with(|| crate::paths::clean(&study.pipeline.output));
    }
    let output = output.unwrap_or_default();
    // The variants run into a staging folder beside `variants/` (at the same depth, so the
    // relative paths their manifests record stay true) and move into `variants/` only when all
    // have run: an error only computing finds (a layout the plan cannot know before the trials
    // are counted, a stage failing on a subject's values) leaves no variant behind either.
    // Staging folders of killed sweeps are removed once stale.
    if let Ok(entries) = std::fs::read_dir(&output) {
        for entry in entries.flatten() {
            let name = entry.file_name().to_string_lossy().into_owned();
            if name.starts_with(STAGING) && crate::fsio::is_stale(&entry.path()) {
                let _ = std::fs::remove_dir_all(entry.path());
            }
        }
    }
    let staging = output.join(format!("{STAGING}{}", std::process::id()));
    // The topmost folder of `output` that is not there yet: a failed sweep removes what it made.
    let made = output
        .ancestors()
        .take_while(|a| !a.as_os_str().is_empty() && !a.exists())
        .last()
        .map(Path::to_path_buf);
    let mut runs = Vec::new();
    for variant in grid {
        let dir = staging.join(folder_name(&variant.name));
        let options = variant_options(base, &variant, Some(dir));
        match session::run(pipeline, &options, env) {
            Ok(summary) => runs.push((variant, summary)),
            Err(source) => {
                let _ = std::fs::remove_dir_all(&staging);
                if let Some(made) = &made {
                    // Only empty folders: `remove_dir` refuses any other.
                    for dir in output.ancestors() {
                        if std::fs::remove_dir(dir).is_err() || dir == made {
                            break;
                        }
                    }
                }
                return Err(SweepError::Run {
                    variant: variant.name.clone(),
                    source,
                });
            }
        }
    }
    // Every variant ran: the earlier sweep's table goes, the variants move into place.
    for stale in ["sweep.tsv", "sweep.json"] {
        let _ = std::fs::remove_file(output.join(stale));
    }
    let io = |path: &Path, e: std::io::Error| SweepError::Io {
        path: path.to_path_buf(),
        message: e.to_string(),
    };
    let variants_dir = output.join("variants");
    std::fs::create_dir_all(&variants_dir).map_err(|e| io(&variants_dir, e))?;
    for (variant, summary) in &mut runs {
        let from = staging.join(folder_name(&variant.name));
        let to = variants_dir.join(folder_name(&variant.name));
        if to.exists() {
            std::fs::remove_dir_all(&to).map_err(|e| io(&to, e))?;
        }
        std::fs::rename(&from, &to).map_err(|e| io(&to, e))?;
        if let Ok(rest) = summary.manifest_path.strip_prefix(&from) {
            summary.manifest_path = to.join(rest);
        }
    }
    let _ = std::fs::remove_dir(&staging);
    let (text, dictionary, rows) = sweep_table(&output, &varies, &runs)?;
    let table = output.join("sweep.tsv");
    let io = |path: &Path| {
        let path = path.to_path_buf();
        move |e: crate::output::OutputError| SweepError::Io {
            path: path.clone(),
            message: e.to_string(),
        }
    };
    crate::output::write_atomically(&table, text.as_bytes()).map_err(io(&table))?;
    let json_path = output.join("sweep.json");
    let json_text = serde_json::to_string_pretty(&dictionary).unwrap_or_default() + "\n";
    crate::output::write_atomically(&json_path, json_text.as_bytes()).map_err(io(&json_path))?;
    Ok(SweepSummary { runs, table, rows })
}

/// A variant's run options: the sweep's own, its `--set`s after the sweep's, every subject.
fn variant_options(base: &Options, variant: &Variant, output: Option<PathBuf>) -> Options {
    Options {
        overrides: base
            .overrides
            .iter()
            .chain(&variant.sets)
            .cloned()
            .collect(),
        subjects: Vec::new(),
        output,
        ..base.clone()
    }
}

/// One table as read: its header and rows, cells as text.
struct Table {
    columns: Vec<String>,
    rows: Vec<Vec<String>>,
}

fn read_table(path: &Path) -> Result<Table, SweepError> {
    let text = std::fs::read_to_string(path).map_err(|e| SweepError::Io {
        path: path.to_path_buf(),
        message: e.to_string(),
    })?;
    let mut lines = text.lines();
    let columns: Vec<String> = lines
        .next()
        .unwrap_or_default()
        .split('\t')
        .map(str::to_string)
        .collect();
    let rows = lines
        .filter(|l| !l.is_empty())
        .map(|l| l.split('\t').map(str::to_string).collect())
        .collect();
    Ok(Table { columns, rows })
}

/// The rows of a table that the sweep lines up: group rows where there is a `subject` column,
/// significant rows where there is a `significant` column (a contrast's findings), else all.
fn kept(table: &Table) -> Vec<&Vec<String>> {
    let col = |name: &str| table.columns.iter().position(|c| c == name);
    let (subject, significant) = (col("subject"), col("significant"));
    table
        .rows
        .iter()
        .filter(|r| subject.is_none_or(|i| r.get(i).map(String::as_str) == Some("group")))
        .filter(|r| significant.is_none_or(|i| r.get(i).map(String::as_str) == Some("true")))
        .collect()
}

/// `sweep.tsv`'s text, its column dictionary and its number of rows.
fn sweep_table(
    output: &Path,
    varies: &[Vary],
    runs: &[(Variant, RunSummary)],
) -> Result<(String, Value, usize), SweepError> {
    let lead: Vec<String> = std::iter::once("variant".to_string())
        .chain(varies.iter().map(|v| v.param.clone()))
        .chain(std::iter::once("stage".to_string()))
        .collect();
    let mut columns: Vec<String> = Vec::new();
    let mut dictionary = serde_json::Map::new();
    dictionary.insert(
        "variant".into(),
        json!({"Description": "The variant: its folder under variants/, the params it sets"}),
    );
    for v in varies {
        dictionary.insert(
            v.param.clone(),
            json!({"Description": format!("The value of {} in this variant (--vary)", v.param)}),
        );
    }
    dictionary.insert(
        "stage".into(),
        json!({"Description": "The group-level stage whose table the row comes from"}),
    );
    // (variant index, stage, table)
    let mut tables = Vec::new();
    for (i, (variant, _)) in runs.iter().enumerate() {
        let dir = output.join("variants").join(folder_name(&variant.name));
        let mut files: Vec<PathBuf> = std::fs::read_dir(&dir)
            .map_err(|e| SweepError::Io {
                path: dir.clone(),
                message: e.to_string(),
            })?
            .flatten()
            .map(|e| e.path())
            .filter(|p| p.extension().is_some_and(|e| e == "tsv"))
            .collect();
        files.sort();
        for file in files {
            let stage = file
                .file_stem()
                .map(|s| s.to_string_lossy().into_owned())
                .unwrap_or_default();
            let table = read_table(&file)?;
            for c in &table.columns {
                if !columns.contains(c) && !lead.contains(c) {
                    columns.push(c.clone());
                }
            }
            if let Ok(text) = std::fs::read_to_string(file.with_extension("json")) {
                if let Ok(Value::Object(entries)) = serde_json::from_str::<Value>(&text) {
                    for (k, v) in entries {
                        dictionary.entry(k).or_insert(v);
                    }
                }
            }
            tables.push((i, stage, table));
        }
    }
    let mut text = lead
        .iter()
        .chain(&columns)
        .cloned()
        .collect::<Vec<_>>()
        .join("\t");
    text.push('\n');
    let mut rows = 0;
    for (i, stage, table) in &tables {
        let variant = &runs[*i].0;
        let index: BTreeMap<&str, usize> = table
            .columns
            .iter()
            .enumerate()
            .map(|(k, c)| (c.as_str(), k))
            .collect();
        for row in kept(table) {
            let mut cells: Vec<&str> = vec![variant.name.as_str()];
            cells.extend(variant.labels.iter().map(String::as_str));
            cells.push(stage);
            cells.extend(columns.iter().map(|c| {
                index
                    .get(c.as_str())
                    .and_then(|&k| row.get(k))
                    .map_or("n/a", String::as_str)
            }));
            text.push_str(&cells.join("\t"));
            text.push('\n');
            rows += 1;
        }
    }
    // Only the columns the table has.
    let keep: Vec<&String> = lead.iter().chain(&columns).collect();
    dictionary.retain(|k, _| keep.contains(&k));
    Ok((text, Value::Object(dictionary), rows))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_vary_is_a_param_and_a_non_empty_list() {
        let v = parse_vary("tf.cycles=[4, 6, {from: 3, to: 8}, ratio]").unwrap();
        assert_eq!(v.param, "tf.cycles");
        let labels: Vec<&str> = v.values.iter().map(|(l, _)| l.as_str()).collect();
        assert_eq!(labels, ["4", "6", r#"{"from":3,"to":8}"#, "ratio"]);
        let sets: Vec<&str> = v.values.iter().map(|(_, s)| s.as_str()).collect();
        assert_eq!(sets, ["4", "6", r#"{"from":3,"to":8}"#, r#""ratio""#]);
        for bad in [
            "tf.cycles=[]",
            "tf.cycles=6",
            "tf.cycles",
            "tf=[1, 2]",
            ".cycles=[1]",
            "tf..x=[1]",
            "tf.cycles=[4, 4]",
            "tf.cycles=[4, 6",
        ] {
            let e = parse_vary(bad).unwrap_err();
            assert!(
                matches!(&e, SweepError::Vary { text, .. } if text == bad),
                "{bad}: {e}"
            );
            assert_eq!(e.exit_code(), 2);
        }
    }

    #[test]
    fn several_varies_make_a_grid_with_readable_names() {
        let a = parse_vary("tf.cycles=[4, 6]").unwrap();
        let b = parse_vary("norm.mode=[subtract, ratio, zscore]").unwrap();
        let grid = variants(&[a, b]);
        let names: Vec<&str> = grid.iter().map(|v| v.name.as_str()).collect();
        assert_eq!(
            names,
            [
                "tf.cycles=4,norm.mode=subtract",
                "tf.cycles=4,norm.mode=ratio",
                "tf.cycles=4,norm.mode=zscore",
                "tf.cycles=6,norm.mode=subtract",
                "tf.cycles=6,norm.mode=ratio",
                "tf.cycles=6,norm.mode=zscore",
            ]
        );
        assert_eq!(grid[4].sets, ["tf.cycles=6", r#"norm.mode="ratio""#]);
        assert_eq!(grid[4].labels, ["6", "ratio"]);
    }

    #[test]
    fn only_group_rows_and_significant_findings_are_kept() {
        let t = Table {
            columns: vec!["subject".into(), "mean".into()],
            rows: vec![
                vec!["sub-01".into(), "1".into()],
                vec!["group".into(), "2".into()],
            ],
        };
        assert_eq!(kept(&t), [&vec!["group".to_string(), "2".to_string()]]);
        let f = Table {
            columns: vec!["cluster".into(), "significant".into()],
            rows: vec![
                vec!["1".into(), "false".into()],
                vec!["2".into(), "true".into()],
            ],
        };
        assert_eq!(kept(&f), [&vec!["2".to_string(), "true".to_string()]]);
        assert_eq!(folder_name("a.b=x/y"), "a.b=x_y");
    }
}
