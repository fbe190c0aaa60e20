//! Streaming a `cache: false` unit into its consumer part by part (see the "Parts" section of
//! `phasewise_stages::op`).
//!
//! A unit P streams into its consumer C when P's stage is `cache: false` and not exported, C is
//! P's only consumer and P is C's only input, P's op computes parts along an axis
//! (`part_axis`) and C's op slices along that same axis (`slices_along`): the recipes `streamed`
//! and `parts` ([`crate::recipe`]). The executor then never
//! holds P's whole output: it computes P a part at a time (a range along the axis), runs C on
//! each part and hands C's parts on: joined in memory ([`Joined`]), or, when C is stored and
//! every consumer of C can read it in slabs, each part written at its place in C's object file
//! ([`crate::slabs::Spool`]), so C is never whole in memory either. Peak memory holds one part
//! of P instead of all of it, so it no longer grows with the length of that axis (for the
//! wavelet: the number of frequencies) once the axis is longer than one part.
//!
//! The parts are fixed by the sizes alone ([`part_len`]), and both ops promise the same bits
//! as whole runs, so outputs do not depend on whether a unit streamed.

use phasewise_stages::{Input, InputLayout, Joining, LabelledArray, Layout, Notes, StageError};

use crate::study::Study;

/// Bytes of one part of the streamed unit's output (the axis is cut into parts of at most this
/// size, at least one index each).
pub const PART_BYTES: usize = 48 << 20;

/// Environment variable that sets another part size in bytes (for tests and for machines with
/// little memory); results do not depend on it.
pub const PART_BYTES_VAR: &str = "PHASEWISE_PART_BYTES";

fn part_bytes() -> usize {
    bytes_from_env(PART_BYTES_VAR, PART_BYTES)
}

/// A positive byte count from the environment variable `var`, else `default`.
pub fn bytes_from_env(var: &str, default: usize) -> usize {
    std::env::var(var)
        .ok()
        .and_then(|v| v.parse().ok())
        .filter(|&b| b > 0)
        .unwrap_or(default)
}

/// Indices per part along an axis of `len` entries, for an output of `bytes` bytes in all.
pub fn part_len(len: usize, bytes: usize) -> usize {
    part_len_within(len, bytes, part_bytes())
}

fn part_len_within(len: usize, bytes: usize, part: usize) -> usize {
    let per_index = bytes / len.max(1);
    (part / per_index.max(1)).clamp(1, len.max(1))
}

/// How a streamed pair of units will run, from the layouts alone.
pub struct PartPlan {
    /// The producer's layout (of the whole output it never holds).
    pub producer_layout: Layout,
    /// The consumer's whole output layout, when its op can say it in advance.
    pub consumer_layout: Option<Layout>,
    /// The axis cut into parts.
    pub axis: &'static str,
    /// Length of that axis, and indices per part.
    len: usize,
    step: usize,
}

/// What a streamed pair of units produced besides the consumer's parts.
pub struct Streamed {
    /// `<c8` or `<f4`.
    pub producer_dtype: &'static str,
    /// Warnings and records of the producer's parts (repeated warnings once).
    pub producer_notes: Notes,
    /// Seconds spent in the producer's parts.
    pub producer_seconds: f64,
    /// Warnings and records of the consumer's parts (repeated warnings once).
    pub consumer_notes: Notes,
}

