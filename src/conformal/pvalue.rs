//! Weighted conformal p-values (Tibshirani, Barber, Candes & Ramdas 2019; Jin & Candes 2023).
//!
//! With labeled scores `V_i`, labeled weights `w_i` (sum `W`), pool scores `Vh_j` and pool
//! weights `w_j` (design.md section 2.2):
//!
//! * conservative: `p_j = (sum_i w_i 1{V_i <= Vh_j} + w_j) / (W + w_j)`
//! * randomized:   `p_j = (sum_i w_i 1{V_i < Vh_j} + U_j (w_j + sum_i w_i 1{V_i = Vh_j})) / (W + w_j)`
//!   with `U_j ~ Uniform(0, 1)` drawn from a seeded generator, one per pool unit in input order.
//!
//! With every weight equal to 1 these are ordinary split-conformal p-values. The labeled
//! scores are sorted once and their weights prefix-summed, so each pool unit costs one
//! binary search: `O((n + m) log n)` in all.
//!
//! Every p-value has a floor `w_j / (W + w_j)`: a unit whose weight is large relative to
//! `W` can never reach a small level. Such units are "unreachable" (see
//! [`crate::selection::bh::unreachable`]).

use rand::Rng;
use rand_chacha::ChaCha20Rng;
use rayon::prelude::*;
use thiserror::Error;

use crate::random::{stream, Stream};

/// Broken preconditions of the p-value computation.
#[derive(Debug, Error, PartialEq)]
#[non_exhaustive]
pub enum PValueError {
    /// No labeled units.
    #[error("the labeled set is empty: conformal p-values need at least one labeled unit")]
    EmptyCalibration,
    /// A score is NaN.
    #[error("labeled score {index} is NaN; scores must be numbers (+inf is allowed)")]
    NanScore { index: usize },
    /// A pool score is NaN.
    #[error("pool score {index} is NaN; scores must be numbers")]
    NanPoolScore { index: usize },
    /// Weight vector length differs from the score vector length.
    #[error("{what}: {got} weights for {expected} units")]
    LengthMismatch {
        what: &'static str,
        expected: usize,
        got: usize,
    },
    /// A weight is not a finite positive number.
    #[error("{what} weight {index} is {value}; weights must be finite and > 0")]
    BadWeight {
        what: &'static str,
        index: usize,
        value: f64,
    },
    /// The labeled weights sum to infinity.
    #[error("the labeled weights sum to {total}; rescale the weights (only ratios matter)")]
    TotalNotFinite { total: f64 },
}

/// The labeled (calibration) side, prepared once: scores sorted ascending, with the
/// prefix sums of their weights in the same order.
#[derive(Clone, Debug)]
pub struct CalibrationSet {
    sorted_scores: Vec<f64>,
    /// `prefix[i]` = sum of the weights of the `i` smallest scores; `prefix[n] = W`.
    prefix: Vec<f64>,
}

impl CalibrationSet {
    /// Sort the labeled scores and prefix-sum their weights (`None` = every weight 1).
    ///
    /// # Errors
    /// Empty input, NaN scores, weights that are not finite and positive, a length
    /// mismatch, or an infinite total weight.
    pub fn new(scores: &[f64], weights: Option<&[f64]>) -> Result<Self, PValueError> {
        if scores.is_empty() {
            return Err(PValueError::EmptyCalibration);
        }
        if let Some(index) = scores.iter().position(|v| v.is_nan()) {
            return Err(PValueError::NanScore { index });
        }
        if let Some(w) = weights {
            check_weights("labeled", w, scores.len())?;
        }
        let mut order: Vec<usize> = (0..scores.len()).collect();
        order.sort_by(|&a, &b| scores[a].total_cmp(&scores[b]));
        let sorted_scores: Vec<f64> = order.iter().map(|&i| scores[i]).collect();
        let mut prefix = Vec::with_capacity(scores.len() + 1);
        let mut total = 0.0;
        prefix.push(total);
        for &i in &order {
            total += weights.map_or(1.0, |w| w[i]);
            prefix.push(total);
        }
        if !total.is_finite() {
            return Err(PValueError::TotalNotFinite { total });
        }
        Ok(CalibrationSet {
            sorted_scores,
            prefix,
        })
    }

