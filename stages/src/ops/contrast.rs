//! The `contrast` op: is an effect real across subjects, corrected for all points tested
//! (DESIGN §4c)?
//!
//! Input: one per-subject array per subject, dims `[condition, measure, pair, freq, time]` (a
//! `clustering` or `baseline` output). Each subject gives one difference map per measure and
//! pair: `compare: [a, b]` gives a − b, `condition: a` gives a itself (tested against 0). The
//! point-wise statistic is the one-sample t of the n subjects' differences (mean over the SEM,
//! the SD with ddof 1). Significance comes from sign flips of whole subjects (Nichols & Holmes
//! 2002, Hum Brain Mapp 15:1–25): under the null each subject's difference map is as likely
//! negated, so every flip pattern gives a draw of the whole t-map. All 2^n patterns are used when
//! 2^n ≤ `permutations`; otherwise the unflipped data and `permutations` − 1 random patterns
//! drawn from `seed`, in chunks of [`CHUNK`] whose patterns depend on (seed, chunk) only. A
//! p-value is the share of patterns (the unflipped one included) whose statistic reaches the
//! observed one. The unflipped pattern and its mirror image (every sign flipped) always reach
//! it, so no p is below 2 / 2^n with all patterns, nor below 1 / patterns with random ones
//! (more when a random draw repeats either: [`Flips::always_reaching`]); the op warns when that
//! floor is above `alpha`.
//!
//! Corrections, each over the family of all points and pairs of one measure:
//! - `cluster` (Maris & Oostenveld 2007, J Neurosci Methods 164:177–190): points whose |t|
//!   exceeds the two-sided Student t quantile of `threshold` (n − 1 df) form clusters, 4-connected
//!   over freq × time within one pair, one sign per cluster; mass = Σ t. A cluster's p is the
//!   share of patterns whose largest |mass| over all pairs reaches its |mass|. Points outside any
//!   cluster get p NaN and cluster 0.
//! - `max`: a point's p is the share of patterns whose largest |t| over all points and pairs
//!   reaches its |t|.
//! - `fdr`: each point's permutation p (share of patterns whose |t| at that point reaches the
//!   observed), adjusted by Benjamini & Hochberg 1995 (J R Stat Soc B 57:289–300).
//! - `none`: each point's permutation p, unadjusted.
//!
//! Significant means p ≤ `alpha`. Output: dims `[statistic, measure, pair, freq, time]`, statistic
//! `t, p, cluster, mean, sem`; clusters are numbered 1, 2, … over measures, pairs and then the
//! raster order (freq, then time) of each cluster's first point. The runner writes the findings
//! table `<output>/<stage>.tsv` ([`findings_tsv`]).
//!
//! How the permutations stay cheap: with S = Σ εᵢ dᵢ for flips εᵢ = ±1 and Q = Σ dᵢ² (the same
//! for every flip), t² = (n − 1) S² / (n Q − S²), so |t| grows with |S| at a point and a
//! threshold on |t| is one on |S|. S is summed from tables: the subjects are cut into groups of
//! [`GROUP`], and for each group every sign pattern's partial sum map is built once per pair;
//! a pattern's S is then a sum of one row per group: g − 1 additions per point and pattern for g
//! groups, instead of the n multiply-adds of Σ εᵢ dᵢ. Tables and sums are f64 (f32 data of a
//! moderate range then sum exactly), built left to right over the subjects, so a pattern and its
//! mirror image give exactly opposite sums. The observed map goes through the same arithmetic (the
//! unflipped pattern), so its clusters and statistics are exactly those of pattern 0. The t shown
//! in the output is the plain two-pass t in f64; the clusters and masses come from the table sums,
//! which agree with it to about 1e-12 relative. A cluster's mass is its points' t added in raster
//! order (freq, then time), however the clusters were found: the observed map's by flood fill,
//! every pattern's from its sign bitmaps as runs of set bits joined across rows (union-find), t
//! computed at the points above threshold only, and at a point with no set neighbour (a cluster
//! of its own) only where a bound without square root or division says its |t| may exceed the
//! largest mass found so far.

use std::collections::BTreeMap;
use std::fmt::Write as _;

use ndarray::{ArrayD, IxDyn};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha20Rng;
use rayon::prelude::*;
use serde::{Deserialize, Serialize};
use serde_json::json;

use crate::array::{Coord, LabelledArray, Layout, Meta};
use crate::error::StageError;
use crate::op::{Input, InputLayout, Notes, Op};
use crate::ops::aggregate::{with_subject, Over};
use crate::ops::baseline::{points_within, range_text};
use crate::ops::clustering::PairSpec;
use crate::stats;
use crate::table::{coord_text, number_text};

/// The `contrast` op.
pub struct Contrast;

/// One measure name or several.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize, schemars::JsonSchema)]
#[serde(untagged, expecting = "a measure name or a list of measure names")]
pub enum Names {
    /// One.
    One(String),
    /// Several, in output order.
    Many(Vec<String>),
}

/// The multiple-comparison correction.
#[derive(
    Clone, Copy, Debug, Default, PartialEq, Eq, Serialize, Deserialize, schemars::JsonSchema,
)]
#[serde(rename_all = "lowercase")]
pub enum Correction {
    /// Cluster mass over freq × time within a pair, family-wise over the pairs of a measure.
    #[default]
    Cluster,
    /// The largest |t| over all points and pairs of a measure.
    Max,
    /// Benjamini–Hochberg over all points and pairs of a measure.
    Fdr,
    /// Point-wise permutation p, uncorrected.
    None,
}

/// Parameters of `contrast`.
#[derive(Clone, Debug, Serialize, Deserialize, schemars::JsonSchema)]
#[serde(deny_unknown_fields)]
pub struct ContrastParams {
    /// `subjects`: one input per subject (required).
    pub over: Over,
    /// `[a, b]`: the paired difference a − b.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub compare: Option<[String; 2]>,
    /// `a`: condition a tested against 0.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub condition: Option<String>,
    /// The measure(s) to test (default: every measure of the input).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub measure: Option<Names>,
    /// The pairs (default `all`: every pair of the input).
    #[serde(default)]
    pub pairs: PairSpec,
    /// Inclusive frequency range tested, Hz (default: all).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub freqs: Option<[f64; 2]>,
    /// Inclusive time range tested, s (default: all).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub times: Option<[f64; 2]>,
    /// `cluster` (default), `max`, `fdr` or `none`.
    #[serde(default)]
    pub correction: Correction,
    /// Cluster-forming two-sided p of the point-wise t (default 0.05; `cluster` only).
    #[serde(default = "default_alpha")]
    pub threshold: f64,
    /// Number of sign-flip patterns (default 4096); all 2^n are used when that is no more.
    #[serde(default = "default_permutations")]
    pub permutations: u32,
    /// Significance level (default 0.05).
    #[serde(default = "default_alpha")]
    pub alpha: f64,
    /// Seed of the random flips (default 1).
    #[serde(default = "default_seed")]
    pub seed: u64,
}

fn default_alpha() -> f64 {
    0.05
}
fn default_permutations() -> u32 {
    4096
}
fn default_seed() -> u64 {
    1
}

/// The statistics of the output, in the order of its `statistic` axis.
pub const STATISTICS: [&str; 5] = ["t", "p", "cluster", "mean", "sem"];
/// Subjects per flip table (2^5 = 32 rows per group).
pub const GROUP: usize = 5;
/// Flip patterns per chunk: the random patterns of chunk c depend on (seed, c) alone.
pub const CHUNK: usize = 256;
/// `meta.extra` key that marks the output's table as a findings table.
pub const TABLE_FORM: &str = "findings";

/// What the layout step works out once; `prepare` and `join` reuse it.
struct Plan {
    /// Index on the input's condition axis of a (and b for `compare`).
    conditions: (usize, Option<usize>),
    measures: Vec<usize>,
    pairs: Vec<usize>,
    freqs: Vec<usize>,
    times: Vec<usize>,
    /// The per-subject difference layout `[measure, pair, freq, time]`.
    prepared: Layout,
}

const DIMS: [&str; 5] = ["condition", "measure", "pair", "freq", "time"];

fn find_condition(field: &str, conditions: &[String], name: &str) -> Result<usize, StageError> {
    conditions.iter().position(|c| c == name).ok_or_else(|| {
        StageError::param(
            field,
            format!(
                "condition `{name}` is not in the data, whose conditions are: {}",
                conditions.join(", ")
            ),
        )
    })
}

fn select_pairs(spec: &PairSpec, pairs: &[[String; 2]]) -> Result<Vec<usize>, StageError> {
    match spec {
        PairSpec::All(_) => Ok((0..pairs.len()).collect()),
        PairSpec::Seed(s) => {
            let out: Vec<usize> = (0..pairs.len())
                .filter(|&i| s.seed.iter().any(|c| pairs[i].contains(c)))
                .collect();
            if out.is_empty() {
                return Err(StageError::param(
                    "pairs.seed",
                    format!(
                        "no pair of the input has a channel among {}",
                        s.seed.join(", ")
                    ),
                ));
            }
            Ok(out)
        }
        PairSpec::List(list) => list
            .iter()
            .enumerate()
            .map(|(k, [a, b])| {
                pairs
                    .iter()
                    .position(|p| p[0] == *a && p[1] == *b)
                    .ok_or_else(|| {
                        let reversed = pairs.iter().any(|p| p[0] == *b && p[1] == *a);
                        let hint = if reversed {
                            format!(" (the input has {b}-{a}: pairs keep their order)")
                        } else {
                            String::new()
                        };
                        StageError::param(
                            format!("pairs[{k}]"),
                            format!(
                                "pair {a}-{b} is not among the input's {} pairs{hint}",
                                pairs.len()
                            ),
                        )
                    })
            })
            .collect(),
    }
}

fn select_range(
    input: &Layout,
    field: &str,
    axis: &str,
    unit: &str,
    range: Option<[f64; 2]>,
) -> Result<Vec<usize>, StageError> {
    let coords = input.numbers(axis)?;
    let Some(range) = range else {
        return Ok((0..coords.len()).collect());
    };
    let points = points_within(coords, range);
    if points.is_empty() {
        let span = match (coords.first(), coords.last()) {
            (Some(&a), Some(&b)) => range_text([a, b]),
            _ => "[] (none)".into(),
        };
        return Err(StageError::param(
            field,
            format!(
                "{} {unit} holds no {axis} point of the input, whose {axis} points run over \
                 {span} {unit}",
                range_text(range)
            ),
        ));
    }
    Ok(points)
}

fn pick<T: Clone>(v: &[T], idx: &[usize]) -> Vec<T> {
    idx.iter().map(|&i| v[i].clone()).collect()
}

/// One subject's plan from its layout.
fn plan_one(p: &ContrastParams, input: &Layout) -> Result<Plan, StageError> {
    if input.complex {
        return Err(StageError::data(
            "contrast needs real values (a measure), but the input holds complex coefficients",
        ));
    }
    if input.dims != DIMS {
        return Err(StageError::data(format!(
            "contrast needs an input with axes [{}], got [{}]",
            DIMS.join(", "),
            input.dims.join(", ")
        )));
    }
    let conditions = input.labels("condition")?;
    let conditions = match (&p.compare, &p.condition) {
        (Some([a, b]), _) => (
            find_condition("compare[0]", conditions, a)?,
            Some(find_condition("compare[1]", conditions, b)?),
        ),
        (None, Some(a)) => (find_condition("condition", conditions, a)?, None),
        (None, None) => {
            return Err(StageError::param(
                "compare",
                "give `compare` or `condition`",
            ))
        }
    };
    let measures_in = input.labels("measure")?;
    let measures = match &p.measure {
        None => (0..measures_in.len()).collect(),
        Some(names) => {
            let names = match names {
                Names::One(m) => std::slice::from_ref(m),
                Names::Many(v) => v.as_slice(),
            };
            names
                .iter()
                .map(|m| {
                    measures_in.iter().position(|x| x == m).ok_or_else(|| {
                        StageError::param(
                            "measure",
                            format!(
                                "measure `{m}` is not in the input, which holds: {}",
                                measures_in.join(", ")
                            ),
                        )
                    })
                })
                .collect::<Result<Vec<_>, _>>()?
        }
    };
    let pairs_in = input
        .coord("pair")?
        .pairs()
        .ok_or_else(|| StageError::data("the input's `pair` axis does not hold channel pairs"))?;
    let pairs = select_pairs(&p.pairs, pairs_in)?;
    let freqs = select_range(input, "freqs", "freq", "Hz", p.freqs)?;
    let times = select_range(input, "times", "time", "s", p.times)?;
    let prepared = Layout {
        dims: DIMS[1..].iter().map(|s| s.to_string()).collect(),
        coords: vec![
            Coord::Labels(pick(measures_in, &measures)),
            Coord::Pairs(pick(pairs_in, &pairs).into()),
            Coord::Numbers(pick(input.numbers("freq")?, &freqs)),
            Coord::Numbers(pick(input.numbers("time")?, &times)),
        ],
        units: input.units.clone(),
        complex: false,
        meta: Meta {
            sampling_rate: input.meta.sampling_rate,
            ..Meta::default()
        },
    };
    Ok(Plan {
        conditions,
        measures,
        pairs,
        freqs,
        times,
        prepared,
    })
}

