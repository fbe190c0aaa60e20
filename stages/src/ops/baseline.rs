//! The `baseline` op: normalise every time course by its own pre-event baseline.
//!
//! For every position of all axes but `time` (for clustering output: condition × measure × pair ×
//! freq), b̄ and s are the mean and standard deviation (ddof 1) of the values at the time points
//! inside `window` (inclusive), accumulated in f64. DESIGN §4 fixes the modes:
//! `subtract` v − b̄, `percent` 100 (v − b̄) / b̄, `db` 10 log10(v / b̄), `zscore` (v − b̄) / s.
//! The op works on any real array with a numeric `time` axis.
//!
//! `db` and `percent` divide by the baseline mean, so they are only meaningful for non-negative
//! quantities: for a signed one a negative mean flips the sign of every change and a mean near
//! zero blows it up. Measures that can be negative by definition are refused from the layout
//! alone, any other negative value at run time, for both modes. A zero baseline mean (percent,
//! db) or zero spread (zscore) gives NaN for that time course, with a warning.

use ndarray::{ArrayD, ArrayView1, ArrayViewMut1, Axis, Dimension, IxDyn, Zip};
use rayon::prelude::*;
use serde::{Deserialize, Serialize};

use crate::array::{LabelledArray, Layout, Values};
use crate::error::StageError;
use crate::op::{single, Input, InputLayout, Notes, Op, OwnedInput};
use crate::ops::measures::Measure;
use crate::table::{number_text, position_text};

/// The `baseline` op.
pub struct Baseline;

/// Parameters of `baseline`.
#[derive(Clone, Debug, Serialize, Deserialize, schemars::JsonSchema)]
#[serde(deny_unknown_fields)]
pub struct BaselineParams {
    /// Baseline window `[t0, t1]` in seconds on the `time` axis, both ends included.
    pub window: [f64; 2],
    /// How each value is related to its baseline.
    pub mode: BaselineMode,
}

/// How a value is expressed relative to its baseline.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize, schemars::JsonSchema)]
#[serde(rename_all = "snake_case")]
pub enum BaselineMode {
    /// v − b̄, in the input's units.
    Subtract,
    /// 100 (v − b̄) / b̄, in %; non-negative quantities only.
    Percent,
    /// 10 log10(v / b̄), in dB; non-negative quantities only.
    Db,
    /// (v − b̄) / s with s the baseline's standard deviation (ddof 1).
    Zscore,
}

impl BaselineMode {
    /// The output unit for an input in `units`.
    fn units(self, units: &str) -> String {
        match self {
            BaselineMode::Subtract => units.to_string(),
            BaselineMode::Percent => "%".into(),
            BaselineMode::Db => "dB".into(),
            BaselineMode::Zscore => "z".into(),
        }
    }

    /// The mode's name in pipeline files.
    fn name(self) -> &'static str {
        match self {
            BaselineMode::Subtract => "subtract",
            BaselineMode::Percent => "percent",
            BaselineMode::Db => "db",
            BaselineMode::Zscore => "zscore",
        }
    }

    /// True for the modes that divide by the baseline mean (`percent`, `db`): on a quantity
    /// that can be negative, a negative mean flips the sign of every change and a mean near zero
    /// makes it arbitrarily large, so these modes are refused there.
    fn needs_non_negative(self) -> bool {
        matches!(self, BaselineMode::Percent | BaselineMode::Db)
    }

    /// Why the mode needs a non-negative quantity (the start of its refusal).
    fn why_non_negative(self) -> &'static str {
        match self {
            BaselineMode::Db => "db takes the logarithm of a ratio to the baseline mean",
            _ => {
                "percent divides by the baseline mean (a negative mean flips the sign of the \
                  change, one near zero inflates it)"
            }
        }
    }
}

// The inclusive-range rule has one home (`crate::range`); re-exported here for ops written
// against this module.
pub use crate::range::{points_within, range_text};

/// What `layout` works out once and `run` reuses.
struct Plan {
    layout: Layout,
    time_axis: usize,
    points: Vec<usize>,
}

fn plan(p: &BaselineParams, input: &Layout) -> Result<Plan, StageError> {
    if input.complex {
        return Err(StageError::data(
            "baseline needs real values (a measure or power), but the input holds complex \
             wavelet coefficients",
        ));
    }
    let time_axis = input.axis("time")?;
    let times = input.numbers("time")?;
    let points = window_points(p, times)?;
    if p.mode.needs_non_negative() {
        refuse_signed_measures(input, p.mode)?;
    }
    let mut layout = input.clone();
    layout.units = p.mode.units(&input.units);
    Ok(Plan {
        layout,
        time_axis,
        points,
    })
}

