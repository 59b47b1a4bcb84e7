//! A designed calibration batch (design.md 2.8): inclusion probabilities for every pool unit
//! and a Poisson draw, so that the density ratio between the units left in the pool and the
//! assayed batch is known exactly.
//!
//! # Why the weights are exact
//! Each pool unit j is put in the batch independently with probability `pi_j = pi(x_j) > 0`
//! (Poisson sampling, as in survey design). The assayed units are then draws from a density
//! proportional to `pi(x) f(x)` and the units left in the pool from one proportional to
//! `(1 - pi(x)) f(x)`, so the pool/labeled density ratio is `w(x) = (1 - pi(x)) / pi(x)` up to
//! a constant, with nothing estimated, and weighted conformal selection on the batch keeps its
//! finite-sample guarantee (Tibshirani, Barber, Candes & Ramdas 2019, known likelihood ratio;
//! Jin & Candes 2023 for the selection). This holds for Poisson sampling only: a fixed-size
//! draw makes the units dependent and is not offered.
//!
//! # The default design (`ranked`)
//! Resolution is spent where selection happens. With r_j the rank of unit j's prediction
//! (0 = the model's best, ties share their mean rank),
//!
//! `pi_j = p_min + (p_max - p_min) exp(-r_j / tau)`,
//!
//! with `tau` found by bisection so that the expected size `sum_j pi_j` is the requested N.
//! `p_max` (default 0.5, our choice: weight 1 at the top, and half of the top stays in the
//! pool to be selected) is the cap, strictly below 1 since `pi = 1` would give weight 0.
//! `p_min` keeps every unit reachable: a unit can be selected at level q only if its p-value
//! floor `w / (W + w)` is at most q, i.e. `w <= q W / (1 - q)`; with the expected total labeled
//! weight `E[W] = sum_j pi_j (1 - pi_j) / pi_j = sum_j (1 - pi_j)`, about `M - N`, that needs
//! `p_min >= 1 / (1 + q (M - N) / (1 - q))`. The default is [`FLOOR_MARGIN`] times that bound
//! (margin for the randomness of W), unless the budget cannot afford it. The `uniform`
//! design (`pi = N / M` for every unit) is the comparison.

use rand::Rng;
use serde::Serialize;
use thiserror::Error;

use crate::random::{stream, Stream};

/// Default cap of the inclusion probabilities (our choice; see the module docs).
pub const DEFAULT_MAX_PROBABILITY: f64 = 0.5;
/// The default floor is this many times the reachability bound (our choice: it leaves room
/// for the total labeled weight to fall to a quarter of its expectation).
pub const FLOOR_MARGIN: f64 = 4.0;

/// How inclusion probabilities are chosen.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum BatchDesign {
    /// Higher probabilities for units the model ranks high, decaying exponentially in rank
    /// down to a floor that keeps every unit reachable.
    Ranked,
    /// The same probability N / M for every unit.
    Uniform,
}

/// Settings of a batch design.
#[derive(Clone, Debug)]
pub struct BatchOptions {
    /// Expected batch size N (the draw's size is random).
    pub size: f64,
    /// The FDR level the batch will be used at (for the floor and the reading).
    pub fdr: f64,
    pub design: BatchDesign,
    /// Floor of the probabilities; `None` = derived (module docs).
    pub min_probability: Option<f64>,
    /// Cap of the probabilities, in (0, 1).
    pub max_probability: f64,
    pub seed: u64,
}

/// Why a design cannot be made.
#[derive(Debug, Error, PartialEq)]
#[non_exhaustive]
pub enum BatchError {
    #[error("the pool is empty")]
    EmptyPool,
    #[error("prediction of unit {index} is not finite ({value})")]
    NonFinitePrediction { index: usize, value: f64 },
    #[error(
        "--size must be a number > 0 and below the pool size times the cap ({limit}), got {size}"
    )]
    BadSize { size: f64, limit: f64 },
    #[error("--fdr must be in (0, 1), got {0}")]
    BadFdr(f64),
    #[error("--max-probability must be in (0, 1), got {0}")]
    BadMaxProbability(f64),
    #[error(
        "--min-probability {min} must be in (0, --max-probability {max}) and leave room in the \
         budget: the pool's {units} units at the floor alone expect {floor_size:.1} of the \
         {size} batch units"
    )]
    BadMinProbability {
        min: f64,
        max: f64,
        units: usize,
        floor_size: f64,
        size: f64,
    },
}

