//! The `clustering` op (the measures kernel) on its own, across trials, at one subject of the
//! natural workload (bench/natural.py): 24 EEG channels (276 pairs) × 2 conditions × 50 trials ×
//! 20 frequencies × 871 time points (512 Hz, [−0.6, 1.1] s), all six measures; sizes from the
//! environment (`MEASURES_CHANNELS`, `MEASURES_TRIALS` per condition, `MEASURES_FREQS`,
//! `MEASURES_TIMES`). All threads of rayon's pool, best of 5.
//!
//! Printed beside the time: the op's floor, the larger of
//! - arithmetic: per pair, trial, frequency and time point the sums of DESIGN.md §4 need
//!   (Σ u_x conj u_y: 2 complex-multiply halves of 2 mul + 1 add each, 2 accumulating adds;
//!   Im S: 2 mul + 1 sub; Σ Im S, Σ |Im S|, Σ (Im S)², Σ sign Im S: 1 + 2 + 2 + 3), 19 f64
//!   operations, at the machine's nominal f64 rate without fused multiply-add: cores × 4 lanes
//!   (AVX2) × 2 operations per cycle × the clock /proc/cpuinfo reports — an upper bound on the
//!   rate, so a lower bound on the time;
//! - memory: the coefficients read once and the output written once, at the copy bandwidth
//!   measured here (a 256 MiB copy, best of 3, bytes read plus written).
//!
//! `cargo bench -p phasewise-stages --bench measures`; bench/natural.py runs it.

use std::time::Instant;

use ndarray::{ArrayD, IxDyn};
use num_complex::Complex32;
use phasewise_stages::array::{Coord, LabelledArray, Layout, Meta, TrialInfo};
use phasewise_stages::op::{DynOp, Input, Notes, Registered};
use phasewise_stages::ops::clustering::Clustering;

fn size(name: &str, default: usize) -> usize {
    std::env::var(name)
        .ok()
        .and_then(|v| v.parse().ok())
        .unwrap_or(default)
}

/// f64 operations per pair, trial, frequency and time point (see the module's doc).
const FLOPS_PER_TERM: f64 = 19.0;

/// This process's CPU seconds (user + system) from /proc/self/stat (ticks of 1/100 s, the
/// Linux default `USER_HZ`); 0 where there is no /proc.
fn cpu_seconds() -> f64 {
    let stat = std::fs::read_to_string("/proc/self/stat").unwrap_or_default();
    let rest = stat.rsplit(')').next().unwrap_or("");
    let fields: Vec<&str> = rest.split_whitespace().collect();
    let tick = |i: usize| {
        fields
            .get(i)
            .and_then(|v| v.parse::<f64>().ok())
            .unwrap_or(0.0)
    };
    // After the command's closing parenthesis: state is field 0, utime 11, stime 12.
    (tick(11) + tick(12)) / 100.0
}

fn clock_hz() -> f64 {
    std::fs::read_to_string("/proc/cpuinfo")
        .ok()
        .and_then(|s| {
            s.lines()
                .find(|l| l.starts_with("cpu MHz"))
                .and_then(|l| l.split(':').nth(1))
                .and_then(|v| v.trim().parse::<f64>().ok())
        })
        .unwrap_or(2500.0)
        * 1e6
}

fn copy_bandwidth() -> f64 {
    let n = 32 << 20; // 256 MiB of f64
    let src: Vec<f64> = (0..n).map(|i| i as f64).collect();
    let mut dst = vec![0.0f64; n];
    let mut best = f64::INFINITY;
    for _ in 0..3 {
        let t = Instant::now();
        dst.copy_from_slice(&src);
        best = best.min(t.elapsed().as_secs_f64());
    }
    std::hint::black_box(&dst);
    (2 * n * 8) as f64 / best
}

