//! From classifier output to density-ratio weights: choice of fitting rows (all, held-out
//! split, pool sample with class-ratio correction), e(x) -> w(x), capping at a quantile,
//! weight quantiles (design.md 2.5).
//!
//! # Formula
//! The classifier is fit with sample weight n / n_fit on each fitted labeled row and
//! m / m_fit on each fitted pool row (n labeled rows, m pool rows), so its linear predictor
//! eta(x) estimates the log-odds of "pool" at the real set sizes: e(x) = P(pool | x) =
//! 1 / (1 + exp(-eta)). The weight is the estimated density ratio
//!
//! w(x) = p_pool(x) / p_labeled(x) = (n / m) e(x) / (1 - e(x)) = exp(eta(x) + log(n / m)).
//!
//! The constant n / m is the class-size ratio; it cancels in every weighted p-value, and it
//! makes w close to 1 when there is no shift. The "balanced" probability
//! w / (1 + w) = P(pool | x) as if both sets had the same size is what the overlap
//! diagnostics use. Weights are computed from eta in log space, never as e / (1 - e).

use rand::seq::index::sample;
use rand::Rng;
use serde::Serialize;

use super::logistic::sigmoid;
use super::{FitRows, ShiftOptions};

/// Log-weights are clamped to [-LOG_WEIGHT_LIMIT, LOG_WEIGHT_LIMIT] so that weights, their
/// sums and squares stay finite; clamped rows are counted and warned about.
pub const LOG_WEIGHT_LIMIT: f64 = 300.0;

/// Quantile levels reported for the weights.
pub const WEIGHT_QUANTILES: [f64; 9] = [0.0, 0.01, 0.05, 0.25, 0.5, 0.75, 0.95, 0.99, 1.0];

/// Rows chosen for fitting (sorted indices) and their class sample weights.
#[derive(Debug, Clone, PartialEq)]
pub struct FitRowChoice {
    /// Labeled rows in the fit.
    pub labeled: Vec<usize>,
    /// Pool rows in the fit.
    pub pool: Vec<usize>,
    /// n / labeled rows fit.
    pub labeled_sample_weight: f64,
    /// m / pool rows fit.
    pub pool_sample_weight: f64,
}

/// Seeded choice of `count` of `total` rows, sorted (sequential memory access later).
pub(crate) fn sample_sorted(rng: &mut impl Rng, total: usize, count: usize) -> Vec<usize> {
    if count >= total {
        return (0..total).collect();
    }
    let mut rows = sample(rng, total, count).into_vec();
    rows.sort_unstable();
    rows
}

/// Choose the fitting rows per [`FitRows`] and `max_pool_sample`.
pub(crate) fn choose_fit_rows(
    n: usize,
    m: usize,
    options: &ShiftOptions,
    rng: &mut impl Rng,
) -> FitRowChoice {
    let (labeled, mut pool_count) = match options.fit_rows {
        FitRows::All => ((0..n).collect::<Vec<_>>(), m),
        FitRows::HeldOut { labeled_fraction } => {
            let count = ((labeled_fraction * n as f64).round() as usize).clamp(1, n - 1);
            let pool_count = ((labeled_fraction * m as f64).round() as usize).clamp(1, m);
            (sample_sorted(rng, n, count), pool_count)
        }
    };
    if let Some(cap) = options.max_pool_sample {
        pool_count = pool_count.min(cap);
    }
    let pool = sample_sorted(rng, m, pool_count);
    FitRowChoice {
        labeled_sample_weight: n as f64 / labeled.len() as f64,
        pool_sample_weight: m as f64 / pool.len() as f64,
        labeled,
        pool,
    }
}

/// Boolean mask of length `len`, true at `rows`.
pub(crate) fn row_mask(len: usize, rows: &[usize]) -> Vec<bool> {
    let mut mask = vec![false; len];
    for &r in rows {
        mask[r] = true;
    }
    mask
}