fn subject_ids<'a>(ids: impl Iterator<Item = Option<&'a str>>) -> Result<Vec<&'a str>, StageError> {
    let mut out: Vec<&str> = Vec::new();
    for id in ids {
        let id = id.ok_or_else(|| {
            StageError::data("contrast needs one input per subject, but an input has no subject")
        })?;
        if out.contains(&id) {
            return Err(StageError::data(format!("subject id `{id}` appears twice")));
        }
        out.push(id);
    }
    if out.len() < 3 {
        return Err(StageError::param(
            "over",
            format!(
                "contrast over subjects needs at least 3 subjects, got {}",
                out.len()
            ),
        ));
    }
    Ok(out)
}

/// The flip patterns that will be used for `n` subjects.
fn pattern_count(p: &ContrastParams, n: usize) -> usize {
    match exact_count(p, n) {
        Some(all) => all,
        None => p.permutations as usize,
    }
}

/// 2^n when that is no more than `permutations`.
fn exact_count(p: &ContrastParams, n: usize) -> Option<usize> {
    (n < 32 && (1u64 << n) <= u64::from(p.permutations)).then(|| 1usize << n)
}

fn output_layout(p: &ContrastParams, prepared: &Layout, n: usize) -> Layout {
    let mut layout = prepared.clone();
    layout.dims.insert(0, "statistic".into());
    layout.coords.insert(
        0,
        Coord::Labels(STATISTICS.iter().map(|s| s.to_string()).collect()),
    );
    let extra = &mut layout.meta.extra;
    extra.insert("table".into(), json!(true));
    extra.insert("table_form".into(), json!(TABLE_FORM));
    extra.insert("correction".into(), json!(p.correction));
    extra.insert("alpha".into(), json!(p.alpha));
    extra.insert("subjects".into(), json!(n));
    extra.insert("patterns".into(), json!(pattern_count(p, n)));
    extra.insert("exact".into(), json!(exact_count(p, n).is_some()));
    if p.correction == Correction::Cluster {
        extra.insert("threshold".into(), json!(p.threshold));
        extra.insert(
            "threshold_t".into(),
            json!(stats::t_isf(p.threshold / 2.0, (n - 1) as f64)),
        );
    }
    match (&p.compare, &p.condition) {
        (Some(c), _) => extra.insert("compare".into(), json!(c)),
        (None, c) => extra.insert("condition".into(), json!(c)),
    };
    layout
}

/// Every subject's plan (errors name the subject) and the common prepared layout.
fn plan_all(p: &ContrastParams, inputs: &[(&str, &Layout)]) -> Result<Layout, StageError> {
    let mut first: Option<(&str, Layout)> = None;
    for (id, layout) in inputs {
        let plan = plan_one(p, layout).map_err(|e| with_subject(e, id))?;
        match &first {
            None => first = Some((id, plan.prepared)),
            Some((first_id, want)) => {
                for (k, dim) in want.dims.iter().enumerate() {
                    if want.coords[k] != plan.prepared.coords[k] {
                        return Err(StageError::data(format!(
                            "subjects {first_id} and {id} cannot be compared: their `{dim}` \
                             axes differ"
                        )));
                    }
                }
            }
        }
    }
    first
        .map(|(_, l)| l)
        .ok_or_else(|| StageError::data("contrast got no subjects"))
}

/// One subject's differences `[measure, pair, freq, time]` (a − b, or a), f32.
fn prepare_one(p: &ContrastParams, input: &LabelledArray) -> Result<LabelledArray, StageError> {
    let plan = plan_one(p, &input.layout)?;
    let values = input.real_values()?;
    let (a, b) = plan.conditions;
    let (nf, nt) = (plan.freqs.len(), plan.times.len());
    let mut out = Vec::with_capacity(plan.measures.len() * plan.pairs.len() * nf * nt);
    for &m in &plan.measures {
        for &q in &plan.pairs {
            for &f in &plan.freqs {
                for &t in &plan.times {
                    let x = values[[a, m, q, f, t]];
                    out.push(match b {
                        Some(b) => x - values[[b, m, q, f, t]],
                        None => x,
                    });
                }
            }
        }
    }
    let shape = plan.prepared.shape();
    let values = ArrayD::from_shape_vec(IxDyn(&shape), out)
        .map_err(|e| StageError::data(format!("internal: {e}")))?;
    LabelledArray::real(plan.prepared, values)
}

/// The sign-flip patterns: per pattern one mask per subject group, bit k set when the group's
/// k-th subject is negated. Pattern 0 is the data as observed.
#[derive(Clone, Debug, PartialEq)]
pub struct Flips {
    /// Subjects of each group (consecutive, at most [`GROUP`]).
    pub groups: Vec<std::ops::Range<usize>>,
    /// `patterns × groups` masks.
    pub masks: Vec<u8>,
}

impl Flips {
    /// All 2^n patterns (pattern k negates subject i when bit i of k is set), or pattern 0 and
    /// `count − 1` random ones, chunk c of [`CHUNK`] patterns drawn from a ChaCha20 stream
    /// seeded with `seed` on stream c.
    pub fn new(n: usize, count: usize, exact: bool, seed: u64) -> Flips {
        let groups: Vec<_> = (0..n)
            .step_by(GROUP)
            .map(|s| s..(s + GROUP).min(n))
            .collect();
        let g = groups.len();
        let mut masks = vec![0u8; count * g];
        if exact {
            for (k, row) in masks.chunks_mut(g).enumerate() {
                for (m, r) in row.iter_mut().zip(&groups) {
                    *m = ((k >> r.start) & ((1 << r.len()) - 1)) as u8;
                }
            }
        } else {
            masks
                .par_chunks_mut(CHUNK * g)
                .enumerate()
                .for_each(|(c, chunk)| {
                    let mut rng = ChaCha20Rng::seed_from_u64(seed);
                    rng.set_stream(c as u64);
                    for row in chunk.chunks_mut(g) {
                        for (m, r) in row.iter_mut().zip(&groups) {
                            *m = rng.gen::<u8>() & ((1u16 << r.len()) - 1) as u8;
                        }
                    }
                });
            masks[..g].iter_mut().for_each(|m| *m = 0);
        }
        Flips { groups, masks }
    }

    /// Number of patterns.
    pub fn count(&self) -> usize {
        self.masks.len() / self.groups.len().max(1)
    }

    /// How many patterns reach the observed statistic whatever the data: the unflipped pattern
    /// and its mirror image (every subject negated: sums exactly opposite, so the same |t|, the
    /// same clusters and the same |mass|), each as often as it occurs. Under every correction
    /// the smallest p the test can give is this over [`Flips::count`]: 2 / 2^n for all 2^n
    /// patterns (the exact two-sided sign-flip test, Nichols & Holmes 2002), 1 / count or more
    /// for random ones, as the random draws may repeat either (p = (b + 1) / (m + 1) of Phipson
    /// & Smyth 2010, Stat Appl Genet Mol Biol 9:39, with m random patterns).
    pub fn always_reaching(&self) -> usize {
        let g = self.groups.len();
        if g == 0 {
            return self.count();
        }
        let full: Vec<u8> = self
            .groups
            .iter()
            .map(|r| ((1u16 << r.len()) - 1) as u8)
            .collect();
        self.masks
            .chunks(g)
            .filter(|row| row.iter().all(|&m| m == 0) || *row == full.as_slice())
            .count()
    }
}

/// The tables of one map: for each group, the partial sum map of every sign pattern, in f64.
/// Each table row holds `len` sums and is padded with zeros to `stride` (a multiple of [`LANES`]),
/// so the `cluster` kernel reads whole blocks of [`LANES`] points.
struct Tables {
    /// Row offsets of each group's first pattern (in units of rows).
    offsets: Vec<usize>,
    rows: Vec<f64>,
    len: usize,
    stride: usize,
}

impl Tables {
    fn build(maps: &[&[f32]], flips: &Flips) -> Tables {
        let mut tables = Tables {
            offsets: Vec::new(),
            rows: Vec::new(),
            len: 0,
            stride: 0,
        };
        tables.build_into(maps, flips);
        tables
    }

    /// [`Tables::build`] into this table's memory (every row is written, padding included).
    fn build_into(&mut self, maps: &[&[f32]], flips: &Flips) {
        let len = maps.first().map_or(0, |m| m.len());
        let stride = len.next_multiple_of(LANES);
        let offsets = &mut self.offsets;
        offsets.clear();
        let mut total = 0;
        for g in &flips.groups {
            offsets.push(total);
            total += 1 << g.len();
        }
        self.len = len;
        self.stride = stride;
        if maps.is_empty() {
            return;
        }
        let rows = &mut self.rows;
        rows.resize(total * stride, 0.0);
        for (g, range) in flips.groups.iter().enumerate() {
            let block = &mut rows[offsets[g] * stride..(offsets[g] + (1 << range.len())) * stride];
            // Level k holds the 2^(k+1) patterns of the group's first k + 1 subjects, each the
            // left-to-right sum ±d₀ ± d₁ … (so mirror patterns give opposite sums exactly).
            for (k, s) in range.clone().enumerate() {
                let d = maps[s];
                let half = 1 << k;
                if k == 0 {
                    let (plus, minus) = block.split_at_mut(stride);
                    for ((p, m), &x) in plus.iter_mut().zip(&mut minus[..len]).zip(d) {
                        *p = f64::from(x);
                        *m = -f64::from(x);
                    }
                    continue;
                }
                let (lower, upper) = block.split_at_mut(half * stride);
                for m in 0..half {
                    let src = &mut lower[m * stride..m * stride + len];
                    let dst = &mut upper[m * stride..m * stride + len];
                    for ((o, x), &v) in dst.iter_mut().zip(src.iter_mut()).zip(d) {
                        let v = f64::from(v);
                        *o = *x - v;
                        *x += v;
                    }
                }
            }
            for row in block.chunks_mut(stride) {
                row[len..].iter_mut().for_each(|x| *x = 0.0);
            }
        }
    }

    /// The table row of group `g` for its mask `mask`, padding included.
    fn row(&self, g: usize, mask: u8) -> &[f64] {
        let at = (self.offsets[g] + mask as usize) * self.stride;
        &self.rows[at..at + self.stride]
    }

    /// S of pattern `masks` (one mask per group) at the points `range` into `s`: the group's
    /// rows added left to right, the same additions at every point whatever the range.
    fn sum(&self, masks: &[u8], range: std::ops::Range<usize>, s: &mut [f64]) {
        let row = |g: usize| &self.row(g, masks[g])[range.clone()];
        let groups = self.offsets.len().min(masks.len());
        if groups == 1 {
            s.iter_mut().zip(row(0)).for_each(|(a, &b)| *a = b);
        }
        if groups < 2 {
            return;
        }
        // The same additions as copying the first row and adding the others one by one, two
        // rows a pass (fewer loads and stores of s; a plain copy loop would become a library
        // call per short range).
        for ((a, &x), &y) in s.iter_mut().zip(row(0)).zip(row(1)) {
            *a = x + y;
        }
        let mut g = 2;
        while g + 1 < groups {
            for ((a, &x), &y) in s.iter_mut().zip(row(g)).zip(row(g + 1)) {
                *a = *a + x + y;
            }
            g += 2;
        }
        if g < groups {
            s.iter_mut().zip(row(g)).for_each(|(a, &b)| *a += b);
        }
    }
}

/// t from S and Q for n subjects: S √((n − 1) / (n Q − S²)).
fn t_of(s: f64, q: f64, n: f64) -> f64 {
    let den = n * q - s * s;
    if q == 0.0 {
        return f64::NAN;
    }
    if den <= 0.0 {
        return s.signum() * f64::INFINITY;
    }
    s * ((n - 1.0) / den).sqrt()
}

/// The threshold on S equivalent to |t| > c (given c²) for n subjects and Q = Σ dᵢ².
///
/// For fixed Q, t = S √((n − 1) / (n Q − S²)) on −√(nQ) < S < √(nQ) (and S² ≤ n Q always, by
/// Cauchy–Schwarz), and dt/dS = √(n − 1) · n Q / (n Q − S²)^{3/2} > 0: t is strictly increasing
/// in S. So for c > 0, t > c ⇔ S > 0 and (n − 1) S² > c² (n Q − S²) ⇔ S > √(c² n Q / (n − 1 + c²)),
/// and t < −c ⇔ S < −that. Q = 0 (every difference 0; t undefined) or not finite: no point
/// passes (infinity).
fn threshold_of_s(q: f64, c2: f64, n: f64) -> f64 {
    if q.is_finite() && q > 0.0 {
        (c2 * n * q / (n - 1.0 + c2)).sqrt()
    } else {
        f64::INFINITY
    }
}

/// The permutation side of one pair's map.
struct MapResult {
    /// Per pattern: the largest |mass| (cluster) or the largest S²/Q (max).
    null: Vec<f64>,
    /// Per point: patterns whose |S| reaches the observed (fdr, none).
    counts: Vec<u32>,
    /// Observed cluster labels (0 none, else 1-based within the map) and masses.
    labels: Vec<u32>,
    masses: Vec<f64>,
    /// Observed S²/Q per point (max).
    ratio: Vec<f64>,
}

/// The statistics engine's fixed inputs for one map.
struct MapInput<'a> {
    maps: Vec<&'a [f32]>,
    q: &'a [f64],
    threshold_s: &'a [f64],
    cols: usize,
}

