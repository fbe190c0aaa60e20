//! The `notch` op: removes line noise from a continuous recording with second-order IIR notches
//! (DESIGN.md §4, the design of scipy.signal.iirnotch), applied forward and backward so that
//! phases are not shifted (as scipy.signal.filtfilt with its defaults).
//!
//! Several frequencies (and, with `harmonics: true`, every multiple k·f below Nyquist) are
//! removed one after another, each with its own forward–backward pass, in the order listed
//! (fundamentals in order, each followed by its harmonics); a frequency already removed is not
//! removed twice. Computation is in `f64` per channel; channels run in parallel.

use serde::{Deserialize, Serialize};

use crate::array::{LabelledArray, Layout};
use crate::dsp::design::notch;
use crate::dsp::recording::{map_channels, refuse_non_finite_anywhere, Continuous};
use crate::dsp::sos::ZeroPhase;
use crate::error::StageError;
use crate::op::{single, Input, InputLayout, Notes, Op};

/// The `notch` op.
pub struct Notch;

/// Parameters of `notch`.
#[derive(Clone, Debug, Serialize, Deserialize, schemars::JsonSchema)]
#[serde(deny_unknown_fields)]
pub struct NotchParams {
    /// Centre frequencies in Hz (e.g. `[50]`).
    pub freqs: Vec<f64>,
    /// Also remove every multiple k·f below the Nyquist frequency.
    #[serde(default)]
    pub harmonics: bool,
    /// Quality factor: centre frequency over −3 dB bandwidth.
    #[serde(default = "default_q")]
    pub q: f64,
}

/// Common practice for mains notches (a bandwidth of under 2 Hz at 50 Hz).
fn default_q() -> f64 {
    30.0
}

/// Samples of edge padding of one notch pass (3 × 3 taps, as scipy.signal.filtfilt).
const NOTCH_PAD: usize = 9;

impl Op for Notch {
    type Params = NotchParams;
    const NAME: &'static str = "notch";
    const VERSION: u32 = 1;

    fn check(p: &Self::Params) -> Result<(), StageError> {
        if p.freqs.is_empty() {
            return Err(StageError::param(
                "freqs",
                "give at least one frequency in Hz",
            ));
        }
        for (i, f) in p.freqs.iter().enumerate() {
            if !(f.is_finite() && *f > 0.0) {
                return Err(StageError::param(
                    format!("freqs[{i}]"),
                    format!("a notch frequency must be a positive number of Hz, found {f}"),
                ));
            }
        }
        if !(p.q.is_finite() && p.q > 0.0) {
            return Err(StageError::param(
                "q",
                format!(
                    "the quality factor must be a positive number, found {}",
                    p.q
                ),
            ));
        }
        Ok(())
    }