    /// Number of labeled units.
    pub fn len(&self) -> usize {
        self.sorted_scores.len()
    }

    /// Always false: construction rejects an empty labeled set.
    pub fn is_empty(&self) -> bool {
        self.sorted_scores.is_empty()
    }

    /// `W`, the total labeled weight.
    pub fn total_weight(&self) -> f64 {
        self.prefix[self.prefix.len() - 1]
    }

    /// Labeled scores in ascending order.
    pub fn sorted_scores(&self) -> &[f64] {
        &self.sorted_scores
    }

    /// `sum_i w_i 1{V_i < v}`.
    #[inline]
    pub fn weight_below(&self, v: f64) -> f64 {
        self.prefix[self.sorted_scores.partition_point(|&s| s < v)]
    }

    /// `sum_i w_i 1{V_i <= v}`.
    #[inline]
    pub fn weight_at_or_below(&self, v: f64) -> f64 {
        self.prefix[self.sorted_scores.partition_point(|&s| s <= v)]
    }

    /// Prefix sum of the `count` smallest scores' weights.
    pub fn prefix_weight(&self, count: usize) -> f64 {
        self.prefix[count]
    }
}

/// Which p-value definition to use.
#[derive(Clone, Copy, Debug, PartialEq, Eq, serde::Serialize)]
#[serde(rename_all = "lowercase")]
pub enum PValueKind {
    /// Deterministic, ties count against the unit (needed by conditional calibration).
    Conservative,
    /// Ties broken by a seeded uniform draw; exactly uniform under exchangeability.
    Randomized,
}

impl PValueKind {
    /// The name used on the command line and in summaries.
    pub fn name(self) -> &'static str {
        match self {
            PValueKind::Conservative => "conservative",
            PValueKind::Randomized => "randomized",
        }
    }
}

/// Pool p-values kept as numerator and denominator, so that level comparisons can be
/// made in one form everywhere (see [`crate::selection::bh::within_level`]).
#[derive(Clone, Debug)]
pub struct PoolPValues {
    /// `sum_i w_i 1{V_i <= Vh_j} + w_j` (conservative) or the randomized numerator.
    pub numerator: Vec<f64>,
    /// `W + w_j`.
    pub denominator: Vec<f64>,
}

impl PoolPValues {
    /// The p-values `numerator / denominator`.
    pub fn values(&self) -> Vec<f64> {
        self.numerator
            .iter()
            .zip(&self.denominator)
            .map(|(a, d)| a / d)
            .collect()
    }

    /// Number of pool units.
    pub fn len(&self) -> usize {
        self.numerator.len()
    }

    /// True when there are no pool units.
    pub fn is_empty(&self) -> bool {
        self.numerator.is_empty()
    }
}

/// Check that pool weights (if any) are usable; returns an error naming the first bad one.
fn check_pool(pool_scores: &[f64], pool_weights: Option<&[f64]>) -> Result<(), PValueError> {
    if let Some(index) = pool_scores.iter().position(|v| v.is_nan()) {
        return Err(PValueError::NanPoolScore { index });
    }
    if let Some(w) = pool_weights {
        check_weights("pool", w, pool_scores.len())?;
    }
    Ok(())
}

pub(crate) fn check_weights(
    what: &'static str,
    weights: &[f64],
    expected: usize,
) -> Result<(), PValueError> {
    if weights.len() != expected {
        return Err(PValueError::LengthMismatch {
            what,
            expected,
            got: weights.len(),
        });
    }
    if let Some(index) = weights.iter().position(|w| !(w.is_finite() && *w > 0.0)) {
        return Err(PValueError::BadWeight {
            what,
            index,
            value: weights[index],
        });
    }
    Ok(())
}

/// Weight of pool unit `j` (`None` = every weight 1).
#[inline]
pub(crate) fn weight_of(weights: Option<&[f64]>, j: usize) -> f64 {
    weights.map_or(1.0, |w| w[j])
}

