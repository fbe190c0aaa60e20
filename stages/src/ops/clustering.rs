//! The `clustering` op: phase-synchronization measures between channel pairs, per condition
//! (DESIGN.md §4). This file owns the params, pair and condition resolution, the output layout
//! and the data movement; the formulas are in [`super::measures`].
//!
//! Input: complex wavelet coefficients, dims `[channel, trial, freq, time]`, the trial axis
//! labelled with each trial's condition. Output: f32, dims
//! `[condition, measure, pair, freq, time]`, unit `1`.
//!
//! Decisions where DESIGN.md is silent:
//! - Conditions are sorted by name, so every subject's output has the same condition order
//!   whatever order its trials came in (first appearance would differ between subjects).
//! - Only data channels form pairs: types EEG, SEEG, ECOG, DBS, LFP and MEG* (case-insensitive);
//!   without `meta.channel_types` every channel is a data channel.
//! - `pairs: all` is every unordered pair in channel order ([a, b] with a before b);
//!   `{seed: [..]}` is each seed (in the order given) with every other data channel in channel
//!   order, skipping a pair already listed the other way round; a list is taken as given.
//!   In a pair [a, b], X is a and Y is b: icoh > 0 when a leads b.
//! - `across: time`: for trial n, frequency f and sample t, the sums run over the samples
//!   t − h … t + h with h = round(window_cycles · fs / (2f)) (2h + 1 samples, about
//!   `window_cycles` cycles of f, centred), cut at the ends of the time axis; the measure of each
//!   trial is then averaged over the trials of the condition.
//! - A zero coefficient has no phase: every measure of a pair is NaN at a (freq, time) where
//!   one of its terms has a zero coefficient, with one warning per channel.

use std::collections::BTreeMap;

use ndarray::{ArrayD, IxDyn};
use num_complex::Complex32;
use rayon::prelude::*;
use serde::{Deserialize, Serialize};

#[cfg(test)]
use crate::array::Values;
use crate::array::{Coord, LabelledArray, Layout};
use crate::dsp::recording::is_voltage_data_type;
use crate::error::StageError;
use crate::op::{single, Input, InputLayout, Notes, Op};
use crate::table::number_text;

pub use super::measures::Measure;
use super::measures::{polar, Sums};
use super::params_de::map_only;
use super::trial_sums::{self, Needs, PairSums, Planes};

/// The `clustering` op.
pub struct Clustering;

/// One measure or several.
///
/// Read by hand rather than as an untagged enum, so that a misspelt measure is reported as serde
/// reports an unknown variant (naming it and the measures that exist) instead of "did not match".
#[derive(Clone, Debug, PartialEq, Serialize, schemars::JsonSchema)]
#[serde(untagged)]
pub enum MeasureSpec {
    /// A single measure.
    One(Measure),
    /// Several measures, in output order.
    Many(Vec<Measure>),
}

impl<'de> Deserialize<'de> for MeasureSpec {
    fn deserialize<D: serde::Deserializer<'de>>(d: D) -> Result<Self, D::Error> {
        use serde::de::Error;
        use serde_json::Value;
        let value = Value::deserialize(d)?;
        let read =
            match value {
                Value::String(_) => Measure::deserialize(value).map(MeasureSpec::One),
                Value::Array(_) => Vec::<Measure>::deserialize(value).map(MeasureSpec::Many),
                _ => return Err(D::Error::custom(
                    "expected a measure (plv, ppc, pli, wpli, dwpli, icoh) or a list of measures",
                )),
            };
        read.map_err(D::Error::custom)
    }
}

/// The word `all`.
#[derive(
    Clone, Copy, Debug, Default, PartialEq, Eq, Serialize, Deserialize, schemars::JsonSchema,
)]
#[serde(rename_all = "lowercase")]
pub enum AllWord {
    /// Every pair of data channels.
    #[default]
    All,
}

/// `{seed: [..]}`.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize, schemars::JsonSchema)]
#[serde(deny_unknown_fields)]
pub struct Seeds {
    /// Seed channel names.
    pub seed: Vec<String>,
}

/// Which channel pairs to measure.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize, schemars::JsonSchema)]
#[serde(
    untagged,
    expecting = "`all`, `{seed: [channel, ..]}` or a list of `[a, b]` channel pairs"
)]
pub enum PairSpec {
    /// Every pair of data channels.
    All(AllWord),
    /// Each seed with every other data channel.
    #[serde(deserialize_with = "map_only")]
    Seed(Seeds),
    /// Explicit pairs.
    List(Vec<[String; 2]>),
}

impl Default for PairSpec {
    fn default() -> Self {
        PairSpec::All(AllWord::All)
    }
}

/// What the sums run over.
#[derive(
    Clone, Copy, Debug, Default, PartialEq, Eq, Serialize, Deserialize, schemars::JsonSchema,
)]
#[serde(rename_all = "lowercase")]
pub enum Across {
    /// Over the trials of a condition (the default).
    #[default]
    Trials,
    /// Over a sliding window within each trial, then averaged over trials.
    Time,
}

/// Parameters of `clustering`.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize, schemars::JsonSchema)]
#[serde(deny_unknown_fields)]
pub struct ClusteringParams {
    /// The measure(s).
    pub measure: MeasureSpec,
    /// The pairs (default `all`).
    #[serde(default)]
    pub pairs: PairSpec,
    /// `trials` (default) or `time`.
    #[serde(default)]
    pub across: Across,
    /// Window length in cycles of each frequency (only with `across: time`).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub window_cycles: Option<f64>,
}

impl ClusteringParams {
    /// The measures in output order.
    pub fn measures(&self) -> Vec<Measure> {
        match &self.measure {
            MeasureSpec::One(m) => vec![*m],
            MeasureSpec::Many(v) => v.clone(),
        }
    }
}

/// True for the channel types whose signals form pairs: the voltage data channels of
/// [`is_voltage_data_type`] and MEG sensors (a phase needs no voltage unit).
pub fn is_data_channel(kind: &str) -> bool {
    is_voltage_data_type(kind) || kind.trim().to_ascii_uppercase().starts_with("MEG")
}

/// Everything [`Clustering::run`] needs, derived from params and the input layout alone.
struct Plan {
    measures: Vec<Measure>,
    /// Channel indices (a, b) of each pair.
    pairs: Vec<(usize, usize)>,
    /// Condition names (sorted) with the indices of their trials.
    conditions: Vec<(String, Vec<usize>)>,
    /// Half-window in samples per frequency, for `across: time`.
    halves: Option<Vec<usize>>,
    layout: Layout,
}

fn check_input(layout: &Layout) -> Result<(), StageError> {
    if layout.dims != ["channel", "trial", "freq", "time"] {
        return Err(StageError::data(format!(
            "clustering expects wavelet coefficients with axes [channel, trial, freq, time], \
             found [{}]",
            layout.dims.join(", ")
        )));
    }
    if !layout.complex {
        return Err(StageError::data(
            "clustering expects complex wavelet coefficients, found real values",
        ));
    }
    Ok(())
}

/// The trials of each condition, conditions sorted by name.
pub(crate) fn conditions(layout: &Layout) -> Result<Vec<(String, Vec<usize>)>, StageError> {
    let labels: Vec<String> = match (layout.coord("trial")?, &layout.meta.trials) {
        (Coord::Labels(l), _) => l.clone(),
        (c, Some(t)) if t.len() == c.len() => t.iter().map(|t| t.condition.clone()).collect(),
        _ => {
            return Err(StageError::data(
                "the trials carry no condition: expected condition labels on the `trial` axis \
                 or one entry per trial in meta.trials",
            ))
        }
    };
    let mut by_name: BTreeMap<String, Vec<usize>> = BTreeMap::new();
    for (i, l) in labels.into_iter().enumerate() {
        by_name.entry(l).or_default().push(i);
    }
    if by_name.is_empty() {
        return Err(StageError::data("the input holds no trials"));
    }
    Ok(by_name.into_iter().collect())
}

/// Channel names and whether each is a data channel.
fn channels(layout: &Layout) -> Result<(Vec<String>, Vec<bool>), StageError> {
    let names = layout.labels("channel")?.to_vec();
    let data = match &layout.meta.channel_types {
        None => vec![true; names.len()],
        Some(t) if t.len() == names.len() => t.iter().map(|k| is_data_channel(k)).collect(),
        Some(t) => {
            return Err(StageError::data(format!(
                "meta.channel_types lists {} types for {} channels",
                t.len(),
                names.len()
            )))
        }
    };
    Ok((names, data))
}

