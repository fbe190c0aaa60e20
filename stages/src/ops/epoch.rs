//! The `epoch` op: cuts trials out of a continuous recording around its events.
//!
//! Every event whose label is listed under a condition gives one trial of that condition (an
//! event listed under two conditions gives one trial of each). With s = round(onset · fs) (the
//! nearest sample; halves round away from zero) and the window [t0, t1], the trial holds samples
//! s + k for k = round(t0 · fs) ..= round(t1 · fs), with time coordinate k / fs (DESIGN.md §4).
//! Onsets count from the first sample of the recording. Trials are ordered by onset (events of
//! equal onset keep their order, conditions their name order).
//!
//! Per condition, trials are counted as `dropped` (window reaching past either edge of the
//! recording), `rejected` (peak-to-peak over `reject.peak_to_peak` volts on any voltage data
//! channel — see [`crate::dsp::recording`]) and `kept`; the counts go to the manifest under
//! `epochs`. A NaN or infinite sample inside a trial's window is a data error naming the
//! channel and the event, not a silent rejection: it means something upstream is broken.
//!
//! Output: dims `[channel, trial, time]`, trial coordinates the trials' conditions,
//! `meta.trials` the source events; `meta.events` is dropped.

use ndarray::{s, Array3, ArrayView2};
use rand::SeedableRng;
use rand_chacha::ChaCha20Rng;
use serde::{Deserialize, Serialize};
use serde_json::json;
use std::collections::BTreeMap;

use crate::array::{Coord, Event, LabelledArray, Layout, TrialInfo};
use crate::dsp::recording::{as_matrix, Continuous};
use crate::error::StageError;
use crate::op::{single, Input, InputLayout, Notes, Op};

/// The `epoch` op.
pub struct Epoch;

/// Parameters of `epoch`.
#[derive(Clone, Debug, Serialize, Deserialize, schemars::JsonSchema)]
#[serde(deny_unknown_fields)]
pub struct EpochParams {
    /// Condition name → the event labels that belong to it.
    pub conditions: BTreeMap<String, Vec<String>>,
    /// Seconds around each event `[t0, t1]`, both included.
    pub window: [f64; 2],
    /// Optional rejection of trials.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub reject: Option<Reject>,
    /// Optional seeded subsampling of every condition to the smallest count.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub equalize: Option<Equalize>,
}

/// `equalize: { seed: S }`.
#[derive(Clone, Debug, Serialize, Deserialize, schemars::JsonSchema)]
#[serde(deny_unknown_fields)]
pub struct Equalize {
    /// Seed of the subsampling: same seed, same trials kept.
    pub seed: u64,
}

/// Rejection criteria.
#[derive(Clone, Debug, Serialize, Deserialize, schemars::JsonSchema)]
#[serde(deny_unknown_fields)]
pub struct Reject {
    /// Largest allowed max − min, in volts, on any voltage data channel within a trial.
    pub peak_to_peak: f64,
}

/// One candidate trial: a (condition, event) match whose window lies inside the recording.
#[derive(Clone, Debug)]
struct Trial {
    condition: String,
    event: Event,
    /// First sample of the window.
    start: usize,
}

/// Per-condition counts.
#[derive(Clone, Copy, Debug, Default, PartialEq)]
struct Counts {
    kept: usize,
    dropped: usize,
    rejected: usize,
    /// Left out by `equalize` (`None` without it, so the record is unchanged then).
    equalized: Option<usize>,
}

/// The trials inside the recording and the counts so far (before rejection).
struct Selection {
    fs: f64,
    k0: i64,
    n_window: usize,
    trials: Vec<Trial>,
    counts: BTreeMap<String, Counts>,
}

impl Op for Epoch {
    type Params = EpochParams;
    const NAME: &'static str = "epoch";
    const VERSION: u32 = 1;