/// A designed batch.
#[derive(Clone, Debug, Serialize)]
pub struct BatchOutcome {
    pub design: BatchDesign,
    /// Per pool unit, in input order.
    #[serde(skip)]
    pub probabilities: Vec<f64>,
    /// Per pool unit: drawn into the batch.
    #[serde(skip)]
    pub in_batch: Vec<bool>,
    pub pool_units: usize,
    pub expected_size: f64,
    /// sqrt(sum pi (1 - pi)).
    pub size_sd: f64,
    /// The size of this seed's draw.
    pub drawn_size: usize,
    pub min_probability: f64,
    pub max_probability: f64,
    /// The reachability bound on the floor at the expected total weight.
    pub reachability_floor: f64,
    /// Ranked design: the decay `tau` in ranks; null for uniform.
    pub decay_ranks: Option<f64>,
    /// `E[W] = sum (1 - pi)`.
    pub expected_total_weight: f64,
    /// Largest weight `(1 - p_min) / p_min` and the bound `q E[W] / (1 - q)` it must stay under.
    pub largest_weight: f64,
    pub reachable_weight_bound: f64,
    /// `w_top / (E[W] + w_top)` for the top-ranked unit.
    pub expected_top_floor: f64,
    /// `ceil(floor m / q)`: a BH line at level q reaches the floor only from this many units.
    pub shortlist_needs_at_least: usize,
    /// Expected batch units among the top k predictions, for k = 100, 1000, 10000 (when the
    /// pool is that large).
    pub expected_in_top: Vec<(usize, f64)>,
    pub seed: u64,
    /// Plain words.
    pub reading: Vec<String>,
}

/// 0-based ranks of `values` in decreasing order, ties sharing their mean rank.
fn descending_ranks(values: &[f64]) -> Vec<f64> {
    let mut order: Vec<usize> = (0..values.len()).collect();
    order.sort_by(|&a, &b| values[b].total_cmp(&values[a]));
    let mut ranks = vec![0.0; values.len()];
    let mut i = 0;
    while i < order.len() {
        let mut j = i;
        while j + 1 < order.len() && values[order[j + 1]] == values[order[i]] {
            j += 1;
        }
        for &k in &order[i..=j] {
            ranks[k] = (i + j) as f64 / 2.0;
        }
        i = j + 1;
    }
    ranks
}

/// `p_min + (p_max - p_min) exp(-r / tau)` with `tau` such that the sum is `size`.
fn ranked_probabilities(ranks: &[f64], size: f64, p_min: f64, p_max: f64) -> (Vec<f64>, f64) {
    let probs = |tau: f64| -> Vec<f64> {
        ranks
            .iter()
            .map(|r| p_min + (p_max - p_min) * (-r / tau).exp())
            .collect()
    };
    let total = |tau: f64| probs(tau).iter().sum::<f64>();
    // The sum increases with tau, from about p_max + (M - 1) p_min to M p_max.
    let (mut lo, mut hi) = (1e-9_f64, 1.0_f64);
    while total(hi) < size && hi < 1e18 {
        hi *= 2.0;
    }
    for _ in 0..200 {
        let mid = (lo * hi).sqrt();
        if total(mid) < size {
            lo = mid;
        } else {
            hi = mid;
        }
    }
    let tau = (lo * hi).sqrt();
    (probs(tau), tau)
}

/// Design the batch and draw it.
///
/// # Errors
/// An empty pool, a non-finite prediction, or settings out of range (see [`BatchError`]).
pub fn design_batch(
    predictions: &[f64],
    options: &BatchOptions,
) -> Result<BatchOutcome, BatchError> {
    let m = predictions.len();
    if m == 0 {
        return Err(BatchError::EmptyPool);
    }
    if let Some(index) = predictions.iter().position(|p| !p.is_finite()) {
        return Err(BatchError::NonFinitePrediction {
            index,
            value: predictions[index],
        });
    }
    let q = options.fdr;
    if !(q > 0.0 && q < 1.0) {
        return Err(BatchError::BadFdr(q));
    }
    let p_max = options.max_probability;
    if !(p_max > 0.0 && p_max < 1.0) {
        return Err(BatchError::BadMaxProbability(p_max));
    }
    let n = options.size;
    let limit = m as f64 * p_max;
    if !(n > 0.0 && n < limit) {
        return Err(BatchError::BadSize { size: n, limit });
    }
    let reachability_floor = 1.0 / (1.0 + q * (m as f64 - n) / (1.0 - q));
    let (probabilities, decay_ranks, p_min) = match options.design {
        BatchDesign::Uniform => (vec![n / m as f64; m], None, n / m as f64),
        BatchDesign::Ranked => {
            // The derived floor, unless the pool at the floor would use more than half of
            // the budget (then half of the uniform probability).
            let p_min = options
                .min_probability
                .unwrap_or_else(|| (FLOOR_MARGIN * reachability_floor).min(0.5 * n / m as f64));
            let floor_size = p_min * m as f64;
            if !(p_min > 0.0 && p_min < p_max && floor_size < n) {
                return Err(BatchError::BadMinProbability {
                    min: p_min,
                    max: p_max,
                    units: m,
                    floor_size,
                    size: n,
                });
            }
            let ranks = descending_ranks(predictions);
            let (probabilities, tau) = ranked_probabilities(&ranks, n, p_min, p_max);
            (probabilities, Some(tau), p_min)
        }
    };
    let mut rng = stream(options.seed, Stream::Simulation);
    let in_batch: Vec<bool> = probabilities
        .iter()
        .map(|&p| rng.gen::<f64>() < p)
        .collect();
    Ok(summarize(
        probabilities,
        in_batch,
        options,
        decay_ranks,
        p_min,
        reachability_floor,
        predictions,
    ))
}

