//! The group table's text on its own: [`write_tidy_tsv`] of the group array of the harness's
//! medium workload (statistic × 11 subjects (10 and the group) × 2 conditions × 3 measures ×
//! 2016 pairs × 2 bands × 2 windows: 532 224 rows, about 27 MB), into a sink that only counts
//! bytes, so the file system is not in the figures. Values as an aggregate gives them: a mean
//! per cell, a standard error only on the group rows (NaN, written `n/a`, on one subject's
//! rows), and the count. Best of 5.
//!
//! For comparing changes to the table writer: `cargo bench -p phasewise-stages --bench table`.

use std::time::Instant;

use ndarray::{ArrayD, IxDyn};
use phasewise_stages::table::write_tidy_tsv;
use phasewise_stages::{Coord, LabelledArray, Layout, Values};

fn labels(v: &[&str]) -> Coord {
    Coord::Labels(v.iter().map(|s| s.to_string()).collect())
}

fn main() {
    let channels: Vec<String> = (0..64).map(|c| format!("E{c}")).collect();
    let mut pairs = Vec::new();
    for a in 0..channels.len() {
        for b in a + 1..channels.len() {
            pairs.push([channels[a].clone(), channels[b].clone()]);
        }
    }
    let mut subjects: Vec<String> = (1..=10).map(|s| format!("{s:02}")).collect();
    subjects.push("group".into());
    let shape = [3, subjects.len(), 2, 3, pairs.len(), 2, 2];
    let layout = Layout {
        dims: "statistic subject condition measure pair band window"
            .split(' ')
            .map(String::from)
            .collect(),
        coords: vec![
            labels(&["mean", "sem", "n"]),
            Coord::Labels(subjects.clone()),
            labels(&["left", "right"]),
            labels(&["plv", "ppc", "wpli"]),
            Coord::Pairs(pairs.into()),
            labels(&["theta", "beta"]),
            labels(&["early", "late"]),
        ],
        units: "1".into(),
        ..Layout::default()
    };
    let per_stat: usize = shape[1..].iter().product();
    let group_rows: usize = shape[2..].iter().product();
    // A deterministic spread of magnitudes, as baseline-corrected measures have.
    let values: Vec<f32> = (0..3 * per_stat)
        .map(|i| {
            let (stat, rest) = (i / per_stat, i % per_stat);
            let group = rest / group_rows == subjects.len() - 1;
            match stat {
                0 => ((rest as f64 * 0.618_034).fract() - 0.5) as f32 * 0.2,
                1 if group => ((rest as f64 * 0.414_214).fract() * 0.03) as f32,
                1 => f32::NAN,
                _ if group => 10.0,
                _ => 1.0,
            }
        })
        .collect();
    let array = LabelledArray::checked(
        layout,
        Values::Real(ArrayD::from_shape_vec(IxDyn(&shape), values).expect("shape")),
    )
    .expect("layout fits");
    let mut best = f64::INFINITY;
    let mut bytes = 0usize;
    for _ in 0..5 {
        let start = Instant::now();
        bytes = 0;
        let done: Result<(), std::convert::Infallible> = write_tidy_tsv(&array, &mut |piece| {
            bytes += piece.len();
            Ok(())
        });
        done.expect("a counting sink cannot fail");
        best = best.min(start.elapsed().as_secs_f64());
    }
    println!(
        "group table, {} rows, {bytes} bytes: {best:.4} s (best of 5, {} threads)",
        per_stat,
        rayon::current_num_threads()
    );
}
