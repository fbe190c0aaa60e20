//! The `surrogate` op: is a pair's synchronization above chance, within one subject
//! (DESIGN §4c)?
//!
//! Input: complex coefficients `[channel, trial, freq, time]` (a `wavelet` or `hilbert` output),
//! the trials labelled with their condition, as `clustering` takes them. Output: f32, dims
//! `[statistic, condition, measure, pair, freq, time]`, statistic `value`, `z`, `p`; the `freq`
//! and `time` axes keep only the points inside `bands` and `windows` (all points when absent).
//!
//! - `method: rayleigh` (plv across trials only). With N trials and R̄ the plv (the mean
//!   resultant length of the phase differences), Rayleigh's z = N·R̄², and p the series of
//!   Wilkie (1983, Applied Statistics 32:311–312; the expansion of Greenwood & Durand 1955, in
//!   Zar 1999, Biostatistical Analysis, §27.1) that `astropy.stats.rayleightest` computes:
//!   p = e^{−z} (1 + (2z − z²)/(4N) − (24z − 132z² + 76z³ − 9z⁴)/(288N²)) for N < 50, e^{−z} for
//!   N ≥ 50. Where that series leaves (0, 1] (a strong lock over few trials, where the truncated
//!   series turns negative), p is Zar's closed form instead, p = exp(√(1 + 4N + 4(N² − R²)) −
//!   (1 + 2N)) with R = N·R̄ (Zar 1999, eq. 27.4), which stays in (0, 1].
//! - `method: shuffle` (any measure across trials). Surrogate k pairs trial i of the first
//!   channel with trial π_k(i) ≠ i of the second, π_k a random derangement of the condition's
//!   trials drawn from a ChaCha20 stream seeded with `seed` on stream = the condition's index
//!   (conditions sorted by name), one derangement per surrogate for all pairs, frequencies and
//!   times. This keeps each channel's own structure and breaks only the trial-by-trial pairing.
//!   z = (value − mean) / sd of the `permutations` surrogate values (sd with ddof 1);
//!   p = (1 + #{surrogates ≥ value}) / (1 + permutations) (Phipson & Smyth 2010, Stat Appl Genet
//!   Mol Biol 9:39: a permutation p counts the observed arrangement, so it is never 0). For
//!   `icoh`, whose sign says which channel leads, the count compares |values| (two-sided).
//!
//! Cost: the shuffle computes (permutations + 1) × trials terms per condition, pair, frequency
//! and time point kept; `pairs`, `bands` and `windows` bound it. Each output value is computed by
//! one sequential loop, so results are bit-identical for any thread count.

use std::collections::BTreeMap;

use ndarray::{ArrayD, IxDyn};
use num_complex::Complex32;
use rand::seq::SliceRandom;
use rand::SeedableRng;
use rand_chacha::ChaCha20Rng;
use rayon::prelude::*;
use serde::{Deserialize, Serialize};
use serde_json::json;

use crate::array::{Coord, LabelledArray, Layout};
use crate::error::StageError;
use crate::op::{single, Input, InputLayout, Notes, Op};
use crate::ops::aggregate::{check_ranges, span_text};
use crate::ops::clustering::{
    check_coefficients, check_measures_and_pairs, conditions, measure_layout, resolve_pairs,
    used_channels, Coefs, MeasureSpec, PairSpec,
};
use crate::ops::measures::{polar, Measure, Sums};
use crate::range::{points_within, range_text};

/// The `surrogate` op.
pub struct Surrogate;

/// How chance is judged.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize, schemars::JsonSchema)]
#[serde(rename_all = "lowercase")]
pub enum Method {
    /// Rayleigh's test of the phase differences across trials (plv only).
    Rayleigh,
    /// Trial-shuffle surrogates.
    Shuffle,
}