/// The time points of the window, or a param error naming the window and the time axis.
fn window_points(p: &BaselineParams, times: &[f64]) -> Result<Vec<usize>, StageError> {
    let (Some(&first), Some(&last)) = (times.first(), times.last()) else {
        return Err(StageError::data("the input's time axis is empty"));
    };
    if !crate::range::within_axis(p.window, first, last) {
        return Err(StageError::param(
            "window",
            format!(
                "the baseline window {} s reaches outside the time axis of the input, which runs \
                 over {} s",
                range_text(p.window),
                range_text([first, last])
            ),
        ));
    }
    let points = points_within(times, p.window);
    let needed = if p.mode == BaselineMode::Zscore { 2 } else { 1 };
    if points.len() < needed {
        return Err(StageError::param(
            "window",
            format!(
                "the baseline window {} s holds {} time point(s) of the input, but mode {:?} \
                 needs at least {needed} (a standard deviation needs 2); widen the window",
                range_text(p.window),
                points.len(),
                p.mode
            ),
        ));
    }
    Ok(points)
}

/// Refuses a mode that divides by the baseline mean (`db`, `percent`) on a measure that can be
/// negative by definition, from the layout alone.
fn refuse_signed_measures(input: &Layout, mode: BaselineMode) -> Result<(), StageError> {
    let Ok(measures) = input.labels("measure") else {
        return Ok(());
    };
    match measures
        .iter()
        .find(|m| Measure::named(m).is_some_and(Measure::signed))
    {
        Some(m) => Err(StageError::param(
            "mode",
            format!(
                "{} and needs a non-negative quantity, but measure `{m}` can be negative; use \
                 subtract or zscore (or leave `{m}` out)",
                mode.why_non_negative()
            ),
        )),
        None => Ok(()),
    }
}

/// Refuses a mode that divides by the baseline mean on data holding a negative value, naming
/// the first one.
fn refuse_negative_values(
    input: &LabelledArray,
    values: &ArrayD<f32>,
    mode: BaselineMode,
) -> Result<(), StageError> {
    match values.indexed_iter().find(|(_, &v)| v < 0.0) {
        Some((index, v)) => Err(StageError::param(
            "mode",
            format!(
                "{} needs non-negative values, but the input holds {} at {}; use subtract or \
                 zscore",
                mode.name(),
                number_text(f64::from(*v)),
                position_text(&input.layout, index.slice())
            ),
        )),
        None => Ok(()),
    }
}

/// Mean and standard deviation (ddof 1) of one time course's baseline points, in f64.
#[derive(Clone, Copy, Debug)]
struct Stats {
    mean: f64,
    sd: f64,
}

fn baseline_stats(lane: ArrayView1<f32>, points: &[usize]) -> Stats {
    let n = points.len() as f64;
    let value = |&i: &usize| lane.get(i).map_or(f64::NAN, |&v| f64::from(v));
    let mean = points.iter().map(value).sum::<f64>() / n;
    // Two passes: numerically safer than the sum of squares.
    let ss: f64 = points.iter().map(|i| (value(i) - mean).powi(2)).sum();
    let sd = if points.len() > 1 {
        (ss / (n - 1.0)).sqrt()
    } else {
        f64::NAN
    };
    Stats { mean, sd }
}

/// The divisor of a mode, when the mode divides.
fn divisor(mode: BaselineMode, s: Stats) -> Option<f64> {
    match mode {
        BaselineMode::Subtract => None,
        BaselineMode::Percent | BaselineMode::Db => Some(s.mean),
        BaselineMode::Zscore => Some(s.sd),
    }
}

fn normalise_lane(
    input: ArrayView1<f32>,
    mut out: ArrayViewMut1<f32>,
    s: Stats,
    mode: BaselineMode,
) {
    let degenerate = divisor(mode, s) == Some(0.0);
    for (o, &v) in out.iter_mut().zip(input) {
        let v = f64::from(v);
        let y = match mode {
            _ if degenerate => f64::NAN,
            BaselineMode::Subtract => v - s.mean,
            BaselineMode::Percent => 100.0 * (v - s.mean) / s.mean,
            BaselineMode::Db => 10.0 * (v / s.mean).log10(),
            BaselineMode::Zscore => (v - s.mean) / s.sd,
        };
        *o = y as f32;
    }
}