    fn layout(p: &Self::Params, inputs: &[InputLayout<'_>]) -> Result<Option<Layout>, StageError> {
        output_layout(p, single(inputs)?.layout).map(Some)
    }

    fn run(
        p: &Self::Params,
        inputs: &[Input<'_>],
        _notes: &mut Notes,
    ) -> Result<LabelledArray, StageError> {
        let input = single(inputs)?.array;
        let layout = output_layout(p, &input.layout)?;
        let fs = layout.sampling_rate()?;
        let filters: Vec<ZeroPhase> = notch_frequencies(p, fs)
            .into_iter()
            .map(|f| ZeroPhase::new(vec![notch(f, p.q, fs)]))
            .collect();
        refuse_non_finite_anywhere(
            input,
            "the notch runs forward and backward over the whole recording and would spread it \
             over the whole channel",
        )?;
        let values = map_channels(input.real_values()?, |rows, scratch| {
            filters
                .iter()
                .try_for_each(|zp| zp.apply_rows(rows, scratch))
        })?;
        LabelledArray::real(layout, values)
    }
}

/// Check the params against the recording; the output layout equals the input's.
fn output_layout(p: &NotchParams, input: &Layout) -> Result<Layout, StageError> {
    Notch::check(p)?;
    let rec = Continuous::of(input)?;
    for (i, f) in p.freqs.iter().enumerate() {
        if *f >= rec.nyquist() {
            return Err(StageError::param(
                format!("freqs[{i}]"),
                format!(
                    "{f} Hz is at or above the Nyquist frequency ({} Hz) of this recording \
                     (sampled at {} Hz)",
                    rec.nyquist(),
                    rec.fs
                ),
            ));
        }
    }
    if rec.n_times <= NOTCH_PAD {
        return Err(StageError::data(format!(
            "the notch needs more than {NOTCH_PAD} samples per channel, found {}",
            rec.n_times
        )));
    }
    Ok(input.clone())
}

/// The frequencies to remove, in order, without repeats: each listed frequency followed, with
/// `harmonics`, by 2f, 3f, … below Nyquist.
fn notch_frequencies(p: &NotchParams, fs: f64) -> Vec<f64> {
    let nyquist = fs / 2.0;
    let mut out: Vec<f64> = Vec::new();
    for &f in &p.freqs {
        let last = if p.harmonics {
            (nyquist / f).ceil() as usize
        } else {
            1
        };
        for k in 1..=last.max(1) {
            let h = k as f64 * f;
            // Equal within a millionth of a sample rate counts as a repeat (100 listed beside
            // 50 with harmonics).
            if h < nyquist && !out.iter().any(|o| (o - h).abs() <= 1e-6 * fs) {
                out.push(h);
            }
        }
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::array::{Coord, Meta};
    use crate::testutil::{largest_error_of_peak, max_rel_diff, read_f64, read_json, read_vec};
    use ndarray::{Array2, ArrayD};
    use serde_json::json;
    use std::f64::consts::PI;

    fn params(v: serde_json::Value) -> NotchParams {
        crate::op::parse_params(&v).unwrap()
    }

    fn continuous(rows: &[Vec<f64>], fs: f64) -> LabelledArray {
        let n = rows[0].len();
        let flat: Vec<f32> = rows.iter().flatten().map(|&v| v as f32).collect();
        let layout = Layout {
            dims: vec!["channel".into(), "time".into()],
            coords: vec![
                Coord::Labels((0..rows.len()).map(|i| format!("C{i}")).collect()),
                Coord::Numbers((0..n).map(|k| k as f64 / fs).collect()),
            ],
            units: "V".into(),
            complex: false,
            meta: Meta {
                sampling_rate: Some(fs),
                ..Meta::default()
            },
        };
        let values = Array2::from_shape_vec((rows.len(), n), flat)
            .unwrap()
            .into_dyn();
        LabelledArray::real(layout, values).unwrap()
    }

    fn run(p: &NotchParams, x: &LabelledArray) -> Result<ArrayD<f32>, StageError> {
        let input = Input {
            stage: "raw",
            subject: None,
            array: x,
        };
        let out = Notch::run(p, &[input], &mut Notes::default())?;
        Ok(out.real_values()?.clone())
    }

    #[test]
    fn coefficients_equal_scipy_iirnotch() {
        // Reference: scipy.signal.iirnotch(f, q, fs) (scipy 1.13.1), tests/reference/gen_preproc.py.
        let want = read_f64("preproc", "notch_coefficients");
        let cases = read_json("preproc", "notch_coefficients");
        for (i, case) in cases["cases"].as_array().unwrap().iter().enumerate() {
            let (f, q, fs) = (
                case["freq"].as_f64().unwrap(),
                case["q"].as_f64().unwrap(),
                case["fs"].as_f64().unwrap(),
            );
            let got = notch(f, q, fs);
            let row: Vec<f64> = (0..6).map(|j| want[[i, j]]).collect();
            assert!(
                max_rel_diff(&got, &row, 1e-300) < 1e-13,
                "case {case}: {got:?} vs {row:?}"
            );
        }
    }

    #[test]
    fn output_equals_scipy_filtfilt_edges_included() {
        // Reference: scipy.signal.filtfilt(b, a, x) with default padding, once per frequency
        // (tests/reference/gen_preproc.py). Tolerance: f32 storage of the output, 1e-6 of the
        // signal's peak (values near zero crossings make a pointwise relative test meaningless).
        let x = read_f64("preproc", "signal");
        let fs = read_json("preproc", "signal")["fs"].as_f64().unwrap();
        let input = continuous(&[x.iter().copied().collect()], fs);
        for case in ["single", "harmonics", "wide"] {
            let meta = read_json("preproc", &format!("notch_{case}"));
            let p = params(json!({ "freqs": meta["freqs"], "q": meta["q"] }));
            let want: Vec<f64> = read_vec("preproc", &format!("notch_{case}"));
            let got: Vec<f64> = run(&p, &input)
                .unwrap()
                .iter()
                .map(|&v| f64::from(v))
                .collect();
            let err = largest_error_of_peak(&got, &want);
            eprintln!("notch {case}: largest error {err:.2e} of the peak");
            assert!(err < 1e-6, "{case}: largest error {err:e} of the peak");
        }
    }

    /// Amplitude and phase of the `f` Hz component over samples lo..hi, by least-squares
    /// projection on cos and sin (an integer number of periods).
    fn amp_phase(x: &[f32], f: f64, fs: f64, lo: usize, hi: usize) -> (f64, f64) {
        let (mut c, mut s) = (0.0, 0.0);
        for (k, v) in x.iter().enumerate().take(hi).skip(lo) {
            let w = 2.0 * PI * f * k as f64 / fs;
            c += f64::from(*v) * w.cos();
            s += f64::from(*v) * w.sin();
        }
        let n = (hi - lo) as f64;
        ((2.0 * c / n).hypot(2.0 * s / n), (-s).atan2(c))
    }

    #[test]
    fn removes_the_line_and_keeps_a_passband_phase() {
        // Analytic: forward–backward filtering has zero phase (Oppenheim & Schafer, Discrete-Time
        // Signal Processing, zero-phase filtering) and the notch's gain at f0 is 0, so a 50 Hz
        // line vanishes and a 10 Hz sine keeps amplitude and phase.
        let fs = 500.0;
        let x: Vec<f64> = (0..5000)
            .map(|k| {
                let t = k as f64 / fs;
                (2.0 * PI * 10.0 * t + 0.7).cos() + 2.0 * (2.0 * PI * 50.0 * t).cos()
            })
            .collect();
        let out = run(
            &params(json!({ "freqs": [50], "harmonics": true })),
            &continuous(&[x], fs),
        )
        .unwrap();
        let row = out.as_slice().unwrap();
        let (a10, ph10) = amp_phase(row, 10.0, fs, 1000, 4000);
        let (a50, _) = amp_phase(row, 50.0, fs, 1000, 4000);
        assert!((a10 - 1.0).abs() < 1e-3, "10 Hz amplitude {a10}");
        assert!((ph10 - 0.7).abs() < 1e-3, "10 Hz phase {ph10}");
        assert!(a50 < 1e-4, "50 Hz left: {a50}");
    }

    #[test]
    fn harmonics_stop_below_nyquist_without_repeats() {
        // Definition (DESIGN.md §4): k·f below Nyquist.
        let p = params(json!({ "freqs": [50, 100], "harmonics": true }));
        assert_eq!(
            notch_frequencies(&p, 500.0),
            vec![50.0, 100.0, 150.0, 200.0]
        );
        let p = params(json!({ "freqs": [60] }));
        assert_eq!(notch_frequencies(&p, 500.0), vec![60.0]);
    }

    #[test]
    fn bad_frequencies_are_param_errors() {
        let x = continuous(&[vec![0.0; 100]], 100.0);
        let err = run(&params(json!({ "freqs": [50] })), &x).unwrap_err();
        assert_eq!(err.to_string(), "freqs[0]: 50 Hz is at or above the Nyquist frequency (50 Hz) of this recording (sampled at 100 Hz)");
        let err = run(&params(json!({ "freqs": [10, 0] })), &x).unwrap_err();
        assert!(
            matches!(&err, StageError::Param { field, .. } if field == "freqs[1]"),
            "{err}"
        );
        let err = Notch::check(&params(json!({ "freqs": [] }))).unwrap_err();
        assert!(
            err.to_string().starts_with("freqs: give at least one"),
            "{err}"
        );
        let err = Notch::check(&params(json!({ "freqs": [50], "q": -1 }))).unwrap_err();
        assert_eq!(
            err.to_string(),
            "q: the quality factor must be a positive number, found -1"
        );
        let err = crate::op::parse_params::<NotchParams>(&json!({ "freqs": [50], "width": 2 }))
            .unwrap_err();
        assert!(err.to_string().contains("unknown field `width`"), "{err}");
    }

    #[test]
    fn short_or_epoched_input_is_a_data_error() {
        let err = run(
            &params(json!({ "freqs": [50] })),
            &continuous(&[vec![0.0; 9]], 500.0),
        )
        .unwrap_err();
        assert_eq!(
            err.to_string(),
            "the notch needs more than 9 samples per channel, found 9"
        );
        let mut x = continuous(&[vec![0.0; 100]], 500.0);
        x.layout.dims = vec!["channel".into(), "sample".into()];
        let err = run(&params(json!({ "freqs": [50] })), &x).unwrap_err();
        assert!(
            err.to_string()
                .contains("expected continuous data with axes [channel, time]"),
            "{err}"
        );
    }

    #[test]
    #[ignore = "measurement: 64 channels x 1 h at 500 Hz (0.9 GB of f32); run with --ignored"]
    fn one_hour_of_64_channels_notches_in_seconds() {
        let (n_ch, fs) = (64, 500.0);
        let n = 3600 * 500;
        let mut v = Array2::<f32>::zeros((n_ch, n));
        v.indexed_iter_mut()
            .for_each(|((c, k), x)| *x = ((k * (c + 1)) as f32 * 0.001).sin() * 1e-5);
        let mut x = continuous(&[vec![0.0; 16]], fs);
        x.layout.coords[0] = Coord::Labels((0..n_ch).map(|i| format!("C{i}")).collect());
        x.layout.coords[1] = Coord::Numbers((0..n).map(|k| k as f64 / fs).collect());
        x.values = crate::array::Values::Real(v.into_dyn());
        let p = params(json!({ "freqs": [50], "harmonics": true }));
        let start = std::time::Instant::now();
        run(&p, &x).unwrap();
        let secs = start.elapsed().as_secs_f64();
        eprintln!(
            "notch 50 Hz + 3 harmonics, 64 ch x 1 h x 500 Hz: {secs:.2} s on {} threads",
            rayon::current_num_threads()
        );
        assert!(secs < 60.0, "took {secs} s");
    }

    #[test]
    fn result_does_not_depend_on_the_thread_count() {
        // Determinism requirement (DESIGN.md §5): bit-identical for any thread count.
        let rows: Vec<Vec<f64>> = (0..6)
            .map(|c| {
                (0..700)
                    .map(|k| ((k * (c + 3)) as f64 * 0.37).sin())
                    .collect()
            })
            .collect();
        let x = continuous(&rows, 250.0);
        let p = params(json!({ "freqs": [50], "harmonics": true }));
        let one = rayon::ThreadPoolBuilder::new()
            .num_threads(1)
            .build()
            .unwrap();
        let a = one.install(|| run(&p, &x)).unwrap();
        let b = run(&p, &x).unwrap();
        assert_eq!(a, b);
    }
}
