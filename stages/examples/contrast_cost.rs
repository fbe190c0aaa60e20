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
//!
//! Branch stats4 (2026-12-03, same op version 2, same bits): the cluster null by strips of 16
//! columns whose tables (16 KiB) stay in L1 while a block of 512 patterns reads them, AVX2 sums
//! and sign masks, S kept at set points, isolated points bounded without a square root. Full
//! study, `cluster`: 119.7 s of CPU (user), 474 s wall at load 9–12 (one of this session's
//! builds beside it), 1.68 GB. The example now also prints its own CPU and this machine's
//! measured rate for the inner operation (sums through the tables and the two comparisons,
//! L1-resident): 0.84–1.79 ns per point-pattern in its runs at load 8–12 (a standalone copy of
//! the loop gave 0.44–0.56 ns at load ~8), that is 22–89 s of CPU for the full study's 4.955e10
//! point-patterns before any labelling: CPU seconds on this shared machine swing with its load.

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
    let cpu_start = cpu_seconds();
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
    let cpu = cpu_seconds().zip(cpu_start).map(|(b, a)| b - a);
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
    if let Some(cpu) = cpu {
        println!("CPU (user + system) of the test alone: {cpu:.2} s");
    }
    rate(&flips, len);
}

/// This process's CPU time (user + system) so far, from /proc/self/stat (Linux; fields 14 and
/// 15, in clock ticks, taken as 100 per second, the usual value), or None.
fn cpu_seconds() -> Option<f64> {
    let stat = std::fs::read_to_string("/proc/self/stat").ok()?;
    // The command name (field 2) is in parentheses and may hold spaces: count after it.
    let rest = &stat[stat.rfind(')')? + 2..];
    let fields: Vec<&str> = rest.split_whitespace().collect();
    let ticks = |k: usize| fields.get(k - 3)?.parse::<f64>().ok();
    Some((ticks(14)? + ticks(15)?) / 100.0)
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

/// This machine's measured rate for the inner operation of the op's loops, and the CPU time it
/// implies for the whole study: one pattern's S over 16 points from one table row per group
/// (each row read from L1; f64 additions left to right), compared with +threshold and
/// −threshold into bitmaps, for every pattern in turn. Timed over about 0.3 s, best of three.
/// It leaves out all else (labelling, t, table builds, memory traffic), so it is a floor for
/// any loop built on these tables, not an estimate of the op's time.
fn rate(flips: &Flips, points: usize) {
    let g = flips.groups.len();
    if g == 0 {
        return;
    }
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(2);
    let tables: Vec<f64> = (0..g * 32 * 16).map(|_| rng.gen_range(-1.0..1.0)).collect();
    let threshold: Vec<f64> = (0..16).map(|_| rng.gen_range(0.5..1.5)).collect();
    let masks = &flips.masks;
    let patterns = flips.count();
    let mut best = f64::INFINITY;
    let mut reps = 1usize;
    let mut checksum = 0u64;
    for _ in 0..3 {
        loop {
            let start = Instant::now();
            for _ in 0..reps {
                checksum = checksum.wrapping_add(row_signs(&tables, masks, g, &threshold));
            }
            let secs = start.elapsed().as_secs_f64();
            if secs > 0.1 {
                best = best.min(secs / (reps * patterns * 16) as f64);
                break;
            }
            reps *= 2;
        }
    }
    println!(
        "floor (measured here): {:.3} ns per point-pattern for the sums through the tables and \
         the two comparisons (L1-resident, best of 3, checksum {checksum}); for {:.3e} \
         point-patterns: {:.1} s of CPU",
        best * 1e9,
        points as f64 * patterns as f64,
        best * points as f64 * patterns as f64
    );
}

/// Every pattern's S over 16 points and its two sign bitmaps; returns the count of set bits.
fn row_signs(tables: &[f64], masks: &[u8], g: usize, threshold: &[f64]) -> u64 {
    #[cfg(target_arch = "x86_64")]
    if std::arch::is_x86_feature_detected!("avx2") {
        // SAFETY: the CPU has AVX2 (checked above).
        return unsafe { row_signs_avx2(tables, masks, g, threshold) };
    }
    let mut count = 0u64;
    for m in masks.chunks(g) {
        let mut s = [0f64; 16];
        for (k, &mask) in m.iter().enumerate() {
            let row = &tables[(k * 32 + mask as usize) * 16..][..16];
            s.iter_mut().zip(row).for_each(|(a, &b)| *a += b);
        }
        let (mut pos, mut neg) = (0u32, 0u32);
        for (k, (&x, &c)) in s.iter().zip(threshold).enumerate() {
            pos |= u32::from(x > c) << k;
            neg |= u32::from(x < -c) << k;
        }
        count += u64::from((pos | neg << 16).count_ones());
    }
    count
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2")]
fn row_signs_avx2(tables: &[f64], masks: &[u8], g: usize, threshold: &[f64]) -> u64 {
    use std::arch::x86_64::*;
    let load = |v: &[f64]| {
        assert!(v.len() >= 4);
        // SAFETY: `v` holds at least the 4 f64 read.
        unsafe { _mm256_loadu_pd(v.as_ptr()) }
    };
    let sign = _mm256_set1_pd(-0.0);
    let mut count = 0u64;
    for m in masks.chunks(g) {
        let row = |k: usize| &tables[(k * 32 + m[k] as usize) * 16..][..16];
        let first = row(0);
        let mut s = [0, 4, 8, 12].map(|a| load(&first[a..]));
        for k in 1..g {
            let r = row(k);
            for (j, s) in s.iter_mut().enumerate() {
                *s = _mm256_add_pd(*s, load(&r[4 * j..]));
            }
        }
        let (mut pos, mut neg) = (0i32, 0i32);
        for (j, &s) in s.iter().enumerate() {
            let c = load(&threshold[4 * j..]);
            pos |= _mm256_movemask_pd(_mm256_cmp_pd::<_CMP_GT_OQ>(s, c)) << (4 * j);
            neg |= _mm256_movemask_pd(_mm256_cmp_pd::<_CMP_LT_OQ>(s, _mm256_xor_pd(c, sign)))
                << (4 * j);
        }
        count += u64::from((pos | neg << 16).count_ones());
    }
    count
}
