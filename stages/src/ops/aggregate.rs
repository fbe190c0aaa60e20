//! The `aggregate` op: means over named frequency bands, time windows and pair groups, and
//! (with `over: subjects`) the group mean, SEM and n over subjects.
//!
//! Per subject, each of `bands` (on `freq`), `windows` (on `time`) and `pair_groups` (on `pair`)
//! replaces its axis by one of names (`band`, `window`, `pair_group`) holding the mean over the
//! coordinates inside each (inclusive ranges; a pair group lists pairs). An axis with no
//! grouping given stays as it is, so the op works on any real array. Within a subject NaN
//! propagates: a NaN inside a band is a fault upstream (clustering warned about it) and should
//! not be averaged away silently.
//!
//! With `over: subjects` the op joins all subjects' arrays (equal layouts required) into
//! dims `[statistic, subject, ...]`: `statistic` is `[mean, sem, n]` and `subject` holds every
//! subject id and then `group`. A subject's own row holds its value as `mean`, `sem` NaN and `n`
//! 1 (0 when the value is NaN); the `group` row holds the mean over subjects, the SEM
//! sd (ddof 1) / √n, and n, all over the finite values only (a subject missing a value drops out
//! of that cell's n). So one array and one tidy table give both the per-subject values and the
//! group summary. Outputs carry `meta.extra["table"] = true`: the runner writes a TSV of them.

use std::collections::BTreeMap;

use ndarray::{concatenate, ArrayD, ArrayViewD, Axis, Dimension, IxDyn, Zip};
use rayon::prelude::*;
use serde::{Deserialize, Serialize};
use serde_json::json;

use crate::array::{Coord, LabelledArray, Layout, Meta};
use crate::error::StageError;
use crate::op::{single, Input, InputLayout, Notes, Op};
use crate::range::{points_within, range_text};
use crate::table::coord_text;

/// The `aggregate` op.
pub struct Aggregate;

/// Parameters of `aggregate`.
#[derive(Clone, Debug, Serialize, Deserialize, schemars::JsonSchema)]
#[serde(deny_unknown_fields)]
pub struct AggregateParams {
    /// Frequency bands `name: [lo, hi]` in Hz (inclusive); the `freq` axis becomes `band`.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub bands: Option<BTreeMap<String, [f64; 2]>>,
    /// Time windows `name: [t0, t1]` in s (inclusive); the `time` axis becomes `window`.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub windows: Option<BTreeMap<String, [f64; 2]>>,
    /// Pair groups `name: [[a, b], ..]`: the mean over those pairs; `pair` becomes `pair_group`.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub pair_groups: Option<BTreeMap<String, Vec<[String; 2]>>>,
    /// `subjects`: join all subjects into mean, SEM and n.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub over: Option<Over>,
}

/// What `over` can join.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize, schemars::JsonSchema)]
#[serde(rename_all = "snake_case")]
pub enum Over {
    /// One input per subject; the output summarises them.
    Subjects,
}

/// The statistics of a group output, in the order of the `statistic` axis.
pub const STATISTICS: [&str; 3] = ["mean", "sem", "n"];
/// The `subject` coordinate of the group summary row.
pub const GROUP: &str = "group";

/// One axis reduction: the axis, its new name, and the named index groups to average.
#[derive(Clone, Debug)]
struct Reduction {
    axis: usize,
    new_name: &'static str,
    groups: Vec<(String, Vec<usize>)>,
}

/// What the per-subject layout step works out, reused by `run`.
struct Plan {
    layout: Layout,
    reductions: Vec<Reduction>,
}

/// Ranges sorted by start, end, then name, so bands read low to high whatever their names.
fn sorted_ranges(ranges: &BTreeMap<String, [f64; 2]>) -> Vec<(&String, [f64; 2])> {
    let mut v: Vec<_> = ranges.iter().map(|(k, r)| (k, *r)).collect();
    v.sort_by(|a, b| {
        (a.1[0], a.1[1])
            .partial_cmp(&(b.1[0], b.1[1]))
            .unwrap_or(std::cmp::Ordering::Equal)
            .then_with(|| a.0.cmp(b.0))
    });
    v
}