/// The plan of producer `p` streaming into consumer `u` along the producer's part axis, over
/// the producer's `inputs`.
pub fn plan(
    study: &Study,
    (p, u): (usize, usize),
    inputs: &[Input<'_>],
) -> Result<PartPlan, (usize, StageError)> {
    let producer = &study.pipeline.stages[study.units[p].stage];
    let consumer = &study.pipeline.stages[study.units[u].stage];
    let axis = producer
        .op
        .part_axis()
        .ok_or_else(|| (p, StageError::data("this op does not compute parts")))?;
    let layouts: Vec<InputLayout<'_>> = inputs
        .iter()
        .map(|i| InputLayout {
            stage: i.stage,
            subject: i.subject,
            layout: &i.array.layout,
        })
        .collect();
    let whole = producer
        .op
        .layout(&layouts)
        .map_err(|e| (p, e))?
        .ok_or_else(|| {
            let why = "its output layout is not known in advance, so it cannot stream";
            (p, StageError::data(why))
        })?;
    let shape = whole.shape();
    let len = whole.coord(axis).map_err(|e| (p, e))?.len();
    let element = if whole.complex { 8 } else { 4 };
    let step = part_len(len, shape.iter().product::<usize>() * element);
    let whole_input = [InputLayout {
        stage: &producer.name,
        subject: study.subject(p),
        layout: &whole,
    }];
    let consumer_layout = consumer.op.layout(&whole_input).ok().flatten();
    Ok(PartPlan {
        producer_layout: whole,
        consumer_layout,
        axis,
        len,
        step,
    })
}

/// Run producer `p` and consumer `u` part by part over the producer's `inputs`, handing each
/// of the consumer's parts to `take` in order along the axis.
pub fn run(
    study: &Study,
    (p, u): (usize, usize),
    plan: &PartPlan,
    inputs: &[Input<'_>],
    mut take: impl FnMut(LabelledArray) -> Result<(), StageError>,
) -> Result<Streamed, (usize, StageError)> {
    let producer = &study.pipeline.stages[study.units[p].stage];
    let consumer = &study.pipeline.stages[study.units[u].stage];
    let (len, step) = (plan.len, plan.step);
    let (mut producer_notes, mut consumer_notes) = (Notes::default(), Notes::default());
    let mut producer_seconds = 0.0;
    for start in (0..len).step_by(step) {
        let clock = std::time::Instant::now();
        let mut notes = Notes::default();
        let part = producer
            .op
            .run_part(inputs, start..(start + step).min(len), &mut notes)
            .map_err(|e| (p, e))?;
        producer_seconds += clock.elapsed().as_secs_f64();
        absorb(&mut producer_notes, notes);
        let mut notes = Notes::default();
        let input = Input {
            stage: &producer.name,
            subject: study.subject(p),
            array: &part,
        };
        let out = consumer.op.run(&[input], &mut notes).map_err(|e| (u, e))?;
        absorb(&mut consumer_notes, notes);
        take(out).map_err(|e| (u, e))?;
    }
    let whole = &plan.producer_layout;
    Ok(Streamed {
        producer_dtype: if whole.complex { "<c8" } else { "<f4" },
        producer_notes,
        producer_seconds,
        consumer_notes,
    })
}

/// The consumer's parts joined in memory: filled part by part into the whole output (each part
/// dropped once copied) when its layout is known in advance, else kept and joined at the end.
pub struct Joined {
    joining: Option<Joining>,
    parts: Vec<LabelledArray>,
    axis: &'static str,
}

impl Joined {
    /// Room for the consumer's whole output as `plan` says it.
    pub fn new(plan: &PartPlan) -> Result<Joined, StageError> {
        let joining = match &plan.consumer_layout {
            Some(out) => {
                let k = out.axis(plan.axis)?;
                Some(Joining::new(&out.shape(), k, out.complex))
            }
            None => None,
        };
        Ok(Joined {
            joining,
            parts: Vec::new(),
            axis: plan.axis,
        })
    }

    /// Take the next part.
    pub fn push(&mut self, part: LabelledArray) -> Result<(), StageError> {
        match &mut self.joining {
            Some(j) => j.push(&part),
            None => {
                self.parts.push(part);
                Ok(())
            }
        }
    }

    /// The whole output.
    pub fn finish(self) -> Result<LabelledArray, StageError> {
        match self.joining {
            Some(j) => j.finish(),
            None => LabelledArray::join(&self.parts, self.axis),
        }
    }
}

/// Adds a part's notes: warnings not seen yet, in order; records of the first part that has
/// them.
fn absorb(all: &mut Notes, part: Notes) {
    for w in part.warnings {
        if !all.warnings.contains(&w) {
            all.warnings.push(w);
        }
    }
    for (k, v) in part.records {
        all.records.entry(k).or_insert(v);
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn parts_are_fixed_by_sizes_and_never_empty() {
        // 24 frequencies of a 267 MB output: 11 MB per frequency, so 4 per 48 MiB part.
        assert_eq!(part_len_within(24, 267_000_000, PART_BYTES), 4);
        assert_eq!(part_len_within(24, 1_000, PART_BYTES), 24);
        assert_eq!(part_len_within(3, 10_000_000_000, PART_BYTES), 1);
        assert_eq!(part_len_within(0, 0, PART_BYTES), 1);
    }
}