fn summarize(
    probabilities: Vec<f64>,
    in_batch: Vec<bool>,
    options: &BatchOptions,
    decay_ranks: Option<f64>,
    p_min: f64,
    reachability_floor: f64,
    predictions: &[f64],
) -> BatchOutcome {
    let m = probabilities.len();
    let q = options.fdr;
    let expected_size: f64 = probabilities.iter().sum();
    let size_sd = probabilities
        .iter()
        .map(|p| p * (1.0 - p))
        .sum::<f64>()
        .sqrt();
    let drawn_size = in_batch.iter().filter(|b| **b).count();
    let expected_total_weight: f64 = probabilities.iter().map(|p| 1.0 - p).sum();
    let p_lo = probabilities.iter().copied().fold(f64::INFINITY, f64::min);
    let p_hi = probabilities.iter().copied().fold(0.0, f64::max);
    let largest_weight = (1.0 - p_lo) / p_lo;
    let reachable_weight_bound = q * expected_total_weight / (1.0 - q);
    let w_top = (1.0 - p_hi) / p_hi;
    let expected_top_floor = w_top / (expected_total_weight + w_top);
    let pool_left = m as f64 - expected_size;
    let shortlist_needs_at_least = (expected_top_floor * pool_left / q).ceil().max(1.0) as usize;
    let mut order: Vec<usize> = (0..m).collect();
    order.sort_by(|&a, &b| predictions[b].total_cmp(&predictions[a]));
    let expected_in_top: Vec<(usize, f64)> = [100usize, 1000, 10_000]
        .into_iter()
        .filter(|&k| k <= m)
        .map(|k| (k, order[..k].iter().map(|&j| probabilities[j]).sum()))
        .collect();
    let mut reading = vec![format!(
        "Expected batch size {expected_size:.0} (standard deviation {size_sd:.1}: each unit is \
         drawn on its own, so the size varies; about 95% of draws fall between {:.0} and \
         {:.0}); this draw (seed {}) holds {drawn_size}.",
        (expected_size - 1.96 * size_sd).max(0.0),
        expected_size + 1.96 * size_sd,
        options.seed
    )];
    reading.push(match options.design {
        BatchDesign::Ranked => format!(
            "Inclusion probabilities fall from {p_hi:.3} for the model's top-ranked unit to \
             {p_lo:.2e} (decay over about {:.0} ranks): the batch is dense where the shortlist \
             will be drawn, so the assayed units can rank the top of the pool.",
            decay_ranks.unwrap_or(0.0)
        ),
        BatchDesign::Uniform => format!(
            "Every unit has inclusion probability {p_hi:.3e} (uniform design): the batch is a \
             random sample of the pool, as thin at the top as anywhere else."
        ),
    });
    reading.push(if largest_weight <= reachable_weight_bound {
        format!(
            "Every unit stays reachable at FDR {q}: the largest weight (1 - pi) / pi is \
             {largest_weight:.3e}, within q W / (1 - q) = {reachable_weight_bound:.3e} at the \
             expected total labeled weight W = {expected_total_weight:.0}."
        )
    } else {
        format!(
            "Not every unit is reachable at FDR {q}: the largest weight {largest_weight:.3e} \
             exceeds q W / (1 - q) = {reachable_weight_bound:.3e} at the expected total \
             labeled weight; raise --min-probability or the batch size."
        )
    });
    reading.push(format!(
        "The smallest p-value a unit at the top can reach is about {expected_top_floor:.2e}; a \
         BH line at FDR {q} meets that floor only from a shortlist of {shortlist_needs_at_least} \
         unit(s), so the top units need nearly no inactive assayed unit ranked above them."
    ));
    if !expected_in_top.is_empty() {
        reading.push(format!(
            "Expected batch units among the top predictions: {}. The assayed units ranked \
             above a pool unit decide its p-value; where the batch is thin, the shortlist \
             cannot reach.",
            expected_in_top
                .iter()
                .map(|(k, e)| format!("{e:.1} of the top {k}"))
                .collect::<Vec<_>>()
                .join(", ")
        ));
    }
    reading.push(
        "Assay every unit of the batch. Its outcomes must not be used to retrain the model \
         whose predictions the selection calibrates: that voids the exactness of the weights."
            .to_string(),
    );
    BatchOutcome {
        design: options.design,
        probabilities,
        in_batch,
        pool_units: m,
        expected_size,
        size_sd,
        drawn_size,
        min_probability: p_min,
        max_probability: options.max_probability,
        reachability_floor,
        decay_ranks,
        expected_total_weight,
        largest_weight,
        reachable_weight_bound,
        expected_top_floor,
        shortlist_needs_at_least,
        expected_in_top,
        seed: options.seed,
        reading,
    }
}