fn main() {
    let (channels, per_cond) = (size("MEASURES_CHANNELS", 24), size("MEASURES_TRIALS", 50));
    let (freqs, times) = (size("MEASURES_FREQS", 20), size("MEASURES_TIMES", 871));
    let trials = 2 * per_cond;
    let conditions: Vec<String> = (0..trials)
        .map(|k| if k % 2 == 0 { "left" } else { "right" }.to_string())
        .collect();
    let fs = 512.0;
    let layout = Layout {
        dims: ["channel", "trial", "freq", "time"]
            .map(String::from)
            .to_vec(),
        coords: vec![
            Coord::Labels((0..channels).map(|c| format!("C{c}")).collect()),
            Coord::Labels(conditions.clone()),
            Coord::Numbers((0..freqs).map(|f| 4.0 + f as f64).collect()),
            Coord::Numbers((0..times).map(|k| k as f64 / fs).collect()),
        ],
        units: "V".into(),
        complex: true,
        meta: Meta {
            sampling_rate: Some(fs),
            channel_types: Some(vec!["EEG".into(); channels]),
            trials: Some(
                conditions
                    .iter()
                    .enumerate()
                    .map(|(i, c)| TrialInfo {
                        condition: c.clone(),
                        event: format!("cue-{c}"),
                        onset: 10.0 + 3.0 * i as f64,
                    })
                    .collect(),
            ),
            ..Meta::default()
        },
    };
    // Deterministic coefficients of varied phase and amplitude (a small linear congruential
    // sequence; no zeros).
    let n = channels * trials * freqs * times;
    let mut state = 0x2545_f491_4f6c_dd1du64;
    let values: Vec<Complex32> = (0..n)
        .map(|_| {
            state = state
                .wrapping_mul(6_364_136_223_846_793_005)
                .wrapping_add(1);
            let a = ((state >> 11) as f64 / (1u64 << 53) as f64) * std::f64::consts::TAU;
            let r = 0.5 + ((state >> 40) & 0xff) as f64 / 255.0;
            Complex32::new((r * a.cos()) as f32, (r * a.sin()) as f32)
        })
        .collect();
    let input = LabelledArray::complex(
        layout,
        ArrayD::from_shape_vec(IxDyn(&[channels, trials, freqs, times]), values).unwrap(),
    )
    .unwrap();
    let params = serde_json::json!({
        "measure": ["plv", "ppc", "pli", "wpli", "dwpli", "icoh"],
        "pairs": "all",
        "across": "trials"
    });
    let op = Registered::<Clustering>::new().bind(&params).unwrap();
    let inputs = [Input {
        stage: "tf",
        subject: Some("01"),
        array: &input,
    }];
    let threads = rayon::current_num_threads();
    let (mut tries, mut cpus) = (Vec::new(), Vec::new());
    for _ in 0..5 {
        let (t, c) = (Instant::now(), cpu_seconds());
        let out = op.run(&inputs, &mut Notes::default()).unwrap();
        tries.push(t.elapsed().as_secs_f64());
        cpus.push(cpu_seconds() - c);
        std::hint::black_box(out);
    }
    let cpu = cpus.iter().copied().fold(f64::INFINITY, f64::min);
    let best = tries.iter().copied().fold(f64::INFINITY, f64::min);
    let pairs = channels * (channels - 1) / 2;
    let terms = (pairs * trials * freqs * times) as f64;
    let flops = terms * FLOPS_PER_TERM;
    let peak = threads as f64 * 4.0 * 2.0 * clock_hz();
    let bytes = (n * 8 + 2 * 6 * pairs * freqs * times * 4) as f64;
    let bw = copy_bandwidth();
    let floor = (flops / peak).max(bytes / bw);
    println!(
        "clustering, 6 measures across trials: {channels} channels ({pairs} pairs) x {trials} \
         trials (2 conditions) x {freqs} freqs x {times} times, {threads} threads"
    );
    println!(
        "  op {best:.3} s (best of 5: {})",
        tries
            .iter()
            .map(|t| format!("{t:.3}"))
            .collect::<Vec<_>>()
            .join(", ")
    );
    println!(
        "  CPU {cpu:.2} s (user + system, least of 5; on a machine shared with other work the \
         wall time counts their turns too): CPU / threads / floor {:.2}x",
        cpu / threads as f64 / ((flops / peak).max(bytes / bw))
    );
    println!(
        "  floor {floor:.3} s = max(arithmetic {:.2} GFLOP / {:.0} GFLOP/s nominal = {:.3} s, \
         memory {:.0} MB / {:.1} GB/s copy = {:.3} s): op / floor {:.2}x (target <= 3x)",
        flops / 1e9,
        peak / 1e9,
        flops / peak,
        bytes / 1e6,
        bw / 1e9,
        bytes / bw,
        best / floor
    );
}