/// Parameters of `surrogate`.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize, schemars::JsonSchema)]
#[serde(deny_unknown_fields)]
pub struct SurrogateParams {
    /// `rayleigh` or `shuffle`.
    pub method: Method,
    /// The measure(s): `plv` for rayleigh (the default there); required for shuffle.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub measure: Option<MeasureSpec>,
    /// The pairs (default `all`), as `clustering` takes them.
    #[serde(default)]
    pub pairs: PairSpec,
    /// Frequency bands `name: [lo, hi]` in Hz (inclusive); only their points are tested.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub bands: Option<BTreeMap<String, [f64; 2]>>,
    /// Time windows `name: [t0, t1]` in s (inclusive); only their points are tested.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub windows: Option<BTreeMap<String, [f64; 2]>>,
    /// Number of surrogates (shuffle only, required there).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub permutations: Option<u32>,
    /// Seed of the derangements (shuffle only, required there).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub seed: Option<u64>,
}

/// The statistics of the output, in the order of its `statistic` axis.
pub const STATISTICS: [&str; 3] = ["value", "z", "p"];

impl SurrogateParams {
    fn measures(&self) -> Vec<Measure> {
        match &self.measure {
            None => vec![Measure::Plv],
            Some(MeasureSpec::One(m)) => vec![*m],
            Some(MeasureSpec::Many(v)) => v.clone(),
        }
    }
}

/// Rayleigh's p for N phases of mean resultant length R̄, given z = N·R̄²: the series that
/// `astropy.stats.rayleightest` computes (Wilkie 1983), or Zar's closed form (Zar 1999,
/// eq. 27.4) where the series leaves (0, 1]. See the module doc.
pub fn rayleigh_p(n: f64, z: f64) -> f64 {
    let series = if n < 50.0 {
        1.0 + (2.0 * z - z * z) / (4.0 * n)
            - (24.0 * z - 132.0 * z.powi(2) + 76.0 * z.powi(3) - 9.0 * z.powi(4)) / (288.0 * n * n)
    } else {
        1.0
    };
    let p = (-z).exp() * series;
    if p > 0.0 && p <= 1.0 {
        return p;
    }
    // R² = N² R̄² = N z.
    ((1.0 + 4.0 * n + 4.0 * (n * n - n * z)).sqrt() - (1.0 + 2.0 * n)).exp()
}

/// What the layout step works out once.
struct Plan {
    measures: Vec<Measure>,
    pairs: Vec<(usize, usize)>,
    conditions: Vec<(String, Vec<usize>)>,
    freqs: Vec<usize>,
    times: Vec<usize>,
    layout: Layout,
}

/// The points of `axis` inside any of `ranges` (all points without ranges), in axis order.
fn kept_points(
    input: &Layout,
    (field, axis, unit): (&str, &str, &str),
    ranges: Option<&BTreeMap<String, [f64; 2]>>,
) -> Result<Vec<usize>, StageError> {
    let coords = input.numbers(axis)?;
    let Some(ranges) = ranges else {
        return Ok((0..coords.len()).collect());
    };
    let mut kept = vec![false; coords.len()];
    for (name, &range) in ranges {
        let points = points_within(coords, range);
        if points.is_empty() {
            let span = span_text(coords);
            return Err(StageError::param(
                format!("{field}.{name}"),
                format!(
                    "`{name}` {} {unit} holds no {axis} point of the input, whose {axis} points \
                     run over {span} {unit}",
                    range_text(range)
                ),
            ));
        }
        points.into_iter().for_each(|i| kept[i] = true);
    }
    Ok((0..coords.len()).filter(|&i| kept[i]).collect())
}