/// A reduction over named inclusive ranges of a numeric axis.
fn range_reduction(
    input: &Layout,
    field: &str,
    (axis_name, new_name, unit): (&str, &'static str, &str),
    ranges: &BTreeMap<String, [f64; 2]>,
) -> Result<Reduction, StageError> {
    let axis = input
        .axis(axis_name)
        .map_err(|e| StageError::param(field, e.to_string()))?;
    let coords = input
        .numbers(axis_name)
        .map_err(|e| StageError::param(field, e.to_string()))?;
    let mut groups = Vec::new();
    for (name, range) in sorted_ranges(ranges) {
        let points = points_within(coords, range);
        if points.is_empty() {
            return Err(StageError::param(
                format!("{field}.{name}"),
                format!(
                    "`{name}` {} {unit} holds no {axis_name} point of the input, whose {} {axis_name} \
                     points run over {} {unit}",
                    range_text(range),
                    coords.len(),
                    span_text(coords)
                ),
            ));
        }
        groups.push((name.clone(), points));
    }
    Ok(Reduction {
        axis,
        new_name,
        groups,
    })
}

/// The first and last coordinate as `[a, b]` (for messages).
pub(crate) fn span_text(coords: &[f64]) -> String {
    match (coords.first(), coords.last()) {
        (Some(&a), Some(&b)) => range_text([a, b]),
        _ => "[] (none)".into(),
    }
}

/// A reduction over named lists of pairs. Pairs match in their order only: a signed measure
/// (icoh) changes sign when the pair is reversed, so `P4-F3` is not the same as `F3-P4`.
fn pair_reduction(
    input: &Layout,
    groups_param: &BTreeMap<String, Vec<[String; 2]>>,
) -> Result<Reduction, StageError> {
    let field = "pair_groups";
    let axis = input
        .axis("pair")
        .map_err(|e| StageError::param(field, e.to_string()))?;
    let pairs = input.coord("pair")?.pairs().ok_or_else(|| {
        StageError::param(field, "the input's `pair` axis does not hold channel pairs")
    })?;
    let mut groups = Vec::new();
    for (name, members) in groups_param {
        let mut points = Vec::new();
        for (k, [a, b]) in members.iter().enumerate() {
            let found = pairs.iter().position(|p| p[0] == *a && p[1] == *b);
            let Some(i) = found else {
                let reversed = pairs.iter().any(|p| p[0] == *b && p[1] == *a);
                let hint = if reversed {
                    format!(" (the input has {b}-{a}: pairs keep their order, because signed measures change sign with it)")
                } else {
                    String::new()
                };
                return Err(StageError::param(
                    format!("{field}.{name}[{k}]"),
                    format!(
                        "pair {a}-{b} is not among the input's {} pairs{hint}",
                        pairs.len()
                    ),
                ));
            };
            points.push(i);
        }
        groups.push((name.clone(), points));
    }
    Ok(Reduction {
        axis,
        new_name: "pair_group",
        groups,
    })
}

fn reductions(p: &AggregateParams, input: &Layout) -> Result<Vec<Reduction>, StageError> {
    let mut out = Vec::new();
    if let Some(bands) = &p.bands {
        out.push(range_reduction(
            input,
            "bands",
            ("freq", "band", "Hz"),
            bands,
        )?);
    }
    if let Some(windows) = &p.windows {
        out.push(range_reduction(
            input,
            "windows",
            ("time", "window", "s"),
            windows,
        )?);
    }
    if let Some(groups) = &p.pair_groups {
        out.push(pair_reduction(input, groups)?);
    }
    Ok(out)
}

/// The per-subject plan: the reductions and the layout they give.
fn plan_one(p: &AggregateParams, input: &Layout) -> Result<Plan, StageError> {
    if input.complex {
        return Err(StageError::data(
            "aggregate needs real values (a measure or power), but the input holds complex \
             wavelet coefficients",
        ));
    }
    let reductions = reductions(p, input)?;
    let mut layout = input.clone();
    for r in &reductions {
        layout.dims[r.axis] = r.new_name.to_string();
        layout.coords[r.axis] = Coord::Labels(r.groups.iter().map(|(n, _)| n.clone()).collect());
    }
    layout.complex = false;
    let keeps_time = layout.dims.iter().any(|d| d == "time");
    layout.meta = Meta {
        sampling_rate: input.meta.sampling_rate.filter(|_| keeps_time),
        extra: input.meta.extra.clone(),
        ..Meta::default()
    };
    add_table_meta(p, &mut layout.meta);
    Ok(Plan { layout, reductions })
}

/// Marks the output as a table for the runner and records the ranges behind the names.
fn add_table_meta(p: &AggregateParams, meta: &mut Meta) {
    meta.extra.insert("table".into(), json!(true));
    if let Some(bands) = &p.bands {
        meta.extra.insert("bands".into(), json!(bands));
    }
    if let Some(windows) = &p.windows {
        meta.extra.insert("windows".into(), json!(windows));
    }
    if let Some(groups) = &p.pair_groups {
        meta.extra.insert("pair_groups".into(), json!(groups));
    }
}

/// The mean along `axis` over each index group, in f64, in group order. Every output value is
/// the sum of its points in index order, divided by their count, however the array is laid out.
fn reduce_axis<T: Copy + Into<f64> + Sync>(input: &ArrayViewD<T>, r: &Reduction) -> ArrayD<f64> {
    match input.as_slice() {
        Some(data) if !data.is_empty() => reduce_contiguous(data, input.shape(), r),
        _ => reduce_axis_any(input, r),
    }
}

/// [`reduce_axis`] for any memory order.
fn reduce_axis_any<T: Copy + Into<f64>>(input: &ArrayViewD<T>, r: &Reduction) -> ArrayD<f64> {
    let axis = Axis(r.axis);
    let mut shape = input.shape().to_vec();
    shape.remove(r.axis);
    let parts: Vec<ArrayD<f64>> = r
        .groups
        .iter()
        .map(|(_, points)| {
            let mut acc = ArrayD::<f64>::zeros(IxDyn(&shape));
            for &i in points {
                Zip::from(&mut acc)
                    .and(input.index_axis(axis, i))
                    .for_each(|a, &v| *a += v.into());
            }
            let n = points.len() as f64;
            acc.mapv_inplace(|a| a / n);
            acc.insert_axis(axis)
        })
        .collect();
    let views: Vec<_> = parts.iter().map(|a| a.view()).collect();
    // Equal shapes but the reduced axis: concatenation cannot fail.
    concatenate(axis, &views).unwrap_or_else(|_| ArrayD::zeros(IxDyn(&[0])))
}

/// [`reduce_axis`] for a standard-layout array seen as `[outer, axis, inner]`: contiguous rows
/// of `inner` values are summed, in parallel over `outer` (each output value is still summed in
/// index order by one task, so the split does not change a bit).
fn reduce_contiguous<T: Copy + Into<f64> + Sync>(
    data: &[T],
    shape: &[usize],
    r: &Reduction,
) -> ArrayD<f64> {
    let len = shape[r.axis];
    let inner: usize = shape[r.axis + 1..].iter().product();
    let groups = r.groups.len();
    let mut out_shape = shape.to_vec();
    out_shape[r.axis] = groups;
    let mut out = vec![0f64; data.len() / len.max(1) * groups];
    if inner > 0 && len > 0 {
        out.par_chunks_mut(groups * inner)
            .zip(data.par_chunks(len * inner))
            .for_each(|(out, block)| {
                for (acc, (_, points)) in out.chunks_exact_mut(inner).zip(&r.groups) {
                    for &i in points {
                        let row = &block[i * inner..(i + 1) * inner];
                        for (a, &v) in acc.iter_mut().zip(row) {
                            *a += v.into();
                        }
                    }
                    let n = points.len() as f64;
                    acc.iter_mut().for_each(|a| *a /= n);
                }
            });
    }
    // The length follows from the shape: this cannot fail.
    ArrayD::from_shape_vec(IxDyn(&out_shape), out).unwrap_or_else(|_| unreachable!())
}

/// One subject's means: the reductions applied in turn (means of means over rectangular groups
/// equal the mean over the whole band × window × group).
fn reduce_all(values: &ArrayD<f32>, reductions: &[Reduction]) -> ArrayD<f64> {
    // The first reduction reads the f32 input directly, so no f64 copy of the (large) input
    // is made; reductions replace their axis in place, so the later axis indices stay valid.
    let Some((first, rest)) = reductions.split_first() else {
        return values.mapv(f64::from);
    };
    let mut current = reduce_axis(&values.view(), first);
    for r in rest {
        current = reduce_axis(&current.view(), r);
    }
    current
}

/// The group layout: `[statistic, subject, ...]` over the common per-subject layout.
fn group_layout(one: &Layout, subjects: &[&str]) -> Layout {
    let mut layout = one.clone();
    let mut ids: Vec<String> = subjects.iter().map(|s| s.to_string()).collect();
    ids.push(GROUP.into());
    layout
        .dims
        .splice(0..0, ["statistic".to_string(), "subject".to_string()]);
    layout.coords.splice(
        0..0,
        [
            Coord::Labels(STATISTICS.iter().map(|s| s.to_string()).collect()),
            Coord::Labels(ids),
        ],
    );
    layout
        .meta
        .extra
        .retain(|k, _| ["bands", "windows", "pair_groups", "table"].contains(&k.as_str()));
    layout
}

/// The subject ids of the inputs, or a data error when one has none or an id repeats.
fn subject_ids<'a>(ids: impl Iterator<Item = Option<&'a str>>) -> Result<Vec<&'a str>, StageError> {
    let mut out: Vec<&str> = Vec::new();
    for id in ids {
        let id = id.ok_or_else(|| {
            StageError::data(
                "aggregate over subjects needs one input per subject, but an input has no subject",
            )
        })?;
        if out.contains(&id) || id == GROUP {
            return Err(StageError::data(format!(
                "subject id `{id}` appears twice or clashes with the summary row `{GROUP}`"
            )));
        }
        out.push(id);
    }
    if out.is_empty() {
        return Err(StageError::data("aggregate over subjects got no subjects"));
    }
    Ok(out)
}