/// Per-row probabilities and weights for both sets.
#[derive(Debug, Clone, PartialEq)]
pub(crate) struct Fitted {
    pub labeled_probability: Vec<f64>,
    pub pool_probability: Vec<f64>,
    pub labeled_balanced: Vec<f64>,
    pub pool_balanced: Vec<f64>,
    pub labeled_weight: Vec<f64>,
    pub pool_weight: Vec<f64>,
    pub clamped: usize,
}

/// e(x), balanced probability and w(x) from the linear predictor (module formula).
pub(crate) fn weights_from_linear_predictor(
    labeled_eta: &[f64],
    pool_eta: &[f64],
    n: usize,
    m: usize,
) -> Fitted {
    let offset = (n as f64 / m as f64).ln();
    let mut clamped = 0;
    let mut one = |eta: &[f64]| {
        let mut prob = Vec::with_capacity(eta.len());
        let mut balanced = Vec::with_capacity(eta.len());
        let mut weight = Vec::with_capacity(eta.len());
        for &e in eta {
            let raw = e + offset;
            let log_w = raw.clamp(-LOG_WEIGHT_LIMIT, LOG_WEIGHT_LIMIT);
            if log_w != raw {
                clamped += 1;
            }
            prob.push(sigmoid(e));
            balanced.push(sigmoid(log_w));
            weight.push(log_w.exp());
        }
        (prob, balanced, weight)
    };
    let (labeled_probability, labeled_balanced, labeled_weight) = one(labeled_eta);
    let (pool_probability, pool_balanced, pool_weight) = one(pool_eta);
    Fitted {
        labeled_probability,
        pool_probability,
        labeled_balanced,
        pool_balanced,
        labeled_weight,
        pool_weight,
        clamped,
    }
}

/// Sample quantile, type 7 of Hyndman & Fan (1996) (linear interpolation between order
/// statistics; numpy's default): h = (S - 1) p, Q = x_(floor h) + (h - floor h)
/// (x_(floor h + 1) - x_(floor h)) on the ascending `sorted` values (0-based).
pub fn quantile_sorted(sorted: &[f64], p: f64) -> f64 {
    let h = (sorted.len() - 1) as f64 * p;
    let lo = h.floor() as usize;
    let hi = (lo + 1).min(sorted.len() - 1);
    sorted[lo] + (h - lo as f64) * (sorted[hi] - sorted[lo])
}

/// What capping did.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct CapReport {
    /// Requested quantile.
    pub quantile: f64,
    /// The cap: type-7 quantile of the calibration and pool weights together.
    pub cap: f64,
    /// Labeled rows whose weight was lowered to the cap.
    pub labeled_capped: usize,
    /// Pool rows whose weight was lowered to the cap.
    pub pool_capped: usize,
}

/// Cap every weight at the `quantile` of the calibration-row and pool weights (labeled
/// fitting-only rows are capped too, but do not enter the quantile). The balanced
/// probabilities follow the capped weights; e(x) stays the classifier's output.
pub(crate) fn cap_weights(fitted: &mut Fitted, calibration: &[usize], quantile: f64) -> CapReport {
    let mut all: Vec<f64> = calibration
        .iter()
        .map(|&i| fitted.labeled_weight[i])
        .chain(fitted.pool_weight.iter().copied())
        .collect();
    all.sort_unstable_by(f64::total_cmp);
    let cap = quantile_sorted(&all, quantile);
    let apply = |weights: &mut [f64], balanced: &mut [f64]| {
        let mut count = 0;
        for (w, b) in weights.iter_mut().zip(balanced.iter_mut()) {
            if *w > cap {
                *w = cap;
                *b = cap / (1.0 + cap);
                count += 1;
            }
        }
        count
    };
    let labeled_capped = apply(&mut fitted.labeled_weight, &mut fitted.labeled_balanced);
    let pool_capped = apply(&mut fitted.pool_weight, &mut fitted.pool_balanced);
    CapReport {
        quantile,
        cap,
        labeled_capped,
        pool_capped,
    }
}