/// Points per tile of the `max`, `fdr` and `none` permutation loops: one tile's table rows
/// (groups × 32 × TILE f64, 256 KiB for 20 subjects) stay in the core's cache while every
/// pattern of a block passes over them, instead of every pattern streaming the whole map's tables
/// from memory. A multiple of 64, so that a tile fills whole bitmap words.
const TILE: usize = 256;

/// Patterns per block of the `cluster` loop. A block passes over the map row by row and each row
/// strip by strip ([`LANES`] columns); each strip's tables (groups × 32 × 16 f64, 16 KiB for 20
/// subjects) are built for the block and stay in the core's first-level cache while the block's
/// patterns read them; each pattern keeps its bitmaps and the S of its supra-threshold points
/// (a few KiB) for the clusters. The tables are built patterns / BLOCK times (about 124
/// additions per point each, against 3 per point and pattern for the sums). 512 measured
/// best of 128–2048 at 100 pairs (BENCHMARKS.md).
const BLOCK: usize = 512;

/// Points per step of the `cluster` kernel: their sums stay in registers (four of AVX2) while
/// each group's table row is added. Table rows are padded to a multiple of it.
const LANES: usize = 16;

/// Labels the 4-connected clusters of `sign` (+1, −1, 0 per point; one sign per cluster) by
/// flood fill, 1, 2, … in the raster order of each cluster's first point; returns the count.
fn label_clusters(sign: &[i8], cols: usize, labels: &mut [u32]) -> usize {
    labels.iter_mut().for_each(|l| *l = 0);
    let mut stack = Vec::new();
    let mut label = 0;
    for first in 0..sign.len() {
        if sign[first] == 0 || labels[first] != 0 {
            continue;
        }
        label += 1;
        stats::fill(
            sign,
            cols,
            first,
            |i| {
                let new = labels[i] == 0;
                labels[i] = label;
                new
            },
            &mut stack,
        );
    }
    label as usize
}

/// The mass of every cluster of `labels`: Σ t over its points, added in raster order.
fn raster_masses(labels: &[u32], count: usize, t_at: impl Fn(usize) -> f64) -> Vec<f64> {
    let mut masses = vec![0f64; count];
    for (i, &l) in labels.iter().enumerate() {
        if l > 0 {
            masses[l as usize - 1] += t_at(i);
        }
    }
    masses
}

/// The tiles of a map of `len` points.
fn tiles(len: usize) -> impl Iterator<Item = std::ops::Range<usize>> {
    (0..len).step_by(TILE).map(move |a| a..(a + TILE).min(len))
}

/// Calls `each(first, last)` for every run of set bits of one bitmap row (columns, inclusive),
/// left to right: the next set bit, then the next clear bit after it, by trailing zeros.
fn for_each_run(row: &[u64], mut each: impl FnMut(usize, usize)) {
    let mut w = 0;
    let mut word = row.first().copied().unwrap_or(0);
    loop {
        while word == 0 {
            w += 1;
            if w >= row.len() {
                return;
            }
            word = row[w];
        }
        let first = w * 64 + word.trailing_zeros() as usize;
        // The clear bits at or after `first`.
        let mut clear = !row[w] & (!0u64 << (first % 64));
        while clear == 0 {
            w += 1;
            if w == row.len() {
                each(first, w * 64 - 1);
                return;
            }
            clear = !row[w];
        }
        let end = w * 64 + clear.trailing_zeros() as usize;
        each(first, end - 1);
        word = row[w] & (!0u64 << (end % 64));
    }
}

/// A run of set bits of one bitmap row, in [`largest_mass_by`].
#[derive(Clone, Copy)]
struct Run {
    /// First and last column, and the row.
    from: u32,
    to: u32,
    row: u32,
    /// Rank of its first point among the set points (raster order).
    first: u32,
    /// Union-find parent; a cluster's root is its first run in raster order.
    parent: u32,
}

/// Scratch of [`largest_mass_by`].
#[derive(Default)]
struct Runs {
    runs: Vec<Run>,
    mass: Vec<f64>,
    /// Per bitmap word: the rank of its first set bit among all set bits.
    rank: Vec<u32>,
    /// The set bits with a set neighbour.
    joined: Vec<u64>,
}

fn find(runs: &mut [Run], mut x: usize) -> usize {
    while runs[x].parent as usize != x {
        let up = runs[runs[x].parent as usize].parent;
        runs[x].parent = up;
        x = up as usize;
    }
    x
}

/// How [`largest_mass_by`] gets the t of a set point, given its rank among the set points
/// (raster order) and its index in the map.
trait PointT {
    /// The point's t.
    fn t(&self, rank: usize, point: usize) -> f64;
    /// True only if |t| at the point is surely no more than `m` (false says nothing).
    fn within(&self, rank: usize, point: usize, m: f64) -> bool;
}

/// t given for each set point.
#[cfg(test)]
struct GivenT<'a>(&'a [f64]);

#[cfg(test)]
impl PointT for GivenT<'_> {
    fn t(&self, rank: usize, _point: usize) -> f64 {
        self.0[rank]
    }
    fn within(&self, rank: usize, _point: usize, m: f64) -> bool {
        self.0[rank].abs() <= m
    }
}

/// t from the permuted sum S of each set point and the map's Q.
struct FromSums<'a> {
    s: &'a [f64],
    q: &'a [f64],
    n: f64,
}

impl PointT for FromSums<'_> {
    fn t(&self, rank: usize, point: usize) -> f64 {
        t_of(self.s[rank], self.q[point], self.n)
    }
    /// With D = fl(n Q − S²) as [`t_of`] computes it and t = fl(S · fl(√fl((n − 1) / D))) (at
    /// most 3 roundings of relative 2⁻⁵³ from S √((n − 1) / D)): fl((n − 1) S²) <
    /// fl(m² D (1 − 10⁻⁹)) (each side within 4 roundings) gives (n − 1) S² / D < m² (1 − 10⁻⁹ +
    /// 10⁻¹⁵), so |t| < m. No square root, no division.
    fn within(&self, rank: usize, point: usize, m: f64) -> bool {
        let (s, q, n) = (self.s[rank], self.q[point], self.n);
        let den = n * q - s * s;
        den > 0.0 && (n - 1.0) * s * s < m * m * den * (1.0 - 1e-9)
    }
}

/// The largest |mass| over the clusters of one sign of one pattern: `bits` holds the sign's
/// bitmap row by row (`row_words` words a row, the columns of a row from bit 0, `cols` columns).
/// A set point with no set neighbour is a cluster of its own, its mass its t, which is computed
/// only where it may exceed the largest so far. The other points' runs of set bits are joined
/// into 4-connected clusters when they share a column with a run of the row above (union-find);
/// each such cluster's mass is its t added in raster order, the same additions in the same
/// order as [`raster_masses`] on the flood fill's labels.
fn largest_mass_by(
    bits: &[u64],
    row_words: usize,
    cols: usize,
    at: &impl PointT,
    scratch: &mut Runs,
) -> f64 {
    let rw = row_words;
    let rows = bits.len().checked_div(rw).unwrap_or(0);
    let Runs {
        runs,
        mass,
        rank,
        joined,
    } = scratch;
    rank.clear();
    joined.clear();
    let mut total = 0u32;
    let row_of = |r: usize| bits.get(r * rw..(r + 1) * rw).unwrap_or(&[]);
    for r in 0..rows {
        let up = if r > 0 { row_of(r - 1) } else { &[] };
        let (row, down) = (row_of(r), row_of(r + 1));
        for (w, &b) in row.iter().enumerate() {
            rank.push(total);
            total += b.count_ones();
            let left = (b << 1) | if w > 0 { row[w - 1] >> 63 } else { 0 };
            let right = (b >> 1) | row.get(w + 1).map_or(0, |x| x << 63);
            let near = up.get(w).copied().unwrap_or(0) | down.get(w).copied().unwrap_or(0);
            joined.push(b & (left | right | near));
        }
    }
    if total == 0 {
        return 0.0;
    }
    let rank_of = |i: usize, bit: usize| rank[i] + (bits[i] & ((1u64 << bit) - 1)).count_ones();
    runs.clear();
    let mut above = 0..0;
    for (r, row) in joined.chunks(rw).enumerate() {
        let here = runs.len();
        let mut p = above.start;
        for_each_run(row, |a, b| {
            let id = runs.len();
            runs.push(Run {
                from: a as u32,
                to: b as u32,
                row: r as u32,
                first: rank_of(r * rw + a / 64, a % 64),
                parent: id as u32,
            });
            while p < above.end && (runs[p].to as usize) < a {
                p += 1;
            }
            let mut q = p;
            while q < above.end && runs[q].from as usize <= b {
                let (x, y) = (find(runs, id), find(runs, q));
                let (lo, hi) = (x.min(y), x.max(y));
                runs[hi].parent = lo as u32;
                q += 1;
            }
        });
        above = here..runs.len();
    }
    mass.clear();
    mass.resize(runs.len(), 0.0);
    for id in 0..runs.len() {
        let root = find(runs, id);
        let run = runs[id];
        let m = &mut mass[root];
        let point = run.row as usize * cols;
        for (k, c) in (run.from as usize..=run.to as usize).enumerate() {
            *m += at.t(run.first as usize + k, point + c);
        }
    }
    let mut largest = mass.iter().fold(0f64, |m, x| m.max(x.abs()));
    for r in 0..rows {
        for w in 0..rw {
            let i = r * rw + w;
            let mut alone = bits[i] & !joined[i];
            let point = r * cols + w * 64;
            while alone != 0 {
                let bit = alone.trailing_zeros() as usize;
                alone &= alone - 1;
                let (rank, point) = (rank_of(i, bit) as usize, point + bit);
                if !at.within(rank, point, largest) {
                    largest = largest.max(at.t(rank, point).abs());
                }
            }
        }
    }
    largest
}

/// [`largest_mass_by`] with the t of each set point given in raster order.
#[cfg(test)]
fn largest_mass(bits: &[u64], row_words: usize, t: &[f64], scratch: &mut Runs) -> f64 {
    largest_mass_by(bits, row_words, row_words * 64, &GivenT(t), scratch)
}

/// One pattern's supra-threshold points in the `cluster` loop.
#[derive(Default)]
struct Marks {
    /// Bitmaps of S above / below the thresholds, row by row (`row_words` words a row).
    pos: Vec<u64>,
    neg: Vec<u64>,
    /// S at the set points of each, in raster order: the first `n_pos` / `n_neg` (the rest is
    /// room to write into).
    s_pos: Vec<f64>,
    s_neg: Vec<f64>,
    n_pos: usize,
    n_neg: usize,
}

/// One strip of [`LANES`] columns of one map row, as the `cluster` loop reads it.
struct Row<'a> {
    /// The tables of the strip's points (stride [`LANES`]; 16 KiB for 20 subjects, so they stay
    /// in the core's first-level cache while every pattern of a block reads them).
    tables: &'a Tables,
    /// The strip's thresholds on S ([`LANES`], +∞ past the row's end).
    threshold_s: &'a [f64],
    /// The bitmap word that holds the strip, and the strip's first bit in it.
    word: usize,
    shift: usize,
}

/// S of one pattern (`masks`, one per group) at the [`LANES`] points of `tables`, its groups'
/// rows added left to right (as [`Tables::sum`] does), into `s`; and its signs against the
/// thresholds `thr`: bit k of the first word set where S is above the point's threshold, of the
/// second where below its negative (NaN: neither).
#[inline(always)]
fn lanes_portable(tables: &Tables, masks: &[u8], thr: &[f64], s: &mut [f64; LANES]) -> (u64, u64) {
    s.copy_from_slice(&tables.row(0, masks[0])[..LANES]);
    for (k, &mask) in masks.iter().enumerate().skip(1) {
        for (x, &y) in s.iter_mut().zip(tables.row(k, mask)) {
            *x += y;
        }
    }
    let (mut pos, mut neg) = (0u64, 0u64);
    for (k, (&x, &c)) in s.iter().zip(&thr[..LANES]).enumerate() {
        pos |= u64::from(x > c) << k;
        neg |= u64::from(x < -c) << k;
    }
    (pos, neg)
}

/// [`lanes_portable`] in AVX2: the same IEEE additions in the same order and the same
/// comparisons (ordered, so NaN compares false as in Rust; −c by flipping the sign bit, as
/// Rust's negation does), so the same bits.
#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2")]
#[inline]
fn lanes_avx2(tables: &Tables, masks: &[u8], thr: &[f64], s: &mut [f64; LANES]) -> (u64, u64) {
    use std::arch::x86_64::*;
    const _: () = assert!(LANES == 16);
    let load = |v: &[f64], k: usize| {
        let v = &v[4 * k..4 * k + 4];
        // SAFETY: `v` holds the 4 f64 read.
        unsafe { _mm256_loadu_pd(v.as_ptr()) }
    };
    let first = tables.row(0, masks[0]);
    let mut x = [0, 1, 2, 3].map(|k| load(first, k));
    for (k, &mask) in masks.iter().enumerate().skip(1) {
        let r = tables.row(k, mask);
        for (j, x) in x.iter_mut().enumerate() {
            *x = _mm256_add_pd(*x, load(r, j));
        }
    }
    let sign = _mm256_set1_pd(-0.0);
    let (mut pos, mut neg) = (0u64, 0u64);
    for (k, &x) in x.iter().enumerate() {
        let c = load(thr, k);
        let up = _mm256_movemask_pd(_mm256_cmp_pd::<_CMP_GT_OQ>(x, c));
        let down = _mm256_movemask_pd(_mm256_cmp_pd::<_CMP_LT_OQ>(x, _mm256_xor_pd(c, sign)));
        pos |= (up as u64) << (4 * k);
        neg |= (down as u64) << (4 * k);
        // SAFETY: `s` holds 16 f64, so 4 from 4 k.
        unsafe { _mm256_storeu_pd(s.as_mut_ptr().add(4 * k), x) };
    }
    (pos, neg)
}

