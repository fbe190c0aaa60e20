//! The `wavelet` op: complex Morlet coefficients of epoched data (DESIGN.md §4).
//!
//! This file owns the op's params, their checks, the output layout (frequencies, cycles, crop,
//! stride) and the parallel loop over channels; the wavelet and the FFT convolution themselves
//! are in [`super::morlet`].
//!
//! Input: real data, dims `[channel, trial, time]`, `meta.sampling_rate`. Output: complex f32,
//! dims `[channel, trial, freq, time]`, in the input's unit; the metadata flows through, with
//! `sampling_rate` divided by `stride`.
//!
//! Decisions where DESIGN.md is silent:
//! - `cycles: {from, to}` ramps log-spaced over the *index* of the frequencies
//!   (n_k = from · (to/from)^(k/(K−1)), like numpy's geomspace), so the k-th frequency gets n_k.
//! - The edge warning uses an *effective* half-length of 3σ of the longest wavelet (largest σ over
//!   all frequencies, which is the lowest frequency's for the usual ramps). Beyond 3σ the
//!   one-sided Gaussian tail holds 1 − Φ(3) ≈ 0.13 % of the weight (standard normal table), so
//!   zeros further away than that change a coefficient by ≲ 0.3 % of its size; 5σ (the sampled
//!   support) would flag almost every practical epoch.
//! - Without `crop`, the whole epoch is kept and the buffer is zero, so the warning is given too.

use ndarray::{ArrayD, IxDyn};
use num_complex::{Complex32, Complex64};
use rayon::prelude::*;
use serde::{Deserialize, Serialize};

#[cfg(test)]
use crate::array::Values;
use crate::array::{Coord, LabelledArray, Layout};
use crate::error::StageError;
use crate::op::{single, Input, InputLayout, Notes, Op, PlanKey, Plans};
use crate::range;

use super::morlet::{self, Bank, Keep};
use super::params_de::map_only;

/// The `wavelet` op.
pub struct Wavelet;

/// Spacing of a frequency range.
#[derive(
    Clone, Copy, Debug, Default, PartialEq, Eq, Serialize, Deserialize, schemars::JsonSchema,
)]
#[serde(rename_all = "lowercase")]
pub enum Spacing {
    /// Equal ratios between neighbours (the default).
    #[default]
    Log,
    /// Equal steps.
    Linear,
}

/// `freqs: {from, to, count, spacing}`.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize, schemars::JsonSchema)]
#[serde(deny_unknown_fields)]
pub struct FreqRange {
    /// Lowest frequency in Hz.
    pub from: f64,
    /// Highest frequency in Hz (included).
    pub to: f64,
    /// Number of frequencies.
    pub count: usize,
    /// `log` (default) or `linear`.
    #[serde(default)]
    pub spacing: Spacing,
}

/// The frequencies: a range or an explicit list (Hz).
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize, schemars::JsonSchema)]
#[serde(
    untagged,
    expecting = "`{from, to, count, spacing: log|linear}` or a list of frequencies in Hz"
)]
pub enum FreqSpec {
    /// A range.
    #[serde(deserialize_with = "map_only")]
    Range(FreqRange),
    /// Explicit frequencies, in the order given.
    List(Vec<f64>),
}

/// `cycles: {from, to}`: log-spaced over the frequencies' order.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize, schemars::JsonSchema)]
#[serde(deny_unknown_fields)]
pub struct CycleRamp {
    /// Cycles at the first frequency.
    pub from: f64,
    /// Cycles at the last frequency.
    pub to: f64,
}

/// Number of cycles: one for all frequencies, or a ramp.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize, schemars::JsonSchema)]
#[serde(untagged, expecting = "a number of cycles or `{from, to}`")]
pub enum CycleSpec {
    /// The same number of cycles at every frequency.
    Fixed(f64),
    /// Log-spaced from `from` at the first frequency to `to` at the last.
    #[serde(deserialize_with = "map_only")]
    Ramp(CycleRamp),
}

/// Parameters of `wavelet`.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize, schemars::JsonSchema)]
#[serde(deny_unknown_fields)]
pub struct WaveletParams {
    /// The frequencies.
    pub freqs: FreqSpec,
    /// Cycles per wavelet.
    pub cycles: CycleSpec,
    /// `[t0, t1]` in s (inclusive): the part of the epoch kept after convolution.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub crop: Option<[f64; 2]>,
    /// Keep every k-th time point of the cropped output.
    #[serde(default = "one")]
    pub stride: usize,
}

fn one() -> usize {
    1
}

/// Everything [`Wavelet::run`] needs, derived from params and the input layout alone.
struct Plan {
    freqs: Vec<f64>,
    cycles: Vec<f64>,
    fs: f64,
    epoch_len: usize,
    keep: Keep,
    layout: Layout,
}

/// Fails unless `v` is a finite number above zero.
fn positive(field: &str, v: f64, what: &str) -> Result<(), StageError> {
    if v.is_finite() && v > 0.0 {
        Ok(())
    } else {
        Err(StageError::param(
            field,
            format!("{what} must be a finite number above 0, found {v}"),
        ))
    }
}

/// `count` values from `from` to `to` (both included), equal ratios or equal steps.
fn spaced(from: f64, to: f64, count: usize, spacing: Spacing) -> Vec<f64> {
    if count == 1 {
        return vec![from];
    }
    let last = (count - 1) as f64;
    (0..count)
        .map(|k| match spacing {
            Spacing::Log => from * (to / from).powf(k as f64 / last),
            Spacing::Linear => from + (to - from) * k as f64 / last,
        })
        .collect()
}