/// The exact density-ratio weight `(1 - pi) / pi` of an inclusion probability.
pub fn exact_weight(probability: f64) -> f64 {
    (1.0 - probability) / probability
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::conformal::score::Thresholds;
    use crate::selection::pipeline::{run_selection, LabeledInput, PoolInput, SelectOptions};
    use rand::SeedableRng;
    use rand_distr::{Distribution, StandardNormal};

    fn options(design: BatchDesign, size: f64) -> BatchOptions {
        BatchOptions {
            size,
            fdr: 0.2,
            design,
            min_probability: None,
            max_probability: DEFAULT_MAX_PROBABILITY,
            seed: 7,
        }
    }

    #[test]
    fn ranked_design_hits_the_size_and_the_bounds() {
        let predictions: Vec<f64> = (0..40_000).map(|i| ((i * 7919) % 40_000) as f64).collect();
        let o = design_batch(&predictions, &options(BatchDesign::Ranked, 800.0)).unwrap();
        assert!(
            (o.expected_size - 800.0).abs() < 1e-6,
            "{}",
            o.expected_size
        );
        // Floor: 4 / (1 + 0.2 * 39200 / 0.8) = 4 / 9801 (hand computation).
        assert!((o.min_probability - 4.0 / 9801.0).abs() < 1e-12);
        let top = predictions
            .iter()
            .enumerate()
            .max_by(|a, b| a.1.total_cmp(b.1))
            .unwrap()
            .0;
        assert!((o.probabilities[top] - 0.5).abs() < 1e-3);
        assert!(o
            .probabilities
            .iter()
            .all(|&p| p >= o.min_probability - 1e-15 && p <= 0.5));
        // Monotone in the prediction.
        let mut by_prediction: Vec<(f64, f64)> = predictions
            .iter()
            .copied()
            .zip(o.probabilities.iter().copied())
            .collect();
        by_prediction.sort_by(|a, b| a.0.total_cmp(&b.0));
        assert!(by_prediction.windows(2).all(|w| w[0].1 <= w[1].1 + 1e-15));
        assert!(o.largest_weight <= o.reachable_weight_bound);
        // The draw's size is near its expectation (within 4 SD).
        assert!((o.drawn_size as f64 - 800.0).abs() < 4.0 * o.size_sd);
        // Uniform: every probability N / M.
        let u = design_batch(&predictions, &options(BatchDesign::Uniform, 800.0)).unwrap();
        assert!(u.probabilities.iter().all(|&p| (p - 0.02).abs() < 1e-15));
    }

    #[test]
    fn bad_settings_are_errors() {
        let p = vec![1.0, 2.0, 3.0];
        assert_eq!(
            design_batch(&[], &options(BatchDesign::Ranked, 1.0)).unwrap_err(),
            BatchError::EmptyPool
        );
        assert!(matches!(
            design_batch(&p, &options(BatchDesign::Ranked, 2.0)),
            Err(BatchError::BadSize { .. })
        ));
        let mut o = options(BatchDesign::Ranked, 1.0);
        o.min_probability = Some(0.4);
        assert!(matches!(
            design_batch(&p, &o),
            Err(BatchError::BadMinProbability { .. })
        ));
        assert!(matches!(
            design_batch(&[1.0, f64::NAN], &options(BatchDesign::Ranked, 0.5)),
            Err(BatchError::NonFinitePrediction { index: 1, .. })
        ));
    }

    /// One simulated library: outcome y = mu + e, prediction mu, interesting y > 2.
    fn library(units: usize, seed: u64) -> (Vec<f64>, Vec<f64>) {
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(seed);
        let mut mu = Vec::with_capacity(units);
        let mut y = Vec::with_capacity(units);
        for _ in 0..units {
            let m: f64 = StandardNormal.sample(&mut rng);
            let e: f64 = StandardNormal.sample(&mut rng);
            mu.push(m);
            y.push(m + e);
        }
        (mu, y)
    }

    /// Realized (FDP, selected) of one batch and exact-weight selection; assayed units are
    /// not in the pool handed to the selection, so none can be selected.
    fn screen(mu: &[f64], y: &[f64], design: BatchDesign, seed: u64) -> (f64, usize) {
        let mut o = options(design, 800.0);
        o.seed = seed;
        let batch = design_batch(mu, &o).unwrap();
        let (mut lab_y, mut lab_mu, mut lab_w) = (Vec::new(), Vec::new(), Vec::new());
        let (mut pool_mu, mut pool_w, mut pool_y) = (Vec::new(), Vec::new(), Vec::new());
        for j in 0..mu.len() {
            let w = exact_weight(batch.probabilities[j]);
            if batch.in_batch[j] {
                lab_y.push(y[j]);
                lab_mu.push(mu[j]);
                lab_w.push(w);
            } else {
                pool_mu.push(mu[j]);
                pool_w.push(w);
                pool_y.push(y[j]);
            }
        }
        let select = SelectOptions {
            fdr: 0.2,
            seed,
            ..SelectOptions::default()
        };
        let out = run_selection(
            &select,
            LabeledInput {
                outcome: &lab_y,
                prediction: &lab_mu,
                thresholds: Thresholds::Constant(2.0),
                weights: Some(&lab_w),
            },
            PoolInput {
                prediction: &pool_mu,
                thresholds: Thresholds::Constant(2.0),
                weights: Some(&pool_w),
            },
        )
        .unwrap();
        let false_hits = (0..pool_mu.len())
            .filter(|&j| out.selected[j] && pool_y[j] <= 2.0)
            .count();
        let fdp = if out.selected_count == 0 {
            0.0
        } else {
            false_hits as f64 / out.selected_count as f64
        };
        (fdp, out.selected_count)
    }

    #[test]
    fn exact_batch_weights_keep_fdr_and_the_ranked_design_rarely_comes_back_empty() {
        // 40,000 units, batch of 800 expected, q = 0.2, 40 replicates (a new library and a
        // new draw each): with the exact weights (1 - pi) / pi conditional calibration keeps
        // FDR <= q (Tibshirani et al. 2019 + Jin & Candes 2023; checked within 2 Monte Carlo
        // SE), and the ranked design gives a non-empty shortlist in at least 90% of
        // replicates, more often than the uniform one (the evidence for the default; measured:
        // ranked FDR 0.201 +- 0.027, non-empty 95%, mean size 136; uniform 0.155 +- 0.048,
        // 53%, 294).
        let replicates = 40;
        let mut results = Vec::new();
        for design in [BatchDesign::Ranked, BatchDesign::Uniform] {
            let runs: Vec<(f64, usize)> = (0..replicates)
                .map(|r| {
                    let (mu, y) = library(40_000, 1000 + r);
                    screen(&mu, &y, design, 2000 + r)
                })
                .collect();
            let n = runs.len() as f64;
            let fdr = runs.iter().map(|r| r.0).sum::<f64>() / n;
            let var = runs.iter().map(|r| (r.0 - fdr).powi(2)).sum::<f64>() / (n - 1.0);
            let se = (var / n).sqrt();
            let nonempty = runs.iter().filter(|r| r.1 > 0).count() as f64 / n;
            let mean_size = runs.iter().map(|r| r.1 as f64).sum::<f64>() / n;
            eprintln!("{design:?}: FDR {fdr:.3} +- {:.3}, non-empty {nonempty:.2}, mean size {mean_size:.1}", 2.0 * se);
            assert!(fdr <= 0.2 + 2.0 * se, "{design:?}: FDR {fdr} +- {se}");
            results.push((design, nonempty, mean_size));
        }
        assert!(
            results[0].1 >= 0.9,
            "ranked non-empty share {}",
            results[0].1
        );
        // The uniform batch is as thin at the top as anywhere: its shortlist is a draw at
        // the p-value floor, all or nothing (seen: non-empty in about half the replicates,
        // large when it is not empty).
        assert!(results[0].1 > results[1].1, "{results:?}");
    }
}