fn plan(p: &SurrogateParams, input: &Layout) -> Result<Plan, StageError> {
    if input.dims != ["channel", "trial", "freq", "time"] || !input.complex {
        return Err(StageError::data(format!(
            "surrogate expects complex coefficients with axes [channel, trial, freq, time] (a \
             wavelet or hilbert output), found {} values with axes [{}]",
            if input.complex { "complex" } else { "real" },
            input.dims.join(", ")
        )));
    }
    let measures = p.measures();
    let pairs = resolve_pairs(&p.pairs, input)?;
    let conditions = conditions(input)?;
    if p.method == Method::Shuffle {
        if let Some((c, t)) = conditions.iter().find(|(_, t)| t.len() < 2) {
            return Err(StageError::data(format!(
                "condition {c} has {} trial; trial shuffling needs at least 2 trials per \
                 condition",
                t.len()
            )));
        }
    }
    let freqs = kept_points(input, ("bands", "freq", "Hz"), p.bands.as_ref())?;
    let times = kept_points(input, ("windows", "time", "s"), p.windows.as_ref())?;
    let pick = |axis: &str, idx: &[usize]| -> Result<Coord, StageError> {
        let all = input.numbers(axis)?;
        Ok(Coord::Numbers(idx.iter().map(|&i| all[i]).collect()))
    };
    let mut layout = measure_layout(
        input,
        &conditions,
        &measures,
        &pairs,
        (pick("freq", &freqs)?, pick("time", &times)?),
    )?;
    layout.dims.insert(0, "statistic".into());
    layout.coords.insert(
        0,
        Coord::Labels(STATISTICS.iter().map(|s| s.to_string()).collect()),
    );
    let extra = &mut layout.meta.extra;
    extra.insert("method".into(), json!(p.method));
    if let (Some(k), Some(seed)) = (p.permutations, p.seed) {
        extra.insert("permutations".into(), json!(k));
        extra.insert("seed".into(), json!(seed));
    }
    if let Some(b) = &p.bands {
        extra.insert("bands".into(), json!(b));
    }
    if let Some(w) = &p.windows {
        extra.insert("windows".into(), json!(w));
    }
    Ok(Plan {
        measures,
        pairs,
        conditions,
        freqs,
        times,
        layout,
    })
}

/// `permutations` derangements of 0..n (n ≥ 2) from ChaCha20 seeded with `seed` on `stream`:
/// each a uniform shuffle, drawn again until no index stays in place.
pub fn derangements(n: usize, permutations: usize, seed: u64, stream: u64) -> Vec<Vec<usize>> {
    let mut rng = ChaCha20Rng::seed_from_u64(seed);
    rng.set_stream(stream);
    (0..permutations)
        .map(|_| loop {
            let mut order: Vec<usize> = (0..n).collect();
            order.shuffle(&mut rng);
            if order.iter().enumerate().all(|(i, &j)| i != j) {
                break order;
            }
        })
        .collect()
}

/// One channel's selected coefficients in polar form, laid out `[trial, freq, time]` over the
/// condition's trials and the kept points.
struct Polar {
    unit: Vec<Complex32>,
    amp: Vec<f32>,
}

fn to_polar(x: &Coefs, c: usize, trials: &[usize], plan: &Plan) -> Polar {
    let len = trials.len() * plan.freqs.len() * plan.times.len();
    let (mut unit, mut amp) = (Vec::with_capacity(len), Vec::with_capacity(len));
    for &n in trials {
        for &f in &plan.freqs {
            let series = x.series(c, n, f);
            for &t in &plan.times {
                let (u, a) = polar(series[t]);
                unit.push(u);
                amp.push(a);
            }
        }
    }
    Polar { unit, amp }
}

/// The sums over trials of one frequency row (`nt` time points) with trial `i` of `a` paired
/// with trial `order(i)` of `b`.
fn row_sums(
    (a, b): (&Polar, &Polar),
    (f, nf, nt): (usize, usize, usize),
    trials: usize,
    order: impl Fn(usize) -> usize,
    sums: &mut [Sums],
) {
    sums.iter_mut().for_each(|s| *s = Sums::default());
    for i in 0..trials {
        let (ra, rb) = ((i * nf + f) * nt, (order(i) * nf + f) * nt);
        for (t, s) in sums.iter_mut().enumerate() {
            s.add_polar(a.unit[ra + t], a.amp[ra + t], b.unit[rb + t], b.amp[rb + t]);
        }
    }
}