    fn check(p: &Self::Params) -> Result<(), StageError> {
        if p.conditions.is_empty() {
            return Err(StageError::param(
                "conditions",
                "give at least one condition, e.g. `{ A: [cue-a] }`",
            ));
        }
        if let Some((name, _)) = p.conditions.iter().find(|(_, labels)| labels.is_empty()) {
            return Err(StageError::param(
                format!("conditions.{name}"),
                "list at least one event label for this condition",
            ));
        }
        let [t0, t1] = p.window;
        if !(t0.is_finite() && t1.is_finite() && t0 < t1) {
            return Err(StageError::param(
                "window",
                format!("expected [start, end] seconds with start < end, found [{t0}, {t1}]"),
            ));
        }
        if let Some(r) = &p.reject {
            if !(r.peak_to_peak.is_finite() && r.peak_to_peak > 0.0) {
                return Err(StageError::param(
                    "reject.peak_to_peak",
                    format!(
                        "expected a positive number of volts, found {}",
                        r.peak_to_peak
                    ),
                ));
            }
        }
        Ok(())
    }

    /// Known in advance only without rejection: rejection depends on the values.
    fn layout(p: &Self::Params, inputs: &[InputLayout<'_>]) -> Result<Option<Layout>, StageError> {
        let input = single(inputs)?.layout;
        let sel = select(p, input)?;
        // Rejection can only lower the counts, so an empty condition is known already.
        check_nonempty(&sel.counts)?;
        if p.reject.is_some() {
            return Ok(None);
        }
        let mut sel = sel;
        if let Some(e) = &p.equalize {
            equalize(&mut sel, e.seed);
        }
        Ok(Some(epoched_layout(input, &sel)?))
    }

    /// The trials before rejection and equalising, which only lower the counts.
    fn layout_bound(
        p: &Self::Params,
        inputs: &[InputLayout<'_>],
    ) -> Result<Option<Layout>, StageError> {
        let input = single(inputs)?.layout;
        let sel = select(p, input)?;
        check_nonempty(&sel.counts)?;
        Ok(Some(epoched_layout(input, &sel)?))
    }

    fn run(
        p: &Self::Params,
        inputs: &[Input<'_>],
        notes: &mut Notes,
    ) -> Result<LabelledArray, StageError> {
        let input = single(inputs)?.array;
        let mut sel = select(p, &input.layout)?;
        let rec = Continuous::of(&input.layout)?;
        let x = as_matrix(input.real_values()?)?;
        check_finite(x, &sel, rec.channels)?;
        if let Some(r) = &p.reject {
            reject(x, &mut sel, &rec.is_data, r.peak_to_peak);
        }
        if let Some(e) = &p.equalize {
            equalize(&mut sel, e.seed);
        }
        notes.record("epochs", counts_record(&sel.counts));
        check_nonempty(&sel.counts)?;
        let layout = epoched_layout(&input.layout, &sel)?;
        LabelledArray::real(layout, cut(x, &sel).into_dyn())
    }
}

/// Check the params against the recording and find the trials whose window fits.
fn select(p: &EpochParams, input: &Layout) -> Result<Selection, StageError> {
    Epoch::check(p)?;
    let rec = Continuous::of(input)?;
    let events =
        input.meta.events.as_deref().ok_or_else(|| {
            StageError::data("the recording carries no events to cut epochs around")
        })?;
    let (k0, k1) = (
        (p.window[0] * rec.fs).round(),
        (p.window[1] * rec.fs).round(),
    );
    // In f64 first: an absurd window must not overflow the integer conversion.
    let span = k1 - k0 + 1.0;
    if span > rec.n_times as f64 {
        return Err(StageError::param(
            "window",
            format!(
                "the window [{}, {}] s spans {span} samples but the recording has only {} \
                 ({:.3} s at {} Hz)",
                p.window[0],
                p.window[1],
                rec.n_times,
                rec.n_times as f64 / rec.fs,
                rec.fs
            ),
        ));
    }
    check_labels(p, events)?;
    let mut order: Vec<&Event> = events.iter().collect();
    order.sort_by(|a, b| {
        a.onset
            .partial_cmp(&b.onset)
            .unwrap_or(std::cmp::Ordering::Equal)
    });
    let mut sel = Selection {
        fs: rec.fs,
        k0: k0 as i64,
        n_window: span as usize,
        trials: Vec::new(),
        counts: p
            .conditions
            .keys()
            .map(|c| (c.clone(), Counts::default()))
            .collect(),
    };
    for event in order {
        for (condition, labels) in &p.conditions {
            if labels.contains(&event.label) {
                admit(&mut sel, condition, event, rec.n_times);
            }
        }
    }
    Ok(sel)
}

/// Add the trial of `event` for `condition` when its window fits, else count it as dropped.
fn admit(sel: &mut Selection, condition: &str, event: &Event, n_times: usize) {
    let s = (event.onset * sel.fs).round();
    let first = s + sel.k0 as f64;
    let last = first + (sel.n_window - 1) as f64;
    let counts = sel.counts.entry(condition.to_string()).or_default();
    if event.onset.is_finite() && first >= 0.0 && last <= (n_times - 1) as f64 {
        counts.kept += 1;
        sel.trials.push(Trial {
            condition: condition.to_string(),
            event: event.clone(),
            start: first as usize,
        });
    } else {
        counts.dropped += 1;
    }
}

/// Every listed label must match at least one event (a typo would silently lose a condition).
fn check_labels(p: &EpochParams, events: &[Event]) -> Result<(), StageError> {
    for (condition, labels) in &p.conditions {
        for (i, label) in labels.iter().enumerate() {
            if !events.iter().any(|e| &e.label == label) {
                let mut present: Vec<&str> = events.iter().map(|e| e.label.as_str()).collect();
                present.sort_unstable();
                present.dedup();
                return Err(StageError::param(
                    format!("conditions.{condition}[{i}]"),
                    format!(
                        "condition `{condition}`: no event is labelled `{label}`; the recording's \
                         event labels are [{}]",
                        present.join(", ")
                    ),
                ));
            }
        }
    }
    Ok(())
}

/// A data error naming the first channel and event with a NaN or infinite sample in a trial.
fn check_finite(
    x: ArrayView2<'_, f32>,
    sel: &Selection,
    channels: &[String],
) -> Result<(), StageError> {
    for trial in &sel.trials {
        let block = x.slice(s![.., trial.start..trial.start + sel.n_window]);
        for (c, row) in block.outer_iter().enumerate() {
            if let Some(k) = row.iter().position(|v| !v.is_finite()) {
                return Err(StageError::data(format!(
                    "channel `{}` has a non-finite sample ({}) at {:.4} s, inside the epoch of \
                     event `{}` at {} s; clean or interpolate the recording before epoching",
                    channels.get(c).map(String::as_str).unwrap_or("?"),
                    row[k],
                    (trial.start + k) as f64 / sel.fs,
                    trial.event.label,
                    trial.event.onset
                )));
            }
        }
    }
    Ok(())
}

/// Drop trials whose peak-to-peak on any voltage data channel exceeds `limit` volts.
fn reject(x: ArrayView2<'_, f32>, sel: &mut Selection, is_data: &[bool], limit: f64) {
    let n = sel.n_window;
    let counts = &mut sel.counts;
    sel.trials.retain(|trial| {
        let block = x.slice(s![.., trial.start..trial.start + n]);
        let over = block
            .outer_iter()
            .zip(is_data)
            .filter(|(_, d)| **d)
            .any(|(row, _)| peak_to_peak(row.iter()) > limit);
        if over {
            let c = counts.entry(trial.condition.clone()).or_default();
            c.kept -= 1;
            c.rejected += 1;
        }
        !over
    });
}

/// Keep, in every condition, a random subset of its trials as large as the smallest
/// condition's count: condition k (in name order) draws its subset from a ChaCha20 stream seeded
/// with `seed` on stream k, so the choice depends on the seed and the trial lists alone. Kept
/// trials stay in onset order.
fn equalize(sel: &mut Selection, seed: u64) {
    let Some(least) = sel.counts.values().map(|c| c.kept).min() else {
        return;
    };
    let mut keep = vec![true; sel.trials.len()];
    for (k, (name, counts)) in sel.counts.iter_mut().enumerate() {
        let members: Vec<usize> = (0..sel.trials.len())
            .filter(|&i| sel.trials[i].condition == *name)
            .collect();
        let mut rng = ChaCha20Rng::seed_from_u64(seed);
        rng.set_stream(k as u64);
        let chosen = rand::seq::index::sample(&mut rng, members.len(), least.min(members.len()));
        let mut kept = vec![false; members.len()];
        chosen.into_iter().for_each(|i| kept[i] = true);
        for (&i, &k) in members.iter().zip(&kept) {
            keep[i] = k;
        }
        counts.equalized = Some(members.len() - least.min(members.len()));
        counts.kept = least.min(members.len());
    }
    let mut flags = keep.into_iter();
    sel.trials.retain(|_| flags.next().unwrap_or(true));
}

/// max − min of the samples, in f64.
fn peak_to_peak<'a>(samples: impl Iterator<Item = &'a f32>) -> f64 {
    let (lo, hi) = samples.fold((f64::INFINITY, f64::NEG_INFINITY), |(lo, hi), &v| {
        (lo.min(f64::from(v)), hi.max(f64::from(v)))
    });
    hi - lo
}

/// A data error for the first condition without trials, with its counts.
fn check_nonempty(counts: &BTreeMap<String, Counts>) -> Result<(), StageError> {
    match counts.iter().find(|(_, c)| c.kept == 0) {
        None => Ok(()),
        Some((name, c)) => Err(StageError::data(format!(
            "condition `{name}` has no epochs left: {} kept, {} dropped at the recording's edges, \
             {} rejected by peak-to-peak",
            c.kept, c.dropped, c.rejected
        ))),
    }
}

fn counts_record(counts: &BTreeMap<String, Counts>) -> serde_json::Value {
    let per: serde_json::Map<String, serde_json::Value> = counts
        .iter()
        .map(|(name, c)| {
            let mut v = json!({ "kept": c.kept, "dropped": c.dropped, "rejected": c.rejected });
            if let Some(n) = c.equalized {
                v["equalized"] = json!(n);
            }
            (name.clone(), v)
        })
        .collect();
    serde_json::Value::Object(per)
}

/// `[channel, trial, time]` layout of the selected trials.
fn epoched_layout(input: &Layout, sel: &Selection) -> Result<Layout, StageError> {
    let channels = input.coord("channel")?.clone();
    let times = (0..sel.n_window)
        .map(|i| (sel.k0 + i as i64) as f64 / sel.fs)
        .collect();
    let mut meta = input.meta.clone();
    meta.events = None;
    meta.trials = Some(
        sel.trials
            .iter()
            .map(|t| TrialInfo {
                condition: t.condition.clone(),
                event: t.event.label.clone(),
                onset: t.event.onset,
            })
            .collect(),
    );
    Ok(Layout {
        dims: vec!["channel".into(), "trial".into(), "time".into()],
        coords: vec![
            channels,
            Coord::Labels(sel.trials.iter().map(|t| t.condition.clone()).collect()),
            Coord::Numbers(times),
        ],
        units: input.units.clone(),
        complex: false,
        meta,
    })
}

/// Copy the selected windows into a `[channel, trial, time]` array.
fn cut(x: ArrayView2<'_, f32>, sel: &Selection) -> Array3<f32> {
    let mut out = Array3::<f32>::zeros((x.nrows(), sel.trials.len(), sel.n_window));
    for (i, trial) in sel.trials.iter().enumerate() {
        out.slice_mut(s![.., i, ..])
            .assign(&x.slice(s![.., trial.start..trial.start + sel.n_window]));
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::array::Meta;
    use ndarray::Array2;
    use serde_json::json;

    const FS: f64 = 100.0;
    const N: usize = 1000; // 10 s

    /// Channels: `idx` (MISC, value = sample index, so a trial shows which samples it holds),
    /// `Cz` (EEG, small ramp), `EOG` (large blinks, never part of rejection).
    fn recording(events: &[(f64, &str)]) -> LabelledArray {
        let mut v = Array2::<f32>::zeros((3, N));
        for k in 0..N {
            v[[0, k]] = k as f32;
            v[[1, k]] = (k % 50) as f32 * 1e-6;
            v[[2, k]] = if k % 97 == 0 { 1e-3 } else { 0.0 };
        }
        let layout = Layout {
            dims: vec!["channel".into(), "time".into()],
            coords: vec![
                Coord::Labels(vec!["idx".into(), "Cz".into(), "EOG".into()]),
                Coord::Numbers((0..N).map(|k| k as f64 / FS).collect()),
            ],
            units: "V".into(),
            complex: false,
            meta: Meta {
                sampling_rate: Some(FS),
                channel_types: Some(vec!["MISC".into(), "EEG".into(), "EOG".into()]),
                events: Some(
                    events
                        .iter()
                        .map(|&(onset, label)| Event {
                            onset,
                            duration: 0.0,
                            label: label.into(),
                        })
                        .collect(),
                ),
                ..Meta::default()
            },
        };
        LabelledArray::real(layout, v.into_dyn()).unwrap()
    }

    fn params(v: serde_json::Value) -> EpochParams {
        crate::op::parse_params(&v).unwrap()
    }

    fn run(p: &EpochParams, x: &LabelledArray) -> Result<(LabelledArray, Notes), StageError> {
        let mut notes = Notes::default();
        let out = Epoch::run(
            p,
            &[Input {
                stage: "raw",
                subject: None,
                array: x,
            }],
            &mut notes,
        )?;
        Ok((out, notes))
    }

    fn layout_of(p: &EpochParams, x: &LabelledArray) -> Result<Option<Layout>, StageError> {
        Epoch::layout(
            p,
            &[InputLayout {
                stage: "raw",
                subject: None,
                layout: &x.layout,
            }],
        )
    }

    #[test]
    fn trials_hold_the_samples_of_the_design_formula() {
        // DESIGN.md §4: s = round(onset·fs), samples s + k for k = round(t0·fs)..=round(t1·fs),
        // time k/fs. By hand: onset 2.496 s → s = 250 (249.6 rounds up); onset 1.004 s → s = 100;
        // window [-0.2, 0.3] s → k = -20..=30, 51 samples.
        let x = recording(&[(2.496, "cue-b"), (1.004, "cue-a"), (5.0, "other")]);
        let p = params(
            json!({ "conditions": { "A": ["cue-a"], "B": ["cue-b"] }, "window": [-0.2, 0.3] }),
        );
        let (out, notes) = run(&p, &x).unwrap();
        let v = out.real_values().unwrap();
        assert_eq!(v.shape(), [3, 2, 51]);
        let first: Vec<f32> = (0..51).map(|i| v[[0, 0, i]]).collect();
        let second: Vec<f32> = (0..51).map(|i| v[[0, 1, i]]).collect();
        assert_eq!(first, (80..=130).map(|k| k as f32).collect::<Vec<_>>()); // ordered by onset
        assert_eq!(second, (230..=280).map(|k| k as f32).collect::<Vec<_>>());
        let times = out.layout.numbers("time").unwrap();
        assert_eq!((times[0], times[20], times[50]), (-0.2, 0.0, 0.3));
        assert_eq!(out.layout.dims, ["channel", "trial", "time"]);
        assert_eq!(out.layout.labels("trial").unwrap(), ["A", "B"]);
        let trials = out.layout.meta.trials.as_ref().unwrap();
        assert_eq!(
            (trials[1].event.as_str(), trials[1].onset),
            ("cue-b", 2.496)
        );
        assert!(out.layout.meta.events.is_none());
        assert_eq!(out.layout.meta.channel_types, x.layout.meta.channel_types);
        let want = json!({ "A": { "kept": 1, "dropped": 0, "rejected": 0 }, "B": { "kept": 1, "dropped": 0, "rejected": 0 } });
        assert_eq!(notes.records["epochs"], want);
        // Without rejection the layout is known in advance and equals the output's.
        assert_eq!(layout_of(&p, &x).unwrap().unwrap(), out.layout);
    }

    #[test]
    fn events_too_close_to_an_edge_are_dropped_and_counted() {
        // Edges by hand: with k = -50..=50, s must lie in 50..=949 (N = 1000 samples).
        let x = recording(&[
            (0.49, "a"),
            (0.50, "a"),
            (9.49, "a"),
            (9.50, "a"),
            (4.0, "b"),
        ]);
        let p = params(json!({ "conditions": { "A": ["a"], "B": ["b"] }, "window": [-0.5, 0.5] }));
        let (out, notes) = run(&p, &x).unwrap();
        let v = out.real_values().unwrap();
        let starts: Vec<f32> = (0..3).map(|t| v[[0, t, 0]]).collect();
        assert_eq!(starts, [0.0, 350.0, 899.0]);
        assert_eq!(
            notes.records["epochs"]["A"],
            json!({ "kept": 2, "dropped": 2, "rejected": 0 })
        );
    }

    #[test]
    fn peak_to_peak_rejects_over_eeg_channels_only() {
        // Definition: reject when max − min on a voltage data channel exceeds the threshold.
        // Cz's ramp spans 49 µV per 50 samples; the EOG blinks (1 mV) must not count.
        let mut x = recording(&[(2.0, "a"), (4.0, "a"), (6.0, "a")]);
        if let crate::array::Values::Real(v) = &mut x.values {
            v[[1, 410]] = 200e-6; // inside the second trial only
        }
        let p = params(
            json!({ "conditions": { "A": ["a"] }, "window": [-0.1, 0.2], "reject": { "peak_to_peak": 100e-6 } }),
        );
        assert_eq!(layout_of(&p, &x).unwrap(), None); // depends on the values
        let (out, notes) = run(&p, &x).unwrap();
        let trials = out.layout.meta.trials.as_ref().unwrap();
        assert_eq!(
            trials.iter().map(|t| t.onset).collect::<Vec<_>>(),
            [2.0, 6.0]
        );
        assert_eq!(
            notes.records["epochs"]["A"],
            json!({ "kept": 2, "dropped": 0, "rejected": 1 })
        );
        // The bound for the room estimate: the trials before rejection, as without `reject`.
        let input = InputLayout {
            stage: "raw",
            subject: None,
            layout: &x.layout,
        };
        let bound = Epoch::layout_bound(&p, &[input]).unwrap().unwrap();
        let mut unrejected = p.clone();
        unrejected.reject = None;
        assert_eq!(Some(bound.clone()), layout_of(&unrejected, &x).unwrap());
        assert_eq!(bound.shape(), [3, 3, 31]); // 3 trials; 0.3 s at 100 Hz, both ends: 31
        assert_eq!(out.layout.shape(), [3, 2, 31]); // channel × trial × time
    }

    #[test]
    fn a_condition_without_epochs_is_a_data_error_with_its_counts() {
        let mut x = recording(&[(0.05, "a"), (3.0, "b")]);
        let p = params(json!({ "conditions": { "A": ["a"], "B": ["b"] }, "window": [-0.1, 0.2] }));
        let want = "condition `A` has no epochs left: 0 kept, 1 dropped at the recording's edges, 0 rejected by peak-to-peak";
        assert_eq!(layout_of(&p, &x).unwrap_err().to_string(), want);
        assert_eq!(run(&p, &x).unwrap_err().to_string(), want);
        if let crate::array::Values::Real(v) = &mut x.values {
            v[[1, 300]] = 1.0;
        }
        let p = params(
            json!({ "conditions": { "B": ["b"] }, "window": [-0.1, 0.2], "reject": { "peak_to_peak": 1e-4 } }),
        );
        let err = run(&p, &x).unwrap_err();
        assert_eq!(err.to_string(), "condition `B` has no epochs left: 0 kept, 0 dropped at the recording's edges, 1 rejected by peak-to-peak");
    }

    #[test]
    fn an_unmatched_label_names_the_condition_and_the_labels_present() {
        let x = recording(&[(2.0, "cue-a"), (3.0, "cue-b"), (4.0, "cue-a")]);
        let p = params(
            json!({ "conditions": { "A": ["cue-a"], "B": ["cue-x"] }, "window": [-0.1, 0.2] }),
        );
        let err = layout_of(&p, &x).unwrap_err();
        assert_eq!(err.to_string(), "conditions.B[0]: condition `B`: no event is labelled `cue-x`; the recording's event labels are [cue-a, cue-b]");
    }

    #[test]
    fn bad_windows_are_param_errors() {
        let x = recording(&[(2.0, "a")]);
        let err = Epoch::check(&params(
            json!({ "conditions": { "A": ["a"] }, "window": [0.5, 0.5] }),
        ))
        .unwrap_err();
        assert_eq!(
            err.to_string(),
            "window: expected [start, end] seconds with start < end, found [0.5, 0.5]"
        );
        let p = params(json!({ "conditions": { "A": ["a"] }, "window": [-6, 5] }));
        let err = layout_of(&p, &x).unwrap_err();
        assert_eq!(err.to_string(), "window: the window [-6, 5] s spans 1101 samples but the recording has only 1000 (10.000 s at 100 Hz)");
        let p = params(json!({ "conditions": { "A": ["a"] }, "window": [-1e300, 1e300] }));
        assert!(
            matches!(layout_of(&p, &x).unwrap_err(), StageError::Param { field, .. } if field == "window")
        );
        let err = Epoch::check(&params(json!({ "conditions": { "A": ["a"] }, "window": [0, 1], "reject": { "peak_to_peak": 0 } }))).unwrap_err();
        assert_eq!(
            err.to_string(),
            "reject.peak_to_peak: expected a positive number of volts, found 0"
        );
        let err = Epoch::check(&params(json!({ "conditions": {}, "window": [0, 1] }))).unwrap_err();
        assert!(
            err.to_string()
                .starts_with("conditions: give at least one condition"),
            "{err}"
        );
        let err = Epoch::check(&params(
            json!({ "conditions": { "A": [] }, "window": [0, 1] }),
        ))
        .unwrap_err();
        assert_eq!(
            err.to_string(),
            "conditions.A: list at least one event label for this condition"
        );
    }

    #[test]
    fn non_finite_samples_inside_a_trial_are_a_data_error() {
        let mut x = recording(&[(2.0, "a"), (5.0, "a")]);
        if let crate::array::Values::Real(v) = &mut x.values {
            v[[2, 505]] = f32::NAN; // EOG, second trial
            v[[1, 800]] = f32::INFINITY; // outside every trial: harmless
        }
        let p = params(json!({ "conditions": { "A": ["a"] }, "window": [-0.1, 0.2] }));
        let err = run(&p, &x).unwrap_err();
        assert_eq!(err.to_string(), "channel `EOG` has a non-finite sample (NaN) at 5.0500 s, inside the epoch of event `a` at 5 s; clean or interpolate the recording before epoching");
    }

    #[test]
    fn a_recording_without_events_is_a_data_error() {
        let mut x = recording(&[]);
        x.layout.meta.events = None;
        let p = params(json!({ "conditions": { "A": ["a"] }, "window": [-0.1, 0.2] }));
        assert_eq!(
            run(&p, &x).unwrap_err().to_string(),
            "the recording carries no events to cut epochs around"
        );
    }

    #[test]
    fn equalize_keeps_the_smallest_count_per_condition_reproducibly() {
        // A: 6 events, B: 3. With `equalize` each condition keeps 3, recorded in the counts;
        // the same seed keeps the same trials, and the kept trials stay in onset order.
        let events: Vec<(f64, &str)> = (0..9)
            .map(|k| {
                (
                    1.0 + 0.5 * k as f64,
                    if k % 3 == 2 { "cue-b" } else { "cue-a" },
                )
            })
            .collect();
        let x = recording(&events);
        let with = |seed: u64| {
            params(json!({ "conditions": { "A": ["cue-a"], "B": ["cue-b"] },
                           "window": [-0.1, 0.1], "equalize": { "seed": seed } }))
        };
        let (out, notes) = run(&with(4), &x).unwrap();
        let labels = out.layout.labels("trial").unwrap();
        assert_eq!(labels.iter().filter(|l| *l == "A").count(), 3);
        assert_eq!(labels.iter().filter(|l| *l == "B").count(), 3);
        let want = json!({ "A": { "kept": 3, "dropped": 0, "rejected": 0, "equalized": 3 },
                           "B": { "kept": 3, "dropped": 0, "rejected": 0, "equalized": 0 } });
        assert_eq!(notes.records["epochs"], want);
        let onsets = |o: &LabelledArray| -> Vec<f64> {
            o.layout
                .meta
                .trials
                .as_ref()
                .unwrap()
                .iter()
                .map(|t| t.onset)
                .collect()
        };
        let kept = onsets(&out);
        assert!(kept.windows(2).all(|w| w[0] < w[1]), "{kept:?}");
        assert_eq!(onsets(&run(&with(4), &x).unwrap().0), kept);
        let others: Vec<Vec<f64>> = (5..12)
            .map(|s| onsets(&run(&with(s), &x).unwrap().0))
            .collect();
        assert!(
            others.iter().any(|o| *o != kept),
            "the seed changes the choice"
        );
        assert_eq!(layout_of(&with(4), &x).unwrap().as_ref(), Some(&out.layout));
        // Without `equalize` the effective params (and so the cache keys) are unchanged.
        let plain = params(json!({ "conditions": { "A": ["cue-a"] }, "window": [-0.1, 0.1] }));
        assert!(serde_json::to_value(&plain)
            .unwrap()
            .get("equalize")
            .is_none());
    }
}