/// Writes `s[k]` for every set bit k of `bits`, ascending, into `out` from `*at` on (`out` has
/// room for [`LANES`] more). The common case, at most one set bit, takes no branch: S at the
/// lowest set bit (at lane 0 when none is set) is written after the list and kept only when a
/// bit is set.
#[inline(always)]
fn push_set(out: &mut [f64], at: &mut usize, bits: u64, s: &[f64; LANES]) {
    out[*at] = s[bits.trailing_zeros() as usize & (LANES - 1)];
    *at += usize::from(bits != 0);
    let mut rest = bits & bits.wrapping_sub(1);
    while rest != 0 {
        out[*at] = s[rest.trailing_zeros() as usize];
        *at += 1;
        rest &= rest - 1;
    }
}

/// Every pattern of `masks` (`g` masks a pattern) over one strip, into its marks: S by `lanes`,
/// the signs into the bitmap words, S kept at the points above threshold.
#[inline(always)]
fn mark_row_body(
    row: &Row<'_>,
    masks: &[u8],
    g: usize,
    marks: &mut [Marks],
    lanes: impl Fn(&Tables, &[u8], &[f64], &mut [f64; LANES]) -> (u64, u64),
) {
    let mut s = [0f64; LANES];
    for (pattern, m) in masks.chunks(g).zip(marks.iter_mut()) {
        let (p, n) = lanes(row.tables, pattern, row.threshold_s, &mut s);
        let (pos, neg) = (&mut m.pos[row.word], &mut m.neg[row.word]);
        if row.shift == 0 {
            (*pos, *neg) = (p, n);
        } else {
            *pos |= p << row.shift;
            *neg |= n << row.shift;
        }
        push_set(&mut m.s_pos, &mut m.n_pos, p, &s);
        push_set(&mut m.s_neg, &mut m.n_neg, n, &s);
    }
}

fn mark_row_portable(row: &Row<'_>, masks: &[u8], g: usize, marks: &mut [Marks]) {
    mark_row_body(row, masks, g, marks, lanes_portable);
}

/// The strip loop compiled for AVX2 around [`lanes_avx2`].
#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2")]
fn mark_row_avx2(row: &Row<'_>, masks: &[u8], g: usize, marks: &mut [Marks]) {
    mark_row_body(row, masks, g, marks, |t, m, c, s| lanes_avx2(t, m, c, s));
}

fn mark_row(row: &Row<'_>, masks: &[u8], g: usize, marks: &mut [Marks]) {
    #[cfg(target_arch = "x86_64")]
    if std::arch::is_x86_feature_detected!("avx2") {
        // SAFETY: the CPU supports AVX2 (checked above).
        unsafe { mark_row_avx2(row, masks, g, marks) };
        return;
    }
    mark_row_portable(row, masks, g, marks);
}

/// Every subject's points `at`, into `out`.
fn subject_points<'a>(maps: &[&'a [f32]], at: std::ops::Range<usize>, out: &mut Vec<&'a [f32]>) {
    out.clear();
    out.extend(maps.iter().map(|m| &m[at.clone()]));
}