/// Index of data channel `name`, or a param error at `field` saying what is wrong.
fn lookup(
    name: &str,
    field: &str,
    layout: &Layout,
    names: &[String],
    data: &[bool],
) -> Result<usize, StageError> {
    let data_names: Vec<&str> = names
        .iter()
        .zip(data)
        .filter(|(_, &d)| d)
        .map(|(n, _)| n.as_str())
        .collect();
    match names.iter().position(|n| n == name) {
        Some(i) if data.get(i) == Some(&true) => Ok(i),
        Some(i) => {
            let kind = layout
                .meta
                .channel_types
                .as_ref()
                .and_then(|t| t.get(i))
                .map_or("unknown", String::as_str);
            Err(StageError::param(
                field,
                format!("channel `{name}` is of type {kind}; only data channels form pairs (data channels: [{}])", data_names.join(", ")),
            ))
        }
        None => Err(StageError::param(
            field,
            format!(
                "no channel `{name}` in the data (data channels: [{}])",
                data_names.join(", ")
            ),
        )),
    }
}

pub(crate) fn resolve_pairs(
    spec: &PairSpec,
    layout: &Layout,
) -> Result<Vec<(usize, usize)>, StageError> {
    let (names, data) = channels(layout)?;
    let idx: Vec<usize> = (0..names.len()).filter(|&i| data[i]).collect();
    let mut pairs = Vec::new();
    match spec {
        PairSpec::All(_) => {
            for (k, &a) in idx.iter().enumerate() {
                pairs.extend(idx[k + 1..].iter().map(|&b| (a, b)));
            }
        }
        PairSpec::Seed(s) => {
            for (k, name) in s.seed.iter().enumerate() {
                let field = format!("pairs.seed[{k}]");
                let a = lookup(name, &field, layout, &names, &data)?;
                if s.seed[..k].contains(name) {
                    return Err(StageError::param(
                        field,
                        format!("seed `{name}` is listed twice"),
                    ));
                }
                for &b in idx.iter().filter(|&&b| b != a) {
                    if !pairs.contains(&(b, a)) {
                        pairs.push((a, b));
                    }
                }
            }
        }
        PairSpec::List(list) => {
            for (k, [x, y]) in list.iter().enumerate() {
                let field = format!("pairs[{k}]");
                let (a, b) = (
                    lookup(x, &field, layout, &names, &data)?,
                    lookup(y, &field, layout, &names, &data)?,
                );
                if a == b {
                    return Err(StageError::param(
                        field,
                        format!("a pair needs two different channels, found [{x}, {y}]"),
                    ));
                }
                if pairs.contains(&(a, b)) {
                    return Err(StageError::param(
                        field,
                        format!("pair [{x}, {y}] is listed twice"),
                    ));
                }
                pairs.push((a, b));
            }
        }
    }
    if pairs.is_empty() {
        return Err(StageError::data(format!(
            "no channel pairs: the data hold {} data channel(s), at least 2 are needed",
            idx.len()
        )));
    }
    Ok(pairs)
}

/// Half-windows in samples per frequency for `across: time`; a window must hold ≥ 3 samples.
fn half_windows(cycles: f64, layout: &Layout) -> Result<Vec<usize>, StageError> {
    let fs = layout.sampling_rate()?;
    let freqs = layout.numbers("freq")?;
    freqs
        .iter()
        .map(|&f| {
            let h = (cycles * fs / (2.0 * f)).round();
            if h.is_finite() && h >= 1.0 {
                Ok(h as usize)
            } else {
                Err(StageError::param(
                    "window_cycles",
                    format!(
                        "{cycles} cycles at {f} Hz span fewer than 3 samples at {fs} Hz; \
                         a window needs at least 3 (raise window_cycles)"
                    ),
                ))
            }
        })
        .collect()
}

/// The layout `[condition, measure, pair, freq, time]` of measures computed from coefficients
/// `input`, with the given freq and time coordinates; the trial count of each condition in
/// `meta.extra.trials_per_condition`.
pub(crate) fn measure_layout(
    input: &Layout,
    conditions: &[(String, Vec<usize>)],
    measures: &[Measure],
    pairs: &[(usize, usize)],
    (freq, time): (Coord, Coord),
) -> Result<Layout, StageError> {
    let names = input.labels("channel")?;
    let mut layout = input.clone();
    layout.dims = ["condition", "measure", "pair", "freq", "time"]
        .map(String::from)
        .to_vec();
    layout.coords = vec![
        Coord::Labels(conditions.iter().map(|c| c.0.clone()).collect()),
        Coord::Labels(measures.iter().map(|m| m.name().to_string()).collect()),
        Coord::Pairs(
            pairs
                .iter()
                .map(|&(a, b)| [names[a].clone(), names[b].clone()])
                .collect(),
        ),
        freq,
        time,
    ];
    layout.units = "1".into();
    layout.complex = false;
    // These are parallel to axes the output no longer has.
    layout.meta.channel_types = None;
    layout.meta.trials = None;
    layout.meta.events = None;
    let counts: serde_json::Map<String, serde_json::Value> = conditions
        .iter()
        .map(|(c, t)| (c.clone(), t.len().into()))
        .collect();
    layout
        .meta
        .extra
        .insert("trials_per_condition".into(), counts.into());
    Ok(layout)
}

fn plan(params: &ClusteringParams, input: &Layout) -> Result<Plan, StageError> {
    Clustering::check(params)?;
    check_input(input)?;
    let measures = params.measures();
    let pairs = resolve_pairs(&params.pairs, input)?;
    let conditions = conditions(input)?;
    let halves = match (params.across, params.window_cycles) {
        (Across::Time, Some(c)) => Some(half_windows(c, input)?),
        _ => None,
    };
    let layout = measure_layout(
        input,
        &conditions,
        &measures,
        &pairs,
        (input.coord("freq")?.clone(), input.coord("time")?.clone()),
    )?;
    Ok(Plan {
        measures,
        pairs,
        conditions,
        halves,
        layout,
    })
}

/// At least one measure, none twice; a seed list or pair list that is not empty.
pub(crate) fn check_measures_and_pairs(
    measures: &[Measure],
    pairs: &PairSpec,
) -> Result<(), StageError> {
    if measures.is_empty() {
        return Err(StageError::param(
            "measure",
            "expected at least one measure",
        ));
    }
    for (i, m) in measures.iter().enumerate() {
        if measures[..i].contains(m) {
            return Err(StageError::param(
                "measure",
                format!("{} is listed twice", m.name()),
            ));
        }
    }
    match pairs {
        PairSpec::Seed(s) if s.seed.is_empty() => {
            return Err(StageError::param(
                "pairs.seed",
                "expected at least one seed channel",
            ))
        }
        PairSpec::List(l) if l.is_empty() => {
            return Err(StageError::param("pairs", "expected at least one pair"))
        }
        _ => {}
    }
    Ok(())
}

impl Op for Clustering {
    type Params = ClusteringParams;
    const NAME: &'static str = "clustering";
    const VERSION: u32 = 1;

    fn check(p: &Self::Params) -> Result<(), StageError> {
        check_measures_and_pairs(&p.measures(), &p.pairs)?;
        match (p.across, p.window_cycles) {
            (Across::Time, None) => Err(StageError::param(
                "window_cycles",
                "across: time needs window_cycles (the window length in cycles of each frequency)",
            )),
            (Across::Time, Some(c)) if !(c.is_finite() && c > 0.0) => Err(StageError::param(
                "window_cycles",
                format!("expected a finite number above 0, found {c}"),
            )),
            (Across::Trials, Some(_)) => Err(StageError::param(
                "window_cycles",
                "only applies with across: time (across: trials has no window)",
            )),
            _ => Ok(()),
        }
    }