/// Conservative weighted conformal p-values of all pool units.
///
/// # Formula
/// `p_j = (sum_i w_i 1{V_i <= Vh_j} + w_j) / (W + w_j)` (design.md 2.2; Jin & Candes 2023).
///
/// # Errors
/// NaN pool scores; pool weights of the wrong length or not finite and positive.
///
/// # Examples
/// ```
/// use weighbridge::conformal::pvalue::{conservative_pvalues, CalibrationSet};
/// // Unweighted: (#{V_i <= 0.5} + 1) / (n + 1) = (2 + 1) / 5.
/// let cal = CalibrationSet::new(&[0.1, 0.5, 0.9, 2.0], None).unwrap();
/// let p = conservative_pvalues(&cal, &[0.5], None).unwrap();
/// assert!((p.values()[0] - 0.6).abs() < 1e-15);
/// ```
pub fn conservative_pvalues(
    calibration: &CalibrationSet,
    pool_scores: &[f64],
    pool_weights: Option<&[f64]>,
) -> Result<PoolPValues, PValueError> {
    check_pool(pool_scores, pool_weights)?;
    let total = calibration.total_weight();
    let (numerator, denominator) = pool_scores
        .par_iter()
        .enumerate()
        .map(|(j, &v)| {
            let w = weight_of(pool_weights, j);
            (calibration.weight_at_or_below(v) + w, total + w)
        })
        .unzip();
    Ok(PoolPValues {
        numerator,
        denominator,
    })
}

/// Randomized weighted conformal p-values of all pool units.
///
/// # Formula
/// `p_j = (sum_i w_i 1{V_i < Vh_j} + U_j (w_j + sum_i w_i 1{V_i = Vh_j})) / (W + w_j)`,
/// `U_j ~ Uniform(0, 1)` drawn in input order from ChaCha20 seeded with `seed`
/// (design.md 2.2). The same seed and input give the same values on every machine.
///
/// # Errors
/// NaN pool scores; pool weights of the wrong length or not finite and positive.
pub fn randomized_pvalues(
    calibration: &CalibrationSet,
    pool_scores: &[f64],
    pool_weights: Option<&[f64]>,
    seed: u64,
) -> Result<PoolPValues, PValueError> {
    check_pool(pool_scores, pool_weights)?;
    let total = calibration.total_weight();
    let m = pool_scores.len();
    let mut numerator = vec![0.0; m];
    let mut denominator = vec![0.0; m];
    // The draws are the sequence U_1, U_2, ... of one stream in input order; each f64 uses
    // one 64-bit output (two 32-bit ChaCha words), so chunk c starts at word 2 * (first unit
    // of the chunk) and the parallel result equals the sequential one bit for bit.
    const CHUNK: usize = 1 << 14;
    numerator
        .par_chunks_mut(CHUNK)
        .zip(denominator.par_chunks_mut(CHUNK))
        .enumerate()
        .for_each(|(c, (numerators, denominators))| {
            let first = c * CHUNK;
            let mut rng: ChaCha20Rng = stream(seed, Stream::PValueTies);
            rng.set_word_pos(2 * first as u128);
            for (offset, (a, d)) in numerators.iter_mut().zip(denominators).enumerate() {
                let j = first + offset;
                let v = pool_scores[j];
                let w = weight_of(pool_weights, j);
                let below = calibration.weight_below(v);
                let tied = calibration.weight_at_or_below(v) - below;
                let u: f64 = rng.gen();
                *a = below + u * (w + tied);
                *d = total + w;
            }
        });
    Ok(PoolPValues {
        numerator,
        denominator,
    })
}