/// Any memory order: lane by lane along the time axis.
fn normalise_any(
    values: &ArrayD<f32>,
    plan: &Plan,
    mode: BaselineMode,
) -> (ArrayD<Stats>, ArrayD<f32>) {
    let axis = Axis(plan.time_axis);
    let stats = values.map_axis(axis, |lane| baseline_stats(lane, &plan.points));
    let mut out = ArrayD::<f32>::zeros(values.raw_dim());
    Zip::from(out.lanes_mut(axis))
        .and(values.lanes(axis))
        .and(&stats)
        .for_each(|o, i, &s| normalise_lane(i, o, s, mode));
    (stats, out)
}

/// Time courses per parallel task of [`normalise_contiguous`]; every value is computed on its
/// own, so the result does not depend on how the work is split.
const LANES_PER_TASK: usize = 512;

/// The common case, a standard-layout array with time last: every time course is a contiguous
/// slice; the same arithmetic as [`normalise_lane`], on slices, in parallel over time courses.
/// The values are normalised where they are (the stats of a time course are taken before any of
/// its values changes, and each value is then computed from itself, as in [`normalise_lane`]);
/// the stats come back.
fn normalise_in_place(
    data: &mut [f32],
    shape: &[usize],
    points: &[usize],
    mode: BaselineMode,
) -> ArrayD<Stats> {
    let t = shape[shape.len() - 1];
    let lanes = data.len() / t;
    let mut stats = vec![Stats { mean: 0.0, sd: 0.0 }; lanes];
    let need_sd = mode == BaselineMode::Zscore;
    data.par_chunks_mut(t * LANES_PER_TASK)
        .zip(stats.par_chunks_mut(LANES_PER_TASK))
        .for_each(|(data, stats)| {
            for (block, s) in data
                .chunks_mut(t * STATS_BLOCK)
                .zip(stats.chunks_mut(STATS_BLOCK))
            {
                // The stats are taken before any value of the block changes.
                stats_block(block, t, points, need_sd, s);
                for (o, s) in block.chunks_exact_mut(t).zip(s.iter()) {
                    normalise_own(o, *s, mode);
                }
            }
        });
    let lane_shape = IxDyn(&shape[..shape.len() - 1]);
    // The length follows from the shape: this cannot fail.
    ArrayD::from_shape_vec(lane_shape, stats).unwrap_or_else(|_| unreachable!())
}

/// [`normalise_in_place`] on a copy of `data`.
fn normalise_contiguous(
    data: &[f32],
    shape: &[usize],
    points: &[usize],
    mode: BaselineMode,
) -> (ArrayD<Stats>, ArrayD<f32>) {
    let mut out = data.to_vec();
    let stats = normalise_in_place(&mut out, shape, points, mode);
    // The length follows from the shape: this cannot fail.
    let out = ArrayD::from_shape_vec(IxDyn(shape), out).unwrap_or_else(|_| unreachable!());
    (stats, out)
}

/// Time courses whose stats [`stats_block`] computes together.
const STATS_BLOCK: usize = 8;

/// [`baseline_stats`] of the consecutive time courses (each `t` long) in `block`, into `out`
/// (one per time course). The same sums in the same order, each time course's sum on its own:
/// only the time courses are interleaved, so that the additions of different time courses
/// overlap instead of each waiting for the previous one. The standard deviation is computed
/// only when `need_sd` (else NaN: the modes other than `zscore` never read it).
fn stats_block(block: &[f32], t: usize, points: &[usize], need_sd: bool, out: &mut [Stats]) {
    let k = out.len();
    debug_assert!(k <= STATS_BLOCK && block.len() == k * t);
    let n = points.len() as f64;
    // As in `baseline_stats`, a point beyond the time course reads as NaN, which makes every
    // sum NaN: checked once here, not per value in the loops below.
    if points.iter().any(|&i| i >= t) {
        out.fill(Stats {
            mean: f64::NAN,
            sd: f64::NAN,
        });
        return;
    }
    let value = |l: usize, i: usize| f64::from(block[l * t + i]);
    // `Iterator::sum` of f64 starts from −0.0; so do these, to give the same bits.
    let mut sum = [-0.0f64; STATS_BLOCK];
    for &i in points {
        for (l, acc) in sum.iter_mut().enumerate().take(k) {
            *acc += value(l, i);
        }
    }
    let mut mean = [0f64; STATS_BLOCK];
    for l in 0..k {
        mean[l] = sum[l] / n;
    }
    let mut ss = [-0.0f64; STATS_BLOCK];
    if need_sd {
        for &i in points {
            for (l, acc) in ss.iter_mut().enumerate().take(k) {
                *acc += (value(l, i) - mean[l]).powi(2);
            }
        }
    }
    for (l, s) in out.iter_mut().enumerate() {
        let sd = if need_sd && points.len() > 1 {
            (ss[l] / (n - 1.0)).sqrt()
        } else {
            f64::NAN
        };
        *s = Stats { mean: mean[l], sd };
    }
}