/// Per-subject plans that must all give the same layout; the error names the subjects.
fn plan_subjects(
    p: &AggregateParams,
    inputs: &[(&str, &Layout)],
) -> Result<(Vec<Plan>, Layout), StageError> {
    let plans: Vec<Plan> = inputs
        .iter()
        .map(|(id, l)| plan_one(p, l).map_err(|e| with_subject(e, id)))
        .collect::<Result<_, _>>()?;
    let (Some((first_id, _)), Some(first)) = (inputs.first(), plans.first()) else {
        return Err(StageError::data("aggregate over subjects got no subjects"));
    };
    let first = &first.layout;
    for ((id, _), plan) in inputs.iter().zip(&plans).skip(1) {
        compare_layouts(first_id, first, id, &plan.layout)?;
    }
    let ids: Vec<&str> = inputs.iter().map(|(id, _)| *id).collect();
    let layout = group_layout(first, &ids);
    Ok((plans, layout))
}

/// `e` with `subject {id}: ` before its message (shared with `contrast`).
pub(crate) fn with_subject(e: StageError, id: &str) -> StageError {
    match e {
        StageError::Param { field, message } => {
            StageError::param(field, format!("subject {id}: {message}"))
        }
        StageError::Data(m) => StageError::data(format!("subject {id}: {m}")),
        StageError::Input(m) => StageError::input(format!("subject {id}: {m}")),
    }
}