/// The `cluster` side of one map: the observed clusters (labels and masses) and, per pattern,
/// the largest |mass|.
fn cluster_map(
    input: &MapInput<'_>,
    flips: &Flips,
    mark: fn(&Row<'_>, &[u8], usize, &mut [Marks]),
) -> MapResult {
    let n = input.maps.len() as f64;
    let len = input.q.len();
    let cols = input.cols;
    let rows = len.checked_div(cols).unwrap_or(0);
    let row_words = cols.div_ceil(64);
    let g = flips.groups.len();
    let count = flips.count();
    let mut tables = Tables::build(&[], flips);
    let mut part: Vec<&[f32]> = Vec::with_capacity(input.maps.len());
    let points = |at, part: &mut _| subject_points(&input.maps, at, part);
    // The observed map: pattern 0 through the same tables, clusters by flood fill.
    let mut s_obs = vec![0f64; len];
    for (r, s) in s_obs.chunks_mut(cols.max(1)).enumerate().take(rows) {
        points(r * cols..(r + 1) * cols, &mut part);
        tables.build_into(&part, flips);
        tables.sum(&flips.masks[..g], 0..cols, s);
    }
    let sign: Vec<i8> = s_obs
        .iter()
        .zip(input.threshold_s)
        .map(|(&x, &c)| i8::from(x > c) - i8::from(x < -c))
        .collect();
    let mut labels = vec![0; len];
    let found = label_clusters(&sign, cols, &mut labels);
    let masses = raster_masses(&labels, found, |i| t_of(s_obs[i], input.q[i], n));
    // A block of patterns at a time, one strip of a map row at a time: each pattern's S over
    // the strip, its signs into its bitmaps and S at the supra-threshold points only (in
    // raster order: strips left to right, rows top to bottom); then each pattern's clusters
    // from its bitmaps.
    let block_len = BLOCK;
    let mut marks: Vec<Marks> = (0..block_len.min(count))
        .map(|_| Marks {
            pos: vec![0; rows * row_words],
            neg: vec![0; rows * row_words],
            ..Marks::default()
        })
        .collect();
    let mut threshold_s = [f64::INFINITY; LANES];
    let mut runs = Runs::default();
    let mut null = Vec::with_capacity(count);
    for block in (0..count).step_by(block_len) {
        let patterns = block..(block + block_len).min(count);
        let marks = &mut marks[..patterns.len()];
        for m in marks.iter_mut() {
            (m.n_pos, m.n_neg) = (0, 0);
        }
        for r in 0..rows {
            // Room for a whole row more of each sign's S, and a strip beyond.
            for m in marks.iter_mut() {
                for (s, n) in [(&mut m.s_pos, m.n_pos), (&mut m.s_neg, m.n_neg)] {
                    if s.len() < n + cols + LANES {
                        s.resize(n + cols + LANES, 0.0);
                    }
                }
            }
            for a in (0..cols).step_by(LANES) {
                let at = r * cols + a..r * cols + (a + LANES).min(cols);
                points(at.clone(), &mut part);
                tables.build_into(&part, flips);
                threshold_s.fill(f64::INFINITY);
                threshold_s[..at.len()].copy_from_slice(&input.threshold_s[at]);
                let row = Row {
                    tables: &tables,
                    threshold_s: &threshold_s,
                    word: r * row_words + a / 64,
                    shift: a % 64,
                };
                mark(
                    &row,
                    &flips.masks[patterns.start * g..patterns.end * g],
                    g,
                    marks,
                );
            }
        }
        for m in marks.iter() {
            let t = |s| FromSums { s, q: input.q, n };
            let pos = largest_mass_by(&m.pos, row_words, cols, &t(&m.s_pos[..m.n_pos]), &mut runs);
            let neg = largest_mass_by(&m.neg, row_words, cols, &t(&m.s_neg[..m.n_neg]), &mut runs);
            null.push(pos.max(neg));
        }
    }
    MapResult {
        null,
        counts: Vec::new(),
        labels,
        masses,
        ratio: Vec::new(),
    }
}

fn run_map(input: &MapInput<'_>, flips: &Flips, correction: Correction) -> MapResult {
    if correction == Correction::Cluster {
        return cluster_map(input, flips, mark_row);
    }
    let len = input.q.len();
    let tables = Tables::build(&input.maps, flips);
    let g = flips.groups.len();
    let count = flips.count();
    let mut s = vec![0f64; TILE.min(len)];
    let mut s_obs = vec![0f64; len];
    tables.sum(&flips.masks[..g], 0..len, &mut s_obs);
    let mut out = MapResult {
        null: Vec::new(),
        counts: Vec::new(),
        labels: Vec::new(),
        masses: Vec::new(),
        ratio: Vec::new(),
    };
    let ratio = |x: f64, q: f64| if q > 0.0 { x * x / q } else { f64::NAN };
    match correction {
        Correction::Max => {
            out.ratio = s_obs
                .iter()
                .zip(input.q)
                .map(|(&x, &q)| ratio(x, q))
                .collect();
            // The largest over a map is the largest of its tiles' largest (NaN skipped). With
            // x2 = fl(S²), fl(x2/Q) < M wherever x2 < fl(fl(M·Q)·(1 − 1e-9)) (each rounding is
            // below 1.2e-16 relative), so the division runs only where a point may raise M.
            out.null = vec![0f64; count];
            for r in tiles(len) {
                let s = &mut s[..r.len()];
                for (masks, largest) in flips.masks.chunks(g).zip(out.null.iter_mut()) {
                    tables.sum(masks, r.clone(), s);
                    *largest = s
                        .iter()
                        .zip(&input.q[r.clone()])
                        .fold(*largest, |m, (&x, &q)| {
                            if x * x < m * q * (1.0 - 1e-9) {
                                return m;
                            }
                            let r = ratio(x, q);
                            if r.is_nan() {
                                m
                            } else {
                                m.max(r)
                            }
                        });
                }
            }
        }
        Correction::Cluster => unreachable!("cluster_map runs the cluster correction"),
        Correction::Fdr | Correction::None => {
            out.counts = vec![0; len];
            for r in tiles(len) {
                let s = &mut s[..r.len()];
                let counts = &mut out.counts[r.clone()];
                for masks in flips.masks.chunks(g) {
                    tables.sum(masks, r.clone(), s);
                    for ((c, &x), &o) in counts.iter_mut().zip(&*s).zip(&s_obs[r.clone()]) {
                        *c += u32::from(x.abs() >= o.abs());
                    }
                }
            }
        }
    }
    out
}

/// The result of [`test`]: per point t, p, cluster id, mean and sem (each `maps × points`).
#[derive(Clone, Debug, PartialEq)]
pub struct Tested {
    /// Point-wise t (two-pass, f64).
    pub t: Vec<f64>,
    /// Corrected p (NaN outside clusters for `cluster`, and where the t is not finite).
    pub p: Vec<f64>,
    /// Cluster ids (0: none), numbered over maps in order.
    pub cluster: Vec<u32>,
    /// Mean difference.
    pub mean: Vec<f64>,
    /// SEM of the difference (SD with ddof 1 / √n).
    pub sem: Vec<f64>,
}

/// The settings of [`test`].
#[derive(Clone, Copy, Debug)]
pub struct Settings {
    /// Correction.
    pub correction: Correction,
    /// |t| above which points join clusters.
    pub threshold_t: f64,
    /// Maps per family (the pairs of one measure); the maps are grouped in families in order.
    pub maps_per_family: usize,
    /// Rows (frequencies) of a map.
    pub rows: usize,
    /// Columns (time points) of a map.
    pub cols: usize,
}

/// The point-wise t and the corrected p-values of `subjects` (each `maps × rows × cols` long),
/// under the flip patterns `flips`.
pub fn test(subjects: &[&[f32]], flips: &Flips, settings: Settings) -> Tested {
    let n = subjects.len();
    let nf = n as f64;
    let total = subjects.first().map_or(0, |s| s.len());
    let mut t = vec![0f64; total];
    let mut mean = vec![0f64; total];
    let mut sem = vec![0f64; total];
    let mut q = vec![0f64; total];
    t.par_iter_mut()
        .zip(mean.par_iter_mut())
        .zip(sem.par_iter_mut())
        .zip(q.par_iter_mut())
        .enumerate()
        .for_each(|(i, (((t, m), e), q))| {
            let mu = subjects.iter().map(|d| f64::from(d[i])).sum::<f64>() / nf;
            let ss: f64 = subjects
                .iter()
                .map(|d| (f64::from(d[i]) - mu).powi(2))
                .sum();
            let se = (ss / (nf - 1.0)).sqrt() / nf.sqrt();
            *m = mu;
            *e = se;
            *t = mu / se;
            *q = subjects.iter().map(|d| f64::from(d[i]).powi(2)).sum();
            if !q.is_finite() {
                *q = f64::NAN;
            }
        });
    let c2 = settings.threshold_t * settings.threshold_t;
    // Compared with the f64 sums S, for the observed map and every pattern alike.
    let threshold_s: Vec<f64> = q.iter().map(|&q| threshold_of_s(q, c2, nf)).collect();
    Tested {
        p: Vec::new(),
        cluster: Vec::new(),
        t,
        mean,
        sem,
    }
    .with_p(subjects, &q, &threshold_s, flips, settings)
}

impl Tested {
    fn with_p(
        mut self,
        subjects: &[&[f32]],
        q: &[f64],
        threshold_s: &[f64],
        flips: &Flips,
        settings: Settings,
    ) -> Tested {
        let total = self.t.len();
        let fam = settings.maps_per_family.max(1);
        let map_len = settings.rows * settings.cols;
        let maps = total.checked_div(map_len).unwrap_or(0);
        let results: Vec<MapResult> = (0..maps)
            .into_par_iter()
            .map(|k| {
                let r = k * map_len..(k + 1) * map_len;
                let input = MapInput {
                    maps: subjects.iter().map(|d| &d[r.clone()]).collect(),
                    q: &q[r.clone()],
                    threshold_s: &threshold_s[r],
                    cols: settings.cols,
                };
                run_map(&input, flips, settings.correction)
            })
            .collect();
        let count = flips.count() as f64;
        self.p = vec![f64::NAN; total];
        self.cluster = vec![0; total];
        let mut next_id = 0u32;
        for (f, family) in results.chunks(fam).enumerate() {
            let base = f * fam * map_len;
            let null: Vec<f64> = match settings.correction {
                Correction::Cluster | Correction::Max => (0..flips.count())
                    .map(|j| family.iter().map(|r| r.null[j]).fold(0f64, f64::max))
                    .collect(),
                _ => Vec::new(),
            };
            let share = |x: f64| null.iter().filter(|&&v| v >= x).count() as f64 / count;
            match settings.correction {
                Correction::Cluster => {
                    for (m, r) in family.iter().enumerate() {
                        let ps: Vec<f64> = r.masses.iter().map(|x| share(x.abs())).collect();
                        for (i, &l) in r.labels.iter().enumerate() {
                            if l > 0 {
                                let at = base + m * map_len + i;
                                self.cluster[at] = next_id + l;
                                self.p[at] = ps[l as usize - 1];
                            }
                        }
                        next_id += r.masses.len() as u32;
                    }
                }
                Correction::Max => {
                    for (m, r) in family.iter().enumerate() {
                        for (i, &x) in r.ratio.iter().enumerate() {
                            if !x.is_nan() {
                                self.p[base + m * map_len + i] = share(x);
                            }
                        }
                    }
                }
                Correction::Fdr | Correction::None => {
                    let mut raw = vec![f64::NAN; family.len() * map_len];
                    for (m, r) in family.iter().enumerate() {
                        for (i, &c) in r.counts.iter().enumerate() {
                            let at = base + m * map_len + i;
                            if q[at].is_finite() && q[at] > 0.0 {
                                raw[m * map_len + i] = f64::from(c) / count;
                            }
                        }
                    }
                    if settings.correction == Correction::Fdr {
                        raw = stats::bh_adjust(&raw);
                    }
                    self.p[base..base + raw.len()].copy_from_slice(&raw);
                }
            }
        }
        self
    }
}

fn check_range(field: &str, range: Option<[f64; 2]>) -> Result<(), StageError> {
    match range {
        Some([lo, hi]) if !(lo.is_finite() && hi.is_finite() && lo <= hi) => {
            Err(StageError::param(
                field,
                format!(
                    "expected [start, end] with start ≤ end, got {}",
                    range_text([lo, hi])
                ),
            ))
        }
        _ => Ok(()),
    }
}

fn check_probability(field: &str, x: f64) -> Result<(), StageError> {
    if x > 0.0 && x < 1.0 {
        Ok(())
    } else {
        Err(StageError::param(
            field,
            format!("expected a probability between 0 and 1 (exclusive), got {x}"),
        ))
    }
}

impl Op for Contrast {
    type Params = ContrastParams;
    const NAME: &'static str = "contrast";
    const VERSION: u32 = 2;

    fn check(p: &Self::Params) -> Result<(), StageError> {
        match (&p.compare, &p.condition) {
            (Some(_), Some(_)) => {
                return Err(StageError::param(
                    "condition",
                    "give either `compare: [a, b]` (a − b) or `condition: a` (a against 0), \
                     not both",
                ))
            }
            (None, None) => {
                return Err(StageError::param(
                    "compare",
                    "give `compare: [a, b]` (the paired difference a − b) or `condition: a` \
                     (a tested against 0)",
                ))
            }
            (Some([a, b]), None) if a == b => {
                return Err(StageError::param(
                    "compare",
                    format!("`compare` names condition `{a}` twice: give two different conditions"),
                ))
            }
            _ => {}
        }
        if let Some(Names::Many(v)) = &p.measure {
            if v.is_empty() {
                return Err(StageError::param("measure", "give at least one measure"));
            }
            for (k, m) in v.iter().enumerate() {
                if v[..k].contains(m) {
                    return Err(StageError::param(
                        format!("measure[{k}]"),
                        format!("measure `{m}` is listed twice"),
                    ));
                }
            }
        }
        check_range("freqs", p.freqs)?;
        check_range("times", p.times)?;
        check_probability("threshold", p.threshold)?;
        check_probability("alpha", p.alpha)?;
        let least = (1.0 / p.alpha).ceil();
        if f64::from(p.permutations) < least {
            return Err(StageError::param(
                "permutations",
                format!(
                    "{} permutations cannot give a p-value at or below alpha {}: give at least {least}",
                    p.permutations, p.alpha
                ),
            ));
        }
        Ok(())
    }

    fn joins_subjects(_p: &Self::Params) -> bool {
        true
    }

    fn layout(p: &Self::Params, inputs: &[InputLayout<'_>]) -> Result<Option<Layout>, StageError> {
        let ids = subject_ids(inputs.iter().map(|i| i.subject))?;
        let layouts: Vec<(&str, &Layout)> = ids
            .iter()
            .zip(inputs)
            .map(|(id, i)| (*id, i.layout))
            .collect();
        let prepared = plan_all(p, &layouts)?;
        Ok(Some(output_layout(p, &prepared, ids.len())))
    }

    fn run(
        p: &Self::Params,
        inputs: &[Input<'_>],
        notes: &mut Notes,
    ) -> Result<LabelledArray, StageError> {
        let prepared: Vec<LabelledArray> = inputs
            .iter()
            .map(|i| Self::prepare(p, i).unwrap_or_else(|| prepare_one(p, i.array)))
            .collect::<Result<_, _>>()?;
        let prepared: Vec<Input<'_>> = inputs
            .iter()
            .zip(&prepared)
            .map(|(i, array)| Input { array, ..*i })
            .collect();
        Self::join(p, &prepared, notes)
    }

    fn prepares(_p: &Self::Params) -> bool {
        true
    }

    /// Each subject is reduced to its difference maps on its own, so the runner need not hold
    /// every subject's input at once.
    fn prepare(p: &Self::Params, input: &Input<'_>) -> Option<Result<LabelledArray, StageError>> {
        let id = input.subject.unwrap_or("?");
        Some(prepare_one(p, input.array).map_err(|e| with_subject(e, id)))
    }

    fn join(
        p: &Self::Params,
        prepared: &[Input<'_>],
        notes: &mut Notes,
    ) -> Result<LabelledArray, StageError> {
        let ids = subject_ids(prepared.iter().map(|i| i.subject))?;
        let first = &prepared[0].array.layout;
        for (id, i) in ids.iter().zip(prepared).skip(1) {
            if i.array.layout.coords != first.coords || i.array.layout.dims != first.dims {
                return Err(StageError::data(format!(
                    "subjects {} and {id} cannot be compared: their difference maps differ in \
                     their axes",
                    ids[0]
                )));
            }
        }
        let n = ids.len();
        let values: Vec<&[f32]> = prepared
            .iter()
            .map(|i| {
                i.array
                    .real_values()?
                    .as_slice()
                    .ok_or_else(|| StageError::data("internal: prepared values not contiguous"))
            })
            .collect::<Result<_, _>>()?;
        let shape = first.shape();
        let (measures, pairs, rows, cols) = (shape[0], shape[1], shape[2], shape[3]);
        let count = pattern_count(p, n);
        let exact = exact_count(p, n).is_some();
        let flips = Flips::new(n, count, exact, p.seed);
        let floor = flips.always_reaching();
        let smallest = floor as f64 / count as f64;
        if smallest > p.alpha {
            let why = if exact {
                format!(
                    "{n} subjects allow only {count} sign-flip patterns, and a pattern and its \
                     mirror image (every sign flipped) give the same |t|"
                )
            } else {
                format!(
                    "the {count} sign-flip patterns include the unflipped data and its mirror \
                     image (same |t|) {floor} times"
                )
            };
            notes.warn(format!(
                "contrast: {why}, so the smallest possible p is {floor}/{count} = {}, above \
                 alpha {}: nothing can be significant",
                number_text(smallest),
                p.alpha
            ));
        }
        let family = pairs * rows * cols;
        if p.correction == Correction::Fdr && smallest * family as f64 > p.alpha {
            notes.warn(format!(
                "contrast: fdr over {family} points per measure needs permutation p-values down \
                 to alpha / {family}, but {count} patterns give none below {floor}/{count}: \
                 nothing can be significant unless permutations ≥ {:.0} (or narrow pairs, freqs, \
                 times)",
                (family as f64 / p.alpha).ceil()
            ));
        }
        let settings = Settings {
            correction: p.correction,
            threshold_t: stats::t_isf(p.threshold / 2.0, (n - 1) as f64),
            maps_per_family: pairs,
            rows,
            cols,
        };
        let tested = test(&values, &flips, settings);
        let layout = output_layout(p, first, n);
        let per = measures * pairs * rows * cols;
        let mut out = vec![0f32; STATISTICS.len() * per];
        for (k, stat) in [
            &tested.t,
            &tested.p,
            &tested.cluster.iter().map(|&c| f64::from(c)).collect(),
            &tested.mean,
            &tested.sem,
        ]
        .into_iter()
        .enumerate()
        {
            for (o, &v) in out[k * per..(k + 1) * per].iter_mut().zip(stat.iter()) {
                *o = v as f32;
            }
        }
        let values = ArrayD::from_shape_vec(IxDyn(&layout.shape()), out)
            .map_err(|e| StageError::data(format!("internal: {e}")))?;
        LabelledArray::real(layout, values)
    }
}

/// A cluster's rows, columns, mass, peak t and p, as the findings table gathers them.
type Extent = ([usize; 2], [usize; 2], f64, f64, f64);

/// The columns of the findings table.
pub const FINDINGS_COLUMNS: [&str; 12] = [
    "measure",
    "channel_a",
    "channel_b",
    "cluster",
    "freq_from",
    "freq_to",
    "time_from",
    "time_to",
    "mass",
    "peak_t",
    "p",
    "significant",
];

/// The findings table of a `contrast` output, or `None` for any other array: one row per
/// cluster (`cluster` correction; mass = Σ t of its points as stored, peak_t the t of largest
/// magnitude), or per point with p ≤ alpha (`max`, `fdr`, `none`; cluster and mass `n/a`).
/// Rows follow measure, pair, then cluster id or raster order.
pub fn findings_tsv(array: &LabelledArray) -> Option<String> {
    let layout = &array.layout;
    if layout.meta.extra.get("table_form") != Some(&json!(TABLE_FORM)) {
        return None;
    }
    let values = array.real_values().ok()?.as_slice()?;
    let alpha = layout.meta.extra.get("alpha")?.as_f64()?;
    let clusters = layout.meta.extra.get("correction") == Some(&json!(Correction::Cluster));
    let shape = layout.shape();
    let (measures, pairs, rows, cols) = (shape[1], shape[2], shape[3], shape[4]);
    let per = measures * pairs * rows * cols;
    let stat = |k: usize, i: usize| f64::from(values[k * per + i]);
    let (freqs, times) = (layout.numbers("freq").ok()?, layout.numbers("time").ok()?);
    let mut out = FINDINGS_COLUMNS.join("\t");
    out.push('\n');
    let yes_no = |p: f64| if p <= alpha { "true" } else { "false" };
    for m in 0..measures {
        for q in 0..pairs {
            let base = (m * pairs + q) * rows * cols;
            let measure = coord_text(&layout.coords[1], m);
            let pair = layout.coords[2].pairs()?.get(q)?;
            let head = format!("{measure}\t{}\t{}", pair[0], pair[1]);
            if clusters {
                // id → (rows, cols, mass, peak t, p)
                let mut found: BTreeMap<u32, Extent> = BTreeMap::new();
                for i in 0..rows * cols {
                    let id = stat(2, base + i) as u32;
                    if id == 0 {
                        continue;
                    }
                    let (r, c, t) = (i / cols, i % cols, stat(0, base + i));
                    let e = found
                        .entry(id)
                        .or_insert(([r, r], [c, c], 0.0, t, stat(1, base + i)));
                    e.0 = [e.0[0].min(r), e.0[1].max(r)];
                    e.1 = [e.1[0].min(c), e.1[1].max(c)];
                    e.2 += t;
                    if t.abs() > e.3.abs() {
                        e.3 = t;
                    }
                }
                for (id, (r, c, mass, peak, p)) in found {
                    let _ = writeln!(
                        out,
                        "{head}\t{id}\t{}\t{}\t{}\t{}\t{}\t{}\t{}\t{}",
                        number_text(freqs[r[0]]),
                        number_text(freqs[r[1]]),
                        number_text(times[c[0]]),
                        number_text(times[c[1]]),
                        number_text(mass),
                        number_text(peak),
                        number_text(p),
                        yes_no(p)
                    );
                }
            } else {
                for i in 0..rows * cols {
                    let p = stat(1, base + i);
                    if p.is_nan() || p > alpha {
                        continue;
                    }
                    let (f, t) = (number_text(freqs[i / cols]), number_text(times[i % cols]));
                    let _ = writeln!(
                        out,
                        "{head}\tn/a\t{f}\t{f}\t{t}\t{t}\tn/a\t{}\t{}\ttrue",
                        number_text(stat(0, base + i)),
                        number_text(p)
                    );
                }
            }
        }
    }
    Some(out)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::testutil::{assert_close, read_f64, read_json, read_vec};

    fn f32s(v: &[f64]) -> Vec<f32> {
        v.iter().map(|&x| x as f32).collect()
    }

    /// The numpy fixture's 7 subjects as per-subject arrays.
    fn ttest_inputs() -> (Vec<String>, Vec<LabelledArray>) {
        let x = read_f64("stats", "ttest_input");
        let ids: Vec<String> = (1..=x.shape()[0]).map(|k| format!("sub-{k:02}")).collect();
        let pairs: Vec<[String; 2]> = [["F3", "P4"], ["F3", "Cz"], ["Cz", "P4"]]
            .map(|p| p.map(String::from))
            .to_vec();
        let layout = Layout {
            dims: DIMS.map(String::from).to_vec(),
            coords: vec![
                Coord::Labels(vec!["high".into(), "low".into()]),
                Coord::Labels(vec!["plv".into(), "wpli".into()]),
                Coord::Pairs(pairs.into()),
                Coord::Numbers(vec![4.0, 6.0, 8.0, 10.0]),
                Coord::Numbers(vec![0.0, 0.1, 0.2, 0.3, 0.4]),
            ],
            units: "1".into(),
            ..Layout::default()
        };
        let arrays = (0..ids.len())
            .map(|k| {
                let v = x.index_axis(ndarray::Axis(0), k).mapv(|v| v as f32);
                LabelledArray::real(layout.clone(), v).unwrap()
            })
            .collect();
        (ids, arrays)
    }

    fn params(v: serde_json::Value) -> ContrastParams {
        crate::op::parse_params(&v).unwrap()
    }

    fn run(
        p: &ContrastParams,
        ids: &[String],
        arrays: &[LabelledArray],
    ) -> Result<LabelledArray, StageError> {
        run_noting(p, ids, arrays, &mut Notes::default())
    }

    fn run_noting(
        p: &ContrastParams,
        ids: &[String],
        arrays: &[LabelledArray],
        notes: &mut Notes,
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
        Contrast::check(p)?;
        let layouts: Vec<InputLayout> = inputs
            .iter()
            .map(|i| InputLayout {
                stage: i.stage,
                subject: i.subject,
                layout: &i.array.layout,
            })
            .collect();
        let planned = Contrast::layout(p, &layouts)?;
        let out = Contrast::run(p, &inputs, notes)?;
        assert_eq!(planned.as_ref(), Some(&out.layout));
        Ok(out)
    }

    /// `n` subjects whose values are positive at every point and differ between subjects, one
    /// condition `a` (tested against 0) over 1 measure, 2 pairs, 3 freqs and 4 times: every flip
    /// pattern but the unflipped one and its mirror image gives a smaller |Σ ±dᵢ| everywhere, so
    /// a smaller |t| at every point and a smaller mass for every cluster.
    fn same_sign_study(n: usize) -> (Vec<String>, Vec<LabelledArray>) {
        let layout = Layout {
            dims: DIMS.map(String::from).to_vec(),
            coords: vec![
                Coord::Labels(vec!["a".into()]),
                Coord::Labels(vec!["plv".into()]),
                Coord::Pairs(vec![["F3".into(), "P4".into()], ["F3".into(), "Cz".into()]].into()),
                Coord::Numbers(vec![4.0, 6.0, 8.0]),
                Coord::Numbers(vec![0.0, 0.1, 0.2, 0.3]),
            ],
            units: "1".into(),
            ..Layout::default()
        };
        let ids = (1..=n).map(|k| format!("sub-{k:02}")).collect();
        let arrays = (0..n)
            .map(|k| {
                let v: Vec<f32> = (0..24)
                    .map(|i| 0.5 + 0.1 * k as f32 + 0.01 * i as f32)
                    .collect();
                let v = ArrayD::from_shape_vec(IxDyn(&layout.shape()), v).unwrap();
                LabelledArray::real(layout.clone(), v).unwrap()
            })
            .collect();
        (ids, arrays)
    }

    fn smallest_p(out: &LabelledArray) -> f64 {
        statistic(out, "p")
            .into_iter()
            .filter(|p| !p.is_nan())
            .fold(f64::INFINITY, f64::min)
    }

    #[test]
    fn smallest_p_of_all_patterns_is_two_over_two_to_the_n_and_warns_above_alpha() {
        // The exact two-sided sign-flip test (Nichols & Holmes 2002, Hum Brain Mapp 15:1–25):
        // p counts the observed pattern among all 2^n, and its mirror image gives the same |t|,
        // so no p is below 2 / 2^n; same-sign subjects reach it under every correction.
        for n in 3..=7usize {
            let (ids, arrays) = same_sign_study(n);
            let floor = 2.0 / (1u64 << n) as f64;
            for correction in ["cluster", "max", "fdr", "none"] {
                for alpha in [0.01, 0.05, 0.0625, 0.1] {
                    let p = params(json!({ "over": "subjects", "condition": "a",
                                           "correction": correction, "permutations": 4096,
                                           "alpha": alpha }));
                    let mut notes = Notes::default();
                    let out = run_noting(&p, &ids, &arrays, &mut notes).unwrap();
                    let what = format!("n {n} {correction} alpha {alpha}");
                    assert_eq!(smallest_p(&out), floor, "{what}");
                    let warned = notes
                        .warnings
                        .iter()
                        .find(|w| w.contains("smallest possible p"));
                    assert_eq!(warned.is_some(), floor > alpha, "{what}: {notes:?}");
                    if let Some(w) = warned {
                        let text = format!("is 2/{} = {}", 1 << n, number_text(floor));
                        assert!(w.contains(&text), "{what}: {w}");
                    }
                }
            }
        }
    }

    #[test]
    fn smallest_p_of_random_patterns_counts_repeats_of_the_observed_and_its_mirror() {
        // Random flips: p = (b + 1) / (m + 1) over m random patterns and the observed one
        // (Phipson & Smyth 2010, Stat Appl Genet Mol Biol 9:39); a random pattern that happens
        // to be the unflipped one or its mirror image reaches the observed |t| too. 5 subjects
        // and 20 patterns (< 2^5, so random): 19 draws from 32 patterns hit either with
        // probability 1 − (30/32)^19 ≈ 0.7, so some seeds give a floor of 2/20 > alpha.
        let (ids, arrays) = same_sign_study(5);
        let mut floors = Vec::new();
        for seed in 1..=12u64 {
            let flips = Flips::new(5, 20, false, seed);
            // The patterns that negate no subject or all five, counted from the masks.
            let repeats = (0..20)
                .filter(|&k| {
                    let row = &flips.masks[k * flips.groups.len()..(k + 1) * flips.groups.len()];
                    row == [0] || row == [31]
                })
                .count();
            assert_eq!(flips.always_reaching(), repeats);
            let p = params(
                json!({ "over": "subjects", "condition": "a", "correction": "max",
                                   "permutations": 20, "alpha": 0.05, "seed": seed }),
            );
            let mut notes = Notes::default();
            let out = run_noting(&p, &ids, &arrays, &mut notes).unwrap();
            let floor = repeats as f64 / 20.0;
            // The output stores p as f32.
            assert_eq!(smallest_p(&out), f64::from(floor as f32), "seed {seed}");
            let warned = notes
                .warnings
                .iter()
                .any(|w| w.contains(&format!("smallest possible p is {repeats}/20")));
            assert_eq!(warned, floor > 0.05, "seed {seed}: {notes:?}");
            floors.push(repeats);
        }
        assert!(
            floors.contains(&1) && floors.iter().any(|&k| k > 1),
            "{floors:?}"
        );
    }

    fn statistic(out: &LabelledArray, name: &str) -> Vec<f64> {
        let k = STATISTICS.iter().position(|s| *s == name).unwrap();
        out.real_values()
            .unwrap()
            .index_axis(ndarray::Axis(0), k)
            .iter()
            .map(|&v| f64::from(v))
            .collect()
    }

    #[test]
    fn point_t_matches_scipy_ttest_rel_and_ttest_1samp() {
        // Reference: scipy.stats.ttest_rel / ttest_1samp and scipy.stats.sem (gen_stats.py).
        // The differences are formed in f32 (as stored), scipy's in f64: a difference near 0
        // then carries ~1e-8 absolute error, so t (mostly |t| < 5) is checked to 1e-4
        // absolute; mean and SEM to 1e-6. The t formula itself is checked to 1e-12 on f32 data
        // in `exact_family_wise_p_values_match_a_scipy_enumeration`.
        let (ids, arrays) = ttest_inputs();
        let p = params(json!({ "over": "subjects", "compare": ["high", "low"],
                               "correction": "none", "permutations": 128 }));
        let out = run(&p, &ids, &arrays).unwrap();
        assert_eq!(
            out.layout.dims,
            ["statistic", "measure", "pair", "freq", "time"]
        );
        assert_close(
            &statistic(&out, "t"),
            &read_vec("stats", "ttest_rel"),
            1.0,
            1e-4,
            "t",
        );
        assert_close(
            &statistic(&out, "mean"),
            &read_vec("stats", "ttest_mean"),
            1e-2,
            1e-6,
            "mean",
        );
        assert_close(
            &statistic(&out, "sem"),
            &read_vec("stats", "ttest_sem"),
            1e-2,
            1e-6,
            "sem",
        );
        let p = params(
            json!({ "over": "subjects", "condition": "high", "correction": "none",
                               "permutations": 128 }),
        );
        let out = run(&p, &ids, &arrays).unwrap();
        assert_close(
            &statistic(&out, "t"),
            &read_vec("stats", "ttest_1samp"),
            1e-6,
            1e-6,
            "t1",
        );
    }

    fn family() -> (Vec<Vec<f32>>, Settings) {
        let meta = read_json("stats", "family");
        let get = |k: &str| meta[k].as_u64().unwrap() as usize;
        let d = read_f64("stats", "family_input");
        let n = get("subjects");
        let subjects = (0..n)
            .map(|k| {
                f32s(
                    &d.index_axis(ndarray::Axis(0), k)
                        .iter()
                        .copied()
                        .collect::<Vec<_>>(),
                )
            })
            .collect();
        let settings = Settings {
            correction: Correction::Cluster,
            threshold_t: stats::t_isf(meta["threshold"].as_f64().unwrap() / 2.0, (n - 1) as f64),
            maps_per_family: get("pairs"),
            rows: get("rows"),
            cols: get("cols"),
        };
        (subjects, settings)
    }

    fn test_family(correction: Correction) -> Tested {
        let (subjects, settings) = family();
        let views: Vec<&[f32]> = subjects.iter().map(|s| s.as_slice()).collect();
        let n = views.len();
        let flips = Flips::new(n, 1 << n, true, 0);
        test(
            &views,
            &flips,
            Settings {
                correction,
                ..settings
            },
        )
    }

    #[test]
    fn exact_family_wise_p_values_match_a_scipy_enumeration() {
        // Reference: gen_stats.py enumerates all 64 sign patterns of 6 subjects with
        // scipy.stats.ttest_1samp, labels clusters with scipy.ndimage.label and adjusts with
        // scipy.stats.false_discovery_control: the p-values are shares of 64, so equal exactly.
        let meta = read_json("stats", "family");
        let c = stats::t_isf(0.025, 5.0);
        assert!((c - meta["threshold_t"].as_f64().unwrap()).abs() < 1e-12 * c);
        let want_t = read_vec("stats", "family_t");
        let cluster = test_family(Correction::Cluster);
        assert_close(&cluster.t, &want_t, 1e-12, 1e-12, "t");
        let labels: Vec<f64> = cluster.cluster.iter().map(|&c| f64::from(c)).collect();
        assert_eq!(labels, read_vec("stats", "family_labels"));
        let same = |got: &[f64], want: &[f64], what: &str| {
            assert_eq!(got.len(), want.len());
            for (i, (g, w)) in got.iter().zip(want).enumerate() {
                assert!(
                    g == w || (g.is_nan() && w.is_nan()),
                    "{what} [{i}]: {g} vs {w}"
                );
            }
        };
        same(
            &cluster.p,
            &read_vec("stats", "family_p_cluster"),
            "cluster p",
        );
        let max = test_family(Correction::Max);
        same(&max.p, &read_vec("stats", "family_p_max"), "max p");
        let none = test_family(Correction::None);
        same(&none.p, &read_vec("stats", "family_p_none"), "none p");
        let fdr = test_family(Correction::Fdr);
        assert_close(
            &fdr.p,
            &read_vec("stats", "family_p_fdr"),
            1e-300,
            1e-14,
            "fdr p",
        );
    }

    #[test]
    fn point_p_matches_scipy_permutation_test() {
        // Reference: scipy.stats.permutation_test(permutation_type='samples') on one sample
        // (sign flips), statistic |t|, all 2^8 patterns (gen_stats.py).
        let d = read_f64("stats", "flip_input");
        let (n, points) = (d.shape()[0], d.shape()[1]);
        let subjects: Vec<Vec<f32>> = (0..n)
            .map(|k| (0..points).map(|j| d[[k, j]] as f32).collect())
            .collect();
        let views: Vec<&[f32]> = subjects.iter().map(|s| s.as_slice()).collect();
        let settings = Settings {
            correction: Correction::None,
            threshold_t: 2.0,
            maps_per_family: 1,
            rows: 1,
            cols: points,
        };
        let got = test(&views, &Flips::new(n, 1 << n, true, 0), settings);
        assert_eq!(got.p, read_vec("stats", "flip_p"));
    }

    #[test]
    fn mirror_patterns_give_opposite_sums_exactly() {
        // The exactness that makes pattern 0 reproduce the observed map: table rows are
        // left-to-right sums, and negation commutes with rounding.
        use rand::{Rng, SeedableRng};
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(7);
        for n in [3usize, 5, 7, 12] {
            let data: Vec<Vec<f32>> = (0..n)
                .map(|_| (0..33).map(|_| rng.gen_range(-3.0..3.0)).collect())
                .collect();
            let views: Vec<&[f32]> = data.iter().map(|s| s.as_slice()).collect();
            let flips = Flips::new(n, 1 << n, true, 0);
            let tables = Tables::build(&views, &flips);
            let g = flips.groups.len();
            let (mut a, mut b) = (vec![0f64; 33], vec![0f64; 33]);
            for k in 0..1usize << n {
                let mirror = (1 << n) - 1 - k;
                tables.sum(&flips.masks[k * g..(k + 1) * g], 0..33, &mut a);
                tables.sum(&flips.masks[mirror * g..(mirror + 1) * g], 0..33, &mut b);
                let mut part = vec![0f64; 20];
                tables.sum(&flips.masks[k * g..(k + 1) * g], 10..30, &mut part);
                assert!(part
                    .iter()
                    .zip(&a[10..30])
                    .all(|(x, y)| x.to_bits() == y.to_bits()));
                assert!(
                    a.iter().zip(&b).all(|(x, y)| *x == -*y),
                    "n {n} pattern {k}"
                );
                // Against the plain signed sum in f64, left to right: f32 data of a narrow
                // range sum exactly in f64 (24-bit significands, at most 2^4 terms), in any order.
                for (j, x) in a.iter().enumerate() {
                    let plain: f64 = (0..n)
                        .map(|i| if k >> i & 1 == 1 { -1.0 } else { 1.0 } * f64::from(data[i][j]))
                        .sum();
                    assert_eq!(*x, plain, "n {n} k {k}");
                }
            }
        }
    }

    /// The permutation loop without tiles, bitmaps or runs: every pattern's whole map summed,
    /// signed, labelled by flood fill and its masses added in raster order, in turn (the oracle
    /// of the tiled [`run_map`]).
    fn plain_run_map(input: &MapInput<'_>, flips: &Flips, correction: Correction) -> Vec<f64> {
        let n = input.maps.len() as f64;
        let len = input.q.len();
        let tables = Tables::build(&input.maps, flips);
        let g = flips.groups.len();
        let mut s = vec![0f64; len];
        let (mut s_obs, mut sign) = (vec![0f64; len], vec![0i8; len]);
        tables.sum(&flips.masks[..g], 0..len, &mut s_obs);
        let mut labels = vec![0u32; len];
        let mut out = Vec::new();
        for masks in flips.masks.chunks(g) {
            tables.sum(masks, 0..len, &mut s);
            match correction {
                Correction::Cluster => {
                    for (o, (&x, &c)) in sign.iter_mut().zip(s.iter().zip(input.threshold_s)) {
                        *o = i8::from(x > c) - i8::from(x < -c);
                    }
                    let found = label_clusters(&sign, input.cols, &mut labels);
                    let masses = raster_masses(&labels, found, |i| t_of(s[i], input.q[i], n));
                    out.push(masses.iter().fold(0f64, |m, x| m.max(x.abs())));
                }
                Correction::Max => out.push(
                    s.iter()
                        .zip(input.q)
                        .map(|(&x, &q)| x * x / q)
                        .filter(|r| !r.is_nan())
                        .fold(0f64, f64::max),
                ),
                _ => out.extend(
                    s.iter()
                        .zip(&s_obs)
                        .map(|(x, o)| f64::from(u8::from(x.abs() >= o.abs()))),
                ),
            }
        }
        if matches!(correction, Correction::Fdr | Correction::None) {
            // Per point: the count over patterns.
            return (0..len)
                .map(|i| out.iter().skip(i).step_by(len).sum())
                .collect();
        }
        out
    }

    #[test]
    fn tiled_permutations_equal_the_plain_loop_bit_for_bit() {
        // Maps of 9 × 70 = 630 points (three tiles, the last partial; rows of two bitmap
        // words, runs crossing the word boundary), 600 patterns (three random chunks, two
        // blocks, the last partial), smooth enough to form clusters, 13 subjects (groups of 5,
        // 5, 3). The cluster loop is checked compiled for AVX2 (where the CPU has it) and
        // portably.
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(17);
        let (rows, cols, n) = (9, 70, 13);
        let maps: Vec<Vec<f32>> = (0..n)
            .map(|_| {
                let raw: Vec<f32> = (0..rows * cols).map(|_| rng.gen_range(-1.0..1.0)).collect();
                (0..rows * cols)
                    .map(|i| raw[i] + raw[(i + 1) % raw.len()] + raw[(i + cols) % raw.len()] + 0.2)
                    .collect()
            })
            .collect();
        let views: Vec<&[f32]> = maps.iter().map(|m| m.as_slice()).collect();
        let q: Vec<f64> = (0..rows * cols)
            .map(|i| maps.iter().map(|m| f64::from(m[i]).powi(2)).sum())
            .collect();
        let threshold_s: Vec<f64> = q
            .iter()
            .map(|&q| threshold_of_s(q, 2.2 * 2.2, n as f64))
            .collect();
        let input = MapInput {
            maps: views.clone(),
            q: &q,
            threshold_s: &threshold_s,
            cols,
        };
        let flips = Flips::new(n, 600, false, 3);
        let bits = |v: &[f64]| v.iter().map(|x| x.to_bits()).collect::<Vec<_>>();
        let cluster = run_map(&input, &flips, Correction::Cluster);
        assert!(
            cluster.null.iter().filter(|&&m| m > 0.0).count() > 300,
            "clusters form"
        );
        assert_eq!(
            bits(&cluster.null),
            bits(&plain_run_map(&input, &flips, Correction::Cluster))
        );
        let portable = cluster_map(&input, &flips, mark_row_portable);
        assert_eq!(bits(&cluster.null), bits(&portable.null));
        assert_eq!(bits(&cluster.masses), bits(&portable.masses));
        let max = run_map(&input, &flips, Correction::Max);
        assert_eq!(
            bits(&max.null),
            bits(&plain_run_map(&input, &flips, Correction::Max))
        );
        let fdr = run_map(&input, &flips, Correction::Fdr);
        let counts: Vec<f64> = fdr.counts.iter().map(|&c| f64::from(c)).collect();
        assert_eq!(
            bits(&counts),
            bits(&plain_run_map(&input, &flips, Correction::Fdr))
        );
    }

    #[test]
    fn runs_joined_by_union_find_give_the_flood_fill_masses() {
        // Random sign maps from sparse to dense (spirals, U shapes and combs whose arms meet
        // only rows later), widths around the 64-bit word: the largest |mass| from the runs of
        // the bitmaps equals, bit for bit, flood-fill labels with masses added in raster order.
        use rand::{Rng, SeedableRng};
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(23);
        let mut runs = Runs::default();
        for &(rows, cols) in &[
            (1, 1),
            (5, 1),
            (1, 130),
            (7, 63),
            (6, 64),
            (9, 65),
            (4, 200),
        ] {
            for density in [0.05, 0.3, 0.5, 0.7, 0.95] {
                let len = rows * cols;
                let sign: Vec<i8> = (0..len)
                    .map(|_| {
                        let u: f64 = rng.gen();
                        if u < density / 2.0 {
                            1
                        } else if u < density {
                            -1
                        } else {
                            0
                        }
                    })
                    .collect();
                let t: Vec<f64> = sign
                    .iter()
                    .map(|&s| f64::from(s) * rng.gen_range(2.0..9.0))
                    .collect();
                let mut labels = vec![0; len];
                let found = label_clusters(&sign, cols, &mut labels);
                let masses = raster_masses(&labels, found, |i| t[i]);
                let want = masses.iter().fold(0f64, |m, x| m.max(x.abs()));
                let row_words = cols.div_ceil(64);
                let bitmap = |s: i8| {
                    let mut bits = vec![0u64; rows * row_words];
                    for i in (0..len).filter(|&i| sign[i] == s) {
                        let (r, c) = (i / cols, i % cols);
                        bits[r * row_words + c / 64] |= 1 << (c % 64);
                    }
                    let ts: Vec<f64> = (0..len).filter(|&i| sign[i] == s).map(|i| t[i]).collect();
                    (bits, ts)
                };
                let (pos, t_pos) = bitmap(1);
                let (neg, t_neg) = bitmap(-1);
                let got = largest_mass(&pos, row_words, &t_pos, &mut runs)
                    .max(largest_mass(&neg, row_words, &t_neg, &mut runs));
                assert_eq!(
                    got.to_bits(),
                    want.to_bits(),
                    "{rows} x {cols} at {density}"
                );
            }
        }
    }

    #[test]
    fn isolated_points_bounded_without_t_give_the_flood_fill_masses() {
        // largest_mass_by with t from S and Q (`FromSums`, which skips a point without a set
        // neighbour when a bound without square root or division shows its |t| cannot raise
        // the largest): against flood-fill labels with masses of t_of added in raster order,
        // bit for bit. Sparse maps (mostly isolated points) to dense; |S| up to its bound
        // √(n Q), now and then at it (t infinite or very large).
        use rand::{Rng, SeedableRng};
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(31);
        let n = 20.0;
        let mut runs = Runs::default();
        let mut skipped_any = false;
        for &(rows, cols) in &[(3, 17), (30, 200), (8, 64), (5, 130)] {
            for density in [0.01, 0.05, 0.2, 0.6] {
                let len = rows * cols;
                let q: Vec<f64> = (0..len).map(|_| rng.gen_range(0.5..2.0)).collect();
                let (mut sign, mut s) = (vec![0i8; len], vec![0f64; len]);
                for i in 0..len {
                    if rng.gen::<f64>() < density {
                        sign[i] = if rng.gen::<bool>() { 1 } else { -1 };
                        let bound = (n * q[i]).sqrt();
                        let share = if rng.gen::<f64>() < 0.01 {
                            1.0
                        } else {
                            rng.gen_range(0.3..0.99)
                        };
                        s[i] = f64::from(sign[i]) * bound * share;
                    }
                }
                let mut labels = vec![0; len];
                let found = label_clusters(&sign, cols, &mut labels);
                let masses = raster_masses(&labels, found, |i| t_of(s[i], q[i], n));
                let want = masses.iter().fold(0f64, |m, x| m.max(x.abs()));
                let rw = cols.div_ceil(64);
                let mut got = 0f64;
                for side in [1i8, -1] {
                    let mut bits = vec![0u64; rows * rw];
                    let mut sums = Vec::new();
                    for i in (0..len).filter(|&i| sign[i] == side) {
                        let (r, c) = (i / cols, i % cols);
                        bits[r * rw + c / 64] |= 1 << (c % 64);
                        sums.push(s[i]);
                    }
                    let at = FromSums { s: &sums, q: &q, n };
                    skipped_any |= (0..sums.len()).any(|k| at.within(k, 0, 1e3));
                    got = got.max(largest_mass_by(&bits, rw, cols, &at, &mut runs));
                }
                assert_eq!(
                    got.to_bits(),
                    want.to_bits(),
                    "{rows} x {cols} at {density}"
                );
            }
        }
        assert!(skipped_any);
    }

    #[test]
    fn threshold_on_the_sum_is_the_threshold_on_t() {
        // Formula: the one-sample t of the flipped differences, mean / (SD (ddof 1) / √n), as
        // scipy.stats.ttest_1samp defines it, computed here in two passes from the flipped
        // values themselves; against it, S > threshold_of_s(Q) must say the same as t > c (and
        // S < −threshold as t < −c) wherever t is not within 1e-9 relative of ±c, and t_of(S)
        // must equal that t to 1e-12 relative.
        use rand::{Rng, SeedableRng};
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(29);
        let (mut checked, mut passed) = (0, 0);
        for n in [3usize, 7, 20] {
            let c = stats::t_isf(0.025, (n - 1) as f64);
            let points = 400;
            let data: Vec<Vec<f32>> = (0..n)
                .map(|_| (0..points).map(|_| rng.gen_range(-1.0f32..1.6)).collect())
                .collect();
            let views: Vec<&[f32]> = data.iter().map(|d| d.as_slice()).collect();
            let flips = Flips::new(n, 300, false, 4);
            let tables = Tables::build(&views, &flips);
            let g = flips.groups.len();
            let mut s = vec![0f64; points];
            for (j, masks) in flips.masks.chunks(g).enumerate() {
                tables.sum(masks, 0..points, &mut s);
                for (i, &s) in s.iter().enumerate() {
                    let flip = |k: usize| {
                        let (grp, bit) = (k / GROUP, k % GROUP);
                        let neg = flips.masks[j * g + grp] >> bit & 1 == 1;
                        f64::from(data[k][i]) * if neg { -1.0 } else { 1.0 }
                    };
                    let x: Vec<f64> = (0..n).map(flip).collect();
                    let nf = n as f64;
                    let mean = x.iter().sum::<f64>() / nf;
                    let sd =
                        (x.iter().map(|v| (v - mean).powi(2)).sum::<f64>() / (nf - 1.0)).sqrt();
                    let t = mean / (sd / nf.sqrt());
                    let q: f64 = x.iter().map(|v| v * v).sum();
                    assert!((t_of(s, q, nf) - t).abs() <= 1e-12 * t.abs().max(1.0));
                    let thr = threshold_of_s(q, c * c, nf);
                    if (t.abs() - c).abs() > 1e-9 * c {
                        checked += 1;
                        passed += usize::from(t > c);
                        assert_eq!(s > thr, t > c, "n {n} pattern {j} point {i}");
                        assert_eq!(s < -thr, t < -c, "n {n} pattern {j} point {i}");
                    }
                }
            }
        }
        assert!(checked > 300_000 && passed > 1000, "{checked} {passed}");
    }

    #[test]
    fn random_flips_are_seeded_and_start_unflipped() {
        let a = Flips::new(23, 1000, false, 5);
        assert_eq!(a, Flips::new(23, 1000, false, 5));
        assert_ne!(a, Flips::new(23, 1000, false, 6));
        assert_eq!(a.groups.len(), 5);
        assert!(a.masks[..5].iter().all(|&m| m == 0));
        // The last group holds 3 subjects: its masks stay below 2^3.
        assert!(a.masks.chunks(5).all(|m| m[4] < 8));
        // Chunk c depends on (seed, c) alone: a longer run starts with the same patterns.
        assert_eq!(Flips::new(23, 3000, false, 5).masks[..5000], a.masks[..]);
    }

    #[test]
    fn results_are_bit_identical_for_any_thread_count() {
        use rand::{Rng, SeedableRng};
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(11);
        let (n, maps, rows, cols) = (13, 4, 5, 9);
        let data: Vec<Vec<f32>> = (0..n)
            .map(|_| {
                (0..maps * rows * cols)
                    .map(|_| rng.gen_range(-1.0..1.5))
                    .collect()
            })
            .collect();
        let views: Vec<&[f32]> = data.iter().map(|s| s.as_slice()).collect();
        let flips = Flips::new(n, 700, false, 3);
        for correction in [Correction::Cluster, Correction::Max, Correction::Fdr] {
            let settings = Settings {
                correction,
                threshold_t: 1.5,
                maps_per_family: 2,
                rows,
                cols,
            };
            let on = |threads: usize| {
                let pool = rayon::ThreadPoolBuilder::new()
                    .num_threads(threads)
                    .build()
                    .unwrap();
                pool.install(|| test(&views, &flips, settings))
            };
            let one = on(1);
            let bits = |t: &Tested| -> Vec<u64> {
                t.t.iter()
                    .chain(&t.p)
                    .chain(&t.mean)
                    .chain(&t.sem)
                    .map(|x| x.to_bits())
                    .collect()
            };
            for threads in [2, 3, 5] {
                let many = on(threads);
                assert_eq!(bits(&one), bits(&many), "{correction:?} {threads}");
                assert_eq!(one.cluster, many.cluster);
            }
            assert!(one.p.iter().any(|p| p.is_finite()), "{correction:?}");
        }
    }

    fn param_error(v: serde_json::Value) -> (String, String) {
        let (ids, arrays) = ttest_inputs();
        match run(&params(v), &ids, &arrays) {
            Err(StageError::Param { field, message }) => (field, message),
            other => panic!("expected a param error, got {other:?}"),
        }
    }

    #[test]
    fn bad_input_is_a_param_error_naming_the_field() {
        let (f, m) = param_error(json!({ "over": "subjects", "compare": ["high", "mid"] }));
        assert_eq!(f, "compare[1]");
        assert!(
            m.contains("`mid` is not in the data") && m.contains("high, low"),
            "{m}"
        );
        let (f, m) = param_error(json!({ "over": "subjects", "compare": ["high", "high"] }));
        assert_eq!(f, "compare");
        assert!(m.contains("twice"), "{m}");
        let (f, m) = param_error(json!({ "over": "subjects", "condition": "high",
                                         "measure": ["plv", "icoh"] }));
        assert_eq!(f, "measure");
        assert!(
            m.contains("`icoh` is not in the input") && m.contains("plv, wpli"),
            "{m}"
        );
        let (f, m) = param_error(json!({ "over": "subjects", "condition": "high",
                                         "permutations": 19 }));
        assert_eq!(f, "permutations");
        assert!(m.contains("at least 20"), "{m}");
        let (f, _) = param_error(json!({ "over": "subjects", "condition": "high",
                                         "freqs": [50, 60] }));
        assert_eq!(f, "freqs");
        let (f, _) = param_error(json!({ "over": "subjects" }));
        assert_eq!(f, "compare");
        // Fewer than 3 subjects.
        let (ids, arrays) = ttest_inputs();
        let p = params(json!({ "over": "subjects", "condition": "high" }));
        let err = run(&p, &ids[..2], &arrays[..2]).unwrap_err();
        assert!(
            matches!(&err, StageError::Param { field, message } if field == "over"
                && message.contains("at least 3 subjects, got 2")),
            "{err:?}"
        );
        // A subject missing a condition is named.
        let mut arrays = arrays;
        arrays[4].layout.coords[0] = Coord::Labels(vec!["high".into(), "other".into()]);
        let p = params(json!({ "over": "subjects", "compare": ["high", "low"] }));
        let err = run(&p, &ids, &arrays).unwrap_err();
        assert!(
            matches!(&err, StageError::Param { field, message } if field == "compare[1]"
                && message.starts_with("subject sub-05: condition `low` is not in the data")),
            "{err:?}"
        );
    }

    #[test]
    fn findings_table_lists_clusters_with_their_extent() {
        let (ids, arrays) = ttest_inputs();
        let p = params(json!({ "over": "subjects", "compare": ["high", "low"],
                               "threshold": 0.3, "permutations": 128 }));
        let out = run(&p, &ids, &arrays).unwrap();
        let table = crate::table::tidy_tsv(&out);
        let mut lines = table.lines();
        assert_eq!(lines.next().unwrap(), FINDINGS_COLUMNS.join("\t"));
        let cluster = statistic(&out, "cluster");
        let ids_found = cluster.iter().cloned().fold(0.0, f64::max) as usize;
        assert!(ids_found > 0);
        let rows: Vec<&str> = lines.collect();
        assert_eq!(rows.len(), ids_found);
        // Each row's mass is the sum of the stored t over its points (recomputed here).
        let t = statistic(&out, "t");
        for row in rows {
            let cells: Vec<&str> = row.split('\t').collect();
            let id: f64 = cells[3].parse().unwrap();
            let mass: f64 = t
                .iter()
                .zip(&cluster)
                .filter(|(_, &c)| c == id)
                .map(|(t, _)| t)
                .sum();
            let written: f64 = cells[8].parse().unwrap();
            assert!((written - mass).abs() <= 1e-6 * mass.abs(), "{row}");
        }
    }

    /// Null studies (and studies with a planted effect) for the calibration table in
    /// bench/contrast-calibration.md: each study has 12 subjects, 4 pairs of 10 × 12 maps of
    /// normal noise smoothed by a 3 × 3 box (so neighbouring points correlate, as in real maps),
    /// 1000 random sign patterns (2^12 > 1000), α = 0.05, cluster threshold 0.05. A study counts
    /// as a false positive when any point is significant. The 95 % interval of a share is Wilson's
    /// score interval (Wilson 1927, J Am Stat Assoc 22:209–212).
    #[test]
    #[ignore = "calibration, minutes of CPU: cargo test --release -p phasewise-stages calibrate -- --ignored --nocapture"]
    fn calibrate_family_wise_error_and_power() {
        use rand::SeedableRng;
        use rand_distr::{Distribution, StandardNormal};
        let (maps, rows, cols) = (4usize, 10usize, 12usize);
        let len = maps * rows * cols;
        let study = |(n, smooth): (usize, bool), seed: u64, effect: f64| -> Vec<Vec<f32>> {
            let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(seed);
            (0..n)
                .map(|_| {
                    let raw: Vec<f64> = (0..len).map(|_| StandardNormal.sample(&mut rng)).collect();
                    (0..len)
                        .map(|i| {
                            let (m, r, c) = (i / (rows * cols), i / cols % rows, i % cols);
                            let mut acc = 0.0;
                            for dr in -1i64..=1 {
                                for dc in -1i64..=1 {
                                    let (rr, cc) = (r as i64 + dr, c as i64 + dc);
                                    let (rr, cc) = (
                                        rr.clamp(0, rows as i64 - 1),
                                        cc.clamp(0, cols as i64 - 1),
                                    );
                                    let at = m * rows * cols + rr as usize * cols + cc as usize;
                                    // Unsmoothed: the point alone (a null t does not depend on scale).
                                    acc += if smooth { raw[at] } else { raw[i] };
                                }
                            }
                            // Effect: a 3 × 4 patch of pair 0, in units of the smoothed SD (1/3).
                            let inside = m == 0 && (3..6).contains(&r) && (4..8).contains(&c);
                            (acc / 9.0 + if inside { effect / 3.0 } else { 0.0 }) as f32
                        })
                        .collect()
                })
                .collect()
        };
        let wilson = |k: usize, total: usize| {
            let (p, m, z) = (k as f64 / total as f64, total as f64, 1.96f64);
            let centre = (p + z * z / (2.0 * m)) / (1.0 + z * z / m);
            let half = z * (p * (1.0 - p) / m + z * z / (4.0 * m * m)).sqrt() / (1.0 + z * z / m);
            (p, centre - half, centre + half)
        };
        let corrections = [Correction::Cluster, Correction::Max, Correction::Fdr];
        let run = |data: &[Vec<f32>], seed: u64, c: Correction, patterns: usize| {
            let n = data.len();
            let views: Vec<&[f32]> = data.iter().map(|s| s.as_slice()).collect();
            let flips = Flips::new(n, patterns, false, seed);
            let settings = Settings {
                correction: c,
                threshold_t: stats::t_isf(0.025, (n - 1) as f64),
                maps_per_family: maps,
                rows,
                cols,
            };
            test(&views, &flips, settings).p
        };
        let studies = 500;
        println!("| correction | null studies | with any significant point | family-wise error | 95 % interval |");
        println!("|---|---|---|---|---|");
        // 12 subjects and 1000 patterns; then fdr again with 16 subjects and 20000 patterns,
        // enough for a permutation p to reach alpha / 480 (1 / 20000 < 0.05 / 480).
        let nulls: Vec<Vec<Vec<f32>>> = (0..studies)
            .map(|s| study((12, true), 1000 + s as u64, 0.0))
            .collect();
        let wide: Vec<Vec<Vec<f32>>> = (0..studies)
            .map(|s| study((16, true), 1000 + s as u64, 0.0))
            .collect();
        // Unsmoothed maps: 480 independent points, where Benjamini–Hochberg's error under the
        // complete null is alpha (Simes 1986, Biometrika 73:751–754); smoothing (positive
        // dependence) makes it conservative.
        let rough: Vec<Vec<Vec<f32>>> = (0..studies)
            .map(|s| study((16, false), 1000 + s as u64, 0.0))
            .collect();
        let settings = corrections
            .iter()
            .map(|&c| (c, &nulls, 1000, "smoothed"))
            .chain([(Correction::Fdr, &wide, 20000, "smoothed")])
            .chain([(Correction::Fdr, &rough, 20000, "unsmoothed")]);
        for (c, data, patterns, kind) in settings {
            let hits = data
                .iter()
                .enumerate()
                .filter(|(s, d)| run(d, *s as u64, c, patterns).iter().any(|&p| p <= 0.05))
                .count();
            let (p, lo, hi) = wilson(hits, studies);
            let n = data[0].len();
            println!(
                "| {c:?} ({n} subjects, {patterns} patterns, {kind}) | {studies} | {hits} | {p:.3} | \
                 [{lo:.3}, {hi:.3}] |"
            );
        }
        println!();
        println!("| effect (SD) | cluster | max | fdr | fdr (16 subjects, 20000 patterns) |");
        println!("|---|---|---|---|---|");
        let planted = 200;
        for effect in [0.5, 1.0, 1.5, 2.0] {
            let data: Vec<_> = (0..planted)
                .map(|s| study((12, true), 5000 + s as u64, effect))
                .collect();
            let wide: Vec<_> = (0..planted)
                .map(|s| study((16, true), 5000 + s as u64, effect))
                .collect();
            let settings = corrections.iter().map(|&c| (c, &data, 1000)).chain([(
                Correction::Fdr,
                &wide,
                20000,
            )]);
            let power: Vec<String> = settings
                .map(|(c, data, patterns)| {
                    let found = data
                        .iter()
                        .enumerate()
                        .filter(|(s, d)| {
                            let p = run(d, *s as u64, c, patterns);
                            (3..6).any(|r| (4..8).any(|col| p[r * cols + col] <= 0.05))
                        })
                        .count();
                    format!("{:.2}", found as f64 / planted as f64)
                })
                .collect();
            println!("| {effect} | {} |", power.join(" | "));
        }
    }
}
