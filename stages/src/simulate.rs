//! The simulated demo study: a two-cue task recorded with 19 scalp channels and one EOG channel,
//! with one planted, lagged, band-limited coupling that a phase-synchronization analysis should
//! find (DESIGN §7).
//!
//! The scenario is our own. Each participant sees about 40 `cue-left` and 40 `cue-right` cues in
//! shuffled order, with jittered intervals. The signal of every scalp site is built in steps:
//! 1. an independent 1/f source per site (a sum of AR(1) processes with log-spaced corner
//!    frequencies and equal variances, whose spectra add up to roughly 1/f between them);
//! 2. the planted coupling, added to two distant sources (F3 and P4): a 6 Hz cosine under a
//!    tapered window 0.3–0.8 s after each `cue-left` cue, with a random phase per trial, the
//!    same at both sites except that P4 receives it 25 ms later — so only the *difference* of
//!    the phases is consistent over trials, at 2π·6·0.025 rad;
//! 3. zero-lag mixing: each sensor records its own source plus a fraction of its neighbours'
//!    (volume conduction is instantaneous), so neighbouring sensors look coupled at zero lag;
//! 4. at each electrode, 50 Hz mains with its harmonics below Nyquist (amplitudes and phases per
//!    channel) and a little white sensor noise.
//!
//! The EOG channel holds blinks on its own background, and leaks a little into Fp1 and Fp2.
//! Everything is drawn from ChaCha20 streams seeded from the config's seed (one stream per
//! subject), so the same seed gives the same bytes. [`write_study`] writes BIDS-style files and
//! `truth.json`, which records every planted parameter so tests can check what a pipeline finds.

use std::f64::consts::PI;
use std::fmt::Write as _;
use std::path::Path;

use rand::seq::SliceRandom;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha20Rng;
use rand_distr::StandardNormal;
use serde::{Deserialize, Serialize};
use serde_json::json;

use crate::array::Event;
use crate::error::StageError;
use crate::io::edf::{write_edf_plus, EdfWriteSpec, SignalSpec};

/// Size, seed and timing of a simulated study.
#[derive(Clone, Debug, Serialize, Deserialize)]
pub struct SimulateConfig {
    /// Number of participants.
    pub subjects: usize,
    /// Seed of the random generator: same seed, same bytes.
    pub seed: u64,
    /// Cues of each type per participant.
    #[serde(default = "default_trials")]
    pub trials_per_cue: usize,
    /// Sampling rate in Hz (a whole number: EDF records are one second long).
    #[serde(default = "default_rate")]
    pub sampling_rate: f64,
    /// Shortest and longest time between consecutive cues, in s (drawn uniformly).
    #[serde(default = "default_interval")]
    pub interval_s: [f64; 2],
    /// Mains frequency in Hz.
    #[serde(default = "default_mains")]
    pub mains_hz: f64,
}

fn default_trials() -> usize {
    40
}
fn default_rate() -> f64 {
    250.0
}
fn default_interval() -> [f64; 2] {
    [2.6, 3.2]
}
fn default_mains() -> f64 {
    50.0
}

impl Default for SimulateConfig {
    fn default() -> Self {
        SimulateConfig::new(6, 1)
    }
}

impl SimulateConfig {
    /// A study of `subjects` participants from `seed`, with default timing.
    pub fn new(subjects: usize, seed: u64) -> Self {
        SimulateConfig {
            subjects,
            seed,
            trials_per_cue: default_trials(),
            sampling_rate: default_rate(),
            interval_s: default_interval(),
            mains_hz: default_mains(),
        }
    }

    fn check(&self) -> Result<(), StageError> {
        let rate = self.sampling_rate;
        if !(rate.fract() == 0.0 && (64.0..=4096.0).contains(&rate)) {
            return Err(StageError::param(
                "sampling_rate",
                format!("expected a whole number of Hz from 64 to 4096, got {rate}"),
            ));
        }
        let [lo, hi] = self.interval_s;
        if !(lo >= EPOCH_SPAN_S && lo <= hi && hi <= 60.0) {
            return Err(StageError::param(
                "interval_s",
                format!("expected [shortest, longest] with {EPOCH_SPAN_S} ≤ shortest ≤ longest ≤ 60 s (the demo's epochs need {EPOCH_SPAN_S} s), got [{lo}, {hi}]"),
            ));
        }
        if self.subjects == 0 || self.subjects > MAX_SUBJECTS || self.trials_per_cue == 0 {
            return Err(StageError::param(
                "subjects",
                format!(
                    "expected 1 to {MAX_SUBJECTS} subjects and at least one trial per cue, got {} and {}",
                    self.subjects, self.trials_per_cue
                ),
            ));
        }
        if !(self.mains_hz > 0.0 && self.mains_hz < rate / 2.0) {
            return Err(StageError::param(
                "mains_hz",
                format!(
                    "expected a frequency below Nyquist ({} Hz), got {}",
                    rate / 2.0,
                    self.mains_hz
                ),
            ));
        }
        Ok(())
    }
}

/// The shortest time between cues: an epoch of [-1.0, 1.5] s around each fits between them.
const EPOCH_SPAN_S: f64 = 2.5;
/// Quiet time before the first cue and after the last, in s.
const LEAD_S: f64 = 3.0;

/// The two cue types; the coupling follows the first only.
pub const CUES: [&str; 2] = ["cue-left", "cue-right"];

/// 10-20 sites with positions on a flat grid (x: left → right, y: back → front), one unit
/// between rows and columns; mixing uses the distance on this grid.
pub const SITES: [(&str, f64, f64); 19] = [
    ("Fp1", -1.0, 2.0),
    ("Fp2", 1.0, 2.0),
    ("F7", -2.0, 1.0),
    ("F3", -1.0, 1.0),
    ("Fz", 0.0, 1.0),
    ("F4", 1.0, 1.0),
    ("F8", 2.0, 1.0),
    ("T7", -2.0, 0.0),
    ("C3", -1.0, 0.0),
    ("Cz", 0.0, 0.0),
    ("C4", 1.0, 0.0),
    ("T8", 2.0, 0.0),
    ("P7", -2.0, -1.0),
    ("P3", -1.0, -1.0),
    ("Pz", 0.0, -1.0),
    ("P4", 1.0, -1.0),
    ("P8", 2.0, -1.0),
    ("O1", -1.0, -2.0),
    ("O2", 1.0, -2.0),
];