/// Weight distribution summary for shift.json.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct WeightSummary {
    /// How the weights are scaled (the constant that cancels).
    pub scale: String,
    /// Capping, if requested.
    pub cap: Option<CapReport>,
    /// Quantile levels of the two quantile lists.
    pub quantile_levels: Vec<f64>,
    /// Type-7 quantiles of the calibration weights.
    pub labeled_quantiles: Vec<f64>,
    /// Type-7 quantiles of the pool weights.
    pub pool_quantiles: Vec<f64>,
    /// Largest calibration weight / sum of calibration weights.
    pub largest_weight_share: f64,
}

/// Summarize the calibration and pool weights.
pub(crate) fn summarize(
    calibration_weights: &[f64],
    pool_weights: &[f64],
    n: usize,
    m: usize,
    cap: Option<CapReport>,
) -> WeightSummary {
    let quantiles = |w: &[f64]| {
        let mut s = w.to_vec();
        s.sort_unstable_by(f64::total_cmp);
        WEIGHT_QUANTILES
            .iter()
            .map(|&p| quantile_sorted(&s, p))
            .collect::<Vec<_>>()
    };
    let total: f64 = calibration_weights.iter().sum();
    let largest = calibration_weights.iter().fold(0.0f64, |a, &b| a.max(b));
    WeightSummary {
        scale: format!(
            "w(x) = (n/m) e(x)/(1-e(x)) with n = {n} labeled and m = {m} pool rows: the estimated density ratio p_pool(x)/p_labeled(x); any constant factor cancels"
        ),
        cap,
        quantile_levels: WEIGHT_QUANTILES.to_vec(),
        labeled_quantiles: quantiles(calibration_weights),
        pool_quantiles: quantiles(pool_weights),
        largest_weight_share: largest / total,
    }
}

/// The largest power of two not above `x` (positive and finite), exactly: `x` with its
/// mantissa bits cleared. Subnormal `x` gives the smallest normal power, 2^-1022.
///
/// Weights are rescaled only by such powers: multiplying or dividing by a power of two is
/// exact (short of underflow), so every ratio of weights, and with it every exact tie of
/// design.md 2.4, is unchanged.
pub fn power_of_two_below(x: f64) -> f64 {
    debug_assert!(x > 0.0 && x.is_finite());
    if x < f64::MIN_POSITIVE {
        f64::MIN_POSITIVE
    } else {
        f64::from_bits(x.to_bits() & 0xfff0_0000_0000_0000)
    }
}

/// The power of two `2^k` (k <= 0) by which weights with largest value `max`, `count` of
/// them, are multiplied so that any sum of them stays below 2^1000 (far from overflow).
/// 1 when they already do, which is every realistic run.
pub fn overflow_safe_scale(max: f64, count: usize) -> f64 {
    if !(max > 0.0 && max.is_finite()) {
        return 1.0;
    }
    // max < 2^(e + 1) and count + 1 <= 2^c, so any sum is below 2^(e + 1 + c).
    let e = (power_of_two_below(max).to_bits() >> 52) as i64 - 1023;
    let c = 64 - (count as u64 + 1).leading_zeros() as i64;
    let k = (1000 - (e + 1 + c)).min(0);
    f64::from_bits(((k + 1023).max(1) as u64) << 52)
}