    fn layout(p: &Self::Params, inputs: &[InputLayout<'_>]) -> Result<Option<Layout>, StageError> {
        Ok(Some(plan(p, single(inputs)?.layout)?.layout))
    }

    /// Every frequency is measured on its own, across trials and across time alike (the time
    /// window's length depends on the frequency's own value, read from the coordinate).
    fn slices_along(_p: &Self::Params, axis: &str) -> bool {
        axis == "freq"
    }

    fn run(
        p: &Self::Params,
        inputs: &[Input<'_>],
        notes: &mut Notes,
    ) -> Result<LabelledArray, StageError> {
        let input = single(inputs)?.array;
        let plan = plan(p, &input.layout)?;
        let values = input.complex_values()?.as_standard_layout();
        let x = Coefs::new(values.as_slice().unwrap_or(&[]), &input.layout.shape());
        check_coefficients(
            &x,
            &used_channels(&plan.pairs),
            (Self::NAME, &input.layout),
            notes,
        )?;
        if plan.halves.is_none() && plan.measures.contains(&Measure::Ppc) {
            for (c, trials) in plan.conditions.iter().filter(|c| c.1.len() < 2) {
                notes.warn(format!(
                    "clustering: condition {c} has {} trial; ppc needs at least 2, so it is NaN there",
                    trials.len()
                ));
            }
        }
        if plan.halves.is_none() {
            warn_unequal_counts(&plan, notes);
        }
        if let (Some(halves), Some(cycles)) = (&plan.halves, p.window_cycles) {
            warn_long_windows(halves, cycles, &input.layout, notes)?;
        }
        let out = compute(&plan, &x);
        let shape = plan.layout.shape();
        let array = ArrayD::from_shape_vec(IxDyn(&shape), out)
            .map_err(|e| StageError::data(format!("internal shape error: {e}")))?;
        LabelledArray::real(plan.layout, array)
    }
}

/// Warns, naming the frequencies, when a window of `across: time` (2h + 1 samples) is longer
/// than the time axis: no time point then has a whole window, the windows of the middle points
/// all cover the whole axis, and the time course there is flat — a measure over the whole
/// trial, not a time course. Not refused: the values are what the definition gives (windows
/// cut at the ends of the axis), and a higher frequency of the same list may fit.
fn warn_long_windows(
    halves: &[usize],
    cycles: f64,
    input: &Layout,
    notes: &mut Notes,
) -> Result<(), StageError> {
    let freqs = input.numbers("freq")?;
    let n_times = input.coord("time")?.len();
    let long: Vec<(f64, usize)> = freqs
        .iter()
        .zip(halves)
        .filter(|(_, &h)| 2 * h + 1 > n_times)
        .map(|(&f, &h)| (f, h))
        .collect();
    let (Some(&(f_low, h_low)), Some(&(f_high, _))) = (
        long.iter().min_by(|a, b| a.0.total_cmp(&b.0)),
        long.iter().max_by(|a, b| a.0.total_cmp(&b.0)),
    ) else {
        return Ok(());
    };
    let fs = input.sampling_rate()?;
    let listed: Vec<String> = long.iter().map(|&(f, _)| number_text(f)).collect();
    let fitting = n_times as f64 * f_high / fs;
    notes.warn(format!(
        "clustering: at {} Hz the window of {cycles} cycles is longer than the time axis \
         ({} samples at {} Hz against {n_times}), so no time point has a whole window \
         and the middle ones all measure the same samples: the time course there is flat (a \
         measure over the whole trial); lower window_cycles (the time axis holds {fitting:.3} \
         cycles of {} Hz) or keep more of the epoch in the wavelet's crop",
        listed.join(", "),
        2 * h_low + 1,
        number_text(f_low),
        number_text(f_high),
    ));
    Ok(())
}

/// Measures whose expected value grows as the trial count falls (a mean of unit vectors or
/// signs over N trials is biased upwards by about 1/√N): comparing conditions of different
/// counts on them compares the counts too.
const COUNT_BIASED: [Measure; 4] = [Measure::Plv, Measure::Pli, Measure::Wpli, Measure::Icoh];

/// Warns when the largest trial count of the conditions exceeds the smallest by more than 10 %
/// (a rule of thumb, common practice) and a count-biased measure is asked for.
fn warn_unequal_counts(plan: &Plan, notes: &mut Notes) {
    let biased: Vec<&str> = plan
        .measures
        .iter()
        .filter(|m| COUNT_BIASED.contains(m))
        .map(|m| m.name())
        .collect();
    let counts = plan.conditions.iter().map(|(_, t)| t.len());
    let (Some(lo), Some(hi)) = (counts.clone().min(), counts.max()) else {
        return;
    };
    if biased.is_empty() || (hi as f64) <= 1.1 * lo as f64 {
        return;
    }
    let listed: Vec<String> = plan
        .conditions
        .iter()
        .map(|(c, t)| format!("{c} {}", t.len()))
        .collect();
    notes.warn(format!(
        "clustering: the conditions' trial counts differ by more than 10 % ({}), and {} are \
         biased upwards by small counts: compare conditions on ppc, or set `equalize` on the \
         epoch stage",
        listed.join(", "),
        biased.join(", ")
    ));
}

/// Read access to coefficients laid out [channel, trial, freq, time].
pub(crate) struct Coefs<'a> {
    values: &'a [Complex32],
    trials: usize,
    freqs: usize,
    times: usize,
}

impl<'a> Coefs<'a> {
    pub(crate) fn new(values: &'a [Complex32], shape: &[usize]) -> Self {
        let dim = |i: usize| shape.get(i).copied().unwrap_or(0);
        Coefs {
            values,
            trials: dim(1),
            freqs: dim(2),
            times: dim(3),
        }
    }

    /// The time series of (channel c, trial n, frequency f).
    pub(crate) fn series(&self, c: usize, n: usize, f: usize) -> &'a [Complex32] {
        let start = ((c * self.trials + n) * self.freqs + f) * self.times;
        &self.values[start..start + self.times]
    }

    /// All coefficients of channel c.
    fn channel(&self, c: usize) -> &'a [Complex32] {
        let len = self.trials * self.freqs * self.times;
        &self.values[c * len..(c + 1) * len]
    }
}

/// The channels that appear in a pair, in channel order.
pub(crate) fn used_channels(pairs: &[(usize, usize)]) -> Vec<usize> {
    let mut used: Vec<usize> = pairs.iter().flat_map(|&(a, b)| [a, b]).collect();
    used.sort_unstable();
    used.dedup();
    used
}

/// Rejects non-finite coefficients (a NaN would spread through the window sums) and warns once
/// per channel that holds exact zeros; `op` names the op in the warning.
pub(crate) fn check_coefficients(
    x: &Coefs,
    used: &[usize],
    (op, layout): (&str, &Layout),
    notes: &mut Notes,
) -> Result<(), StageError> {
    let names = layout.labels("channel")?;
    // One pass per channel, the channels in parallel; reported in channel order.
    let seen: Vec<(bool, usize)> = used
        .par_iter()
        .map(|&c| {
            let (mut bad, mut zeros) = (false, 0usize);
            for z in x.channel(c) {
                bad |= !(z.re.is_finite() & z.im.is_finite());
                zeros += usize::from((z.re == 0.0) & (z.im == 0.0));
            }
            (bad, zeros)
        })
        .collect();
    for (&c, &(bad, zeros)) in used.iter().zip(&seen) {
        if bad {
            return Err(StageError::data(format!(
                "channel {} holds non-finite wavelet coefficients; {op} needs finite values",
                names[c]
            )));
        }
        if zeros > 0 {
            notes.warn(format!(
                "{op}: channel {} has {zeros} zero wavelet coefficient(s) of {}; a zero has \
                 no phase, so every pair with {} is NaN where one enters",
                names[c],
                x.channel(c).len(),
                names[c]
            ));
        }
    }
    Ok(())
}

/// A channel's coefficients split by [`polar`] into unit phasors and amplitudes.
struct Polar {
    unit: Vec<Complex32>,
    amp: Vec<f32>,
}

impl Polar {
    fn with_len(len: usize) -> Polar {
        Polar {
            unit: vec![Complex32::default(); len],
            amp: vec![0.0; len],
        }
    }
}

/// Output values, laid out [condition, measure, pair, freq, time].
fn compute(plan: &Plan, x: &Coefs) -> Vec<f32> {
    let plane = x.freqs * x.times;
    let used = used_channels(&plan.pairs);
    let Some(halves) = &plan.halves else {
        let mut out = vec![0.0f32; plan.layout.shape().iter().product()];
        let per_condition = out.len() / plan.conditions.len().max(1);
        for ((_, trials), out) in plan.conditions.iter().zip(out.chunks_mut(per_condition)) {
            across_trials(plan, x, trials, &used, out);
        }
        return out;
    };
    // Across time reads each channel in its own [trial, freq, time] order: convert once.
    let whole = as_polar(x, &used);
    let mut out = Vec::with_capacity(plan.layout.shape().iter().product());
    for (_, trials) in &plan.conditions {
        // Each pair's block is [measure, freq, time]; collected in pair order (deterministic).
        let blocks: Vec<Vec<f32>> = plan
            .pairs
            .par_iter()
            .map(|&(a, b)| across_time(&plan.measures, x, (&whole[&a], &whole[&b]), trials, halves))
            .collect();
        for m in 0..plan.measures.len() {
            for block in &blocks {
                out.extend_from_slice(&block[m * plane..(m + 1) * plane]);
            }
        }
    }
    out
}