/// [`normalise_lane`] on one contiguous time course, in place, the mode chosen once per time
/// course (each value depends only on itself and the stats taken before).
fn normalise_own(values: &mut [f32], s: Stats, mode: BaselineMode) {
    if divisor(mode, s) == Some(0.0) {
        values.fill(f32::NAN);
        return;
    }
    let each = values.iter_mut();
    match mode {
        BaselineMode::Subtract => each.for_each(|o| *o = (f64::from(*o) - s.mean) as f32),
        BaselineMode::Percent => {
            each.for_each(|o| *o = (100.0 * (f64::from(*o) - s.mean) / s.mean) as f32)
        }
        BaselineMode::Db => {
            each.for_each(|o| *o = (10.0 * (f64::from(*o) / s.mean).log10()) as f32)
        }
        BaselineMode::Zscore => each.for_each(|o| *o = ((f64::from(*o) - s.mean) / s.sd) as f32),
    }
}

/// The position of the first `true` and the number of `true`s, if any.
fn first_and_count(flags: impl Iterator<Item = bool>) -> Option<(usize, usize)> {
    let mut found = None;
    for (k, flag) in flags.enumerate() {
        if flag {
            found = Some(found.map_or((k, 1), |(first, n)| (first, n + 1)));
        }
    }
    found
}

/// The index of the `flat`-th element, in row-major order, of an array of `shape`.
fn unravel(mut flat: usize, shape: &[usize]) -> Vec<usize> {
    let mut index = vec![0; shape.len()];
    for (i, &len) in index.iter_mut().zip(shape).rev() {
        *i = flat % len.max(1);
        flat /= len.max(1);
    }
    index
}

/// Warnings about time courses whose baseline made them NaN, naming the first of each kind.
fn warn_degenerate(p: &BaselineParams, plan: &Plan, stats: &ArrayD<Stats>, notes: &mut Notes) {
    let mut rest = plan.layout.clone();
    rest.dims.remove(plan.time_axis);
    rest.coords.remove(plan.time_axis);
    let what = match p.mode {
        BaselineMode::Zscore => "a zero standard deviation",
        _ => "a zero mean",
    };
    // Counted over the stats in logical order, the first one's position unravelled from its
    // place in that order (an indexed iteration would build an index per time course).
    let zero = first_and_count(stats.iter().map(|s| divisor(p.mode, *s) == Some(0.0)));
    let nan = first_and_count(stats.iter().map(|s| s.mean.is_nan()));
    for (found, why) in [(zero, what), (nan, "NaN values")] {
        if let Some((first, count)) = found {
            notes.warn(format!(
                "baseline: {count} of {} time courses have {why} in the window {} s, so their \
                 normalised values are NaN (first at {})",
                stats.len(),
                range_text(p.window),
                position_text(&rest, &unravel(first, stats.shape()))
            ));
        }
    }
}

impl Op for Baseline {
    type Params = BaselineParams;
    const NAME: &'static str = "baseline";
    const VERSION: u32 = 1;

    fn check(p: &Self::Params) -> Result<(), StageError> {
        let [lo, hi] = p.window;
        if !(lo.is_finite() && hi.is_finite() && lo <= hi) {
            return Err(StageError::param(
                "window",
                format!(
                    "expected [start, end] in seconds with start ≤ end, got {}",
                    range_text(p.window)
                ),
            ));
        }
        Ok(())
    }