/// p-values of the chosen kind.
///
/// # Errors
/// As [`conservative_pvalues`] / [`randomized_pvalues`].
pub fn pool_pvalues(
    kind: PValueKind,
    calibration: &CalibrationSet,
    pool_scores: &[f64],
    pool_weights: Option<&[f64]>,
    seed: u64,
) -> Result<PoolPValues, PValueError> {
    match kind {
        PValueKind::Conservative => conservative_pvalues(calibration, pool_scores, pool_weights),
        PValueKind::Randomized => randomized_pvalues(calibration, pool_scores, pool_weights, seed),
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand::SeedableRng;

    /// Brute force straight from the definition in design.md 2.2.
    fn brute_conservative(v: &[f64], w: &[f64], vh: f64, wj: f64) -> f64 {
        let total: f64 = w.iter().sum();
        let below: f64 = v
            .iter()
            .zip(w)
            .filter(|(s, _)| **s <= vh)
            .map(|(_, x)| x)
            .sum();
        (below + wj) / (total + wj)
    }

    #[test]
    fn conservative_matches_definition_with_ties_and_infinite_scores() {
        let mut rng = ChaCha20Rng::seed_from_u64(7);
        for _case in 0..200 {
            let n = rng.gen_range(1..40);
            let v: Vec<f64> = (0..n)
                .map(|_| match rng.gen_range(0..4) {
                    0 => f64::INFINITY,
                    _ => rng.gen_range(0..6) as f64 * 0.5,
                })
                .collect();
            let w: Vec<f64> = (0..n).map(|_| rng.gen_range(1..5) as f64).collect();
            let cal = CalibrationSet::new(&v, Some(&w)).unwrap();
            let vh: Vec<f64> = (0..20).map(|_| rng.gen_range(-1..7) as f64 * 0.5).collect();
            let wp: Vec<f64> = (0..20).map(|_| rng.gen_range(1..5) as f64).collect();
            let p = conservative_pvalues(&cal, &vh, Some(&wp)).unwrap().values();
            for j in 0..vh.len() {
                // Integer weights: sums are exact, so equality is exact.
                assert_eq!(p[j], brute_conservative(&v, &w, vh[j], wp[j]));
                assert!(p[j] > 0.0 && p[j] <= 1.0);
            }
        }
    }

    #[test]
    fn randomized_lies_between_strict_and_conservative() {
        let v = [0.0, 1.0, 1.0, 1.0, 2.0];
        let cal = CalibrationSet::new(&v, None).unwrap();
        let p = randomized_pvalues(&cal, &[1.0; 50], None, 3)
            .unwrap()
            .values();
        for x in p {
            // strict part 1/6, conservative 5/6
            assert!((1.0 / 6.0..=5.0 / 6.0).contains(&x));
        }
    }

    /// The parallel chunks reproduce one sequential stream of draws, in input order.
    #[test]
    fn randomized_draws_are_one_sequential_stream() {
        let cal = CalibrationSet::new(&[0.0, 1.0, 2.0], None).unwrap();
        let m = 40_000; // spans several chunks
        let p = randomized_pvalues(&cal, &vec![1.0; m], None, 5).unwrap();
        let mut rng = stream(5, Stream::PValueTies);
        for j in 0..m {
            let u: f64 = rng.gen();
            // below = 1, tied = 1, w = 1: numerator = 1 + 2u.
            assert_eq!(p.numerator[j], 1.0 + u * 2.0, "unit {j}");
        }
    }

    #[test]
    fn randomized_is_reproducible_and_seed_dependent() {
        let cal = CalibrationSet::new(&[0.0, 1.0, 2.0], None).unwrap();
        let a = randomized_pvalues(&cal, &[1.0; 10], None, 11)
            .unwrap()
            .values();
        let b = randomized_pvalues(&cal, &[1.0; 10], None, 11)
            .unwrap()
            .values();
        let c = randomized_pvalues(&cal, &[1.0; 10], None, 12)
            .unwrap()
            .values();
        assert_eq!(a, b);
        assert_ne!(a, c);
    }

    #[test]
    fn bad_inputs_are_errors() {
        assert_eq!(
            CalibrationSet::new(&[], None).unwrap_err(),
            PValueError::EmptyCalibration
        );
        assert!(matches!(
            CalibrationSet::new(&[1.0, f64::NAN], None),
            Err(PValueError::NanScore { index: 1 })
        ));
        assert!(matches!(
            CalibrationSet::new(&[1.0], Some(&[0.0])),
            Err(PValueError::BadWeight { .. })
        ));
        let cal = CalibrationSet::new(&[1.0], None).unwrap();
        assert!(matches!(
            conservative_pvalues(&cal, &[1.0, 2.0], Some(&[1.0])),
            Err(PValueError::LengthMismatch { .. })
        ));
        assert!(matches!(
            conservative_pvalues(&cal, &[1.0], Some(&[f64::INFINITY])),
            Err(PValueError::BadWeight { .. })
        ));
        assert!(matches!(
            conservative_pvalues(&cal, &[0.0, f64::NAN], None),
            Err(PValueError::NanPoolScore { index: 1 })
        ));
        assert!(matches!(
            randomized_pvalues(&cal, &[f64::NAN], None, 1),
            Err(PValueError::NanPoolScore { index: 0 })
        ));
    }
}