/// The EOG channel's name.
pub const EOG: &str = "VEOG";

/// The planted coupling and the other generator parameters, as `truth.json` records them.
#[derive(Clone, Debug, Serialize)]
pub struct Planted {
    /// The coupled sites; the first leads.
    pub pair: [&'static str; 2],
    /// The cue after which the coupling appears.
    pub condition: &'static str,
    /// Frequency of the coupled oscillation in Hz.
    pub frequency_hz: f64,
    /// Its window after the cue, in s (tapered over `ramp_s` at both ends).
    pub window_s: [f64; 2],
    /// Length of the cosine ramps at each end of the window, in s.
    pub ramp_s: f64,
    /// How much later the second site receives the oscillation, in s.
    pub lag_s: f64,
    /// Peak amplitude in µV of the oscillation at each site (before per-subject scaling).
    pub amplitude_uv: f64,
    /// Range of the per-subject factor on that amplitude.
    pub subject_scale: [f64; 2],
    /// RMS in µV of each site's 1/f source.
    pub background_rms_uv: f64,
    /// Corner frequencies in Hz of the AR(1) processes summed into the 1/f background.
    pub background_corners_hz: [f64; 7],
    /// Fraction of each neighbouring source a sensor records (zero lag).
    pub neighbour_weight: f64,
    /// Two sites that both record one strong extra generator, equally and at zero lag (a
    /// midline occipital source seen by both occipital sensors): the demo's volume-conducted pair.
    pub shared_sites: [&'static str; 2],
    /// RMS in µV of that shared generator.
    pub shared_rms_uv: f64,
    /// Centre frequency and bandwidth in Hz of the shared generator's resonance.
    pub shared_band_hz: [f64; 2],
    /// Sites closer than this on the grid are neighbours (grid units; diagonals included).
    pub neighbour_distance: f64,
    /// Range of the mains amplitude per channel, in µV.
    pub mains_uv: [f64; 2],
    /// Amplitude of each harmonic relative to the fundamental.
    pub harmonic_ratio: f64,
    /// RMS in µV of white sensor noise.
    pub sensor_noise_uv: f64,
    /// Range of blink amplitudes in the EOG channel, in µV.
    pub blink_uv: [f64; 2],
    /// Mean time between blinks in s.
    pub blink_interval_s: f64,
    /// Fraction of the EOG signal in Fp1 and Fp2.
    pub eog_leak: f64,
}

/// The demo's parameters.
pub const PLANTED: Planted = Planted {
    pair: ["F3", "P4"],
    condition: CUES[0],
    frequency_hz: 6.0,
    window_s: [0.3, 0.8],
    ramp_s: 0.1,
    lag_s: 0.025,
    amplitude_uv: 8.0,
    subject_scale: [0.85, 1.15],
    background_rms_uv: 12.0,
    background_corners_hz: [0.5, 1.25, 3.1, 7.8, 19.5, 48.8, 122.0],
    neighbour_weight: 0.2,
    shared_sites: ["O1", "O2"],
    shared_rms_uv: 12.0,
    shared_band_hz: [7.0, 6.0],
    neighbour_distance: 1.5,
    mains_uv: [5.0, 20.0],
    harmonic_ratio: 0.33,
    sensor_noise_uv: 2.0,
    blink_uv: [80.0, 160.0],
    blink_interval_s: 6.0,
    eog_leak: 0.1,
};

/// One simulated recording, in µV.
#[derive(Clone, Debug, PartialEq)]
pub struct Recording {
    /// Channel names: the 19 sites, then the EOG channel.
    pub names: Vec<String>,
    /// Channel types (`EEG`, `EOG`), parallel to `names`.
    pub types: Vec<String>,
    /// Samples per channel in µV.
    pub signals: Vec<Vec<f64>>,
    /// The cues.
    pub events: Vec<Event>,
    /// Sampling rate in Hz.
    pub rate: f64,
    /// Per-subject draws that `truth.json` records (coupling scale, mains amplitudes, ...).
    pub draws: serde_json::Value,
}

/// The random stream of subject `index` (0-based): independent of how many subjects there are.
fn subject_rng(seed: u64, index: usize) -> ChaCha20Rng {
    let mut rng = ChaCha20Rng::seed_from_u64(seed);
    rng.set_stream(index as u64 + 1);
    rng
}

/// Cue onsets (on the sample grid) in shuffled order, and the recording's length in whole
/// seconds.
fn schedule(config: &SimulateConfig, rng: &mut ChaCha20Rng) -> (Vec<Event>, usize) {
    let mut labels: Vec<&str> = CUES
        .iter()
        .flat_map(|c| std::iter::repeat_n(*c, config.trials_per_cue))
        .collect();
    labels.shuffle(rng);
    let rate = config.sampling_rate;
    let [lo, hi] = config.interval_s;
    let mut t = LEAD_S;
    let mut events = Vec::with_capacity(labels.len());
    for label in labels {
        events.push(Event {
            onset: (t * rate).round() / rate,
            duration: 0.0,
            label: label.to_string(),
        });
        t += rng.gen_range(lo..=hi);
    }
    let last = events.last().map_or(0.0, |e| e.onset);
    (events, (last + LEAD_S).ceil() as usize)
}

/// A 1/f-like source of unit RMS: the sum of AR(1) processes of unit variance whose corner
/// frequencies are log-spaced. An AR(1) with coefficient a has the spectrum
/// (1 − a²) / |1 − a e^{−iω}|², flat below its corner and falling as 1/f² above it; with equal
/// variances per corner and corners a constant ratio apart the sum falls roughly as 1/f.
fn pink(n: usize, rate: f64, corners: &[f64], rng: &mut ChaCha20Rng) -> Vec<f64> {
    let coefs: Vec<f64> = corners
        .iter()
        .map(|f| (-2.0 * PI * f / rate).exp())
        .collect();
    let gains: Vec<f64> = coefs.iter().map(|a| (1.0 - a * a).sqrt()).collect();
    let mut state: Vec<f64> = coefs.iter().map(|_| rng.sample(StandardNormal)).collect();
    let norm = (corners.len() as f64).sqrt();
    let mut out = Vec::with_capacity(n);
    for _ in 0..n {
        let mut sum = 0.0;
        for ((x, a), g) in state.iter_mut().zip(&coefs).zip(&gains) {
            let w: f64 = rng.sample(StandardNormal);
            *x = a * *x + g * w;
            sum += *x;
        }
        out.push(sum / norm);
    }
    out
}

/// Tukey envelope over `window` (seconds after the cue), cosine ramps of `ramp` at both ends.
fn envelope(t: f64, [t0, t1]: [f64; 2], ramp: f64) -> f64 {
    if t < t0 || t > t1 {
        0.0
    } else if t < t0 + ramp {
        0.5 * (1.0 - (PI * (t - t0) / ramp).cos())
    } else if t > t1 - ramp {
        0.5 * (1.0 - (PI * (t1 - t) / ramp).cos())
    } else {
        1.0
    }
}

/// Adds the planted oscillation after every coupled cue to the two sources: amplitude `amp`,
/// a random phase per trial, the second site delayed by the lag.
fn add_coupling(
    sources: &mut [Vec<f64>],
    events: &[Event],
    rate: f64,
    amp: f64,
    rng: &mut ChaCha20Rng,
) {
    let p = &PLANTED;
    let site = |name: &str| SITES.iter().position(|s| s.0 == name);
    let (Some(lead), Some(lag)) = (site(p.pair[0]), site(p.pair[1])) else {
        return;
    };
    for event in events.iter().filter(|e| e.label == p.condition) {
        let phase = rng.gen_range(0.0..2.0 * PI);
        let start = ((event.onset + p.window_s[0]) * rate).floor() as usize;
        let end = ((event.onset + p.window_s[1] + p.lag_s) * rate).ceil() as usize;
        for k in start..=end {
            let t = k as f64 / rate - event.onset;
            for (idx, delay) in [(lead, 0.0), (lag, p.lag_s)] {
                let u = t - delay;
                let v = amp
                    * envelope(u, p.window_s, p.ramp_s)
                    * (2.0 * PI * p.frequency_hz * u + phase).cos();
                if let Some(x) = sources.get_mut(idx).and_then(|s| s.get_mut(k)) {
                    *x += v;
                }
            }
        }
    }
}

/// For each site, the indices of its neighbours on the grid.
pub fn neighbours() -> Vec<Vec<usize>> {
    SITES
        .iter()
        .map(|&(_, x, y)| {
            SITES
                .iter()
                .enumerate()
                .filter(|(_, &(_, u, v))| {
                    let d = (x - u).hypot(y - v);
                    d > 0.0 && d < PLANTED.neighbour_distance
                })
                .map(|(j, _)| j)
                .collect()
        })
        .collect()
}

/// Zero-lag mixing: sensor i = source i + w · Σ sources of its neighbours.
fn mix(sources: &[Vec<f64>]) -> Vec<Vec<f64>> {
    let w = PLANTED.neighbour_weight;
    neighbours()
        .iter()
        .zip(sources)
        .map(|(nb, own)| {
            let mut out = own.clone();
            for &j in nb {
                for (o, s) in out.iter_mut().zip(&sources[j]) {
                    *o += w * s;
                }
            }
            out
        })
        .collect()
}

/// Adds mains (fundamental and harmonics below Nyquist) and white noise to one channel;
/// returns the fundamental's amplitude in µV.
fn add_electrode_noise(x: &mut [f64], config: &SimulateConfig, rng: &mut ChaCha20Rng) -> f64 {
    let p = &PLANTED;
    let rate = config.sampling_rate;
    let amp = rng.gen_range(p.mains_uv[0]..=p.mains_uv[1]);
    let phase = rng.gen_range(-0.5..0.5);
    let harmonics: Vec<(f64, f64)> = (1..)
        .map(|h| h as f64 * config.mains_hz)
        .take_while(|f| *f < rate / 2.0)
        .enumerate()
        .map(|(k, f)| (f, amp * p.harmonic_ratio.powi(k as i32)))
        .collect();
    for (i, v) in x.iter_mut().enumerate() {
        let t = i as f64 / rate;
        for &(f, a) in &harmonics {
            *v += a * (2.0 * PI * f * t + phase).cos();
        }
        let noise: f64 = rng.sample(StandardNormal);
        *v += p.sensor_noise_uv * noise;
    }
    amp
}

/// The EOG channel: blinks (a 0.3 s raised-cosine bump each) on a 1/f background.
fn eog(n: usize, rate: f64, rng: &mut ChaCha20Rng) -> Vec<f64> {
    let p = &PLANTED;
    let mut x = background(n, rate, rng);
    let width = (0.3 * rate) as usize;
    let mut t = rng.gen_range(0.0..p.blink_interval_s);
    while ((t * rate) as usize) + width < n {
        let amp = rng.gen_range(p.blink_uv[0]..=p.blink_uv[1]);
        let start = (t * rate) as usize;
        for (k, v) in x[start..start + width].iter_mut().enumerate() {
            *v += amp * 0.5 * (1.0 - (2.0 * PI * k as f64 / width as f64).cos());
        }
        t += rng.gen_range(0.3 * p.blink_interval_s..1.7 * p.blink_interval_s);
    }
    x
}

/// One site's 1/f source in µV.
fn background(n: usize, rate: f64, rng: &mut ChaCha20Rng) -> Vec<f64> {
    let p = &PLANTED;
    let s = pink(n, rate, &p.background_corners_hz, rng);
    s.into_iter().map(|v| v * p.background_rms_uv).collect()
}

/// One band-limited generator added, unchanged and at zero lag, to both `shared_sites` (volume
/// conduction: coupling that phase-locking measures see and imaginary-part measures ignore).
/// It is white noise through a two-pole resonator, x[k] = 2r·cos(ω)·x[k−1] − r²·x[k−2] + e[k]
/// with r = exp(−π·B/fs) for a bandwidth of about B Hz, scaled to `shared_rms_uv`.
fn add_shared_source(sources: &mut [Vec<f64>], rate: f64, rng: &mut ChaCha20Rng) {
    let p = &PLANTED;
    let n = sources.first().map_or(0, Vec::len);
    let [centre, width] = p.shared_band_hz;
    let r = (-PI * width / rate).exp();
    let (a1, a2) = (2.0 * r * (2.0 * PI * centre / rate).cos(), -r * r);
    let mut shared = Vec::with_capacity(n);
    let (mut x1, mut x2) = (0.0, 0.0);
    for _ in 0..n {
        let e: f64 = rng.sample(StandardNormal);
        let x = a1 * x1 + a2 * x2 + e;
        shared.push(x);
        (x2, x1) = (x1, x);
    }
    let rms = (shared.iter().map(|v| v * v).sum::<f64>() / n.max(1) as f64).sqrt();
    let gain = if rms > 0.0 {
        p.shared_rms_uv / rms
    } else {
        0.0
    };
    for name in p.shared_sites {
        if let Some(i) = SITES.iter().position(|s| s.0 == name) {
            for (v, s) in sources[i].iter_mut().zip(&shared) {
                *v += gain * s;
            }
        }
    }
}

/// Eye movements reach the frontopolar sites.
fn add_eog_leak(signals: &mut [Vec<f64>], eog: &[f64]) {
    for name in ["Fp1", "Fp2"] {
        let Some(i) = SITES.iter().position(|s| s.0 == name) else {
            continue;
        };
        if let Some(x) = signals.get_mut(i) {
            for (v, e) in x.iter_mut().zip(eog) {
                *v += PLANTED.eog_leak * e;
            }
        }
    }
}

/// Channel names and types: the sites (`EEG`), then the EOG channel.
fn channels() -> (Vec<String>, Vec<String>) {
    let mut names: Vec<String> = SITES.iter().map(|s| s.0.to_string()).collect();
    names.push(EOG.into());
    let mut types = vec!["EEG".to_string(); SITES.len()];
    types.push("EOG".into());
    (names, types)
}

/// Simulates participant `index` (0-based) of a study.
pub fn simulate_subject(config: &SimulateConfig, index: usize) -> Result<Recording, StageError> {
    config.check()?;
    let p = &PLANTED;
    let rate = config.sampling_rate;
    let mut rng = subject_rng(config.seed, index);
    let (events, seconds) = schedule(config, &mut rng);
    let n = seconds * rate as usize;
    let mut sources: Vec<Vec<f64>> = SITES
        .iter()
        .map(|_| background(n, rate, &mut rng))
        .collect();
    let scale = rng.gen_range(p.subject_scale[0]..=p.subject_scale[1]);
    add_coupling(
        &mut sources,
        &events,
        rate,
        scale * p.amplitude_uv,
        &mut rng,
    );
    add_shared_source(&mut sources, rate, &mut rng);
    let mut signals = mix(&sources);
    let eog = eog(n, rate, &mut rng);
    add_eog_leak(&mut signals, &eog);
    signals.push(eog);
    let mains: Vec<f64> = signals
        .iter_mut()
        .map(|x| add_electrode_noise(x, config, &mut rng))
        .collect();
    let (names, types) = channels();
    let mains_by_channel: serde_json::Map<String, serde_json::Value> = names
        .iter()
        .zip(&mains)
        .map(|(n, a)| (n.clone(), json!(a)))
        .collect();
    let draws = json!({
        "coupling_amplitude_uv": scale * p.amplitude_uv,
        "mains_amplitude_uv": mains_by_channel,
        "duration_s": seconds,
        "cues": events.len(),
    });
    Ok(Recording {
        names,
        types,
        signals,
        events,
        rate,
        draws,
    })
}

/// The largest study `simulate` writes (three-digit labels).
pub const MAX_SUBJECTS: usize = 999;

/// `sub-01`, `sub-02`, ... in a study of up to 99 subjects; `sub-001`, ... `sub-100`, ... in a
/// larger one, so that the labels sort in subject order.
pub fn subject_id(index: usize, subjects: usize) -> String {
    let width = if subjects > 99 { 3 } else { 2 };
    format!("sub-{:0width$}", index + 1)
}

/// Writes the study into `dir`: per subject `sub-XX/eeg/sub-XX_task-cue_eeg.edf` (EDF+ with the
/// cues as annotations too), `_events.tsv`, `_channels.tsv`, `_electrodes.tsv` with
/// `_coordsystem.json`, and `_eeg.json`; at the top
/// `dataset_description.json` and `truth.json`.
pub fn write_study(dir: &Path, config: &SimulateConfig) -> Result<(), StageError> {
    config.check()?;
    let mut per_subject = serde_json::Map::new();
    for index in 0..config.subjects {
        let id = subject_id(index, config.subjects);
        let rec = simulate_subject(config, index)?;
        write_subject(dir, &id, &rec, config)?;
        per_subject.insert(id, rec.draws);
    }
    write_text(
        &dir.join("dataset_description.json"),
        &json_text(&dataset_description()),
    )?;
    write_text(
        &dir.join("truth.json"),
        &json_text(&truth(config, per_subject)),
    )
}

fn write_subject(
    dir: &Path,
    id: &str,
    rec: &Recording,
    config: &SimulateConfig,
) -> Result<(), StageError> {
    let eeg = dir.join(id).join("eeg");
    std::fs::create_dir_all(&eeg)
        .map_err(|e| StageError::input(format!("creating {}: {e}", eeg.display())))?;
    let with = |suffix: &str| eeg.join(format!("{id}_task-cue_{suffix}"));
    write_edf_plus(&with("eeg.edf"), &edf_spec(id, rec))?;
    write_text(&with("events.tsv"), &events_tsv(&rec.events))?;
    write_text(&with("channels.tsv"), &channels_tsv(rec))?;
    write_text(&with("electrodes.tsv"), &electrodes_tsv(rec)?)?;
    write_text(&with("coordsystem.json"), &json_text(&coordsystem()))?;
    write_text(&with("eeg.json"), &json_text(&eeg_sidecar(rec, config)))
}

/// Radius in metres of the simulated participants' spherical head (a round adult value).
pub const HEAD_RADIUS_M: f64 = 0.09;

/// BIDS `electrodes.tsv` (name, x, y, z in metres): every scalp site on a sphere of
/// [`HEAD_RADIUS_M`], placed by the 10-20 percent rules ([`crate::spatial::standard`], whose
/// frame is x towards the right preauricular point, y towards the nasion, z up). The numbers are
/// written in full (shortest round-trip form) so that they read back as the same directions the
/// derived positions have. The EOG electrode has no place on this model and is not listed.
fn electrodes_tsv(rec: &Recording) -> Result<String, StageError> {
    let mut t = String::from("name\tx\ty\tz\n");
    for (name, kind) in rec.names.iter().zip(&rec.types) {
        if kind != "EEG" {
            continue;
        }
        let p = crate::spatial::standard::position(name).ok_or_else(|| {
            StageError::input(format!("internal: no 10-20 position for the site {name}"))
        })?;
        let [x, y, z] = p.map(|v| v * HEAD_RADIUS_M);
        let _ = writeln!(t, "{name}\t{x}\t{y}\t{z}");
    }
    Ok(t)
}

/// BIDS `coordsystem.json` for [`electrodes_tsv`].
fn coordsystem() -> serde_json::Value {
    json!({
        "EEGCoordinateSystem": "Other",
        "EEGCoordinateUnits": "m",
        "EEGCoordinateSystemDescription": format!(
            "Simulated spherical head of radius {HEAD_RADIUS_M} m centred at the origin: x towards \
             the right preauricular point, y towards the nasion, z towards the vertex. Sites \
             placed by the 10-20 percent rules (phasewise simulate)."
        ),
    })
}

fn edf_spec(id: &str, rec: &Recording) -> EdfWriteSpec {
    let signals = rec
        .names
        .iter()
        .zip(&rec.types)
        .zip(&rec.signals)
        .map(|((name, kind), x)| SignalSpec {
            label: format!("{kind} {name}"),
            unit: "uV".into(),
            samples: x.clone(),
        })
        .collect();
    EdfWriteSpec {
        patient: format!("{id} X X X"),
        recording: "Startdate 01-JAN-2026 X X phasewise_simulate".into(),
        start_date: "01.01.26".into(),
        start_time: "10.00.00".into(),
        record_seconds: 1.0,
        sampling_rate: rec.rate,
        signals,
        annotations: rec.events.clone(),
    }
}

fn events_tsv(events: &[Event]) -> String {
    let mut t = String::from("onset\tduration\ttrial_type\n");
    for e in events {
        let _ = writeln!(t, "{}\t{}\t{}", e.onset, e.duration, e.label);
    }
    t
}

fn channels_tsv(rec: &Recording) -> String {
    let mut t = String::from("name\ttype\tunits\n");
    for (name, kind) in rec.names.iter().zip(&rec.types) {
        let _ = writeln!(t, "{name}\t{kind}\t\u{b5}V");
    }
    t
}

fn eeg_sidecar(rec: &Recording, config: &SimulateConfig) -> serde_json::Value {
    json!({
        "TaskName": "cue",
        "TaskDescription": "Simulated two-cue task (phasewise demo): cue-left and cue-right in shuffled order.",
        "SamplingFrequency": rec.rate,
        "PowerLineFrequency": config.mains_hz,
        "EEGReference": "none (simulated sources; re-reference before analysis)",
        "SoftwareFilters": "n/a",
        "EEGChannelCount": SITES.len(),
        "EOGChannelCount": 1,
    })
}

fn dataset_description() -> serde_json::Value {
    json!({
        "Name": "phasewise demo: simulated two-cue study",
        "BIDSVersion": "1.8.0",
        "DatasetType": "raw",
        "GeneratedBy": [{ "Name": "phasewise simulate", "Version": env!("CARGO_PKG_VERSION") }],
    })
}

fn truth(
    config: &SimulateConfig,
    per_subject: serde_json::Map<String, serde_json::Value>,
) -> serde_json::Value {
    let p = &PLANTED;
    let names: Vec<&str> = SITES.iter().map(|s| s.0).collect();
    let nb: serde_json::Map<String, serde_json::Value> = neighbours()
        .iter()
        .zip(&names)
        .map(|(js, n)| {
            (
                n.to_string(),
                json!(js.iter().map(|&j| names[j]).collect::<Vec<_>>()),
            )
        })
        .collect();
    json!({
        "format": "phasewise-simulate-truth",
        "format_version": 1,
        "config": config,
        "conditions": CUES,
        "coupling": {
            "pair": p.pair,
            "leader": p.pair[0],
            "condition": p.condition,
            "frequency_hz": p.frequency_hz,
            "window_s": p.window_s,
            "ramp_s": p.ramp_s,
            "lag_s": p.lag_s,
            "phase_lag_rad": 2.0 * PI * p.frequency_hz * p.lag_s,
            "amplitude_uv": p.amplitude_uv,
            "subject_scale": p.subject_scale,
            "phase": "uniform per trial, the same at both sites before the lag",
            "note": "phase_lag_rad is the lag between the two sources. The sensors also record \
                     their neighbours (zero lag) and a re-reference mixes every channel into \
                     every other, so the angle measured between sensors is pulled towards 0 or \
                     π; measures built on the imaginary part of the cross-spectrum ignore those \
                     zero-lag parts.",
        },
        "generator": p,
        "mixing": { "kind": "zero lag", "weight": p.neighbour_weight, "neighbours": nb },
        "volume_conduction": {
            "pair": p.shared_sites,
            "rms_uv": p.shared_rms_uv,
            "lag_s": 0.0,
            "note": "one generator recorded equally by both sites at zero lag: plv and ppc are \
                     high for this pair, pli, wpli, dwpli and icoh are not",
        },
        "subjects": per_subject,
        "eog_channel": EOG,
    })
}

/// Pretty JSON with sorted keys (serde_json's map is ordered) and a final newline.
fn json_text(v: &serde_json::Value) -> String {
    let mut s = serde_json::to_string_pretty(&sorted_keys(v)).unwrap_or_default();
    s.push('\n');
    s
}

/// `v` with every object's keys in sorted order, so the files' bytes do not depend on whether
/// the build's serde_json keeps insertion order (its `preserve_order` feature, which a
/// dependency of the runner turns on) or sorts.
fn sorted_keys(v: &serde_json::Value) -> serde_json::Value {
    use serde_json::Value;
    match v {
        Value::Object(map) => {
            let mut keys: Vec<&String> = map.keys().collect();
            keys.sort();
            Value::Object(
                keys.into_iter()
                    .map(|k| (k.clone(), sorted_keys(&map[k])))
                    .collect(),
            )
        }
        Value::Array(items) => Value::Array(items.iter().map(sorted_keys).collect()),
        other => other.clone(),
    }
}

fn write_text(path: &Path, text: &str) -> Result<(), StageError> {
    std::fs::write(path, text)
        .map_err(|e| StageError::input(format!("writing {}: {e}", path.display())))
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::op::Notes;
    use num_complex::Complex64;

    #[test]
    fn labels_are_two_digits_up_to_99_subjects_and_three_beyond_so_they_sort_in_order() {
        assert_eq!(subject_id(0, 6), "sub-01");
        assert_eq!(subject_id(98, 99), "sub-99");
        let labels: Vec<String> = (0..100).map(|i| subject_id(i, 100)).collect();
        assert_eq!(
            (labels[0].as_str(), labels[99].as_str()),
            ("sub-001", "sub-100")
        );
        assert!(labels.windows(2).all(|w| w[0] < w[1]));
        assert!(SimulateConfig::new(MAX_SUBJECTS + 1, 1).check().is_err());
    }

    fn site(name: &str) -> usize {
        SITES.iter().position(|s| s.0 == name).expect("a site")
    }

    /// A complex Morlet coefficient of `x` at sample `c` as DESIGN §4 defines it: σ = n / (2π f)
    /// (Tallon-Baudry et al. 1997), w(t) = (2 / Σ g) e^{2πift} g(t) for |t| ≤ 5σ, convolution
    /// centred on c. Written out directly (no FFT) as an oracle.
    fn morlet_at(x: &[f64], c: usize, f: f64, cycles: f64, rate: f64) -> Complex64 {
        let sigma = cycles / (2.0 * PI * f);
        let half = (5.0 * sigma * rate).floor() as i64;
        let g = |k: i64| (-(k as f64 / rate).powi(2) / (2.0 * sigma * sigma)).exp();
        let norm: f64 = (-half..=half).map(g).sum();
        (-half..=half)
            .map(|k| {
                let v = x.get((c as i64 - k) as usize).copied().unwrap_or(0.0);
                let t = k as f64 / rate;
                v * g(k) * Complex64::from_polar(2.0 / norm, 2.0 * PI * f * t)
            })
            .sum()
    }

    /// PPC = (|Σ e^{iΔφ}|² − N) / (N (N − 1)) (Vinck et al. 2010) and the angle of Σ e^{iΔφ}.
    fn ppc(cross: &[Complex64]) -> (f64, f64) {
        let n = cross.len() as f64;
        let s: Complex64 = cross.iter().map(|z| z / z.norm()).sum();
        ((s.norm_sqr() - n) / (n * (n - 1.0)), s.arg())
    }

    /// Cross-spectra X_a conj(X_b) at `f` Hz, `t` s after each cue of type `cue`.
    fn cross(rec: &Recording, cue: &str, (a, b): (&str, &str), f: f64, t: f64) -> Vec<Complex64> {
        let (xa, xb) = (&rec.signals[site(a)], &rec.signals[site(b)]);
        rec.events
            .iter()
            .filter(|e| e.label == cue)
            .map(|e| {
                let c = ((e.onset + t) * rec.rate).round() as usize;
                morlet_at(xa, c, f, 5.0, rec.rate) * morlet_at(xb, c, f, 5.0, rec.rate).conj()
            })
            .collect()
    }

    #[test]
    fn same_seed_same_recording_other_seed_differs() {
        let a = simulate_subject(&SimulateConfig::new(2, 7), 1).unwrap();
        let b = simulate_subject(&SimulateConfig::new(5, 7), 1).unwrap();
        assert_eq!(
            a, b,
            "a subject must not depend on how many subjects there are"
        );
        let c = simulate_subject(&SimulateConfig::new(2, 8), 1).unwrap();
        assert_ne!(a.signals, c.signals);
        let d = simulate_subject(&SimulateConfig::new(2, 7), 0).unwrap();
        assert_ne!(a.signals, d.signals);
    }

    #[test]
    fn cues_are_balanced_jittered_and_on_the_sample_grid() {
        let config = SimulateConfig::default();
        let rec = simulate_subject(&config, 0).unwrap();
        for cue in CUES {
            assert_eq!(rec.events.iter().filter(|e| e.label == cue).count(), 40);
        }
        let gaps: Vec<f64> = rec
            .events
            .windows(2)
            .map(|w| w[1].onset - w[0].onset)
            .collect();
        let step = 1.0 / config.sampling_rate;
        assert!(
            gaps.iter().all(|g| *g >= 2.6 - step && *g <= 3.2 + step),
            "{gaps:?}"
        );
        let spread =
            gaps.iter().cloned().fold(0.0, f64::max) - gaps.iter().cloned().fold(9.0, f64::min);
        assert!(
            spread > 0.4,
            "intervals should be jittered, spread {spread}"
        );
        for e in &rec.events {
            let k = e.onset * config.sampling_rate;
            assert!(
                (k - k.round()).abs() < 1e-6,
                "onset {} off the grid",
                e.onset
            );
        }
        let n = rec.signals[0].len();
        assert_eq!(n % 250, 0, "whole one-second EDF records");
        assert!(rec.events.last().unwrap().onset + 1.5 < n as f64 / 250.0);
    }

    #[test]
    fn planted_coupling_is_found_by_ppc_after_cue_left_only() {
        // Expected phase lag derived from the plant: 2π f τ (F3 leads, so the F3·conj(P4)
        // cross-spectrum turns by +2π f τ).
        let p = &PLANTED;
        let lag = 2.0 * PI * p.frequency_hz * p.lag_s;
        let config = SimulateConfig::default();
        for index in 0..config.subjects {
            let rec = simulate_subject(&config, index).unwrap();
            let pair = (p.pair[0], p.pair[1]);
            let (on, angle) = ppc(&cross(&rec, CUES[0], pair, 6.0, 0.55));
            let (off, _) = ppc(&cross(&rec, CUES[1], pair, 6.0, 0.55));
            let (control, _) = ppc(&cross(&rec, CUES[0], ("Fp2", "O1"), 6.0, 0.55));
            let (before, _) = ppc(&cross(&rec, CUES[0], pair, 6.0, -0.4));
            eprintln!("{}: ppc cue-left {on:.3} (angle {angle:.3} rad, planted {lag:.3}), cue-right {off:.3}, control {control:.3}, pre-cue {before:.3}", subject_id(index, config.subjects));
            assert!(on > 0.3, "cue-left ppc {on}");
            assert!(
                off.abs() < 0.1 && control.abs() < 0.1 && before.abs() < 0.1,
                "{off} {control} {before}"
            );
            assert!((angle - lag).abs() < 0.3, "angle {angle} vs {lag}");
        }
    }

    #[test]
    fn neighbours_are_mixed_at_zero_lag() {
        // Volume conduction is instantaneous, so coherency between neighbours is real
        // (Nolte et al. 2004): a large real part and an imaginary part near zero. Estimated at
        // 10 Hz every 0.3 s over the whole recording (~800 nearly independent points, so the
        // estimate's standard deviation is about 0.025).
        let rec = simulate_subject(&SimulateConfig::default(), 0).unwrap();
        let step = (0.3 * rec.rate) as usize;
        let centres: Vec<usize> = (step..rec.signals[0].len() - step).step_by(step).collect();
        for (a, b) in [("C3", "Cz"), ("Pz", "P4")] {
            let coef = |name: &str| -> Vec<Complex64> {
                let x = &rec.signals[site(name)];
                centres
                    .iter()
                    .map(|&c| morlet_at(x, c, 10.0, 5.0, rec.rate))
                    .collect()
            };
            let (xa, xb) = (coef(a), coef(b));
            let s: Complex64 = xa.iter().zip(&xb).map(|(u, v)| u * v.conj()).sum();
            let power = |x: &[Complex64]| x.iter().map(|z| z.norm_sqr()).sum::<f64>();
            let coh = s / (power(&xa) * power(&xb)).sqrt();
            eprintln!("{a}-{b}: coherency {coh:.3}");
            assert!(coh.re > 0.25 && coh.im.abs() < 0.08, "{a}-{b}: {coh}");
        }
    }

    #[test]
    fn background_follows_its_ar1_spectrum_and_is_roughly_one_over_f() {
        // Reference: the spectral density of an AR(1) process, (1 − a²) / |1 − a e^{−iω}|²
        // (textbook time-series result), summed over the components; estimated here by the
        // averaged periodogram of 800 two-second segments.
        let rate = 250.0;
        let corners = PLANTED.background_corners_hz;
        let mut rng = subject_rng(3, 0);
        let seg = 500;
        let x = pink(seg * 800, rate, &corners, &mut rng);
        let rms = (x.iter().map(|v| v * v).sum::<f64>() / x.len() as f64).sqrt();
        assert!((rms - 1.0).abs() < 0.05, "rms {rms}");
        let analytic = |f: f64| -> f64 {
            let w = 2.0 * PI * f / rate;
            corners
                .iter()
                .map(|c| {
                    let a = (-2.0 * PI * c / rate).exp();
                    (1.0 - a * a)
                        / (Complex64::new(1.0, 0.0) - a * Complex64::from_polar(1.0, -w)).norm_sqr()
                })
                .sum::<f64>()
                / corners.len() as f64
        };
        let periodogram = |f: f64| -> f64 {
            let w = 2.0 * PI * f / rate;
            x.chunks(seg)
                .map(|c| {
                    c.iter()
                        .enumerate()
                        .map(|(n, v)| v * Complex64::from_polar(1.0, -w * n as f64))
                        .sum::<Complex64>()
                        .norm_sqr()
                        / seg as f64
                })
                .sum::<f64>()
                / 800.0
        };
        for f in [2.0, 8.0, 32.0] {
            let (est, want) = (periodogram(f), analytic(f));
            assert!((est / want - 1.0).abs() < 0.15, "{f} Hz: {est} vs {want}");
        }
        // 1/f would give a ratio of 16 between 2 and 32 Hz.
        let ratio = analytic(2.0) / analytic(32.0);
        eprintln!("S(2 Hz) / S(32 Hz) = {ratio:.1}");
        assert!((8.0..32.0).contains(&ratio), "{ratio}");
    }

    #[test]
    fn mains_and_harmonic_have_their_drawn_amplitudes() {
        // The DFT amplitude 2|Σ x e^{−iωn}| / N of a whole-recording sinusoid at an exact bin.
        let rec = simulate_subject(&SimulateConfig::default(), 2).unwrap();
        for name in ["Cz", "O2"] {
            let x = &rec.signals[site(name)];
            let amp = |f: f64| {
                let w = 2.0 * PI * f / rec.rate;
                let s: Complex64 = x
                    .iter()
                    .enumerate()
                    .map(|(n, v)| v * Complex64::from_polar(1.0, -w * n as f64))
                    .sum();
                2.0 * s.norm() / x.len() as f64
            };
            let drawn = rec.draws["mains_amplitude_uv"][name].as_f64().unwrap();
            assert!(
                (amp(50.0) / drawn - 1.0).abs() < 0.03,
                "{name}: {} vs {drawn}",
                amp(50.0)
            );
            let h = drawn * PLANTED.harmonic_ratio;
            assert!(
                (amp(100.0) / h - 1.0).abs() < 0.05,
                "{name}: {} vs {h}",
                amp(100.0)
            );
        }
    }

    /// Every file under `dir` with its bytes, in path order.
    fn tree(dir: &Path) -> Vec<(std::path::PathBuf, Vec<u8>)> {
        let mut out = Vec::new();
        let mut stack = vec![dir.to_path_buf()];
        while let Some(d) = stack.pop() {
            for entry in std::fs::read_dir(&d).unwrap() {
                let path = entry.unwrap().path();
                if path.is_dir() {
                    stack.push(path);
                } else {
                    let bytes = std::fs::read(&path).unwrap();
                    out.push((path.strip_prefix(dir).unwrap().to_path_buf(), bytes));
                }
            }
        }
        out.sort();
        out
    }

    #[test]
    fn the_study_reads_back_and_the_same_seed_gives_the_same_bytes() {
        use crate::io::{read_recording, EventSource};
        let config = SimulateConfig::default();
        let (a, b) = (tempfile::tempdir().unwrap(), tempfile::tempdir().unwrap());
        let started = std::time::Instant::now();
        write_study(a.path(), &config).unwrap();
        eprintln!(
            "6 subjects written in {:.2} s",
            started.elapsed().as_secs_f64()
        );
        write_study(b.path(), &config).unwrap();
        let (ta, tb) = (tree(a.path()), tree(b.path()));
        assert_eq!(
            ta.len(),
            2 + 6 * 6,
            "{:?}",
            ta.iter().map(|f| &f.0).collect::<Vec<_>>()
        );
        assert!(ta == tb, "same seed, different bytes");
        let edf_bytes: usize = ta
            .iter()
            .filter(|(p, _)| p.extension().is_some_and(|e| e == "edf"))
            .map(|(_, b)| b.len())
            .sum();
        eprintln!("EDF total {:.2} MB", edf_bytes as f64 / 1e6);
        assert!(edf_bytes < 15_000_000, "{edf_bytes} bytes of EDF");

        let rec = simulate_subject(&config, 1).unwrap();
        let path = a.path().join("sub-02/eeg/sub-02_task-cue_eeg.edf");
        for source in [EventSource::Sidecar, EventSource::Annotations] {
            let read = read_recording(&path, source, &mut Notes::default()).unwrap();
            let l = &read.layout;
            assert_eq!(l.labels("channel").unwrap(), rec.names.as_slice());
            assert_eq!(l.meta.channel_types.as_deref(), Some(rec.types.as_slice()));
            assert_eq!(l.meta.sampling_rate, Some(250.0));
            let events = l.meta.events.as_ref().unwrap();
            assert_eq!(events.len(), rec.events.len());
            for (got, want) in events.iter().zip(&rec.events) {
                assert_eq!(got.label, want.label);
                assert!(
                    (got.onset - want.onset).abs() < 1e-6,
                    "{source:?}: {got:?} vs {want:?}"
                );
            }
            // 16-bit samples over ±peak: a quantisation step of peak / 32767 (Kemp et al. 1992).
            let values = read.real_values().unwrap();
            for (c, x) in rec.signals.iter().enumerate() {
                let peak = x.iter().fold(0.0f64, |m, v| m.max(v.abs()));
                let err = x
                    .iter()
                    .zip(values.index_axis(ndarray::Axis(0), c))
                    .fold(0.0f64, |m, (v, r)| m.max((v * 1e-6 - f64::from(*r)).abs()));
                assert!(
                    err <= 1.01 * peak * 1e-6 / 32767.0,
                    "{}: {err}",
                    rec.names[c]
                );
            }
        }
        let events =
            std::fs::read_to_string(a.path().join("sub-01/eeg/sub-01_task-cue_events.tsv"))
                .unwrap();
        assert!(
            events.starts_with("onset\tduration\ttrial_type\n3\t0\tcue-"),
            "{events}"
        );
        let truth: serde_json::Value =
            serde_json::from_slice(&std::fs::read(a.path().join("truth.json")).unwrap()).unwrap();
        assert_eq!(truth["coupling"]["pair"], json!(["F3", "P4"]));
        assert_eq!(truth["coupling"]["condition"], json!("cue-left"));
        assert_eq!(truth["config"]["seed"], json!(1));
        assert!(truth["subjects"]["sub-06"]["coupling_amplitude_uv"].is_number());
    }

    #[test]
    fn few_epochs_exceed_a_common_rejection_threshold() {
        // 150 µV peak-to-peak is a common rejection threshold for scalp EEG (common practice).
        // Mains is removed here by a 5-point moving average, whose zeros at 250 Hz fall at
        // k · 250 / 5 = 50, 100 Hz; then the average of the EEG channels is subtracted.
        let rec = simulate_subject(&SimulateConfig::default(), 0).unwrap();
        let eeg = SITES.len();
        let smooth: Vec<Vec<f64>> = rec.signals[..eeg]
            .iter()
            .map(|x| x.windows(5).map(|w| w.iter().sum::<f64>() / 5.0).collect())
            .collect();
        let n = smooth[0].len();
        let mean: Vec<f64> = (0..n)
            .map(|k| smooth.iter().map(|x| x[k]).sum::<f64>() / eeg as f64)
            .collect();
        let rejected = rec
            .events
            .iter()
            .filter(|e| {
                let a = ((e.onset - 1.0) * rec.rate) as usize;
                let b = ((e.onset + 1.5) * rec.rate) as usize;
                smooth.iter().any(|x| {
                    let seg = (a..b).map(|k| x[k] - mean[k]);
                    let (lo, hi) = seg.fold((f64::MAX, f64::MIN), |(l, h), v| (l.min(v), h.max(v)));
                    hi - lo > 150.0
                })
            })
            .count();
        eprintln!(
            "{rejected} of {} epochs over 150 µV peak-to-peak",
            rec.events.len()
        );
        assert!(
            rejected * 10 < rec.events.len(),
            "{rejected} epochs rejected"
        );
    }
}