/// Every used channel in polar form, in the input's [trial, freq, time] order.
fn as_polar(x: &Coefs, used: &[usize]) -> BTreeMap<usize, Polar> {
    let converted: Vec<Polar> = used
        .par_iter()
        .map(|&c| {
            let src = x.channel(c);
            let mut dst = Polar::with_len(src.len());
            for ((u, a), &z) in dst.unit.iter_mut().zip(dst.amp.iter_mut()).zip(src) {
                (*u, *a) = polar(z);
            }
            dst
        })
        .collect();
    used.iter().copied().zip(converted).collect()
}

/// The measures of every pair over the trials of one condition into `out`, laid out
/// [measure, pair, freq, time]: one frequency at a time, and within it one tile of time points
/// per parallel task ([`tile_blocks`]). A task fills the tile's planes of every used channel,
/// which then stay in the core's cache while every pair reads them, and sums each pair over
/// the trials. Every sum runs over the trials in trial order, and no value depends on the
/// tiling or on the thread that computed it.
fn across_trials(plan: &Plan, x: &Coefs, trials: &[usize], used: &[usize], out: &mut [f32]) {
    let needs = Needs::of(&plan.measures);
    let (nm, np, nf, nt) = (plan.measures.len(), plan.pairs.len(), x.freqs, x.times);
    let n = trials.len();
    let mut slot = vec![0; used.iter().max().map_or(0, |&c| c + 1)];
    for (i, &c) in used.iter().enumerate() {
        slot[c] = i;
    }
    let tile = tile_blocks(needs, used.len(), n) * trial_sums::LANES;
    // Each tile's values [pair, measure, time], one stretch of `np · nm · tile` per tile, made
    // once per call and reused for every frequency.
    let per_tile = np * nm * tile;
    let span = |ti: usize| ti * tile..((ti + 1) * tile).min(nt);
    let mut staged = vec![0.0f32; nt.div_ceil(tile) * per_tile];
    for f in 0..nf {
        staged
            .par_chunks_mut(per_tile)
            .enumerate()
            .for_each(|(ti, vals)| {
                let times = span(ti);
                let len = times.len();
                let mut slab = SLAB.take();
                slab.resize_with(used.len(), Planes::default);
                for (planes, &c) in slab.iter_mut().zip(used) {
                    planes.reshape(needs, n, len);
                    planes.fill(needs, |k| &x.series(c, trials[k], f)[times.clone()]);
                }
                let mut sums = PairSums::new(needs, trial_sums::blocks(len));
                let vals = &mut vals[..np * nm * len];
                for (&(a, b), pair_vals) in plan.pairs.iter().zip(vals.chunks_exact_mut(nm * len)) {
                    let (pa, pb) = (&slab[slot[a]], &slab[slot[b]]);
                    sums.compute(needs, pa, pb, n);
                    for (&measure, v) in plan.measures.iter().zip(pair_vals.chunks_exact_mut(len)) {
                        sums.values(measure, 0..len, n, (pa, pb), v);
                    }
                }
                SLAB.set(slab);
            });
        // Into `out`, one (measure, pair) row of every frequency per task.
        out.par_chunks_mut(nf * nt)
            .enumerate()
            .for_each(|(row, dst)| {
                let (m, p) = (row / np, row % np);
                let dst = &mut dst[f * nt..(f + 1) * nt];
                for (ti, vals) in staged.chunks_exact(per_tile).enumerate() {
                    let times = span(ti);
                    let at = (p * nm + m) * times.len();
                    dst[times.clone()].copy_from_slice(&vals[at..at + times.len()]);
                }
            });
    }
}

/// Time blocks per tile of [`across_trials`]: as many as keep the tile's planes of every used
/// channel within 1 MiB (a core's L2 cache on the machines measured, a common size), at least
/// one and at most 8 (more gained nothing; BENCHMARKS.md has the measurements). Depends on the
/// sizes alone, never on the machine, so the work split is always the same.
fn tile_blocks(needs: Needs, channels: usize, trials: usize) -> usize {
    let planes = 2 * (usize::from(needs.phasor) + usize::from(needs.raw()));
    let per_block = channels * trials * trial_sums::LANES * planes.max(1) * 4;
    ((1024 << 10) / per_block.max(1)).clamp(1, 8)
}

thread_local! {
    /// The planes of the last tile measured on this thread, kept for the next tile: made
    /// afresh each time, their first touches of new pages cost more than filling them.
    static SLAB: std::cell::RefCell<Vec<Planes>> = const { std::cell::RefCell::new(Vec::new()) };
}

