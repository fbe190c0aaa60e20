//! `inspect PIPELINE STAGE [--subject ID]`: what a cached result looks like — dims, shape,
//! coordinates, units and a summary of the values — without loading it into another tool.

use std::fmt::Write as _;

use phasewise_stages::{Coord, LabelledArray, Values};

use crate::plan::Status;
use crate::store::LoadError;
use crate::study::{subject_label, Study};
use crate::words::{did_you_mean, number};

/// Why a unit cannot be inspected.
#[derive(Debug, thiserror::Error)]
pub enum InspectError {
    /// No such stage.
    #[error("no stage `{stage}`; the stages are: {known}{hint}")]
    UnknownStage {
        /// The name given.
        stage: String,
        /// The stages.
        known: String,
        /// `; did you mean …?`, or nothing.
        hint: String,
    },
    /// No such subject.
    #[error("--subject {subject}: no such subject; the subjects are: {known}{hint}")]
    UnknownSubject {
        /// The subject given.
        subject: String,
        /// The subjects.
        known: String,
        /// `; did you mean …?`, or nothing.
        hint: String,
    },
    /// Several subjects and none chosen.
    #[error("stage {stage} runs once per subject; choose one with --subject (the subjects are: {known})")]
    NeedSubject {
        /// The stage.
        stage: String,
        /// The subjects.
        known: String,
    },
    /// The stage keeps no values (`cache: false`, or the storage policy).
    #[error(
        "{stage} is not stored: {why}, so its values are computed for the stages that read \
         them and then dropped; to inspect it, set `cache: true` on {stage} and run the \
         pipeline again"
    )]
    NotStored {
        /// The stage.
        stage: String,
        /// Who decided: the file or the storage policy.
        why: &'static str,
    },
    /// The result is not cached (yet).
    #[error("{stage} ({who}) has no current result ({reason}); run the pipeline first")]
    NotCached {
        /// The stage.
        stage: String,
        /// Whose.
        who: String,
        /// Why.
        reason: String,
    },
}

impl InspectError {
    /// The exit status (DESIGN §7): 2 for a mistake on the command line (a stage or subject that
    /// does not exist, a missing `--subject`, a stage that is never stored), 1 when the result
    /// is not there yet.
    pub fn exit_code(&self) -> i32 {
        match self {
            InspectError::NotCached { .. } => 1,
            _ => 2,
        }
    }
}

/// Describe the cached result of `stage` for `subject`.
pub fn inspect(study: &Study, stage: &str, subject: Option<&str>) -> Result<String, InspectError> {
    let Some(stage_index) = study.pipeline.stage_index(stage) else {
        let known: Vec<&str> = study
            .pipeline
            .stages
            .iter()
            .map(|s| s.name.as_str())
            .collect();
        return Err(InspectError::UnknownStage {
            stage: stage.into(),
            hint: did_you_mean(stage, known.iter().copied()),
            known: known.join(", "),
        });
    };
    let subjects: Vec<&str> = study.sources.iter().map(|s| s.subject.as_str()).collect();
    if let Some(subject) = subject.filter(|s| !subjects.contains(s)) {
        return Err(InspectError::UnknownSubject {
            subject: subject.into(),
            hint: did_you_mean(subject, subjects.iter().copied()),
            known: subjects.join(", "),
        });
    }
    let resolved = &study.pipeline.stages[stage_index];
    if !resolved.cache {
        return Err(InspectError::NotStored {
            stage: stage.into(),
            why: if resolved.unstored_by_policy {
                "the storage policy hands its output to its one consumer a part at a time \
                 (recomputing it costs less than storing it)"
            } else {
                "it has `cache: false`"
            },
        });
    }
    let units: Vec<usize> = (0..study.units.len())
        .filter(|&u| study.units[u].stage == stage_index)
        .collect();
    // A group stage has one unit whatever subject is asked for.
    let candidates: Vec<usize> = match units.as_slice() {
        [one] if study.subject(*one).is_none() => vec![*one],
        _ => units
            .into_iter()
            .filter(|&u| subject.is_none() || study.subject(u) == subject)
            .collect(),
    };
    let unit = match candidates.as_slice() {
        [one] => *one,
        _ => {
            return Err(InspectError::NeedSubject {
                stage: stage.into(),
                known: subjects.join(", "),
            });
        }
    };
    let plan = study.plan();
    let who = subject_label(study.subject(unit));
    let not_cached = |reason: String| InspectError::NotCached {
        stage: stage.into(),
        who: who.clone(),
        reason,
    };
    if let Status::Stale(_) = &plan.units[unit].status {
        return Err(not_cached(plan.units[unit].status_line()));
    }
    let (array, _) = study.store.load(&study.keys[unit]).map_err(|e| {
        not_cached(match e {
            LoadError::Unavailable => "nothing is cached under its key".into(),
            LoadError::Damaged(why) => format!("its cached object is damaged: {why}"),
        })
    })?;
    Ok(describe(stage, &who, &study.keys[unit], &array))
}

/// The text `inspect` prints.
pub fn describe(stage: &str, who: &str, key: &str, array: &LabelledArray) -> String {
    let layout = &array.layout;
    let mut out = String::new();
    let _ = writeln!(out, "{stage} ({who}), key {key}");
    let _ = writeln!(
        out,
        "dtype {}, shape {:?}, units {}",
        array.values.dtype(),
        array.values.shape(),
        layout.units
    );
    for (dim, coord) in layout.dims.iter().zip(&layout.coords) {
        let _ = writeln!(out, "  {dim} [{}]: {}", coord.len(), coord_summary(coord));
    }
    if let Some(rate) = layout.meta.sampling_rate {
        let _ = writeln!(out, "sampling rate {rate} Hz");
    }
    if let Some(p) = &layout.meta.positions {
        let _ = writeln!(
            out,
            "electrode positions: {} channels, from {}",
            p.by_channel.len(),
            p.source
        );
    }
    let _ = writeln!(out, "{}", value_summary(&array.values));
    out
}

fn coord_summary(coord: &Coord) -> String {
    let items: Vec<String> = match coord {
        Coord::Labels(v) => v.clone(),
        Coord::Numbers(v) => v.iter().map(|x| format!("{x}")).collect(),
        Coord::Pairs(v) => v.iter().map(|[a, b]| format!("{a}–{b}")).collect(),
    };
    if items.len() <= 8 {
        items.join(", ")
    } else {
        format!(
            "{}, …, {}",
            items[..3].join(", "),
            items[items.len() - 3..].join(", ")
        )
    }
}

/// min, max, mean and NaN count (of magnitudes, for complex values), accumulated in f64.
fn value_summary(values: &Values) -> String {
    let numbers: Vec<f64> = match values {
        Values::Real(a) => a.iter().map(|&x| f64::from(x)).collect(),
        Values::Complex(a) => a.iter().map(|z| f64::from(z.norm())).collect(),
    };
    let what = if matches!(values, Values::Complex(_)) {
        "|values|"
    } else {
        "values"
    };
    let nan = numbers.iter().filter(|x| x.is_nan()).count();
    let finite: Vec<f64> = numbers.into_iter().filter(|x| !x.is_nan()).collect();
    if finite.is_empty() {
        return format!("{what}: none finite ({nan} NaN)");
    }
    let min = finite.iter().copied().fold(f64::INFINITY, f64::min);
    let max = finite.iter().copied().fold(f64::NEG_INFINITY, f64::max);
    let mean = finite.iter().sum::<f64>() / finite.len() as f64;
    format!(
        "{what}: min {}, max {}, mean {}, {nan} NaN",
        number(min, 4),
        number(max, 4),
        number(mean, 4)
    )
}