/// Checks of a frequency list or range on its own (shared with [`super::hilbert`]).
pub(crate) fn check_freqs(freqs: &FreqSpec) -> Result<(), StageError> {
    match freqs {
        FreqSpec::Range(r) => {
            positive("freqs.from", r.from, "a frequency")?;
            positive("freqs.to", r.to, "a frequency")?;
            if r.count == 0 {
                return Err(StageError::param(
                    "freqs.count",
                    "expected at least 1, found 0",
                ));
            }
            if r.count == 1 && r.to != r.from {
                return Err(StageError::param(
                    "freqs.count",
                    format!(
                        "one frequency needs from == to, found {} and {}",
                        r.from, r.to
                    ),
                ));
            }
            if r.to < r.from {
                return Err(StageError::param(
                    "freqs.to",
                    format!("must not be below freqs.from ({}), found {}", r.from, r.to),
                ));
            }
            if r.count > 1 && r.to == r.from {
                return Err(StageError::param(
                    "freqs.to",
                    format!(
                        "{} frequencies need to > from, found both {}",
                        r.count, r.to
                    ),
                ));
            }
        }
        FreqSpec::List(list) => {
            if list.is_empty() {
                return Err(StageError::param(
                    "freqs",
                    "expected at least one frequency",
                ));
            }
            for (i, &f) in list.iter().enumerate() {
                positive(&format!("freqs[{i}]"), f, "a frequency")?;
                if list[..i].contains(&f) {
                    return Err(StageError::param(
                        format!("freqs[{i}]"),
                        format!("{f} Hz is listed twice"),
                    ));
                }
            }
        }
    }
    Ok(())
}

fn check_cycles(cycles: &CycleSpec) -> Result<(), StageError> {
    match cycles {
        CycleSpec::Fixed(n) => positive("cycles", *n, "the number of cycles"),
        CycleSpec::Ramp(r) => {
            positive("cycles.from", r.from, "the number of cycles")?;
            positive("cycles.to", r.to, "the number of cycles")
        }
    }
}

impl FreqSpec {
    /// The frequencies in Hz, in the order given (a range from `from` to `to`).
    pub fn values(&self) -> Vec<f64> {
        match self {
            FreqSpec::Range(r) => spaced(r.from, r.to, r.count, r.spacing),
            FreqSpec::List(list) => list.clone(),
        }
    }
}

impl WaveletParams {
    /// The frequencies in Hz, in output order.
    pub fn frequencies(&self) -> Vec<f64> {
        self.freqs.values()
    }

    /// The number of cycles of each frequency's wavelet.
    pub fn cycle_counts(&self, nfreqs: usize) -> Vec<f64> {
        match &self.cycles {
            CycleSpec::Fixed(n) => vec![*n; nfreqs],
            CycleSpec::Ramp(r) => spaced(r.from, r.to, nfreqs, Spacing::Log),
        }
    }
}

/// The dotted path of the parameter that produced frequency `i` (for error messages).
/// A range's highest frequency is `to`, so a range is always blamed on `freqs.to`.
pub(crate) fn freq_field(freqs: &FreqSpec, i: usize) -> String {
    match freqs {
        FreqSpec::Range(_) => "freqs.to".into(),
        FreqSpec::List(_) => format!("freqs[{i}]"),
    }
}

fn check_nyquist(params: &WaveletParams, freqs: &[f64], fs: f64) -> Result<(), StageError> {
    for (i, &f) in freqs.iter().enumerate() {
        if f >= fs / 2.0 {
            return Err(StageError::param(
                freq_field(&params.freqs, i),
                format!(
                    "{f} Hz is at or above the Nyquist frequency ({} Hz at {fs} Hz sampling)",
                    fs / 2.0
                ),
            ));
        }
    }
    Ok(())
}

/// A millionth of a sample period: time coordinates are k/fs computed in floating point, so a
/// crop bound that names a sample's time must match it despite rounding.
fn tolerance(fs: f64) -> f64 {
    1e-6 / fs
}

/// The kept samples of an epoch with time coordinates `times`, for the `crop` and `stride`
/// params of a time-frequency op (shared with [`super::hilbert`]).
pub(crate) fn keep_for(
    crop: Option<[f64; 2]>,
    stride: usize,
    times: &[f64],
) -> Result<Keep, StageError> {
    let (Some(&first), Some(&last)) = (times.first(), times.last()) else {
        return Err(StageError::data("the input epochs have no time points"));
    };
    let (start, end) = match crop {
        None => (0, times.len() - 1),
        Some([t0, t1]) => {
            if !range::within_axis([t0, t1], first, last) {
                return Err(StageError::param(
                    "crop",
                    format!("[{t0}, {t1}] s is outside the epoch, which spans [{first}, {last}] s"),
                ));
            }
            let start = times.iter().position(|&t| range::contains([t0, t1], t));
            let end = times.iter().rposition(|&t| range::contains([t0, t1], t));
            match (start, end) {
                (Some(s), Some(e)) if s <= e => (s, e),
                _ => {
                    return Err(StageError::param(
                        "crop",
                        format!("[{t0}, {t1}] s holds no sample of the epoch"),
                    ))
                }
            }
        }
    };
    Ok(Keep {
        start,
        stride,
        count: (end - start) / stride + 1,
    })
}

/// `crop` must be `[t0, t1]` with t0 ≤ t1 and `stride` at least 1 (shared with
/// [`super::hilbert`]).
pub(crate) fn check_crop_stride(crop: Option<[f64; 2]>, stride: usize) -> Result<(), StageError> {
    if let Some([t0, t1]) = crop {
        if !(t0.is_finite() && t1.is_finite() && t0 <= t1) {
            return Err(StageError::param(
                "crop",
                format!("expected [t0, t1] with t0 ≤ t1 (s), found [{t0}, {t1}]"),
            ));
        }
    }
    if stride == 0 {
        return Err(StageError::param("stride", "expected at least 1, found 0"));
    }
    Ok(())
}

/// Checks that the input is real epoched data `[channel, trial, time]`.
fn check_input(layout: &Layout) -> Result<(), StageError> {
    if layout.dims != ["channel", "trial", "time"] {
        return Err(StageError::data(format!(
            "wavelet expects epoched data with axes [channel, trial, time], found [{}]",
            layout.dims.join(", ")
        )));
    }
    if layout.complex {
        return Err(StageError::data(
            "wavelet expects real samples, found complex values (already wavelet coefficients?)",
        ));
    }
    Ok(())
}

