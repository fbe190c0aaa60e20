//! How long `contrast`'s permutations take on a study of a given size (a hand measurement, not
//! a test): `cargo run --release -p phasewise-stages --example contrast_cost -- SUBJECTS PAIRS
//! FREQS TIMES PATTERNS [cluster|max|fdr]`. The data are independent normal draws (no effect).
//!
//! Measured by hand on 2026-12-03 (commit 96c62b8's loop, two shared cores under a load of ~10):
//! 20 subjects × 2016 pairs × 30 freqs × 200 times, 4096 patterns, cluster: 160 s of CPU (user),
//! 1.6 GB peak memory; 100 pairs: 8.1 s of CPU. About 80 s of wall time on two idle cores.
//!
//! Again on 2026-12-03 after the tiled loops (commit c985de4; release build, the same two shared
//! cores, other builds running): the full study with `cluster` 163 s of CPU (user), 167 s wall,
//! 1.6 GB; 100 pairs, old loop against new, back to back: `cluster` 9.2 → 8.5 s, `max` 7.5 →
//! 4.4 s, `fdr` 2.3 → 2.0 s of CPU. Cluster's time goes to the t of each point above threshold
//! (a square root and a division) and the flood fill, not to the sums.
//!
//! Op version 2 (branch stats3, 2026-12-03; release build, nice, two cores shared with five
//! other sessions' builds, load 12–19 throughout): sums in f64 (they were f32), the cluster null
//! from per-pattern sign bitmaps (runs joined by union-find, t only above threshold, each row's
//! tables built per block of 512 patterns). 100 pairs, `cluster`, old and new binaries
//! alternated back to back at load ~13: 9.04, 8.65 s against 8.33, 8.16 s of CPU (user), about 7 %
//! less; `max` 4.94 → 4.92 s, `fdr` 2.09 → 2.79 s (f64 tables are twice the bytes). Full study,
//! `cluster`: before 164.3 s CPU (load 13–17, 745 s wall), after 180.4 s CPU (load 12–16, with a
//! workspace build of this session running beside it, 1089 s wall), peak RSS 1.64 → 1.68 GB: no
//! gain shown at full size on this machine. The example prints the floor beside its time: at full
//! size 4.955e10 point-patterns, 9.909e11 multiply-adds written plainly against 1.486e11 f64
//! additions through the tables (plus 1.5e9 to build them), 4.955e10 threshold comparisons,
//! ~2.55e9 points above threshold (a square root, a division, an addition each), 0.97 GB of data
//! to read once.

use std::time::Instant;

use phasewise_stages::ops::contrast::{test, Correction, Flips, Settings};
use phasewise_stages::stats::t_isf;
use rand::{Rng, SeedableRng};

fn main() {
    let args: Vec<String> = std::env::args().skip(1).collect();
    let num =
        |k: usize, default: usize| args.get(k).and_then(|a| a.parse().ok()).unwrap_or(default);
    let (n, pairs, rows, cols, patterns) = (
        num(0, 20),
        num(1, 2016),
        num(2, 30),
        num(3, 200),
        num(4, 4096),
    );
    let correction = match args.get(5).map(String::as_str) {
        Some("max") => Correction::Max,
        Some("fdr") => Correction::Fdr,
        _ => Correction::Cluster,
    };
    let len = pairs * rows * cols;
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(1);
    let data: Vec<Vec<f32>> = (0..n)
        .map(|_| (0..len).map(|_| rng.gen_range(-1.0f32..1.0)).collect())
        .collect();
    let views: Vec<&[f32]> = data.iter().map(|d| d.as_slice()).collect();
    let start = Instant::now();
    let flips = Flips::new(n, patterns, false, 1);
    let settings = Settings {
        correction,
        threshold_t: t_isf(0.025, (n - 1) as f64),
        maps_per_family: pairs,
        rows,
        cols,
    };
    let tested = test(&views, &flips, settings);
    let secs = start.elapsed().as_secs_f64();
    let significant = tested.p.iter().filter(|&&p| p <= 0.05).count();
    println!(
        "{n} subjects x {pairs} pairs x {rows} freqs x {cols} times, {patterns} patterns, \
         {correction:?}, {} threads: {secs:.2} s ({significant} points at p <= 0.05)",
        rayon::current_num_threads()
    );
    // The share of points above the threshold in the observed map (pattern 0), an estimate of
    // the share in every pattern under the null.
    let above = tested
        .t
        .iter()
        .filter(|t| t.abs() > settings.threshold_t)
        .count();
    floor(&flips, len, correction, above as f64 / len as f64);
}

/// What any sign-flip test of this size must do, printed beside the measured time: the permuted
/// sum at every point for every pattern (n multiply-adds each written plainly, g − 1 additions
/// through the op's tables), a comparison with the threshold, and for `cluster` a t (a square
/// root and a division) and one addition at every point above the threshold (under the null
/// about the cluster-forming p, 0.05, of them; `share` is the observed map's). The data must be
/// read once from memory; the tables stay in cache.
fn floor(flips: &Flips, points: usize, correction: Correction, share: f64) {
    let n = flips.groups.last().map_or(0, |r| r.end);
    let work = points as f64 * flips.count() as f64;
    let g = flips.groups.len() as f64;
    let table_rows: usize = flips.groups.iter().map(|r| 1 << r.len()).sum();
    println!(
        "floor: {:.3e} point-patterns; plain sums {:.3e} multiply-adds (n = {n}); \
         table sums {:.3e} f64 additions (g = {g}) + {:.3e} to build the tables; \
         {:.3e} threshold comparisons; data read once: {:.2} GB (f32)",
        work,
        work * n as f64,
        work * (g - 1.0),
        (table_rows * points) as f64,
        work,
        (n * points * 4) as f64 / 1e9,
    );
    if correction == Correction::Cluster {
        println!(
            "floor (cluster): ~{:.3e} supra-threshold points ({share:.4} of point-patterns, \
             the observed map's share), each a square root, a division and an addition into \
             its cluster's mass",
            work * share
        );
    }
}