    fn layout(p: &Self::Params, inputs: &[InputLayout<'_>]) -> Result<Option<Layout>, StageError> {
        Ok(Some(plan(p, single(inputs)?.layout)?.layout))
    }

    fn run(
        p: &Self::Params,
        inputs: &[Input<'_>],
        notes: &mut Notes,
    ) -> Result<LabelledArray, StageError> {
        let input = single(inputs)?.array;
        let plan = plan(p, &input.layout)?;
        let values = input.real_values()?;
        if p.mode.needs_non_negative() {
            refuse_negative_values(input, values, p.mode)?;
        }
        let (stats, out) = match values.as_slice() {
            Some(data) if plan.time_axis + 1 == values.ndim() && !values.is_empty() => {
                normalise_contiguous(data, values.shape(), &plan.points, p.mode)
            }
            _ => normalise_any(values, &plan, p.mode),
        };
        warn_degenerate(p, &plan, &stats, notes);
        LabelledArray::real(plan.layout, out)
    }

    /// The output is written over the input's values (same shape, same arithmetic).
    /// Each time course is normalised by its own baseline, so any axis but time can be cut.
    fn slices_along(_p: &Self::Params, axis: &str) -> bool {
        axis != "time"
    }

    fn run_owned(
        p: &Self::Params,
        input: OwnedInput<'_>,
        notes: &mut Notes,
    ) -> Result<LabelledArray, StageError> {
        let plan = plan(p, &input.array.layout)?;
        let in_place = match &input.array.values {
            Values::Real(v) => {
                v.is_standard_layout() && plan.time_axis + 1 == v.ndim() && !v.is_empty()
            }
            Values::Complex(_) => false,
        };
        if !in_place {
            let borrowed = Input {
                stage: input.stage,
                subject: input.subject,
                array: &input.array,
            };
            return Self::run(p, &[borrowed], notes);
        }
        if p.mode.needs_non_negative() {
            refuse_negative_values(&input.array, input.array.real_values()?, p.mode)?;
        }
        let Values::Real(mut values) = input.array.values else {
            return Err(StageError::data("internal: baseline input changed type"));
        };
        let shape = values.shape().to_vec();
        let Some(data) = values.as_slice_mut() else {
            return Err(StageError::data(
                "internal: standard layout without a slice",
            ));
        };
        let stats = normalise_in_place(data, &shape, &plan.points, p.mode);
        warn_degenerate(p, &plan, &stats, notes);
        LabelledArray::real(plan.layout, values)
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::array::{Coord, Values};
    use crate::testutil::{assert_close, read_f64, read_json};
    use serde_json::json;

    fn labels(v: &[&str]) -> Coord {
        Coord::Labels(v.iter().map(|s| s.to_string()).collect())
    }

    /// The clustering-shaped input of the numpy fixture (tests/reference/gen_norm.py).
    fn fixture_input() -> LabelledArray {
        let meta = read_json("norm", "baseline");
        let numbers =
            |k: &str| -> Vec<f64> { serde_json::from_value(meta[k].clone()).expect("numbers") };
        let measures: Vec<String> = serde_json::from_value(meta["measures"].clone()).unwrap();
        let layout = Layout {
            dims: ["condition", "measure", "pair", "freq", "time"]
                .map(String::from)
                .to_vec(),
            coords: vec![
                labels(&["A", "B"]),
                Coord::Labels(measures),
                Coord::Pairs(
                    [["F3", "P4"], ["F3", "Cz"], ["Cz", "P4"], ["Fz", "Pz"]]
                        .map(|p| p.map(String::from))
                        .to_vec()
                        .into(),
                ),
                Coord::Numbers(vec![4.0, 6.0, 8.0, 10.0, 12.0]),
                Coord::Numbers(numbers("times")),
            ],
            units: "1".into(),
            ..Layout::default()
        };
        let values = read_f64("norm", "baseline_input").mapv(|v| v as f32);
        LabelledArray::real(layout, values).expect("consistent fixture")
    }

    fn params(window: [f64; 2], mode: &str) -> BaselineParams {
        serde_json::from_value(json!({ "window": window, "mode": mode })).expect("params")
    }

    fn run_on(p: &BaselineParams, a: &LabelledArray) -> Result<(LabelledArray, Notes), StageError> {
        let mut notes = Notes::default();
        let input = Input {
            stage: "sync",
            subject: Some("sub-01"),
            array: a,
        };
        Baseline::run(p, &[input], &mut notes).map(|out| (out, notes))
    }

    fn layout_of(p: &BaselineParams, a: &LabelledArray) -> Result<Option<Layout>, StageError> {
        let input = InputLayout {
            stage: "sync",
            subject: None,
            layout: &a.layout,
        };
        Baseline::layout(p, &[input])
    }

    #[test]
    fn a_slice_along_any_axis_but_time_gives_that_slice_of_the_output() {
        // The slicing protocol (op.rs), which the runner relies on to normalise a stored input
        // in slabs: each cut of the numpy fixture (every mode) gives the whole output's slice
        // bit for bit, with the same layout.
        let input = fixture_input();
        for mode in ["subtract", "percent", "db", "zscore"] {
            let p = params([-0.3, -0.1], mode);
            let (whole, _) = run_on(&p, &input).unwrap();
            for (k, axis) in input.layout.dims.iter().enumerate() {
                assert_eq!(Baseline::slices_along(&p, axis), axis != "time");
                let n = input.layout.coords[k].len();
                if axis == "time" || n < 2 {
                    continue;
                }
                for part in [0..1, 1..n, n / 2..n] {
                    let (cut, _) = run_on(&p, &input.slice(axis, part.clone()).unwrap()).unwrap();
                    let want = whole.slice(axis, part.clone()).unwrap();
                    assert_eq!(cut.layout, want.layout, "{mode} {axis} {part:?}");
                    let bits = crate::testutil::real_bits;
                    assert_eq!(bits(&cut), bits(&want), "{mode} {axis} {part:?}");
                }
            }
        }
    }

    #[test]
    fn every_mode_matches_numpy() {
        // Reference: numpy with DESIGN §4's formulas (gen_norm.py; common practice, CHECKS.md).
        // Our output is f32 computed in f64, so 1e-6 relative (floor 1e-6) is the tolerance.
        let input = fixture_input();
        let meta = read_json("norm", "baseline");
        let window: [f64; 2] = serde_json::from_value(meta["window"].clone()).unwrap();
        let expected_points = meta["points_in_window"].as_u64().unwrap() as usize;
        let times = input.layout.numbers("time").unwrap();
        assert_eq!(points_within(times, window).len(), expected_points);
        for (mode, units) in [
            ("subtract", "1"),
            ("percent", "%"),
            ("db", "dB"),
            ("zscore", "z"),
        ] {
            let (out, notes) = run_on(&params(window, mode), &input).expect(mode);
            let expected = read_f64("norm", &format!("baseline_{mode}"));
            let actual: Vec<f64> = out
                .real_values()
                .unwrap()
                .iter()
                .map(|&v| v.into())
                .collect();
            assert_close(&actual, expected.as_slice().unwrap(), 1e-6, 1e-6, mode);
            assert_eq!(out.layout.units, units);
            assert_eq!(out.layout.dims, input.layout.dims);
            // The fixture plants a zero baseline (zero mean and spread) and a constant one
            // (zero spread only).
            let flagged = if mode == "zscore" { 2 } else { 1 };
            if mode != "subtract" {
                assert_eq!(notes.warnings.len(), 1, "{mode}: {:?}", notes.warnings);
                let text = format!("{flagged} of 120 time courses");
                assert!(notes.warnings[0].contains(&text), "{:?}", notes.warnings);
            }
        }
    }

    #[test]
    fn owned_input_gives_the_bits_of_a_borrowed_one() {
        // Reference: `run` on the same input (itself checked against numpy above). Handing the
        // op its input to overwrite must not change a bit, a warning or the layout, in any mode;
        // the fixture's zero and constant baselines and a planted NaN are included.
        let mut input = fixture_input();
        if let Values::Real(v) = &mut input.values {
            v.as_slice_mut().unwrap()[7] = f32::NAN;
        }
        let window = [-0.5, -0.2];
        for mode in ["subtract", "percent", "db", "zscore"] {
            let p = params(window, mode);
            let borrowed = run_on(&p, &input);
            let mut notes = Notes::default();
            let owned = OwnedInput {
                stage: "sync",
                subject: Some("sub-01"),
                array: input.clone(),
            };
            let owned = Baseline::run_owned(&p, owned, &mut notes);
            match (borrowed, owned) {
                (Ok((a, notes_a)), Ok(b)) => {
                    let bits = |x: &LabelledArray| -> Vec<u32> {
                        x.real_values()
                            .unwrap()
                            .iter()
                            .map(|v| v.to_bits())
                            .collect()
                    };
                    assert_eq!(bits(&a), bits(&b), "{mode}");
                    assert_eq!(a.layout, b.layout, "{mode}");
                    assert_eq!(notes_a.warnings, notes.warnings, "{mode}");
                }
                (Err(a), Err(b)) => assert_eq!(a.to_string(), b.to_string(), "{mode}"),
                (a, b) => panic!("{mode}: run {:?} but run_owned {:?}", a.is_ok(), b.is_ok()),
            }
        }
    }

    #[test]
    fn layout_equals_the_run_layout() {
        let input = fixture_input();
        let p = params([-0.3, -0.1], "zscore");
        let planned = layout_of(&p, &input).unwrap().unwrap();
        assert_eq!(planned, run_on(&p, &input).unwrap().0.layout);
    }

    #[test]
    fn window_outside_the_time_axis_names_both_ranges() {
        let input = fixture_input();
        let err = layout_of(&params([-1.0, -0.1], "subtract"), &input).unwrap_err();
        assert_eq!(
            err,
            StageError::param(
                "window",
                "the baseline window [-1, -0.1] s reaches outside the time axis of the input, \
                 which runs over [-0.4, 0.38] s"
            )
        );
    }

    #[test]
    fn zscore_needs_two_points() {
        // Times are k/50: [-0.3, -0.29] holds only -0.3.
        let input = fixture_input();
        let err = layout_of(&params([-0.3, -0.29], "zscore"), &input).unwrap_err();
        let StageError::Param { field, message } = err else {
            panic!("not a param error")
        };
        assert_eq!(field, "window");
        assert!(message.contains("holds 1 time point(s)"), "{message}");
        assert!(layout_of(&params([-0.3, -0.29], "subtract"), &input).is_ok());
        let err = layout_of(&params([-0.299, -0.281], "subtract"), &input).unwrap_err();
        assert!(err.to_string().contains("holds 0 time point(s)"), "{err}");
    }

    #[test]
    fn db_refuses_signed_measures_and_negative_values() {
        let mut input = fixture_input();
        input.layout.coords[1] = labels(&["plv", "icoh", "wpli"]);
        let err = layout_of(&params([-0.3, -0.1], "db"), &input).unwrap_err();
        let StageError::Param { field, message } = err else {
            panic!("not a param error")
        };
        assert_eq!(field, "mode");
        assert!(
            message.contains("measure `icoh` can be negative"),
            "{message}"
        );
        // Negative values in a measure not known to be signed: refused at run time, by value.
        let mut input = fixture_input();
        if let Values::Real(v) = &mut input.values {
            v[[1, 0, 2, 3, 5]] = -0.25;
        }
        let err = run_on(&params([-0.3, -0.1], "db"), &input).unwrap_err();
        assert_eq!(
            err,
            StageError::param(
                "mode",
                "db needs non-negative values, but the input holds -0.25 at condition=B, \
                 measure=plv, pair=Cz-P4, freq=10, time=-0.3; use subtract or zscore"
            )
        );
    }

    /// `percent` divides by the baseline mean as `db` does: on a measure that can be negative
    /// (`Measure::signed`: ppc, dwpli, icoh) a negative mean flips the sign of every change and
    /// a mean near zero inflates it, so it is refused where `db` is, by the same checks. The
    /// demo's measure list (pipelines/demo.yaml) holds three of them.
    #[test]
    fn percent_is_refused_where_db_is() {
        let demo = ["plv", "ppc", "pli", "wpli", "dwpli", "icoh"];
        for signed in ["ppc", "dwpli", "icoh"] {
            let mut input = fixture_input();
            // The fixture's measures are plv, pli, wpli; the signed one replaces pli.
            input.layout.coords[1] = labels(&["plv", signed, "wpli"]);
            for mode in ["percent", "db"] {
                let err = layout_of(&params([-0.3, -0.1], mode), &input).unwrap_err();
                let StageError::Param { field, message } = err else {
                    panic!("not a param error")
                };
                assert_eq!(field, "mode");
                assert!(message.starts_with(mode), "{message}");
                assert!(
                    message.contains(&format!(
                        "measure `{signed}` can be negative; use subtract or zscore"
                    )),
                    "{message}"
                );
            }
        }
        // Every measure of the demo, three at a time as the fixture holds them: refused
        // exactly when a signed one is among them; the others pass in every mode.
        let mut input = fixture_input();
        for three in demo.chunks(3).chain([["plv", "pli", "wpli"].as_slice()]) {
            input.layout.coords[1] = labels(three);
            let signed = three.iter().any(|m| ["ppc", "dwpli", "icoh"].contains(m));
            for mode in ["subtract", "percent", "db", "zscore"] {
                let refused = layout_of(&params([-0.3, -0.1], mode), &input).is_err();
                let divides = mode == "percent" || mode == "db";
                assert_eq!(refused, signed && divides, "{three:?} {mode}");
            }
        }
        // A negative value in a measure not known to be signed: refused at run time, as for db.
        let mut input = fixture_input();
        if let Values::Real(v) = &mut input.values {
            v[[1, 0, 2, 3, 5]] = -0.25;
        }
        let err = run_on(&params([-0.3, -0.1], "percent"), &input).unwrap_err();
        assert_eq!(
            err,
            StageError::param(
                "mode",
                "percent needs non-negative values, but the input holds -0.25 at condition=B, \
                 measure=plv, pair=Cz-P4, freq=10, time=-0.3; use subtract or zscore"
            )
        );
    }

    #[test]
    fn bad_params_are_refused() {
        let p = params([0.2, -0.1], "subtract");
        assert!(
            matches!(Baseline::check(&p), Err(StageError::Param { field, .. }) if field == "window")
        );
        let e =
            crate::op::parse_params::<BaselineParams>(&json!({"window": [0, 1], "mode": "ratio"}))
                .unwrap_err();
        assert!(matches!(e, StageError::Param { field, .. } if field == "mode"));
        let e = crate::op::parse_params::<BaselineParams>(
            &json!({"window": [0, 1], "mode": "db", "extra": 1}),
        )
        .unwrap_err();
        assert!(e.to_string().contains("extra"), "{e}");
    }

    #[test]
    fn complex_input_is_a_data_error() {
        let mut layout = fixture_input().layout;
        layout.complex = true;
        let input = InputLayout {
            stage: "tf",
            subject: None,
            layout: &layout,
        };
        let err = Baseline::layout(&params([-0.3, -0.1], "subtract"), &[input]).unwrap_err();
        assert!(matches!(err, StageError::Data(m) if m.contains("complex")));
    }

    /// The contiguous fast path against the lane-by-lane path (the plain implementation of
    /// DESIGN §4's formulas, itself checked against numpy above), bit for bit, over shapes,
    /// windows, seeds and every mode; zeros and NaNs included so degenerate lanes are covered.
    #[test]
    fn contiguous_path_equals_the_lane_path_bit_for_bit() {
        use rand::{Rng, SeedableRng};
        let modes = [
            BaselineMode::Subtract,
            BaselineMode::Percent,
            BaselineMode::Db,
            BaselineMode::Zscore,
        ];
        for (seed, shape) in [
            vec![5usize],
            vec![3, 7],
            vec![2, 3, 40, 4, 11],
            vec![1, 1, 1300, 9],
        ]
        .into_iter()
        .enumerate()
        {
            let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(seed as u64);
            let len: usize = shape.iter().product();
            let data: Vec<f32> = (0..len)
                .map(|k| match k % 97 {
                    0 => f32::NAN,
                    1..=3 => 0.0,
                    _ => rng.gen_range(0.0..2.0),
                })
                .collect();
            let t = shape[shape.len() - 1];
            let values = ArrayD::from_shape_vec(IxDyn(&shape), data.clone()).unwrap();
            for points in [
                vec![0],
                (0..t.min(3)).collect(),
                (t / 2..t).collect::<Vec<_>>(),
                // A point beyond the time course: NaN statistics on both paths.
                vec![t - 1, t],
            ] {
                for mode in modes {
                    let plan = Plan {
                        layout: Layout::default(),
                        time_axis: shape.len() - 1,
                        points: points.clone(),
                    };
                    let (s1, o1) = normalise_contiguous(&data, &shape, &points, mode);
                    let (s2, o2) = normalise_any(&values, &plan, mode);
                    let bits = |a: &ArrayD<f32>| a.iter().map(|x| x.to_bits()).collect::<Vec<_>>();
                    assert_eq!(bits(&o1), bits(&o2), "{shape:?} {points:?} {mode:?}");
                    // The fast path computes the standard deviation only for `zscore`, the
                    // one mode that reads it.
                    let zscore = mode == BaselineMode::Zscore;
                    let sb = |a: &ArrayD<Stats>| {
                        a.iter()
                            .map(|s| (s.mean.to_bits(), zscore.then(|| s.sd.to_bits())))
                            .collect::<Vec<_>>()
                    };
                    assert_eq!(sb(&s1), sb(&s2), "{shape:?} {points:?} {mode:?}");
                }
            }
        }
    }

    /// Reference: ndarray's own indexed iteration, which gives each element's index in logical
    /// (row-major) order; the warnings name the first flagged time course by this index.
    #[test]
    fn unravel_matches_ndarrays_indices() {
        for shape in [
            vec![1usize],
            vec![4],
            vec![2, 3],
            vec![3, 1, 4, 2],
            vec![2, 0, 3],
        ] {
            let a = ArrayD::<u8>::zeros(IxDyn(&shape));
            for (k, (index, _)) in a.indexed_iter().enumerate() {
                assert_eq!(unravel(k, &shape), index.slice(), "{shape:?} {k}");
            }
        }
        assert_eq!(
            first_and_count([false, true, false, true].into_iter()),
            Some((1, 2))
        );
        assert_eq!(first_and_count([false, false].into_iter()), None);
    }
}