/// A data error naming both subjects and the first axis on which their outputs differ.
fn compare_layouts(a_id: &str, a: &Layout, b_id: &str, b: &Layout) -> Result<(), StageError> {
    if a.dims != b.dims {
        return Err(StageError::data(format!(
            "subjects {a_id} and {b_id} cannot be joined: their axes differ ([{}] vs [{}])",
            a.dims.join(", "),
            b.dims.join(", ")
        )));
    }
    for (dim, (ca, cb)) in a.dims.iter().zip(a.coords.iter().zip(&b.coords)) {
        if ca != cb {
            return Err(StageError::data(format!(
                "subjects {a_id} and {b_id} cannot be joined: their `{dim}` axes differ \
                 ({a_id}: {}; {b_id}: {})",
                coord_summary(ca),
                coord_summary(cb)
            )));
        }
    }
    if a.units != b.units {
        return Err(StageError::data(format!(
            "subjects {a_id} and {b_id} cannot be joined: units `{}` vs `{}`",
            a.units, b.units
        )));
    }
    Ok(())
}

/// `n entries: a, b, c, …` (at most 6 shown).
fn coord_summary(c: &Coord) -> String {
    let shown: Vec<String> = (0..c.len().min(6)).map(|i| coord_text(c, i)).collect();
    let more = if c.len() > 6 { ", …" } else { "" };
    format!("{} entries: {}{more}", c.len(), shown.join(", "))
}

/// Mean, SEM (sd ddof 1 / √n) and n of the finite values of one cell across subjects.
pub fn mean_sem_n(values: impl Iterator<Item = f64>) -> [f64; 3] {
    let finite: Vec<f64> = values.filter(|v| v.is_finite()).collect();
    let n = finite.len() as f64;
    if finite.is_empty() {
        return [f64::NAN, f64::NAN, 0.0];
    }
    let mean = finite.iter().sum::<f64>() / n;
    let sem = if finite.len() > 1 {
        let ss: f64 = finite.iter().map(|v| (v - mean).powi(2)).sum();
        (ss / (n - 1.0)).sqrt() / n.sqrt()
    } else {
        f64::NAN
    };
    [mean, sem, n]
}

/// The group array from the per-subject means (each of the common per-subject shape).
fn group_values(per_subject: &[ArrayD<f64>], layout: &Layout) -> ArrayD<f32> {
    let shape = layout.shape();
    let s = per_subject.len();
    let rest: usize = shape.iter().skip(2).product();
    let slices: Option<Vec<&[f64]>> = per_subject
        .iter()
        .map(|a| a.as_slice().filter(|v| v.len() == rest))
        .collect();
    match slices {
        Some(slices) if shape.len() >= 2 && shape[0] == 3 && shape[1] == s + 1 => {
            group_values_contiguous(&slices, &shape, rest)
        }
        _ => group_values_any(per_subject, layout),
    }
}

/// [`group_values`] over flat per-subject values: the same cells, written in memory order.
fn group_values_contiguous(slices: &[&[f64]], shape: &[usize], rest: usize) -> ArrayD<f32> {
    let s = slices.len();
    let mut out = vec![0f32; 3 * (s + 1) * rest];
    let at = |stat: usize, subject: usize, r: usize| (stat * (s + 1) + subject) * rest + r;
    for (k, values) in slices.iter().enumerate() {
        for (r, &v) in values.iter().enumerate() {
            let cell = [v, f64::NAN, if v.is_finite() { 1.0 } else { 0.0 }];
            for (stat, c) in cell.iter().enumerate() {
                out[at(stat, k, r)] = *c as f32;
            }
        }
    }
    for r in 0..rest {
        let cell = mean_sem_n(slices.iter().map(|v| v[r]));
        for (stat, c) in cell.iter().enumerate() {
            out[at(stat, s, r)] = *c as f32;
        }
    }
    // The length follows from the shape: this cannot fail.
    ArrayD::from_shape_vec(IxDyn(shape), out).unwrap_or_else(|_| unreachable!())
}

/// [`group_values`] for per-subject arrays of any memory order.
fn group_values_any(per_subject: &[ArrayD<f64>], layout: &Layout) -> ArrayD<f32> {
    let s = per_subject.len();
    let value = |k: usize, rest: &[usize]| -> f64 {
        per_subject
            .get(k)
            .and_then(|a| a.get(IxDyn(rest)).copied())
            .unwrap_or(f64::NAN)
    };
    ArrayD::from_shape_fn(IxDyn(&layout.shape()), |idx| {
        let idx = idx.slice();
        let (stat, subject, rest) = (idx[0], idx[1], &idx[2..]);
        let cell = if subject < s {
            let v = value(subject, rest);
            [v, f64::NAN, if v.is_finite() { 1.0 } else { 0.0 }]
        } else {
            mean_sem_n((0..s).map(|k| value(k, rest)))
        };
        cell[stat] as f32
    })
}

/// One subject's means (bands, windows, pair groups), as stored in its row of the output.
fn run_one(p: &AggregateParams, input: &LabelledArray) -> Result<LabelledArray, StageError> {
    let plan = plan_one(p, &input.layout)?;
    let values = reduce_all(input.real_values()?, &plan.reductions);
    LabelledArray::real(plan.layout, values.mapv(|v| v as f32))
}