fn plan(params: &WaveletParams, input: &Layout) -> Result<Plan, StageError> {
    Wavelet::check(params)?;
    check_input(input)?;
    let fs = input.sampling_rate()?;
    let times = input.numbers("time")?;
    let freqs = params.frequencies();
    check_nyquist(params, &freqs, fs)?;
    let cycles = params.cycle_counts(freqs.len());
    let keep = keep_for(params.crop, params.stride, times)?;
    let kept_times = times[keep.start..]
        .iter()
        .step_by(keep.stride)
        .take(keep.count)
        .copied()
        .collect();
    let mut layout = input.clone();
    layout.dims = ["channel", "trial", "freq", "time"]
        .map(String::from)
        .to_vec();
    layout.coords = vec![
        input.coord("channel")?.clone(),
        input.coord("trial")?.clone(),
        Coord::Numbers(freqs.clone()),
        Coord::Numbers(kept_times),
    ];
    layout.complex = true;
    layout.meta.sampling_rate = Some(fs / params.stride as f64);
    Ok(Plan {
        freqs,
        cycles,
        fs,
        epoch_len: times.len(),
        keep,
        layout,
    })
}

/// The warning the op gives (and the runner may give from layouts alone) when the effective
/// half-length (3σ) of the longest wavelet exceeds the buffer that `crop` leaves on either side
/// of the epoch. `Ok(None)` when the buffer is long enough.
pub fn edge_warning(params: &WaveletParams, input: &Layout) -> Result<Option<String>, StageError> {
    let plan = plan(params, input)?;
    let times = input.numbers("time")?;
    let kept = plan.layout.numbers("time")?;
    let (Some(first), Some(last), Some(k0), Some(k1)) =
        (times.first(), times.last(), kept.first(), kept.last())
    else {
        return Ok(None);
    };
    let (before, after) = (k0 - first, last - k1);
    let longest = plan
        .freqs
        .iter()
        .zip(&plan.cycles)
        .map(|(&f, &n)| (f, n, morlet::sigma(f, n)))
        .fold((0.0, 0.0, 0.0), |a, b| if b.2 > a.2 { b } else { a });
    let reach = 3.0 * longest.2;
    if reach <= before.min(after) + tolerance(plan.fs) {
        return Ok(None);
    }
    Ok(Some(format!(
        "wavelet: the longest wavelet ({} Hz, {} cycles) reaches {reach:.3} s (3σ) to each side, \
         more than the buffer the crop leaves ({before:.3} s before, {after:.3} s after); \
         coefficients near the ends of the kept window mix in the zeros outside the epoch — \
         widen the epoch or narrow `crop`",
        longest.0, longest.1
    )))
}

/// Fails on the first (channel, trial) holding a NaN or infinite sample: one would spread over
/// every coefficient of that trial through the FFT. (Shared with [`super::hilbert`].)
pub(crate) fn check_finite(
    values: &[f32],
    layout: &Layout,
    epoch_len: usize,
) -> Result<(), StageError> {
    // A pass without early exit first (it vectorises; the search below does not), so clean
    // data costs one quick read.
    let finite = |c: &[f32]| c.iter().fold(true, |ok, v| ok & v.is_finite());
    if values.chunks(1 << 14).all(finite) {
        return Ok(());
    }
    let Some(bad) = values.iter().position(|v| !v.is_finite()) else {
        return Ok(());
    };
    let trials = layout.shape().get(1).copied().unwrap_or(1).max(1);
    let (signal, sample) = (bad / epoch_len.max(1), bad % epoch_len.max(1));
    let channel = layout
        .labels("channel")
        .ok()
        .and_then(|l| l.get(signal / trials).cloned())
        .unwrap_or_else(|| format!("#{}", signal / trials));
    Err(StageError::data(format!(
        "channel {channel}, trial {} holds a non-finite sample ({}) at index {sample}; \
         a time-frequency transform needs finite data",
        signal % trials,
        values[bad]
    )))
}

impl Op for Wavelet {
    type Params = WaveletParams;
    const NAME: &'static str = "wavelet";
    /// 4: a signal that is exactly zero gives exactly zero coefficients, also when it shares
    /// its forward transform with a non-zero one (whose rounding it picked up before).
    const VERSION: u32 = 4;

    fn check(p: &Self::Params) -> Result<(), StageError> {
        check_freqs(&p.freqs)?;
        check_cycles(&p.cycles)?;
        check_crop_stride(p.crop, p.stride)
    }