/// One pair's output for one condition, laid out `[statistic, measure, freq, time]`.
fn pair_block(
    p: &SurrogateParams,
    plan: &Plan,
    (a, b): (&Polar, &Polar),
    trials: usize,
    orders: &[Vec<usize>],
) -> Vec<f32> {
    let (nm, nf, nt) = (plan.measures.len(), plan.freqs.len(), plan.times.len());
    let plane = nm * nf * nt;
    let mut out = vec![0f32; STATISTICS.len() * plane];
    let mut sums = vec![Sums::default(); nt];
    let k = orders.len();
    let mut null = vec![0f64; k * nt];
    for f in 0..nf {
        row_sums((a, b), (f, nf, nt), trials, |i| i, &mut sums);
        let observed: Vec<Vec<f64>> = plan
            .measures
            .iter()
            .map(|&m| sums.iter().map(|s| s.value(m)).collect())
            .collect();
        let mut surrogates: Vec<Vec<f64>> = Vec::new();
        if p.method == Method::Shuffle {
            surrogates = vec![vec![0f64; k * nt]; nm];
            for (j, order) in orders.iter().enumerate() {
                row_sums((a, b), (f, nf, nt), trials, |i| order[i], &mut sums);
                for (m, &measure) in plan.measures.iter().enumerate() {
                    for (t, s) in sums.iter().enumerate() {
                        surrogates[m][j * nt + t] = s.value(measure);
                    }
                }
            }
        }
        for (m, &measure) in plan.measures.iter().enumerate() {
            let at = |stat: usize, t: usize| stat * plane + (m * nf + f) * nt + t;
            for t in 0..nt {
                let v = observed[m][t];
                let (z, pv) = match p.method {
                    Method::Rayleigh => {
                        let z = trials as f64 * v * v;
                        (z, rayleigh_p(trials as f64, z))
                    }
                    Method::Shuffle => {
                        for j in 0..k {
                            null[j] = surrogates[m][j * nt + t];
                        }
                        shuffle_z_p(v, &null[..k], measure == Measure::Icoh)
                    }
                };
                out[at(0, t)] = v as f32;
                out[at(1, t)] = z as f32;
                out[at(2, t)] = pv as f32;
            }
        }
    }
    out
}

/// z and p of `value` against its surrogate values (see the module doc); NaN when the value or
/// any surrogate is NaN.
pub fn shuffle_z_p(value: f64, null: &[f64], two_sided: bool) -> (f64, f64) {
    let k = null.len() as f64;
    let mean = null.iter().sum::<f64>() / k;
    if value.is_nan() || mean.is_nan() {
        return (f64::NAN, f64::NAN);
    }
    let sd = (null.iter().map(|x| (x - mean).powi(2)).sum::<f64>() / (k - 1.0)).sqrt();
    let reaches = if two_sided {
        null.iter().filter(|x| x.abs() >= value.abs()).count()
    } else {
        null.iter().filter(|&&x| x >= value).count()
    };
    ((value - mean) / sd, (1.0 + reaches as f64) / (1.0 + k))
}

impl Op for Surrogate {
    type Params = SurrogateParams;
    const NAME: &'static str = "surrogate";
    const VERSION: u32 = 1;