/// The group output from every subject's [`run_one`] result: the subject rows are those
/// values, and the group statistics are taken over them (so the group row is exactly the
/// mean of the rows shown beside it).
fn join_group(prepared: &[Input<'_>], notes: &mut Notes) -> Result<LabelledArray, StageError> {
    let ids = subject_ids(prepared.iter().map(|i| i.subject))?;
    let (Some(first_id), Some(first)) = (ids.first(), prepared.first()) else {
        return Err(StageError::data("aggregate over subjects got no subjects"));
    };
    for (id, i) in ids.iter().zip(prepared).skip(1) {
        compare_layouts(first_id, &first.array.layout, id, &i.array.layout)?;
    }
    let layout = group_layout(&first.array.layout, &ids);
    let per_subject: Vec<ArrayD<f64>> = prepared
        .iter()
        .map(|i| Ok(i.array.real_values()?.mapv(f64::from)))
        .collect::<Result<_, StageError>>()?;
    if ids.len() < 2 {
        notes.warn(format!(
            "aggregate over subjects got {} subject; the SEM needs at least 2 and is NaN",
            ids.len()
        ));
    }
    let values = group_values(&per_subject, &layout);
    LabelledArray::real(layout, values)
}

impl Op for Aggregate {
    type Params = AggregateParams;
    const NAME: &'static str = "aggregate";
    // 2: group statistics over the f32 subject rows as stored (were: over their f64 means).
    const VERSION: u32 = 2;

    fn check(p: &Self::Params) -> Result<(), StageError> {
        for (field, ranges) in [("bands", &p.bands), ("windows", &p.windows)] {
            check_ranges(field, ranges.as_ref())?;
        }
        check_pair_groups(p.pair_groups.as_ref())
    }

    fn joins_subjects(p: &Self::Params) -> bool {
        p.over == Some(Over::Subjects)
    }

    fn layout(p: &Self::Params, inputs: &[InputLayout<'_>]) -> Result<Option<Layout>, StageError> {
        if !Self::joins_subjects(p) {
            return Ok(Some(plan_one(p, single(inputs)?.layout)?.layout));
        }
        let ids = subject_ids(inputs.iter().map(|i| i.subject))?;
        let layouts: Vec<(&str, &Layout)> = ids
            .iter()
            .zip(inputs)
            .map(|(id, i)| (*id, i.layout))
            .collect();
        Ok(Some(plan_subjects(p, &layouts)?.1))
    }

    fn run(
        p: &Self::Params,
        inputs: &[Input<'_>],
        notes: &mut Notes,
    ) -> Result<LabelledArray, StageError> {
        if !Self::joins_subjects(p) {
            return run_one(p, single(inputs)?.array);
        }
        let prepared: Vec<LabelledArray> = inputs
            .iter()
            .map(|i| Self::prepare(p, i).unwrap_or_else(|| run_one(p, i.array)))
            .collect::<Result<_, _>>()?;
        let prepared: Vec<Input<'_>> = inputs
            .iter()
            .zip(&prepared)
            .map(|(i, array)| Input { array, ..*i })
            .collect();
        join_group(&prepared, notes)
    }

    fn prepares(p: &Self::Params) -> bool {
        Self::joins_subjects(p)
    }

    /// Over subjects, each subject's means are taken on their own, so the runner need not hold
    /// every subject's (large) input at once.
    fn prepare(p: &Self::Params, input: &Input<'_>) -> Option<Result<LabelledArray, StageError>> {
        let id = input.subject.unwrap_or("?");
        Self::joins_subjects(p).then(|| run_one(p, input.array).map_err(|e| with_subject(e, id)))
    }

    /// Each subject's means keep every axis that no reduction takes (condition, measure, and
    /// pair unless pair groups are asked for), value for value.
    fn prepare_slices_along(p: &Self::Params, axis: &str) -> bool {
        let reduced = match axis {
            "freq" => p.bands.is_some(),
            "time" => p.windows.is_some(),
            "pair" => p.pair_groups.is_some(),
            _ => false,
        };
        Self::joins_subjects(p) && !reduced
    }

    fn join(
        p: &Self::Params,
        prepared: &[Input<'_>],
        notes: &mut Notes,
    ) -> Result<LabelledArray, StageError> {
        if !Self::joins_subjects(p) {
            return Self::run(p, prepared, notes);
        }
        join_group(prepared, notes)
    }
}

/// Named inclusive ranges (`bands`, `windows`): at least one, each named, start ≤ end.
pub(crate) fn check_ranges(
    field: &str,
    ranges: Option<&BTreeMap<String, [f64; 2]>>,
) -> Result<(), StageError> {
    let Some(ranges) = ranges else {
        return Ok(());
    };
    if ranges.is_empty() {
        return Err(StageError::param(
            field,
            format!("give at least one `name: [start, end]`, or leave `{field}` out"),
        ));
    }
    for (name, &[lo, hi]) in ranges {
        if name.is_empty() || !(lo.is_finite() && hi.is_finite() && lo <= hi) {
            return Err(StageError::param(
                format!("{field}.{name}"),
                format!(
                    "expected a non-empty name and [start, end] with start ≤ end, got `{name}`: {}",
                    range_text([lo, hi])
                ),
            ));
        }
    }
    Ok(())
}

fn check_pair_groups(
    groups: Option<&BTreeMap<String, Vec<[String; 2]>>>,
) -> Result<(), StageError> {
    let Some(groups) = groups else {
        return Ok(());
    };
    if groups.is_empty() {
        return Err(StageError::param(
            "pair_groups",
            "give at least one `name: [[a, b], ..]`, or leave `pair_groups` out",
        ));
    }
    for (name, members) in groups {
        if members.is_empty() {
            return Err(StageError::param(
                format!("pair_groups.{name}"),
                "a pair group needs at least one pair [a, b]",
            ));
        }
        for (k, pair) in members.iter().enumerate() {
            if members[..k].contains(pair) {
                return Err(StageError::param(
                    format!("pair_groups.{name}[{k}]"),
                    format!("pair {}-{} is listed twice", pair[0], pair[1]),
                ));
            }
        }
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::testutil::{assert_close, read_f64, read_json};
    use ndarray::Axis;

    fn strings(v: &serde_json::Value) -> Vec<String> {
        serde_json::from_value(v.clone()).expect("strings")
    }

    /// One subject's array of the numpy fixture (tests/reference/gen_norm.py).
    fn subject_input(k: usize) -> LabelledArray {
        let meta = read_json("norm", "aggregate");
        let numbers =
            |key: &str| -> Vec<f64> { serde_json::from_value(meta[key].clone()).unwrap() };
        let pairs: Vec<[String; 2]> = serde_json::from_value(meta["pairs"].clone()).unwrap();
        let layout = Layout {
            dims: ["condition", "measure", "pair", "freq", "time"]
                .map(String::from)
                .to_vec(),
            coords: vec![
                Coord::Labels(strings(&meta["conditions"])),
                Coord::Labels(strings(&meta["measures"])),
                Coord::Pairs(pairs.into()),
                Coord::Numbers(numbers("freqs")),
                Coord::Numbers(numbers("times")),
            ],
            units: "1".into(),
            meta: Meta {
                sampling_rate: Some(50.0),
                ..Meta::default()
            },
            ..Layout::default()
        };
        let all = read_f64("norm", "aggregate_input");
        let values = all.index_axis(Axis(0), k).mapv(|v| v as f32);
        LabelledArray::real(layout, values).expect("consistent fixture")
    }

    fn params(extra: serde_json::Value) -> AggregateParams {
        let meta = read_json("norm", "aggregate");
        let mut p = serde_json::json!({ "bands": meta["bands"], "windows": meta["windows"] });
        if let (Some(p), Some(extra)) = (p.as_object_mut(), extra.as_object()) {
            p.extend(extra.clone());
        }
        crate::op::parse_params(&p).expect("params")
    }

    fn run_one(p: &AggregateParams, a: &LabelledArray) -> Result<LabelledArray, StageError> {
        let input = Input {
            stage: "norm",
            subject: Some("sub-01"),
            array: a,
        };
        Aggregate::run(p, &[input], &mut Notes::default())
    }

    fn f64s(a: &LabelledArray) -> Vec<f64> {
        a.real_values().unwrap().iter().map(|&v| v.into()).collect()
    }

    #[test]
    fn prepared_means_slice_along_every_axis_no_reduction_takes() {
        // The slicing protocol (op.rs), which the runner relies on to prepare a subject in
        // slabs: each cut of the numpy fixture along an axis the reductions keep gives the
        // whole prepared array's slice bit for bit, with the same layout.
        let input = subject_input(1);
        let over = serde_json::json!({ "over": "subjects" });
        let mut grouped = over.clone();
        let pairs = input.layout.coords[2].pairs().unwrap()[..2].to_vec();
        grouped["pair_groups"] = serde_json::json!({ "front": pairs });
        for extra in [over, grouped, serde_json::json!({})] {
            let p = params(extra.clone());
            let prepare = |a: &LabelledArray| {
                let input = Input {
                    stage: "norm",
                    subject: Some("sub-02"),
                    array: a,
                };
                Aggregate::prepare(&p, &input).map(Result::unwrap)
            };
            let whole = prepare(&input);
            for (k, axis) in input.layout.dims.iter().enumerate() {
                let slices = Aggregate::prepare_slices_along(&p, axis);
                let kept = matches!(axis.as_str(), "condition" | "measure")
                    || axis == "pair" && p.pair_groups.is_none();
                assert_eq!(slices, kept && p.over.is_some(), "{extra} {axis}");
                if !slices {
                    continue;
                }
                let (whole, n) = (whole.as_ref().unwrap(), input.layout.coords[k].len());
                for part in [0..1, 1..n] {
                    let cut = prepare(&input.slice(axis, part.clone()).unwrap()).unwrap();
                    let want = whole.slice(axis, part.clone()).unwrap();
                    assert_eq!(cut.layout, want.layout, "{extra} {axis} {part:?}");
                    let bits = crate::testutil::real_bits;
                    assert_eq!(bits(&cut), bits(&want), "{extra} {axis} {part:?}");
                }
            }
        }
    }

    #[test]
    fn band_and_window_means_match_numpy() {
        // Reference: numpy means over inclusive masks (gen_norm.py; common practice, CHECKS.md);
        // NaN propagates within a subject as np.mean does. f32 output: 1e-6 relative.
        let meta = read_json("norm", "aggregate");
        let expected = read_f64("norm", "aggregate_subject_means");
        for k in 0..5 {
            let out = run_one(&params(serde_json::json!({})), &subject_input(k)).unwrap();
            assert_eq!(
                out.layout.dims,
                ["condition", "measure", "pair", "band", "window"]
            );
            assert_eq!(
                out.layout.coords[3],
                Coord::Labels(strings(&meta["band_order"]))
            );
            assert_eq!(
                out.layout.coords[4],
                Coord::Labels(strings(&meta["window_order"]))
            );
            assert_eq!(
                out.layout.meta.extra.get("table"),
                Some(&serde_json::json!(true))
            );
            assert_eq!(out.layout.meta.sampling_rate, None);
            let e = expected.index_axis(Axis(0), k).to_owned();
            assert_close(
                &f64s(&out),
                e.as_slice().unwrap(),
                1e-6,
                1e-6,
                "subject means",
            );
        }
    }

    #[test]
    fn pair_group_means_match_numpy() {
        let meta = read_json("norm", "aggregate");
        let p = params(serde_json::json!({ "pair_groups": meta["pair_groups"] }));
        let expected = read_f64("norm", "aggregate_pair_group_means");
        let out = run_one(&p, &subject_input(2)).unwrap();
        assert_eq!(out.layout.dims[2], "pair_group");
        assert_eq!(
            out.layout.coords[2],
            Coord::Labels(vec!["front_back".into()])
        );
        let e = expected.index_axis(Axis(0), 2).to_owned();
        assert_close(
            &f64s(&out),
            e.as_slice().unwrap(),
            1e-6,
            1e-6,
            "pair groups",
        );
    }

    fn group_inputs() -> (Vec<String>, Vec<LabelledArray>) {
        let ids = strings(&read_json("norm", "aggregate")["subjects"]);
        let arrays = (0..ids.len()).map(subject_input).collect();
        (ids, arrays)
    }

    fn run_group_on(
        p: &AggregateParams,
        ids: &[String],
        arrays: &[LabelledArray],
    ) -> Result<LabelledArray, StageError> {
        let inputs: Vec<Input> = ids
            .iter()
            .zip(arrays)
            .map(|(id, a)| Input {
                stage: "norm",
                subject: Some(id),
                array: a,
            })
            .collect();
        Aggregate::run(p, &inputs, &mut Notes::default())
    }

    #[test]
    fn mean_sem_n_over_subjects_match_numpy() {
        // Reference: np.nanmean, np.nanstd(ddof=1) / sqrt(n) with n the finite count
        // (gen_norm.py); the fixture has cells with n = 4, 1 (SEM NaN) and 0 (all NaN).
        let p = params(serde_json::json!({ "over": "subjects" }));
        assert!(Aggregate::joins_subjects(&p));
        let (ids, arrays) = group_inputs();
        let out = run_group_on(&p, &ids, &arrays).unwrap();
        let l = &out.layout;
        assert_eq!(
            l.dims,
            [
                "statistic",
                "subject",
                "condition",
                "measure",
                "pair",
                "band",
                "window"
            ]
        );
        assert_eq!(
            l.coords[0],
            Coord::Labels(STATISTICS.map(String::from).to_vec())
        );
        let mut subjects = ids.clone();
        subjects.push(GROUP.into());
        assert_eq!(l.coords[1], Coord::Labels(subjects));
        let values = out.real_values().unwrap();
        let group = values.index_axis(Axis(1), ids.len());
        for (k, name) in ["mean", "sem", "n"].iter().enumerate() {
            let expected = read_f64("norm", &format!("aggregate_group_{name}"));
            let actual: Vec<f64> = group
                .index_axis(Axis(0), k)
                .iter()
                .map(|&v| v.into())
                .collect();
            assert_close(&actual, expected.as_slice().unwrap(), 1e-6, 1e-6, name);
        }
        // Each subject's own row: its mean, SEM n/a, n = 1 where finite.
        let means = read_f64("norm", "aggregate_subject_means");
        let subject_rows = values.index_axis(Axis(0), 0);
        let actual: Vec<f64> = subject_rows
            .slice_axis(Axis(0), (0..ids.len()).into())
            .iter()
            .map(|&v| v.into())
            .collect();
        assert_close(
            &actual,
            means.as_slice().unwrap(),
            1e-6,
            1e-6,
            "subject rows",
        );
        let planned = Aggregate::layout(
            &p,
            &arrays
                .iter()
                .zip(&ids)
                .map(|(a, id)| InputLayout {
                    stage: "norm",
                    subject: Some(id),
                    layout: &a.layout,
                })
                .collect::<Vec<_>>(),
        )
        .unwrap();
        assert_eq!(planned.as_ref(), Some(l));
    }

    #[test]
    fn subjects_that_disagree_are_named() {
        let p = params(serde_json::json!({ "over": "subjects" }));
        let (ids, mut arrays) = group_inputs();
        arrays[3].layout.coords[2] = Coord::Pairs(
            [["F3", "P4"], ["F3", "Pz"], ["Cz", "P4"]]
                .map(|p| p.map(String::from))
                .to_vec()
                .into(),
        );
        let err = run_group_on(&p, &ids, &arrays).unwrap_err();
        assert_eq!(
            err,
            StageError::data(
                "subjects sub-01 and sub-04 cannot be joined: their `pair` axes differ \
                 (sub-01: 3 entries: F3-P4, F3-Cz, Cz-P4; sub-04: 3 entries: F3-P4, F3-Pz, Cz-P4)"
            )
        );
    }

    #[test]
    fn empty_band_and_window_name_the_available_range() {
        let mut layouts = subject_input(0);
        layouts.layout.coords[3] = Coord::Numbers(vec![3.0, 5.0, 7.0]);
        let p: AggregateParams = crate::op::parse_params(&serde_json::json!({
            "bands": { "theta": [4.0, 8.0], "gamma": [35.0, 45.0] }
        }))
        .unwrap();
        let input = InputLayout {
            stage: "norm",
            subject: None,
            layout: &layouts.layout,
        };
        let err = Aggregate::layout(&p, &[input]).unwrap_err();
        assert_eq!(
            err,
            StageError::param(
                "bands.gamma",
                "`gamma` [35, 45] Hz holds no freq point of the input, whose 3 freq points run \
                 over [3, 7] Hz"
            )
        );
        let p: AggregateParams = crate::op::parse_params(&serde_json::json!({
            "windows": { "late": [0.5, 0.7] }
        }))
        .unwrap();
        let err = Aggregate::layout(&p, &[input]).unwrap_err();
        assert!(
            matches!(&err, StageError::Param { field, message }
                if field == "windows.late" && message.contains("run over [-0.2, 0.38] s")),
            "{err:?}"
        );
    }

    #[test]
    fn pair_groups_must_name_existing_pairs_in_order() {
        let a = subject_input(0);
        let p: AggregateParams = crate::op::parse_params(&serde_json::json!({
            "pair_groups": { "back": [["P4", "F3"]] }
        }))
        .unwrap();
        let err = run_one(&p, &a).unwrap_err();
        let StageError::Param { field, message } = err else {
            panic!("not a param error")
        };
        assert_eq!(field, "pair_groups.back[0]");
        assert!(message.contains("the input has F3-P4"), "{message}");
        let twice = serde_json::json!({ "pair_groups": { "g": [["F3", "P4"], ["F3", "P4"]] } });
        let p: AggregateParams = crate::op::parse_params(&twice).unwrap();
        assert!(
            matches!(Aggregate::check(&p), Err(StageError::Param { field, .. }) if field == "pair_groups.g[1]")
        );
    }

    #[test]
    fn bad_ranges_are_param_errors() {
        let p: AggregateParams =
            crate::op::parse_params(&serde_json::json!({ "bands": { "theta": [8, 4] } })).unwrap();
        assert!(
            matches!(Aggregate::check(&p), Err(StageError::Param { field, .. }) if field == "bands.theta")
        );
        let e =
            crate::op::parse_params::<AggregateParams>(&serde_json::json!({ "over": "trials" }))
                .unwrap_err();
        assert!(matches!(e, StageError::Param { field, .. } if field == "over"));
    }

    #[test]
    fn mean_sem_n_small_cases() {
        // SEM = sd(ddof 1) / √n: for [1, 2, 3] sd = 1, so SEM = 1/√3 (worked by hand).
        let [m, s, n] = mean_sem_n([1.0, 2.0, f64::NAN, 3.0].into_iter());
        assert_eq!((m, n), (2.0, 3.0));
        assert!((s - 1.0 / 3f64.sqrt()).abs() < 1e-15);
        let [m, s, n] = mean_sem_n([f64::NAN].into_iter());
        assert!(m.is_nan() && s.is_nan() && n == 0.0);
    }

    /// The contiguous reduction against the general one (a plain per-index accumulation),
    /// bit for bit, over several shapes, axes, groups and seeds; and the flat group statistics
    /// against the index-by-index ones.
    #[test]
    fn contiguous_reductions_equal_the_general_ones_bit_for_bit() {
        use rand::{Rng, SeedableRng};
        for (seed, shape) in [vec![4usize, 9], vec![2, 3, 5, 7, 6], vec![1, 30, 1]]
            .into_iter()
            .enumerate()
        {
            let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(seed as u64 + 10);
            let len: usize = shape.iter().product();
            let data: Vec<f32> = (0..len).map(|_| rng.gen_range(-1.0..1.0)).collect();
            let values = ArrayD::from_shape_vec(IxDyn(&shape), data).unwrap();
            for axis in 0..shape.len() {
                let n = shape[axis];
                let r = Reduction {
                    axis,
                    new_name: "band",
                    groups: vec![
                        ("a".into(), (0..n.div_ceil(2)).collect()),
                        ("b".into(), (n / 2..n).collect()),
                        ("c".into(), vec![n - 1]),
                    ],
                };
                let fast = reduce_axis(&values.view(), &r);
                let plain = reduce_axis_any(&values.view(), &r);
                assert_eq!(fast.shape(), plain.shape());
                let bits = |a: &ArrayD<f64>| a.iter().map(|x| x.to_bits()).collect::<Vec<_>>();
                assert_eq!(bits(&fast), bits(&plain), "{shape:?} axis {axis}");
            }
            let subjects: Vec<ArrayD<f64>> = (0..3)
                .map(|k| values.mapv(|v| f64::from(v) * (k as f64 + 1.0)))
                .collect();
            let mut layout = Layout {
                dims: (0..shape.len()).map(|a| format!("d{a}")).collect(),
                coords: shape
                    .iter()
                    .map(|&n| Coord::Numbers((0..n).map(|i| i as f64).collect()))
                    .collect(),
                units: "1".into(),
                ..Layout::default()
            };
            layout = group_layout(&layout, &["1", "2", "3"]);
            let fast = group_values(&subjects, &layout);
            let plain = group_values_any(&subjects, &layout);
            let bits = |a: &ArrayD<f32>| a.iter().map(|x| x.to_bits()).collect::<Vec<_>>();
            assert_eq!(bits(&fast), bits(&plain));
        }
    }
}