    fn layout(p: &Self::Params, inputs: &[InputLayout<'_>]) -> Result<Option<Layout>, StageError> {
        Ok(Some(plan(p, single(inputs)?.layout)?.layout))
    }

    fn run(
        p: &Self::Params,
        inputs: &[Input<'_>],
        notes: &mut Notes,
    ) -> Result<LabelledArray, StageError> {
        Self::run_planned(p, &Plans::default(), inputs, notes)
    }

    /// The wavelets' spectra and FFT plans ([`Bank`]) are made once per epoch layout
    /// ([`bank_for`]) and shared by every subject and part.
    fn run_planned(
        p: &Self::Params,
        plans: &Plans,
        inputs: &[Input<'_>],
        notes: &mut Notes,
    ) -> Result<LabelledArray, StageError> {
        let input = single(inputs)?.array;
        let plan = plan(p, &input.layout)?;
        if let Some(w) = edge_warning(p, &input.layout)? {
            notes.warn(w);
        }
        let all = 0..plan.freqs.len();
        let bank = bank_for(plans, &plan)?;
        transform_part(plan, &bank, input, all)
    }

    /// Frequencies are transformed one by one, each with the FFT lengths of the whole set.
    fn part_axis(_p: &Self::Params) -> Option<&'static str> {
        Some("freq")
    }

    fn run_part(
        p: &Self::Params,
        inputs: &[Input<'_>],
        part: std::ops::Range<usize>,
        notes: &mut Notes,
    ) -> Result<LabelledArray, StageError> {
        Self::run_part_planned(p, &Plans::default(), inputs, part, notes)
    }

    fn run_part_planned(
        p: &Self::Params,
        plans: &Plans,
        inputs: &[Input<'_>],
        part: std::ops::Range<usize>,
        notes: &mut Notes,
    ) -> Result<LabelledArray, StageError> {
        let input = single(inputs)?.array;
        let plan = plan(p, &input.layout)?;
        check_part(&part, plan.freqs.len(), "frequencies")?;
        // The edge warning is about the lowest frequency: the part that holds it gives it.
        if part.start == 0 {
            if let Some(w) = edge_warning(p, &input.layout)? {
                notes.warn(w);
            }
        }
        let bank = bank_for(plans, &plan)?;
        transform_part(plan, &bank, input, part)
    }
}

/// The bank of every wavelet of `plan` for its epochs, from `plans` when one was made for the
/// same frequencies, cycles, sampling rate, epoch length and kept samples (the whole key of what
/// [`Bank::new`] reads), else made now and kept there.
fn bank_for(plans: &Plans, plan: &Plan) -> Result<std::sync::Arc<Bank>, StageError> {
    let key = PlanKey::default()
        .numbers(&plan.freqs)
        .numbers(&plan.cycles)
        .numbers(&[plan.fs])
        .counts(&[
            plan.epoch_len,
            plan.keep.start,
            plan.keep.stride,
            plan.keep.count,
        ]);
    plans.get_or_make(&key, || -> Result<Bank, StageError> {
        let taps: Vec<Vec<Complex64>> = plan
            .freqs
            .iter()
            .zip(&plan.cycles)
            .map(|(&f, &n)| morlet::taps(f, n, plan.fs))
            .collect();
        Ok(Bank::new(&taps, plan.epoch_len, plan.keep))
    })
}

/// A part (a range of `len` `what`, e.g. frequencies) that the runner asks for must be a
/// non-empty range inside the axis; anything else is the runner's mistake.
pub(crate) fn check_part(
    part: &std::ops::Range<usize>,
    len: usize,
    what: &str,
) -> Result<(), StageError> {
    if part.start >= part.end || part.end > len {
        return Err(StageError::data(format!(
            "internal: {what} {part:?} of {len}"
        )));
    }
    Ok(())
}

/// The coefficients of the frequencies in `part` (all of them for a whole run).
fn transform_part(
    mut plan: Plan,
    bank: &Bank,
    input: &LabelledArray,
    part: std::ops::Range<usize>,
) -> Result<LabelledArray, StageError> {
    let values = input.real_values()?.as_standard_layout();
    let values = values.as_slice().unwrap_or(&[]);
    check_finite(values, &input.layout, plan.epoch_len)?;
    let out = transform_all(&plan, bank, values, part.clone())?;
    let k = plan.layout.axis("freq")?;
    plan.layout.coords[k] = plan.layout.coords[k].slice(part)?;
    let shape = plan.layout.shape();
    let array = ArrayD::from_shape_vec(IxDyn(&shape), out)
        .map_err(|e| StageError::data(format!("internal shape error: {e}")))?;
    LabelledArray::complex(plan.layout, array)
}

/// Signals per parallel task. Even, so that the pairs that share a forward FFT
/// ([`Bank::transform`]) are the same for any split: (0, 1), (2, 3), … over all signals.
const SIGNALS_PER_TASK: usize = 16;

/// Coefficients of every (channel, trial) signal, laid out [channel, trial, freq, kept time],
/// written straight into the output vector. Parallel over fixed blocks of signals; every value
/// depends only on its own signal and its fixed pair partner, so the result is the same for any
/// thread count.
fn transform_all(
    plan: &Plan,
    bank: &Bank,
    values: &[f32],
    part: std::ops::Range<usize>,
) -> Result<Vec<Complex32>, StageError> {
    let per_signal = part.len() * plan.keep.count;
    let signals: usize = plan.layout.shape().iter().take(2).product();
    let len = per_signal * signals;
    if per_signal == 0 || plan.epoch_len == 0 {
        return Ok(vec![Complex32::default(); len]);
    }
    if values.len() != signals * plan.epoch_len {
        return Err(StageError::data(format!(
            "internal: {} samples for {signals} signals of {}",
            values.len(),
            plan.epoch_len
        )));
    }
    let bank = bank.part(part);
    // Not cleared first: the transform writes every value, and clearing would cost a pass over
    // the whole output (memory the allocator hands back from an earlier part is not zero).
    let mut out: Vec<Complex32> = Vec::with_capacity(len);
    out.spare_capacity_mut()[..len]
        .par_chunks_mut(per_signal * SIGNALS_PER_TASK)
        .zip(values.par_chunks(plan.epoch_len * SIGNALS_PER_TASK))
        .for_each_init(
            || bank.scratch(),
            |scratch, (dst, src)| bank.transform(src, scratch, dst),
        );
    // SAFETY: the first `len` values were all written above: `values` holds `signals` signals
    // (checked), the two chunkings pair every block of signals with its block of outputs, and
    // `Bank::transform` writes all `per_signal` values of each signal it is given.
    unsafe { out.set_len(len) };
    Ok(out)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::ops::tf_testing::{epoched, run_err, run_op};
    use crate::testutil::{read_f64, read_json};
    use ndarray::Array3;
    use serde_json::json;
    use std::f64::consts::PI;

    /// A [channel, trial, time] input from a function of (channel, trial, time in s).
    fn input(
        shape: (usize, usize, usize),
        fs: f64,
        first: i64,
        f: impl Fn(usize, usize, f64) -> f64,
    ) -> LabelledArray {
        let values = Array3::from_shape_fn(shape, |(c, n, k)| {
            f(c, n, (first + k as i64) as f64 / fs) as f32
        });
        epoched(values.into_dyn(), fs, first, &vec!["A"; shape.1])
    }

    fn noise(shape: (usize, usize, usize), fs: f64, first: i64) -> LabelledArray {
        input(shape, fs, first, |c, n, t| {
            ((c * 7 + n * 3) as f64 + 13.7 * t).sin() * 1e-5
        })
    }

    fn coefs(a: &LabelledArray) -> Vec<Complex32> {
        a.complex_values()
            .expect("complex")
            .iter()
            .copied()
            .collect()
    }

    #[test]
    fn wavelet_matches_numpy_fixtures() {
        // Reference: tests/reference/gen_tf.py, a plain numpy implementation of the DESIGN.md §4
        // definition (np.fft convolution zero-padded to T + L − 1, "same" slice, crop, stride).
        // Tolerance: |ours − numpy| ≤ 1e-5 · max(|numpy|, 1e-2 · peak) per coefficient — f32
        // storage gives ≈ 6e-8 relative; the floor keeps near-zero coefficients from making
        // relative error meaningless.
        for case in [
            "log_ramp_crop_stride",
            "list_fixed_full",
            "linear_crop_stride3",
        ] {
            let meta = read_json("tf", case);
            let x = read_f64("tf", &format!("{case}_input"));
            let fs = meta["fs"].as_f64().unwrap();
            let times: Vec<f64> = serde_json::from_value(meta["times"].clone()).unwrap();
            let first = (times[0] * fs).round() as i64;
            let data = epoched(x.mapv(|v| v as f32), fs, first, &vec!["A"; x.shape()[1]]);
            assert_eq!(data.layout.numbers("time").unwrap(), &times[..]);
            let (out, _) = run_op::<Wavelet>(meta["params"].clone(), &data).unwrap();
            let want_f: Vec<f64> = serde_json::from_value(meta["freqs"].clone()).unwrap();
            let got_f = out.layout.numbers("freq").unwrap();
            assert!(got_f
                .iter()
                .zip(&want_f)
                .all(|(a, b)| (a - b).abs() <= 1e-12 * b));
            let kept: Vec<f64> = serde_json::from_value(meta["kept_times"].clone()).unwrap();
            assert_eq!(out.layout.numbers("time").unwrap(), &kept[..]);
            let (re, im) = (
                read_f64("tf", &format!("{case}_re")),
                read_f64("tf", &format!("{case}_im")),
            );
            assert_eq!(out.values.shape(), re.shape());
            let want: Vec<Complex64> = re
                .iter()
                .zip(im.iter())
                .map(|(&r, &i)| Complex64::new(r, i))
                .collect();
            let peak = want.iter().map(|c| c.norm()).fold(0.0, f64::max);
            for (g, w) in coefs(&out).iter().zip(&want) {
                let g = Complex64::new(f64::from(g.re), f64::from(g.im));
                assert!(
                    (g - w).norm() <= 1e-5 * w.norm().max(1e-2 * peak),
                    "{case}: {g} vs {w}"
                );
            }
        }
    }

    #[test]
    fn wavelet_sinusoid_amplitude_and_cosine_phase() {
        // Tallon-Baudry et al. 1997 convention with the 2/Σg normalisation (DESIGN.md §4).
        // Derivation: for x = A cos(2πf t), coefficient(t) = (A/Σg) Σ_k g_k [e^{iα} +
        // e^{−iα} e^{4πi f k/fs}] with α = 2πf t; the first sum is exactly A e^{iα}, the second is
        // the Gaussian's transform at 2f, ≈ e^{−2n²} ≤ e^{−18} ≈ 1.5e-8 for n ≥ 3 cycles. So away
        // from the edges |coef| = A and arg coef = 0 at the cosine's peaks, to f32 precision.
        let (fs, amp) = (500.0, 2e-5);
        let sig = [10.0, 23.0];
        let data = input((2, 2, 2001), fs, -1000, |c, n, t| {
            amp * (2.0 * PI * sig[c] * t).cos() * (1 + n) as f64
        });
        let params = json!({"freqs": sig, "cycles": {"from": 3, "to": 7}, "crop": [-1.0, 1.0]});
        let (out, notes) = run_op::<Wavelet>(params, &data).unwrap();
        assert!(notes.warnings.is_empty(), "{:?}", notes.warnings);
        let v = out.complex_values().unwrap();
        let times = out.layout.numbers("time").unwrap();
        for (c, &f) in sig.iter().enumerate() {
            for n in 0..2 {
                let a = amp * (1 + n) as f64;
                for (k, &t) in times.iter().enumerate() {
                    let z = v[[c, n, c, k]];
                    let z = Complex64::new(f64::from(z.re), f64::from(z.im));
                    assert!(
                        (z.norm() - a).abs() <= 1e-5 * a,
                        "|coef| {} vs {a}",
                        z.norm()
                    );
                    let cycles = t * f;
                    if (cycles - cycles.round()).abs() < 1e-9 {
                        assert!(z.arg().abs() < 1e-5, "phase {} at a peak", z.arg());
                    }
                }
            }
        }
    }

    #[test]
    fn wavelet_layout_and_meta_flow() {
        let data = noise((2, 3, 200), 100.0, -50);
        let params = json!({"freqs": {"from": 5, "to": 20, "count": 3}, "cycles": 4, "crop": [-0.2, 0.9], "stride": 2});
        let (out, _) = run_op::<Wavelet>(params, &data).unwrap();
        assert_eq!(out.layout.dims, ["channel", "trial", "freq", "time"]);
        assert_eq!(out.layout.meta.sampling_rate, Some(50.0));
        assert_eq!(out.layout.meta.trials, data.layout.meta.trials);
        assert_eq!(
            out.layout.meta.channel_types,
            data.layout.meta.channel_types
        );
        assert_eq!(out.layout.units, "V");
        assert!(out.layout.complex);
        let t = out.layout.numbers("time").unwrap();
        assert_eq!(t.len(), 56); // samples −20 … 90 inclusive, every 2nd
        assert!((t[0] + 0.2).abs() < 1e-12 && (t[55] - 0.9).abs() < 1e-12);
        // Geometric spacing: 5, 10, 20 (numpy.geomspace(5, 20, 3)).
        let f = out.layout.numbers("freq").unwrap();
        assert!((f[1] - 10.0).abs() < 1e-12 && f[2] == 20.0);
    }

    #[test]
    fn wavelet_parts_equal_the_whole_run() {
        // The parts protocol (op.rs): any range of frequencies gives exactly the whole run's
        // coefficients of those frequencies — the FFT lengths come from the whole set.
        let x = noise((2, 3, 200), 100.0, -50);
        let params = json!({"freqs": {"from": 3, "to": 30, "count": 7}, "cycles": {"from": 3, "to": 8}, "crop": [-0.2, 1.0], "stride": 3});
        let whole = crate::ops::tf_testing::assert_parts_match::<Wavelet>(
            params,
            &x,
            &[0..1, 0..7, 2..5, 6..7],
        );
        assert_eq!(whole.layout.coord("freq").unwrap().len(), 7);
    }

    #[test]
    fn wavelet_plans_its_bank_once_per_epoch_layout_and_gives_the_same_bits() {
        // Issue 18 "bind once": the bound op keeps the wavelets' spectra and FFT plans for an
        // epoch layout, so a second subject and every part reuse them; the numbers are those of
        // a run that plans afresh.
        let params: WaveletParams = serde_json::from_value(
            json!({"freqs": {"from": 3, "to": 30, "count": 5}, "cycles": {"from": 3, "to": 8}, "crop": [-0.2, 1.0]}),
        )
        .unwrap();
        let plans = Plans::default();
        let run = |x: &LabelledArray, plans: &Plans, part: std::ops::Range<usize>| {
            let input = Input {
                stage: "trials",
                subject: Some("01"),
                array: x,
            };
            Wavelet::run_part_planned(&params, plans, &[input], part, &mut Notes::default())
                .unwrap()
        };
        let (a, b) = (
            noise((2, 3, 200), 100.0, -50),
            noise((3, 2, 200), 100.0, -50),
        );
        for x in [&a, &b] {
            for part in [0..2, 2..5, 0..5] {
                assert_eq!(
                    run(x, &plans, part.clone()),
                    run(x, &Plans::default(), part)
                );
            }
        }
        assert_eq!(
            plans.len(),
            1,
            "two subjects of one epoch layout share one plan"
        );
        // Another epoch length is another plan.
        run(&noise((2, 3, 240), 100.0, -50), &plans, 0..5);
        assert_eq!(plans.len(), 2);
    }

    #[test]
    fn wavelet_same_result_for_any_thread_count() {
        // 35 signals: three parallel blocks, the last one short and with an odd signal (paired
        // with zeros); crop and stride so the folded path runs.
        let data = noise((5, 7, 300), 200.0, -100);
        let params = json!({"freqs": [4, 9.5, 31], "cycles": 5, "crop": [-0.3, 0.9], "stride": 3});
        let run = |threads| {
            rayon::ThreadPoolBuilder::new()
                .num_threads(threads)
                .build()
                .unwrap()
                .install(|| run_op::<Wavelet>(params.clone(), &data).unwrap().0)
        };
        let one = run(1);
        assert_eq!(one, run(2));
        assert_eq!(one, run(3));
    }

    #[test]
    fn wavelet_strided_cropped_output_is_the_direct_convolution() {
        // Reference: DESIGN.md §4 written out plainly. σ = n/(2πf); g(t) = exp(−t²/(2σ²)) at
        // t_k = k/fs for |t_k| ≤ 5σ; w(t) = (2/Σg) e^{2πi f t} g(t); coefficient at sample t =
        // Σ_k w(t_k) x[t − k] with x = 0 outside the epoch; kept: the samples inside the crop,
        // every `stride`-th from the first. Crops start on and off multiples of the stride
        // (counted from the epoch's first sample). Tolerance 1e-6 of the largest coefficient of
        // the frequency's row: f32 storage rounds by ≤ 6e-8 of a value.
        let fs = 250.0;
        let data = input((2, 3, 400), fs, -150, |c, n, t| {
            (2.0 * PI * 7.0 * t + c as f64).sin() + 0.5 * ((n * 5 + c) as f64 + 41.0 * t).cos()
        });
        let x = data.real_values().unwrap();
        let times = data.layout.numbers("time").unwrap().to_vec();
        // cycles {from: 3, to: 8} over three frequencies: 3, 3·(8/3)^(1/2), 8 (log-spaced).
        let (freqs, cycles) = ([5.0, 11.0, 29.0], [3.0, 3.0 * (8.0f64 / 3.0).sqrt(), 8.0]);
        for (stride, crop) in [
            (1usize, [-0.4, 0.8]),
            (2, [-0.4, 0.8]),
            (3, [-0.392, 0.8]),
            (4, [-0.404, 0.9]),
            (4, [-0.6, 0.996]),
            (7, [-0.2, 0.5]),
        ] {
            let params = json!({"freqs": freqs, "cycles": {"from": 3, "to": 8}, "crop": crop, "stride": stride});
            let (out, _) = run_op::<Wavelet>(params, &data).unwrap();
            let v = out.complex_values().unwrap();
            let first = times.iter().position(|&t| t >= crop[0] - 1e-9).unwrap();
            let last = times.iter().rposition(|&t| t <= crop[1] + 1e-9).unwrap();
            let kept: Vec<usize> = (first..=last).step_by(stride).collect();
            assert_eq!(v.shape(), [2, 3, 3, kept.len()]);
            for (fi, (&f, &n)) in freqs.iter().zip(&cycles).enumerate() {
                let sigma = n / (2.0 * PI * f);
                let m = (5.0 * sigma * fs).floor() as i64;
                let g = |k: i64| (-(k as f64 / fs).powi(2) / (2.0 * sigma * sigma)).exp();
                let sum_g: f64 = (-m..=m).map(g).sum();
                let w = |k: i64| {
                    Complex64::from_polar(2.0 / sum_g * g(k), 2.0 * PI * f * k as f64 / fs)
                };
                for c in 0..2 {
                    for tr in 0..3 {
                        let coef = |t: usize| -> Complex64 {
                            (-m..=m)
                                .filter_map(|k| {
                                    let i = t as i64 - k;
                                    (0..400)
                                        .contains(&i)
                                        .then(|| w(k) * f64::from(x[[c, tr, i as usize]]))
                                })
                                .sum()
                        };
                        let want: Vec<Complex64> = kept.iter().map(|&t| coef(t)).collect();
                        let peak = want.iter().map(|z| z.norm()).fold(0.0, f64::max);
                        for (j, want) in want.iter().enumerate() {
                            let z = v[[c, tr, fi, j]];
                            let got = Complex64::new(f64::from(z.re), f64::from(z.im));
                            assert!(
                                (got - want).norm() <= 1e-6 * peak,
                                "stride {stride} crop {crop:?} f {f} sample {}: {got} vs {want}",
                                kept[j]
                            );
                        }
                    }
                }
            }
        }
    }

    #[test]
    fn wavelet_edge_warning() {
        let data = noise((1, 1, 2501), 1000.0, -1000); // epoch [−1.0, 1.5] s
                                                       // 3 Hz, 3 cycles: σ = 0.159 s, 3σ = 0.477 s > 0.4 s left by the crop.
        let short = json!({"freqs": {"from": 3, "to": 30, "count": 4}, "cycles": {"from": 3, "to": 8}, "crop": [-0.6, 1.1]});
        let (_, notes) = run_op::<Wavelet>(short.clone(), &data).unwrap();
        assert_eq!(notes.warnings.len(), 1);
        assert!(
            notes.warnings[0].contains("(3 Hz, 3 cycles) reaches 0.477 s (3σ)"),
            "{}",
            notes.warnings[0]
        );
        let p: WaveletParams = serde_json::from_value(short).unwrap();
        assert_eq!(
            edge_warning(&p, &data.layout).unwrap().as_ref(),
            notes.warnings.first()
        );
        // 0.5 s of buffer on each side is more than 0.477 s: no warning.
        let long = json!({"freqs": {"from": 3, "to": 30, "count": 4}, "cycles": {"from": 3, "to": 8}, "crop": [-0.5, 1.0]});
        assert!(run_op::<Wavelet>(long, &data)
            .unwrap()
            .1
            .warnings
            .is_empty());
        // Without crop nothing is left as buffer.
        let p: WaveletParams = serde_json::from_value(json!({"freqs": [30], "cycles": 5})).unwrap();
        assert!(edge_warning(&p, &data.layout)
            .unwrap()
            .unwrap()
            .contains("0.000 s before"));
    }

    /// The (field, message) of a param error, or a panic.
    fn param_err(params: serde_json::Value, data: &LabelledArray) -> (String, String) {
        match run_err::<Wavelet>(params, data) {
            StageError::Param { field, message } => (field, message),
            other => panic!("expected a param error, got {other:?}"),
        }
    }

    #[test]
    fn wavelet_param_errors() {
        let data = noise((1, 2, 100), 100.0, -20); // epoch [−0.2, 0.79] s, Nyquist 50 Hz
        let cases = [
            (
                json!({"freqs": {"from": 5, "to": 50, "count": 3}, "cycles": 4}),
                "freqs.to",
                "at or above the Nyquist frequency (50 Hz at 100 Hz sampling)",
            ),
            (
                json!({"freqs": [5, 60], "cycles": 4}),
                "freqs[1]",
                "60 Hz is at or above the Nyquist",
            ),
            (
                json!({"freqs": {"from": 0, "to": 20, "count": 3}, "cycles": 4}),
                "freqs.from",
                "must be a finite number above 0, found 0",
            ),
            (
                json!({"freqs": [5, -2], "cycles": 4}),
                "freqs[1]",
                "above 0, found -2",
            ),
            (
                json!({"freqs": {"from": 5, "to": 20, "count": 0}, "cycles": 4}),
                "freqs.count",
                "expected at least 1, found 0",
            ),
            (
                json!({"freqs": {"from": 5, "to": 20, "count": 1}, "cycles": 4}),
                "freqs.count",
                "one frequency needs from == to",
            ),
            (
                json!({"freqs": {"from": 20, "to": 5, "count": 3}, "cycles": 4}),
                "freqs.to",
                "must not be below freqs.from (20), found 5",
            ),
            (
                json!({"freqs": {"from": 5, "to": 5, "count": 3}, "cycles": 4}),
                "freqs.to",
                "3 frequencies need to > from",
            ),
            (
                json!({"freqs": [5, 8, 5], "cycles": 4}),
                "freqs[2]",
                "5 Hz is listed twice",
            ),
            (
                json!({"freqs": [], "cycles": 4}),
                "freqs",
                "expected at least one frequency",
            ),
            (
                json!({"freqs": "alpha", "cycles": 4}),
                "freqs",
                "`{from, to, count, spacing: log|linear}` or a list",
            ),
            (
                json!({"freqs": {"from": 5, "to": 20, "count": 3, "spacing": "mel"}, "cycles": 4}),
                "freqs",
                "or a list of frequencies",
            ),
            (
                json!({"freqs": [5], "cycles": 0}),
                "cycles",
                "the number of cycles must be a finite number above 0",
            ),
            (
                json!({"freqs": [5], "cycles": {"from": -1, "to": 5}}),
                "cycles.from",
                "above 0, found -1",
            ),
            (
                json!({"freqs": [5], "cycles": "many"}),
                "cycles",
                "a number of cycles or `{from, to}`",
            ),
            // A list must not be read as the struct's fields in order.
            (
                json!({"freqs": [5], "cycles": [3, 8]}),
                "cycles",
                "a number of cycles or `{from, to}`",
            ),
            (
                json!({"freqs": [5], "cycles": 4, "crop": [-0.5, 0.5]}),
                "crop",
                "[-0.5, 0.5] s is outside the epoch, which spans [-0.2, 0.79] s",
            ),
            (
                json!({"freqs": [5], "cycles": 4, "crop": [0.5, 0.1]}),
                "crop",
                "expected [t0, t1] with t0 ≤ t1",
            ),
            (
                json!({"freqs": [5], "cycles": 4, "crop": [0.101, 0.105]}),
                "crop",
                "holds no sample of the epoch",
            ),
            (
                json!({"freqs": [5], "cycles": 4, "stride": 0}),
                "stride",
                "expected at least 1, found 0",
            ),
            (
                json!({"freqs": [5], "cycles": 4, "stirde": 2}),
                "stirde",
                "unknown field `stirde`",
            ),
            (json!({"freqs": [5]}), "", "missing field `cycles`"),
        ];
        for (params, field, msg) in cases {
            let (f, m) = param_err(params.clone(), &data);
            assert_eq!(f, field, "{params}: {m}");
            assert!(m.contains(msg), "{params}: `{m}` lacks `{msg}`");
        }
    }

    #[test]
    fn wavelet_data_errors() {
        let ok = json!({"freqs": [5], "cycles": 4});
        let mut data = noise((2, 3, 50), 100.0, 0);
        let msg = |e: StageError| match e {
            StageError::Data(m) => m,
            other => panic!("expected a data error, got {other:?}"),
        };
        let mut bad = data.clone();
        if let Values::Real(v) = &mut bad.values {
            v[[1, 2, 7]] = f32::NAN;
        }
        let m = msg(run_err::<Wavelet>(ok.clone(), &bad));
        assert!(
            m.contains("channel C1, trial 2 holds a non-finite sample (NaN) at index 7"),
            "{m}"
        );
        // Infinities too, of either sign, and the first one is named.
        let mut inf = data.clone();
        if let Values::Real(v) = &mut inf.values {
            v[[0, 1, 49]] = f32::NEG_INFINITY;
            v[[1, 0, 0]] = f32::INFINITY;
        }
        let m = msg(run_err::<Wavelet>(ok.clone(), &inf));
        assert!(
            m.contains("channel C0, trial 1 holds a non-finite sample (-inf) at index 49"),
            "{m}"
        );
        let mut no_rate = data.clone();
        no_rate.layout.meta.sampling_rate = None;
        assert!(msg(run_err::<Wavelet>(ok.clone(), &no_rate)).contains("carries no sampling rate"));
        data.layout.dims.swap(0, 1);
        let m = msg(run_err::<Wavelet>(ok, &data));
        assert!(m.contains("expects epoched data with axes [channel, trial, time], found [trial, channel, time]"), "{m}");
    }

    /// A channel that is exactly zero (say, referenced to itself) has no phase. Signals share a
    /// forward FFT two by two, so a zero signal paired with a non-zero one must not pick up its
    /// partner's rounding: its coefficients are exactly 0.0 (DESIGN §4: the convolution of zeros
    /// is zero), and clustering then makes every pair with it NaN, across trials and across time
    /// alike (DESIGN §4: "a zero coefficient has no phase: its pair is NaN there").
    #[test]
    fn a_zero_channel_gets_exactly_zero_coefficients_and_nan_pairs() {
        use crate::ops::clustering::Clustering;
        let fs = 250.0;
        let params = json!({"freqs": [6, 11, 23], "cycles": 4, "crop": [-0.4, 0.4]});
        // [zero, noise, noise] with one trial: the zero signal shares its transform with the
        // first noisy one. [noise, zero] with three trials: the zero channel's first trial
        // shares it with the noisy channel's last.
        for (zero, shape) in [(0usize, (3usize, 1usize, 300usize)), (1, (2, 3, 300))] {
            let data = input(shape, fs, -150, |c, n, t| {
                if c == zero {
                    0.0
                } else {
                    ((c * 7 + n * 3) as f64 + 13.7 * t).sin() * 1e-5 + (40.0 * t).cos() * 3e-6
                }
            });
            let (tf, _) = run_op::<Wavelet>(params.clone(), &data).unwrap();
            let v = tf.complex_values().unwrap();
            let leaked = v
                .index_axis(ndarray::Axis(0), zero)
                .iter()
                .filter(|z| z.re.to_bits() != 0 || z.im.to_bits() != 0)
                .count();
            assert_eq!(
                leaked, 0,
                "{shape:?}: the zero channel has non-zero coefficients"
            );
            let name = format!("C{zero}");
            for across in [
                json!({"across": "trials"}),
                json!({"across": "time", "window_cycles": 2}),
            ] {
                let mut p = json!({"measure": ["plv", "wpli", "icoh"], "pairs": "all"});
                p.as_object_mut()
                    .unwrap()
                    .extend(across.as_object().unwrap().clone());
                let (out, notes) = run_op::<Clustering>(p, &tf).unwrap();
                assert!(
                    notes
                        .warnings
                        .iter()
                        .any(|w| w.contains(&format!("channel {name} has"))),
                    "{:?}",
                    notes.warnings
                );
                let pairs = match &out.layout.coords[2] {
                    crate::array::Coord::Pairs(p) => p.to_vec(),
                    other => panic!("{other:?}"),
                };
                let values = out.real_values().unwrap();
                for (k, pair) in pairs.iter().enumerate() {
                    let lane = values.index_axis(ndarray::Axis(2), k);
                    let with_zero = pair.contains(&name);
                    let nan = lane.iter().filter(|x| x.is_nan()).count();
                    let want = if with_zero { lane.len() } else { 0 };
                    assert_eq!(nan, want, "{shape:?} {across} {pair:?}");
                }
            }
        }
    }
}