/// Rescale given weights of the labeled and the pool table together by the power of two of
/// [`overflow_safe_scale`], so that their sums cannot overflow (weights near 1.7e308 give
/// an infinite total otherwise). The p-values depend on ratios of weights only, so the
/// selection is unchanged. Returns the factor applied (1 for realistic weights).
pub fn rescale_for_sums(labeled: &mut [f64], pool: &mut [f64]) -> f64 {
    let max = labeled
        .iter()
        .chain(pool.iter())
        .fold(0.0f64, |a, &b| a.max(b));
    let scale = overflow_safe_scale(max, labeled.len() + pool.len());
    if scale != 1.0 {
        for w in labeled.iter_mut().chain(pool.iter_mut()) {
            *w *= scale;
        }
    }
    scale
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn powers_of_two_are_exact() {
        assert_eq!(power_of_two_below(1.0), 1.0);
        assert_eq!(power_of_two_below(3.0), 2.0);
        assert_eq!(power_of_two_below(0.3), 0.25);
        assert_eq!(power_of_two_below(f64::MAX), 2f64.powi(1023));
        assert_eq!(power_of_two_below(5e-324), f64::MIN_POSITIVE);
        assert_eq!(overflow_safe_scale(3.0, 1000), 1.0);
        let scale = overflow_safe_scale(1.7e308, 2300);
        assert_eq!(scale, power_of_two_below(scale), "a power of two");
        assert!(1.7e308 * scale * 2301.0 < 2f64.powi(1001));
        // Ratios survive exactly.
        let (mut labeled, mut pool) = (vec![1.7e308, 3.0e307], vec![1.1e308, 1e-300]);
        let before = labeled[1] / labeled[0];
        let scale = rescale_for_sums(&mut labeled, &mut pool);
        assert!(scale < 1.0);
        assert_eq!(labeled[1] / labeled[0], before);
        assert_eq!(pool[0], 1.1e308 * scale);
        assert!(labeled.iter().chain(&pool).sum::<f64>().is_finite());
        assert!(pool[1] > 0.0);
    }

    #[test]
    fn quantile_matches_numpy_linear() {
        // numpy 2.2 np.quantile([1, 2, 4, 10], [0.5, 0.9, 1/3]) = [3.0, 8.2, 2.0] (hand
        // computation with the type-7 rule, from memory of numpy's default "linear").
        let s = [1.0, 2.0, 4.0, 10.0];
        assert!((quantile_sorted(&s, 0.5) - 3.0).abs() < 1e-12);
        assert!((quantile_sorted(&s, 0.9) - 8.2).abs() < 1e-12);
        assert!((quantile_sorted(&s, 1.0 / 3.0) - 2.0).abs() < 1e-12);
        assert_eq!(quantile_sorted(&s, 1.0), 10.0);
    }

    #[test]
    fn weights_are_the_density_ratio() {
        // eta = log-odds at set sizes n = 10, m = 40; w = (n/m) e/(1-e) = exp(eta) / 4.
        let f = weights_from_linear_predictor(&[0.0, 2.0], &[-1.0, 1000.0], 10, 40);
        assert!((f.labeled_weight[0] - 0.25).abs() < 1e-15);
        assert!((f.labeled_weight[1] - 2f64.exp() / 4.0).abs() < 1e-12);
        assert!((f.labeled_probability[1] - 1.0 / (1.0 + (-2f64).exp())).abs() < 1e-15);
        // Huge eta is clamped, finite, and counted.
        assert!(f.pool_weight[1].is_finite());
        assert_eq!(f.clamped, 1);
        assert!((f.pool_balanced[0] - 1.0 / (1.0 + 4.0 * 1f64.exp())).abs() < 1e-15);
    }

    #[test]
    fn capping_reports_counts() {
        let mut f = weights_from_linear_predictor(&[0.0, 1.0, 2.0], &[3.0, 0.5], 1, 1);
        let report = cap_weights(&mut f, &[0, 1, 2], 0.5);
        // Weights exp(0), exp(1), exp(2), exp(3), exp(0.5): median exp(1).
        assert!((report.cap - 1f64.exp()).abs() < 1e-12);
        assert_eq!((report.labeled_capped, report.pool_capped), (1, 1));
        assert!(f.labeled_weight.iter().all(|&w| w <= report.cap));
    }
}