/// One pair's measures over a sliding window of each trial, averaged over the trials. Window
/// sums are differences of running (prefix) sums along time, all in f64.
fn across_time(
    measures: &[Measure],
    x: &Coefs,
    (a, b): (&Polar, &Polar),
    trials: &[usize],
    halves: &[usize],
) -> Vec<f32> {
    let plane = x.freqs * x.times;
    let mut acc = vec![0.0f64; measures.len() * plane];
    let mut prefix = vec![Sums::default(); x.times + 1];
    for &n in trials {
        for (f, &h) in halves.iter().enumerate() {
            let start = (n * x.freqs + f) * x.times;
            let span = start..start + x.times;
            let terms = a.unit[span.clone()].iter().zip(&a.amp[span.clone()]);
            let terms = terms.zip(b.unit[span.clone()].iter().zip(&b.amp[span]));
            for (t, ((&ua, &aa), (&ub, &ab))) in terms.enumerate() {
                let mut next = prefix[t];
                next.add_polar(ua, aa, ub, ab);
                prefix[t + 1] = next;
            }
            for t in 0..x.times {
                let (lo, hi) = (t.saturating_sub(h), (t + h + 1).min(x.times));
                let window = prefix[hi].minus(&prefix[lo]);
                for (m, &measure) in measures.iter().enumerate() {
                    acc[m * plane + f * x.times + t] += window.value(measure);
                }
            }
        }
    }
    let count = trials.len() as f64;
    acc.into_iter().map(|v| (v / count) as f32).collect()
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::op::{DynOp, Registered};
    use crate::ops::tf_testing::{coefficients, names, run_err, run_op};
    use crate::testutil::{read_f64, read_json};
    use ndarray::Array4;
    use num_complex::Complex64;
    use rand::{Rng, SeedableRng};
    use rand_chacha::ChaCha8Rng;
    use serde_json::json;
    use std::f64::consts::PI;

    const ALL: [&str; 6] = ["plv", "ppc", "pli", "wpli", "dwpli", "icoh"];

    fn c32(z: Complex64) -> Complex32 {
        Complex32::new(z.re as f32, z.im as f32)
    }

    /// Coefficients of EEG channels C0 … from a function of (channel, trial, freq, time).
    fn coefs(
        shape: (usize, usize, usize, usize),
        conds: &[&str],
        f: impl FnMut((usize, usize, usize, usize)) -> Complex64,
    ) -> LabelledArray {
        let mut f = f;
        let v = Array4::from_shape_fn(shape, |i| c32(f(i)));
        let freqs: Vec<f64> = (0..shape.2).map(|k| 4.0 + 3.0 * k as f64).collect();
        coefficients(
            v.into_dyn(),
            100.0,
            &freqs,
            names(shape.0),
            vec!["EEG".into(); shape.0],
            conds,
        )
    }

    fn random_phasor(rng: &mut ChaCha8Rng) -> Complex64 {
        Complex64::from_polar(1.0, rng.gen_range(-PI..PI))
    }

    fn gauss(rng: &mut ChaCha8Rng) -> Complex64 {
        let d = rand_distr::StandardNormal;
        Complex64::new(rng.sample(d), rng.sample(d))
    }

    /// out[[cond, measure, pair, freq, time]] as f64.
    fn at(out: &LabelledArray, i: [usize; 5]) -> f64 {
        f64::from(out.real_values().unwrap()[&i[..]])
    }

    /// NaN where the reference is NaN, else |got − want| ≤ tol · max(|want|, floor).
    fn assert_close(got: &[f64], want: &[f64], tol: f64, floor: f64, what: &str) {
        assert_eq!(got.len(), want.len());
        for (i, (g, w)) in got.iter().zip(want).enumerate() {
            if w.is_nan() || g.is_nan() {
                assert!(w.is_nan() && g.is_nan(), "{what}[{i}]: {g} vs {w}");
            } else {
                assert!(
                    (g - w).abs() <= tol * w.abs().max(floor),
                    "{what}[{i}]: {g} vs {w}"
                );
            }
        }
    }

    fn flat(out: &LabelledArray) -> Vec<f64> {
        out.real_values()
            .unwrap()
            .iter()
            .map(|&v| f64::from(v))
            .collect()
    }

    #[test]
    fn clustering_matches_numpy_fixtures() {
        // Reference: tests/reference/gen_tf.py — numpy one-liners of the DESIGN.md §4 formulas
        // (Lachaux 1999, Vinck 2010, Stam 2007, Vinck 2011, Nolte 2004) over trials, and over a
        // centred window averaged over trials. Inputs are the same complex64 values; tolerance
        // 1e-5 relative (floor 1e-2 for values near 0), f32 output rounding being ≈ 6e-8.
        let case = read_json("sync", "case");
        let get = |k: &str| -> Vec<String> { serde_json::from_value(case[k].clone()).unwrap() };
        let (re, im) = (read_f64("sync", "coef_re"), read_f64("sync", "coef_im"));
        let v = ndarray::Zip::from(&re)
            .and(&im)
            .map_collect(|&r, &i| Complex32::new(r as f32, i as f32));
        let freqs: Vec<f64> = serde_json::from_value(case["freqs"].clone()).unwrap();
        let trials = get("trials");
        let conds: Vec<&str> = trials.iter().map(String::as_str).collect();
        let fs = case["fs"].as_f64().unwrap();
        let data = coefficients(v, fs, &freqs, get("channels"), get("channel_types"), &conds);
        for (across, extra) in [
            ("trials", json!(null)),
            ("time", case["window_cycles"].clone()),
        ] {
            let mut params = json!({"measure": ALL, "pairs": "all", "across": across});
            if !extra.is_null() {
                params["window_cycles"] = extra;
            }
            let (out, notes) = run_op::<Clustering>(params, &data).unwrap();
            assert_eq!(
                out.layout.labels("condition").unwrap(),
                &get("conditions")[..]
            );
            assert_eq!(out.layout.labels("measure").unwrap(), &get("measures")[..]);
            let pairs: Vec<[String; 2]> = serde_json::from_value(case["pairs"].clone()).unwrap();
            assert_eq!(
                out.layout.coord("pair").unwrap().pairs().unwrap(),
                &pairs[..]
            );
            let want = read_f64("sync", &format!("expected_{across}"));
            assert_eq!(out.values.shape(), want.shape());
            assert_close(
                &flat(&out),
                &want.iter().copied().collect::<Vec<_>>(),
                1e-5,
                1e-2,
                across,
            );
            // One warning for the zero coefficient of Cz; across trials also one for condition C's
            // single trial (ppc).
            let zero: Vec<_> = notes
                .warnings
                .iter()
                .filter(|w| w.contains("zero wavelet"))
                .collect();
            assert_eq!(zero.len(), 1, "{:?}", notes.warnings);
            assert!(zero[0].contains("channel Cz has 1 zero wavelet coefficient(s) of 720"));
            let ppc = notes
                .warnings
                .iter()
                .filter(|w| w.contains("condition C has 1 trial"))
                .count();
            assert_eq!(ppc, usize::from(across == "trials"));
            // The fixture's conditions hold different trial counts and plv is asked for: one
            // warning across trials (count bias), none across time.
            let unequal: Vec<_> = notes
                .warnings
                .iter()
                .filter(|w| w.contains("trial counts differ by more than 10 %"))
                .collect();
            assert_eq!(
                unequal.len(),
                usize::from(across == "trials"),
                "{unequal:?}"
            );
            if let Some(w) = unequal.first() {
                assert!(
                    w.contains("plv, pli, wpli, icoh") && w.contains("C 1"),
                    "{w}"
                );
            }
        }
    }

    /// Plain-loop oracle written straight from the DESIGN.md §4 formulas (not sharing code with
    /// the op): the measure over paired samples xs, ys; NaN if any has a zero coefficient.
    fn formula(xs: &[Complex64], ys: &[Complex64], m: &str) -> f64 {
        let n = xs.len() as f64;
        if xs.iter().chain(ys).any(|z| z.norm() == 0.0) {
            return f64::NAN;
        }
        let s: Vec<Complex64> = xs.iter().zip(ys).map(|(x, y)| x * y.conj()).collect();
        let sum_im: f64 = s.iter().map(|s| s.im).sum();
        let sum_abs_im: f64 = s.iter().map(|s| s.im.abs()).sum();
        let sum_im2: f64 = s.iter().map(|s| s.im * s.im).sum();
        let phase_sum: Complex64 = s.iter().map(|s| Complex64::from_polar(1.0, s.arg())).sum();
        match m {
            "plv" => phase_sum.norm() / n,
            "ppc" if n < 2.0 => f64::NAN,
            "ppc" => (phase_sum.norm_sqr() - n) / (n * (n - 1.0)),
            "pli" => {
                s.iter()
                    .map(|s| {
                        if s.im > 0.0 {
                            1.0
                        } else if s.im < 0.0 {
                            -1.0
                        } else {
                            0.0
                        }
                    })
                    .sum::<f64>()
                    .abs()
                    / n
            }
            "wpli" => sum_im.abs() / sum_abs_im,
            "dwpli" => (sum_im * sum_im - sum_im2) / (sum_abs_im * sum_abs_im - sum_im2),
            "icoh" => {
                let px: f64 = xs.iter().map(|x| x.norm_sqr()).sum();
                let py: f64 = ys.iter().map(|y| y.norm_sqr()).sum();
                s.iter().sum::<Complex64>().im / (px * py).sqrt()
            }
            _ => unreachable!(),
        }
    }

    /// The oracle's value at (condition trials, measure, pair, f, t), across trials or time.
    fn oracle(
        x: &ArrayD<Complex32>,
        trials: &[usize],
        m: &str,
        (a, b): (usize, usize),
        f: usize,
        t: usize,
        half: Option<usize>,
    ) -> f64 {
        let z = |c: usize, n: usize, t: usize| {
            let v = x[[c, n, f, t]];
            Complex64::new(f64::from(v.re), f64::from(v.im))
        };
        match half {
            None => {
                let xs: Vec<_> = trials.iter().map(|&n| z(a, n, t)).collect();
                let ys: Vec<_> = trials.iter().map(|&n| z(b, n, t)).collect();
                formula(&xs, &ys, m)
            }
            Some(h) => {
                let n_t = x.shape()[3];
                let window: Vec<usize> = (t.saturating_sub(h)..(t + h + 1).min(n_t)).collect();
                let per_trial: Vec<f64> = trials
                    .iter()
                    .map(|&n| {
                        let xs: Vec<_> = window.iter().map(|&s| z(a, n, s)).collect();
                        let ys: Vec<_> = window.iter().map(|&s| z(b, n, s)).collect();
                        formula(&xs, &ys, m)
                    })
                    .collect();
                per_trial.iter().sum::<f64>() / per_trial.len() as f64
            }
        }
    }

    #[test]
    fn clustering_fast_path_matches_plain_loop_oracle() {
        // Oracle: the plain loops above, over several sizes and seeds, with an EOG channel that
        // must stay out of the pairs and one zero coefficient; tolerance 1e-5 relative (floor
        // 1e-2), the op's output being f32. The last size spans several across-trials tiles.
        for (seed, (ch, tr, nf, nt)) in [
            (1u64, (3, 5, 2, 12)),
            (2, (5, 7, 3, 30)),
            (3, (4, 1, 1, 9)),
            (4, (3, 12, 2, 5)),
            // 2 data channels × ≈100 trials per condition × 12 B ≈ 2.4 kB per (freq, time) point:
            // tiles of ≈ 218 of the 240 points, so two tiles per condition.
            (5, (3, 300, 2, 120)),
        ] {
            let mut rng = ChaCha8Rng::seed_from_u64(seed);
            let pool = ["X", "Y", "Z"];
            let conds: Vec<&str> = (0..tr).map(|_| pool[rng.gen_range(0..3)]).collect();
            let mut data = coefs((ch, tr, nf, nt), &conds, |_| gauss(&mut rng));
            let mut types = vec!["EEG".to_string(); ch];
            types[1] = "EOG".into();
            data.layout.meta.channel_types = Some(types);
            if let Values::Complex(v) = &mut data.values {
                v[[2, tr - 1, nf - 1, nt / 2]] = Complex32::new(0.0, 0.0);
            }
            let x = data.complex_values().unwrap().clone();
            for (across, wc) in [("trials", None), ("time", Some(1.5))] {
                let mut params = json!({"measure": ALL, "across": across});
                if let Some(c) = wc {
                    params["window_cycles"] = json!(c);
                }
                let (out, _) = run_op::<Clustering>(params, &data).unwrap();
                let pairs = out.layout.coord("pair").unwrap().pairs().unwrap().to_vec();
                assert!(
                    pairs.iter().all(|p| p[0] != "C1" && p[1] != "C1"),
                    "EOG in a pair"
                );
                let idx = |n: &str| n[1..].parse::<usize>().unwrap();
                let conds_out = out.layout.labels("condition").unwrap().to_vec();
                let freqs = out.layout.numbers("freq").unwrap().to_vec();
                let mut want = Vec::new();
                for c in &conds_out {
                    let trials: Vec<usize> = (0..tr).filter(|&n| conds[n] == c).collect();
                    for m in ALL {
                        for p in &pairs {
                            for (f, &hz) in freqs.iter().enumerate() {
                                // h = round(window_cycles · fs / (2f)), fs = 100 Hz here.
                                let half =
                                    wc.map(|c: f64| (c * 100.0 / (2.0 * hz)).round() as usize);
                                for t in 0..nt {
                                    want.push(oracle(
                                        &x,
                                        &trials,
                                        m,
                                        (idx(&p[0]), idx(&p[1])),
                                        f,
                                        t,
                                        half,
                                    ));
                                }
                            }
                        }
                    }
                }
                assert_close(
                    &flat(&out),
                    &want,
                    1e-5,
                    1e-2,
                    &format!("seed {seed} {across}"),
                );
            }
        }
    }

    #[test]
    fn clustering_constant_lag_and_icoh_sign() {
        // Lachaux 1999: a constant phase lag gives plv = 1 whatever the phases; Stam 2007 /
        // Vinck 2011: pli = wpli = dwpli = 1 for a lag in (0, π). Nolte 2004: with X = A e^{iθ},
        // Y = A e^{i(θ − δ)} (C0 leads C1 by δ), icoh = Σ A² sin δ / Σ A² = sin δ, and the
        // reversed pair gives −sin δ.
        let delta = 0.7;
        let mut rng = ChaCha8Rng::seed_from_u64(11);
        let draws: Vec<(f64, f64)> = (0..40 * 6)
            .map(|_| (rng.gen_range(-PI..PI), rng.gen_range(0.2..3.0)))
            .collect();
        let data = coefs((2, 40, 1, 6), &["A"; 40], |(c, n, _, t)| {
            let (theta, amp) = draws[n * 6 + t];
            Complex64::from_polar(amp, theta - delta * c as f64)
        });
        let params = json!({"measure": ALL, "pairs": [["C0", "C1"], ["C1", "C0"]]});
        let (out, _) = run_op::<Clustering>(params, &data).unwrap();
        for t in 0..6 {
            for (m, name) in ALL.iter().enumerate().take(5) {
                let v = at(&out, [0, m, 0, 0, t]);
                assert!((v - 1.0).abs() < 1e-5, "{name} = {v}");
            }
            assert!((at(&out, [0, 5, 0, 0, t]) - delta.sin()).abs() < 1e-5);
            assert!((at(&out, [0, 5, 1, 0, t]) + delta.sin()).abs() < 1e-5);
        }
    }

    #[test]
    fn clustering_independent_phases_monte_carlo() {
        // Lachaux 1999 / Vinck 2010: with N independent uniform phase differences θ_n,
        // |Z|² = |Σ e^{iθ_n}|² = N + 2 Σ_{j<k} cos(θ_j − θ_k). The N(N−1)/2 cosines have mean 0,
        // variance 1/2 and are pairwise uncorrelated (even when they share an index), so
        // E|Z|² = N, Var|Z|² = 4 · N(N−1)/2 · 1/2 = N(N−1). Hence
        //   plv² = |Z|²/N²:              mean 1/N, variance N(N−1)/N⁴;
        //   ppc = (|Z|² − N)/(N(N−1)):  mean 0,   variance 1/(N(N−1)).
        // Each of R time points is an independent repetition; the mean over R must fall within
        // 5 standard errors (a 5σ bound: a chance failure has probability ≈ 6e-7; the seed is
        // fixed so the test is reproducible). dwPLI has mean 0 under independence (Vinck 2011);
        // its bound uses the sample standard deviation.
        let (n, r) = (8usize, 4000usize);
        let mut rng = ChaCha8Rng::seed_from_u64(5);
        let data = coefs((2, n, 1, r), &vec!["A"; n], |_| {
            random_phasor(&mut rng) * rng.gen_range(0.5..2.0)
        });
        let (out, _) =
            run_op::<Clustering>(json!({"measure": ["plv", "ppc", "dwpli"]}), &data).unwrap();
        let series = |m: usize| {
            (0..r)
                .map(|t| at(&out, [0, m, 0, 0, t]))
                .collect::<Vec<_>>()
        };
        let mean = |v: &[f64]| v.iter().sum::<f64>() / v.len() as f64;
        let (nf, rf) = (n as f64, r as f64);
        let plv2: Vec<f64> = series(0).iter().map(|p| p * p).collect();
        let se_plv2 = (nf * (nf - 1.0) / nf.powi(4) / rf).sqrt();
        assert!(
            (mean(&plv2) - 1.0 / nf).abs() < 5.0 * se_plv2,
            "mean plv² {} vs {}",
            mean(&plv2),
            1.0 / nf
        );
        let se_ppc = (1.0 / (nf * (nf - 1.0)) / rf).sqrt();
        assert!(
            mean(&series(1)).abs() < 5.0 * se_ppc,
            "mean ppc {}",
            mean(&series(1))
        );
        let d = series(2);
        let sd = (d.iter().map(|v| (v - mean(&d)).powi(2)).sum::<f64>() / (rf - 1.0)).sqrt();
        assert!(
            mean(&d).abs() < 5.0 * sd / rf.sqrt(),
            "mean dwpli {}",
            mean(&d)
        );
    }

    #[test]
    fn clustering_zero_lag_mixture() {
        // Stam 2007, Vinck 2011, Nolte 2004: zero-lag (real) mixing of sources adds nothing to
        // the imaginary part of the cross-spectrum on average, so pli, wpli, dwpli and icoh stay
        // ≈ 0 while plv stays high. X = s + 0.3 e₁, Y = 0.9 s + 0.3 e₂ with s, e₁, e₂
        // independent complex Gaussians per trial. Bounds (5σ): pli's signs are ±1 with equal
        // probability → sd 1/√N; wpli and icoh are Σ Im S over Σ|Im S| or sqrt(Σ|X|²Σ|Y|²), with
        // Σ Im S of sd √N · sd(Im S) estimated from the data; dwpli ≈ wpli² scale, bounded by 5/N.
        let n = 2000usize;
        let mut rng = ChaCha8Rng::seed_from_u64(9);
        let mut pairs = Vec::new();
        for _ in 0..n * 4 {
            let (s, e1, e2) = (gauss(&mut rng), gauss(&mut rng), gauss(&mut rng));
            pairs.push((s + 0.3 * e1, 0.9 * s + 0.3 * e2));
        }
        let data = coefs((2, n, 1, 4), &vec!["A"; n], |(c, k, _, t)| {
            let (x, y) = pairs[k * 4 + t];
            if c == 0 {
                x
            } else {
                y
            }
        });
        let (out, _) = run_op::<Clustering>(json!({"measure": ALL}), &data).unwrap();
        let nf = n as f64;
        for t in 0..4 {
            let s: Vec<Complex64> = (0..n)
                .map(|k| pairs[k * 4 + t])
                .map(|(x, y)| x * y.conj())
                .collect();
            let mean_im = s.iter().map(|s| s.im).sum::<f64>() / nf;
            let sd_im =
                (s.iter().map(|s| (s.im - mean_im).powi(2)).sum::<f64>() / (nf - 1.0)).sqrt();
            let sum_abs: f64 = s.iter().map(|s| s.im.abs()).sum();
            let px: f64 = (0..n).map(|k| pairs[k * 4 + t].0.norm_sqr()).sum();
            let py: f64 = (0..n).map(|k| pairs[k * 4 + t].1.norm_sqr()).sum();
            let v = |m: usize| at(&out, [0, m, 0, 0, t]);
            assert!(v(0) > 0.8, "plv {}", v(0));
            assert!(v(2) < 5.0 / nf.sqrt(), "pli {}", v(2));
            assert!(v(3) < 5.0 * sd_im * nf.sqrt() / sum_abs, "wpli {}", v(3));
            assert!(v(4).abs() < 5.0 / nf, "dwpli {}", v(4));
            assert!(
                v(5).abs() < 5.0 * sd_im * nf.sqrt() / (px * py).sqrt(),
                "icoh {}",
                v(5)
            );
        }
    }

    #[test]
    fn clustering_envelope_leaves_phase_measures_unchanged() {
        // CHECKS.md, common practice: phase-only measures (plv, ppc, pli) must not change when
        // one channel is multiplied by a positive envelope; amplitude-weighted ones (wpli, icoh)
        // do, which shows the check has power. Tolerance 1e-5 (f32 rounding of the products).
        let mut rng = ChaCha8Rng::seed_from_u64(3);
        let base: Vec<Complex64> = (0..2 * 30 * 2 * 10).map(|_| gauss(&mut rng)).collect();
        let env: Vec<f64> = (0..30 * 2 * 10).map(|_| rng.gen_range(0.1..10.0)).collect();
        let make = |scale: bool| {
            coefs((2, 30, 2, 10), &["A"; 30], |(c, n, f, t)| {
                let k = (n * 2 + f) * 10 + t;
                let z = base[c * 600 + k];
                if scale && c == 1 {
                    z * env[k]
                } else {
                    z
                }
            })
        };
        let params = json!({"measure": ALL});
        let (plain, _) = run_op::<Clustering>(params.clone(), &make(false)).unwrap();
        let (scaled, _) = run_op::<Clustering>(params, &make(true)).unwrap();
        let mut moved = [0.0f64; 6];
        for f in 0..2 {
            for t in 0..10 {
                for (m, d) in moved.iter_mut().enumerate() {
                    let (a, b) = (at(&plain, [0, m, 0, f, t]), at(&scaled, [0, m, 0, f, t]));
                    *d = d.max((a - b).abs());
                }
            }
        }
        assert!(
            moved[0] < 1e-5 && moved[1] < 1e-5 && moved[2] < 1e-5,
            "{moved:?}"
        );
        assert!(moved[3] > 1e-3 && moved[5] > 1e-3, "{moved:?}");
    }

    #[test]
    fn clustering_pairs_conditions_and_meta() {
        let data = coefs(
            (4, 5, 1, 3),
            &["late", "early", "late", "mid", "early"],
            |(c, n, _, t)| Complex64::from_polar(1.0, (c * 5 + n * 3 + t) as f64),
        );
        let pairs_of = |spec: serde_json::Value| {
            let (out, _) =
                run_op::<Clustering>(json!({"measure": "plv", "pairs": spec}), &data).unwrap();
            out.layout
                .coord("pair")
                .unwrap()
                .pairs()
                .unwrap()
                .iter()
                .map(|p| format!("{}-{}", p[0], p[1]))
                .collect::<Vec<_>>()
        };
        assert_eq!(
            pairs_of(json!("all")),
            ["C0-C1", "C0-C2", "C0-C3", "C1-C2", "C1-C3", "C2-C3"]
        );
        assert_eq!(
            pairs_of(json!({"seed": ["C2", "C0"]})),
            ["C2-C0", "C2-C1", "C2-C3", "C0-C1", "C0-C3"]
        );
        assert_eq!(
            pairs_of(json!([["C3", "C1"], ["C1", "C3"]])),
            ["C3-C1", "C1-C3"]
        );
        let (out, _) = run_op::<Clustering>(json!({"measure": ["icoh", "plv"]}), &data).unwrap();
        assert_eq!(
            out.layout.labels("condition").unwrap(),
            ["early", "late", "mid"]
        );
        assert_eq!(out.layout.labels("measure").unwrap(), ["icoh", "plv"]);
        assert_eq!(out.layout.units, "1");
        assert_eq!(out.layout.meta.trials, None);
        assert_eq!(out.layout.meta.sampling_rate, Some(100.0));
        assert_eq!(
            out.layout.meta.extra["trials_per_condition"],
            json!({"early": 2, "late": 2, "mid": 1})
        );
    }

    #[test]
    fn clustering_slices_along_freq() {
        // The parts protocol (op.rs): measuring a range of frequencies gives exactly the whole
        // output's values of those frequencies, across trials and across time.
        let mut rng = ChaCha8Rng::seed_from_u64(11);
        let conds = ["A", "B", "A", "A", "B", "B", "A"];
        let data = coefs((3, 7, 5, 9), &conds, |_| gauss(&mut rng));
        for params in [
            json!({"measure": ALL}),
            json!({"measure": ALL, "across": "time", "window_cycles": 1.5}),
        ] {
            let (whole, _) = run_op::<Clustering>(params.clone(), &data).unwrap();
            assert!(Registered::<Clustering>::new()
                .bind(&params)
                .expect("params")
                .slices_along("freq"));
            for part in [0..1, 1..4, 4..5] {
                let (cut, _) = run_op::<Clustering>(
                    params.clone(),
                    &data.slice("freq", part.clone()).unwrap(),
                )
                .unwrap();
                let want = whole.slice("freq", part.clone()).unwrap();
                assert_eq!(cut.layout, want.layout);
                assert!(cut.values == want.values, "{params} {part:?}");
            }
        }
    }

    #[test]
    fn clustering_same_result_for_any_thread_count() {
        let mut rng = ChaCha8Rng::seed_from_u64(21);
        let data = coefs(
            (6, 9, 2, 40),
            &["A", "B", "A", "B", "A", "B", "A", "B", "A"],
            |_| gauss(&mut rng),
        );
        for params in [
            json!({"measure": ALL}),
            json!({"measure": ALL, "across": "time", "window_cycles": 3}),
        ] {
            let run = |threads| {
                rayon::ThreadPoolBuilder::new()
                    .num_threads(threads)
                    .build()
                    .unwrap()
                    .install(|| run_op::<Clustering>(params.clone(), &data).unwrap().0)
            };
            let (a, b) = (run(1), run(4));
            assert_eq!(
                flat(&a).iter().map(|v| v.to_bits()).collect::<Vec<_>>(),
                flat(&b).iter().map(|v| v.to_bits()).collect::<Vec<_>>()
            );
        }
    }

    #[test]
    fn clustering_warns_when_a_time_window_is_longer_than_the_time_axis() {
        // h = round(window_cycles · fs / (2f)) (DESIGN §4, module doc), fs = 100 Hz, 40 samples:
        // with 3 cycles h is 38 at 4 Hz and 21 at 7 Hz (windows of 77 and 43 samples, longer
        // than the axis), 15 at 10 Hz and 12 at 13 Hz (31 and 25 samples, which fit). The points
        // t with t − h ≤ 0 and t + h ≥ 39 all measure the whole axis: their values are equal.
        let mut rng = ChaCha8Rng::seed_from_u64(5);
        let data = coefs((2, 3, 4, 40), &["A"; 3], |_| gauss(&mut rng));
        let params = json!({"measure": ["plv", "wpli"], "across": "time", "window_cycles": 3});
        let (out, notes) = run_op::<Clustering>(params, &data).unwrap();
        let long: Vec<&String> = notes
            .warnings
            .iter()
            .filter(|w| w.contains("longer than the time axis"))
            .collect();
        assert_eq!(long.len(), 1, "{:?}", notes.warnings);
        assert!(
            long[0].starts_with("clustering: at 4, 7 Hz the window of 3 cycles"),
            "{}",
            long[0]
        );
        assert!(
            long[0].contains("(77 samples at 4 Hz against 40)"),
            "{}",
            long[0]
        );
        let v = out.real_values().unwrap();
        let course =
            |f: usize| -> Vec<u32> { (0..40).map(|t| v[[0, 0, 0, f, t]].to_bits()).collect() };
        for (f, h) in [(0usize, 38usize), (1, 21)] {
            let c = course(f);
            assert!(c[39 - h..=h].iter().all(|&b| b == c[h]), "freq {f}: {c:?}");
        }
        let c = course(2);
        assert!(c.iter().any(|&b| b != c[20]), "10 Hz fits and is not flat");
        // Windows that fit: no such warning.
        let params = json!({"measure": "plv", "across": "time", "window_cycles": 1});
        let (_, notes) = run_op::<Clustering>(params, &data).unwrap();
        assert!(
            !notes
                .warnings
                .iter()
                .any(|w| w.contains("longer than the time axis")),
            "{:?}",
            notes.warnings
        );
    }

    #[test]
    fn clustering_param_errors() {
        let mut data = coefs((3, 4, 2, 5), &["A"; 4], |(c, n, f, t)| {
            Complex64::from_polar(1.0, (c + n + f + t) as f64)
        });
        data.layout.meta.channel_types = Some(vec!["EEG".into(), "EOG".into(), "EEG".into()]);
        let cases = [
            (
                json!({"measure": "coherence"}),
                "measure",
                "unknown variant `coherence`, expected one of `plv`, `ppc`, `pli`, `wpli`, `dwpli`, `icoh`",
            ),
            (
                json!({"measure": ["plv", "wpil"]}),
                "measure",
                "unknown variant `wpil`, expected one of",
            ),
            (
                json!({"measure": 3}),
                "measure",
                "expected a measure (plv, ppc, pli, wpli, dwpli, icoh) or a list of measures",
            ),
            (
                json!({"measure": []}),
                "measure",
                "expected at least one measure",
            ),
            (
                json!({"measure": ["plv", "pli", "plv"]}),
                "measure",
                "plv is listed twice",
            ),
            (
                json!({"measure": "plv", "pairs": "some"}),
                "pairs",
                "`all`, `{seed: [channel, ..]}` or a list of `[a, b]` channel pairs",
            ),
            (
                json!({"measure": "plv", "pairs": [["C0", "C2", "C1"]]}),
                "pairs",
                "or a list of `[a, b]` channel pairs",
            ),
            (
                json!({"measure": "plv", "pairs": []}),
                "pairs",
                "expected at least one pair",
            ),
            (
                json!({"measure": "plv", "pairs": [["C0", "Oz"]]}),
                "pairs[0]",
                "no channel `Oz` in the data (data channels: [C0, C2])",
            ),
            (
                json!({"measure": "plv", "pairs": [["C0", "C2"], ["C1", "C2"]]}),
                "pairs[1]",
                "channel `C1` is of type EOG; only data channels form pairs",
            ),
            (
                json!({"measure": "plv", "pairs": [["C2", "C2"]]}),
                "pairs[0]",
                "a pair needs two different channels, found [C2, C2]",
            ),
            (
                json!({"measure": "plv", "pairs": [["C0", "C2"], ["C0", "C2"]]}),
                "pairs[1]",
                "pair [C0, C2] is listed twice",
            ),
            (
                json!({"measure": "plv", "pairs": {"seed": []}}),
                "pairs.seed",
                "expected at least one seed channel",
            ),
            (
                json!({"measure": "plv", "pairs": {"seed": ["C0", "Fz"]}}),
                "pairs.seed[1]",
                "no channel `Fz` in the data",
            ),
            (
                json!({"measure": "plv", "pairs": {"seed": ["C0", "C0"]}}),
                "pairs.seed[1]",
                "seed `C0` is listed twice",
            ),
            (
                json!({"measure": "plv", "pairs": {"seeds": ["C0"]}}),
                "pairs",
                "`all`, `{seed: [channel, ..]}`",
            ),
            (
                json!({"measure": "plv", "across": "time"}),
                "window_cycles",
                "across: time needs window_cycles",
            ),
            (
                json!({"measure": "plv", "across": "time", "window_cycles": -2}),
                "window_cycles",
                "expected a finite number above 0, found -2",
            ),
            (
                json!({"measure": "plv", "window_cycles": 3}),
                "window_cycles",
                "only applies with across: time",
            ),
            (
                json!({"measure": "plv", "across": "time", "window_cycles": 0.05}),
                "window_cycles",
                "0.05 cycles at 7 Hz span fewer than 3 samples at 100 Hz",
            ),
            (
                json!({"measure": "plv", "across": "channels"}),
                "across",
                "unknown variant `channels`",
            ),
            (
                json!({"measure": "plv", "seed": ["C0"]}),
                "seed",
                "unknown field `seed`",
            ),
            (json!({"pairs": "all"}), "", "missing field `measure`"),
        ];
        for (params, field, msg) in cases {
            match run_err::<Clustering>(params.clone(), &data) {
                StageError::Param { field: f, message } => {
                    assert_eq!(f, field, "{params}: {message}");
                    assert!(message.contains(msg), "{params}: `{message}` lacks `{msg}`");
                }
                other => panic!("{params}: expected a param error, got {other:?}"),
            }
        }
    }

    #[test]
    fn clustering_data_errors() {
        let good = coefs((2, 3, 1, 4), &["A"; 3], |(c, n, _, t)| {
            Complex64::from_polar(1.0, (c + n + t) as f64)
        });
        let p = json!({"measure": "plv"});
        let msg = |d: &LabelledArray| match run_err::<Clustering>(p.clone(), d) {
            StageError::Data(m) => m,
            other => panic!("expected a data error, got {other:?}"),
        };
        let mut d = good.clone();
        d.layout.meta.channel_types = Some(vec!["EEG".into(), "ECG".into()]);
        assert!(msg(&d)
            .contains("no channel pairs: the data hold 1 data channel(s), at least 2 are needed"));
        let mut d = good.clone();
        d.layout.meta.channel_types = Some(vec!["EEG".into()]);
        assert!(msg(&d).contains("meta.channel_types lists 1 types for 2 channels"));
        let mut d = good.clone();
        d.layout.coords[1] = Coord::Numbers(vec![0.0, 1.0, 2.0]);
        d.layout.meta.trials = None;
        assert!(msg(&d).contains("the trials carry no condition"));
        let mut d = good.clone();
        if let Values::Complex(v) = &mut d.values {
            v[[1, 0, 0, 2]] = Complex32::new(f32::INFINITY, 0.0);
        }
        assert!(msg(&d).contains("channel C1 holds non-finite wavelet coefficients"));
        let mut d = good.clone();
        d.layout.dims[2] = "band".into();
        assert!(msg(&d).contains("expects wavelet coefficients with axes [channel, trial, freq, time], found [channel, trial, band, time]"));
        let real =
            LabelledArray::real(good.layout.clone(), ArrayD::zeros(IxDyn(&[2, 3, 1, 4]))).unwrap();
        assert!(msg(&real).contains("expects complex wavelet coefficients, found real values"));
        let mut d = good.clone();
        d.layout.meta.sampling_rate = None;
        match run_err::<Clustering>(
            json!({"measure": "plv", "across": "time", "window_cycles": 2}),
            &d,
        ) {
            StageError::Data(m) => assert!(m.contains("carries no sampling rate")),
            other => panic!("{other:?}"),
        }
    }

    /// CPU seconds (user + system) of this process so far, from /proc/self/stat (Linux; 0 when
    /// unreadable). Wall-clock time on a shared machine mostly measures the neighbours.
    fn cpu_seconds() -> f64 {
        let stat = std::fs::read_to_string("/proc/self/stat").unwrap_or_default();
        let after = stat.rsplit(')').next().unwrap_or("");
        let f: Vec<f64> = after
            .split_whitespace()
            .map(|v| v.parse().unwrap_or(0.0))
            .collect();
        // Fields 14 and 15 of the file (utime, stime) in clock ticks of 1/100 s.
        (f.get(11).unwrap_or(&0.0) + f.get(12).unwrap_or(&0.0)) / 100.0
    }

    #[test]
    #[ignore = "timing of a mid-size case; run in release with --ignored --nocapture"]
    fn timing_mid_size() {
        // 32 channels × 100 trials × 1000 samples at 500 Hz → 20 frequencies → plv, ppc, wpli
        // over all 496 pairs. Prints wall-clock and CPU seconds; asserts nothing about speed.
        use crate::ops::tf_testing::epoched;
        use crate::ops::wavelet::Wavelet;
        use std::time::Instant;
        let mut rng = ChaCha8Rng::seed_from_u64(1);
        let v = ndarray::Array3::from_shape_fn((32, 100, 1000), |_| rng.gen_range(-1e-5f32..1e-5));
        let conds: Vec<&str> = (0..100)
            .map(|n| if n % 2 == 0 { "A" } else { "B" })
            .collect();
        let data = epoched(v.into_dyn(), 500.0, -400, &conds);
        let clock = || (Instant::now(), cpu_seconds());
        let report = |what: &str, shape: &[usize], (t0, c0): (Instant, f64)| {
            let (t1, c1) = clock();
            eprintln!(
                "{what} {shape:?}: {:.2} s wall, {:.2} s CPU",
                (t1 - t0).as_secs_f64(),
                c1 - c0
            );
        };
        eprintln!("threads {}", rayon::current_num_threads());
        let start = clock();
        let wp =
            json!({"freqs": {"from": 3, "to": 30, "count": 20}, "cycles": {"from": 3, "to": 8}});
        let (tf, _) = run_op::<Wavelet>(wp, &data).unwrap();
        report("wavelet", tf.values.shape(), start);
        let start = clock();
        let cp = json!({"measure": ["plv", "ppc", "wpli"], "pairs": "all"});
        let (sync, _) = run_op::<Clustering>(cp, &tf).unwrap();
        report("clustering across trials", sync.values.shape(), start);
        let start = clock();
        let tp = json!({"measure": ["plv", "ppc", "wpli"], "pairs": {"seed": ["C0"]}, "across": "time", "window_cycles": 3});
        let (win, _) = run_op::<Clustering>(tp, &tf).unwrap();
        report("clustering across time", win.values.shape(), start);
    }
}