    fn check(p: &Self::Params) -> Result<(), StageError> {
        let measures = p.measures();
        check_measures_and_pairs(&measures, &p.pairs)?;
        match p.method {
            Method::Rayleigh => {
                if let Some(m) = measures.iter().find(|&&m| m != Measure::Plv) {
                    return Err(StageError::param(
                        "measure",
                        format!(
                            "method rayleigh tests the phase differences' mean resultant \
                             length, which is plv; {} needs method: shuffle",
                            m.name()
                        ),
                    ));
                }
                for (field, given) in [
                    ("permutations", p.permutations.is_some()),
                    ("seed", p.seed.is_some()),
                ] {
                    if given {
                        return Err(StageError::param(
                            field,
                            "only applies with method: shuffle (rayleigh draws nothing)",
                        ));
                    }
                }
            }
            Method::Shuffle => {
                if p.measure.is_none() {
                    return Err(StageError::param(
                        "measure",
                        "method shuffle needs `measure` (plv, ppc, pli, wpli, dwpli, icoh or a \
                         list)",
                    ));
                }
                match p.permutations {
                    None => {
                        return Err(StageError::param(
                            "permutations",
                            "method shuffle needs `permutations` (the number of surrogates, e.g. \
                             1000)",
                        ))
                    }
                    Some(k) if k < 2 => {
                        return Err(StageError::param(
                            "permutations",
                            format!("expected at least 2 surrogates (a z needs their SD), got {k}"),
                        ))
                    }
                    _ => {}
                }
                if p.seed.is_none() {
                    return Err(StageError::param(
                        "seed",
                        "method shuffle needs `seed` (surrogates are drawn at random)",
                    ));
                }
            }
        }
        check_ranges("bands", p.bands.as_ref())?;
        check_ranges("windows", p.windows.as_ref())
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
        let values = input.complex_values()?.as_standard_layout();
        let x = Coefs::new(values.as_slice().unwrap_or(&[]), &input.layout.shape());
        let used = used_channels(&plan.pairs);
        check_coefficients(&x, &used, (Self::NAME, &input.layout), notes)?;
        let shape = plan.layout.shape();
        let per_stat = shape[1..].iter().product::<usize>();
        let (nm, np) = (plan.measures.len(), plan.pairs.len());
        let plane = plan.freqs.len() * plan.times.len();
        let mut out = vec![0f32; STATISTICS.len() * per_stat];
        for (ci, (_, trials)) in plan.conditions.iter().enumerate() {
            let orders = match (p.method, p.permutations, p.seed) {
                (Method::Shuffle, Some(k), Some(seed)) => {
                    derangements(trials.len(), k as usize, seed, ci as u64)
                }
                _ => Vec::new(),
            };
            let polar: BTreeMap<usize, Polar> = used
                .par_iter()
                .map(|&c| (c, to_polar(&x, c, trials, &plan)))
                .collect();
            let blocks: Vec<Vec<f32>> = plan
                .pairs
                .par_iter()
                .map(|(a, b)| pair_block(p, &plan, (&polar[a], &polar[b]), trials.len(), &orders))
                .collect();
            for (q, block) in blocks.iter().enumerate() {
                for (s, stat) in block.chunks_exact(nm * plane).enumerate() {
                    for (m, map) in stat.chunks_exact(plane).enumerate() {
                        let at = s * per_stat + ((ci * nm + m) * np + q) * plane;
                        out[at..at + plane].copy_from_slice(map);
                    }
                }
            }
        }
        let array = ArrayD::from_shape_vec(IxDyn(&shape), out)
            .map_err(|e| StageError::data(format!("internal shape error: {e}")))?;
        LabelledArray::real(plan.layout, array)
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::ops::clustering::Clustering;
    use crate::ops::tf_testing::{coefficients, names, run_err, run_op};
    use crate::testutil::{read_f64, read_vec, real_bits};
    use ndarray::Array4;
    use num_complex::Complex64;
    use rand::{Rng, SeedableRng};
    use rand_chacha::ChaCha8Rng;
    use serde_json::{json, Value};
    use std::f64::consts::PI;

    /// Coefficients of EEG channels C0 … from a function of (channel, trial, freq, time), at
    /// 100 Hz, freqs 4, 7, 10, …
    fn coefs(
        shape: (usize, usize, usize, usize),
        conds: &[&str],
        mut f: impl FnMut((usize, usize, usize, usize)) -> Complex64,
    ) -> LabelledArray {
        let v = Array4::from_shape_fn(shape, |i| {
            let z = f(i);
            Complex32::new(z.re as f32, z.im as f32)
        });
        let freqs: Vec<f64> = (0..shape.2).map(|k| 4.0 + 3.0 * k as f64).collect();
        coefficients(
            v.into_dyn(),
            100.0,
            &freqs,
            names(shape.0),
            vec!["EEG".into(); shape.0],
            conds,
        )
    }

    fn values(out: &LabelledArray) -> Vec<f64> {
        out.real_values()
            .unwrap()
            .iter()
            .map(|&v| f64::from(v))
            .collect()
    }

    /// The fixture's phases of case `row` (its NaN padding dropped).
    fn phases(all: &ndarray::ArrayD<f64>, row: usize) -> Vec<f64> {
        all.index_axis(ndarray::Axis(0), row)
            .iter()
            .copied()
            .filter(|x| !x.is_nan())
            .collect()
    }

    #[test]
    fn rayleigh_p_matches_astropy_rayleightest() {
        // Reference: astropy 6.1.7 astropy.stats.rayleightest on the same phases; where its
        // series leaves (0, 1], Zar 1999 eq. 27.4 as computed by the fixture script.
        let all = read_f64("stats", "rayleigh_phases");
        let astropy = read_vec("stats", "rayleigh_p_astropy");
        let zar = read_vec("stats", "rayleigh_p_zar");
        let mut fallbacks = 0;
        for (row, (&want, &closed)) in astropy.iter().zip(&zar).enumerate() {
            let x = phases(&all, row);
            let n = x.len() as f64;
            let (c, s) = (
                x.iter().map(|a| a.cos()).sum::<f64>() / n,
                x.iter().map(|a| a.sin()).sum::<f64>() / n,
            );
            let z = n * (c * c + s * s);
            let got = rayleigh_p(n, z);
            let want = if want > 0.0 && want <= 1.0 {
                want
            } else {
                fallbacks += 1;
                closed
            };
            assert!(
                ((got - want) / want).abs() < 1e-12,
                "case {row} (n {n}): {got} vs {want}"
            );
        }
        assert_eq!(fallbacks, 1, "the fixture holds one negative series");
    }

    #[test]
    fn the_op_on_phase_differences_gives_astropy_p() {
        // The four n = 12 cases of the fixture as four frequencies of one pair: X = 2 e^{iφ},
        // Y = 0.5 e^{0.3i}, so Δφ = φ − 0.3, a rotation that leaves R̄ (and p) unchanged.
        let all = read_f64("stats", "rayleigh_phases");
        let n_of = read_vec("stats", "rayleigh_n");
        let astropy = read_vec("stats", "rayleigh_p_astropy");
        let rows: Vec<usize> = (0..n_of.len()).filter(|&r| n_of[r] == 12.0).collect();
        assert_eq!(rows.len(), 4);
        let data = coefs((2, 12, 4, 1), &["go"; 12], |(c, n, f, _)| {
            if c == 0 {
                Complex64::from_polar(2.0, phases(&all, rows[f])[n])
            } else {
                Complex64::from_polar(0.5, 0.3)
            }
        });
        let (out, _) = run_op::<Surrogate>(json!({"method": "rayleigh"}), &data).unwrap();
        assert_eq!(out.layout.shape(), vec![3, 1, 1, 1, 4, 1]);
        let v = values(&out);
        for (f, &row) in rows.iter().enumerate() {
            let (plv, z, p) = (v[f], v[4 + f], v[8 + f]);
            assert!((z - 12.0 * plv * plv).abs() < 1e-5 * z.max(1.0), "z = N·R̄²");
            let want = astropy[row];
            assert!(((p - want) / want).abs() < 1e-4, "freq {f}: {p} vs {want}");
        }
    }

    fn noise(seed: u64, shape: (usize, usize, usize, usize), conds: &[&str]) -> LabelledArray {
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        coefs(shape, conds, |_| {
            Complex64::from_polar(rng.gen_range(0.5..2.0), rng.gen_range(-PI..PI))
        })
    }

    fn shuffle(measure: Value, k: u32, seed: u64) -> Value {
        json!({"method": "shuffle", "measure": measure, "permutations": k, "seed": seed})
    }

    #[test]
    fn shuffle_value_is_the_clustering_measure() {
        let data = noise(3, (3, 14, 3, 6), &["a"; 14]);
        let all = ["plv", "ppc", "pli", "wpli", "dwpli", "icoh"];
        let (out, _) = run_op::<Surrogate>(shuffle(json!(all), 20, 1), &data).unwrap();
        let (want, _) = run_op::<Clustering>(json!({"measure": all}), &data).unwrap();
        let want = values(&want);
        let got = values(&out);
        // The `value` plane is [condition, measure, pair, freq, time], as clustering's output.
        assert_eq!(want.len() * 3, got.len());
        for (g, w) in got[..want.len()].iter().zip(&want) {
            assert!((g - w).abs() <= 1e-6 * w.abs().max(1.0), "{g} vs {w}");
        }
    }

    #[test]
    fn shuffle_p_is_near_uniform_without_coupling_and_minimal_with_it() {
        // Independent random phases: each of 400 points' p is uniform on {1, …, K+1}/(K+1) under
        // the null, so the share at p ≤ 0.05 is 0.05; with 400 points the binomial SD is 0.011
        // and [0.01, 0.10] holds it at more than 3.5 SD.
        let data = noise(11, (2, 30, 10, 40), &["a"; 30]);
        let (out, _) = run_op::<Surrogate>(shuffle(json!("plv"), 199, 5), &data).unwrap();
        let v = values(&out);
        let p = &v[2 * 400..];
        let share = p.iter().filter(|&&x| x <= 0.05).count() as f64 / 400.0;
        assert!((0.01..=0.10).contains(&share), "share {share}");
        assert!(p.iter().all(|&x| (1.0 / 200.0 - 1e-7..=1.0).contains(&x)));
        // A constant lag of 0.8 rad with small jitter: every point beats all 199 surrogates.
        let mut rng = ChaCha8Rng::seed_from_u64(2);
        let mut base = vec![0f64; 30 * 10 * 40];
        let locked = coefs((2, 30, 10, 40), &["a"; 30], |(c, n, f, t)| {
            let i = (n * 10 + f) * 40 + t;
            if c == 0 {
                base[i] = rng.gen_range(-PI..PI);
            }
            Complex64::from_polar(1.0, base[i] + if c == 1 { 0.8 } else { 0.0 })
        });
        let (out, _) = run_op::<Surrogate>(shuffle(json!("plv"), 199, 5), &locked).unwrap();
        let v = values(&out);
        assert!(v[..400].iter().all(|&x| x > 0.999), "plv of a lock is 1");
        assert!(v[400..800].iter().all(|&z| z > 5.0));
        assert!(v[800..].iter().all(|&p| (p - 1.0 / 200.0).abs() < 1e-7));
    }

    #[test]
    fn shuffle_z_and_p_by_hand() {
        // value 3 against surrogates 1, 2, 3, 4: mean 2.5, SD √(5/3), two reach it → p = 3/5.
        let (z, p) = shuffle_z_p(3.0, &[1.0, 2.0, 3.0, 4.0], false);
        assert!((z - 0.5 / (5.0f64 / 3.0).sqrt()).abs() < 1e-15);
        assert_eq!(p, 0.6);
        // Two-sided (icoh): |−4| ≥ |3| counts too.
        assert_eq!(shuffle_z_p(3.0, &[1.0, -4.0, 3.0, 0.0], true).1, 0.6);
        assert!(shuffle_z_p(f64::NAN, &[1.0, 2.0], false).1.is_nan());
    }

    #[test]
    fn derangements_move_every_trial_and_follow_the_seed() {
        let d = derangements(7, 50, 9, 0);
        for order in &d {
            let mut sorted = order.clone();
            sorted.sort_unstable();
            assert_eq!(sorted, (0..7).collect::<Vec<_>>());
            assert!(order.iter().enumerate().all(|(i, &j)| i != j));
        }
        assert_eq!(d, derangements(7, 50, 9, 0));
        assert_ne!(d, derangements(7, 50, 10, 0));
        assert_ne!(d, derangements(7, 50, 9, 1));
    }

    #[test]
    fn shuffle_is_bit_identical_for_any_thread_count_and_seeded() {
        let data = noise(
            4,
            (4, 12, 3, 10),
            &["a", "b", "a", "b", "a", "b", "a", "b", "a", "b", "a", "b"],
        );
        let params = shuffle(json!(["wpli", "icoh"]), 30, 8);
        let run = |threads, params: &Value| {
            rayon::ThreadPoolBuilder::new()
                .num_threads(threads)
                .build()
                .unwrap()
                .install(|| run_op::<Surrogate>(params.clone(), &data).unwrap().0)
        };
        let one = real_bits(&run(1, &params));
        assert_eq!(one, real_bits(&run(3, &params)));
        assert_eq!(one, real_bits(&run(2, &params)));
        assert_ne!(
            one,
            real_bits(&run(2, &shuffle(json!(["wpli", "icoh"]), 30, 9)))
        );
    }

    #[test]
    fn bands_windows_and_pairs_bound_what_is_tested() {
        let data = noise(5, (3, 6, 5, 20), &["a"; 6]);
        let params = json!({
            "method": "shuffle", "measure": "ppc", "permutations": 10, "seed": 1,
            "pairs": [["C0", "C2"]],
            "bands": {"theta": [4, 7], "high": [16, 16]},
            "windows": {"early": [0.02, 0.05]}
        });
        let (out, _) = run_op::<Surrogate>(params, &data).unwrap();
        assert_eq!(out.layout.shape(), vec![3, 1, 1, 1, 3, 4]);
        assert_eq!(out.layout.numbers("freq").unwrap(), &[4.0, 7.0, 16.0]);
        assert_eq!(
            out.layout.numbers("time").unwrap(),
            &[0.02, 0.03, 0.04, 0.05]
        );
    }

    #[test]
    fn bad_params_name_their_field() {
        let data = noise(6, (2, 4, 2, 5), &["a", "a", "a", "b"]);
        let field = |params: Value| match run_err::<Surrogate>(params, &data) {
            StageError::Param { field, message } => (field, message),
            other => panic!("expected a param error, got {other}"),
        };
        let cases = [
            (json!({"method": "rayleigh", "measure": "wpli"}), "measure"),
            (json!({"method": "rayleigh", "seed": 3}), "seed"),
            (
                json!({"method": "rayleigh", "permutations": 30}),
                "permutations",
            ),
            (
                json!({"method": "shuffle", "permutations": 30, "seed": 1}),
                "measure",
            ),
            (
                json!({"method": "shuffle", "measure": "plv", "seed": 1}),
                "permutations",
            ),
            (
                json!({"method": "shuffle", "measure": "plv", "permutations": 30}),
                "seed",
            ),
            (
                json!({"method": "rayleigh", "bands": {"gamma": [40, 60]}}),
                "bands.gamma",
            ),
            (
                json!({"method": "rayleigh", "windows": {"w": [0.5, 0.2]}}),
                "windows.w",
            ),
            (
                json!({"method": "rayleigh", "pairs": [["C0", "C9"]]}),
                "pairs[0]",
            ),
        ];
        for (params, want) in cases {
            let (got, message) = field(params.clone());
            assert_eq!(got, want, "{params}: {message}");
        }
        // Condition b has one trial: nothing to shuffle.
        match run_err::<Surrogate>(shuffle(json!("plv"), 30, 1), &data) {
            StageError::Data(m) => assert!(m.contains("condition b has 1 trial"), "{m}"),
            other => panic!("{other}"),
        }
    }
}
