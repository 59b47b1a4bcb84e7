//! Shift diagnostics (design.md 2.6): domain-classifier AUC (cross-validated, DeLong
//! interval, permutation test), overlap of e(x), Kish effective sample size, standardized
//! mean differences on the features and on their squares and products, and the count of
//! pool units that can never be selected because of their weight. Pareto k-hat (PSIS) is
//! in [`super::psis`].
//!
//! Each function names its source. Thresholds live in `warnings`.

use linfa::ParamGuard;
use ndarray::linalg::general_mat_mul;
use ndarray::{Array2, ArrayView2, ShapeBuilder};
use rand::seq::SliceRandom;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rayon::prelude::*;
use serde::Serialize;

use super::features::Design;
use super::logistic::{fit_logistic_from, LogisticParams};
use super::weights::{sample_sorted, FitRowChoice};
use super::{FeatureView, ShiftError, ShiftOptions};

/// Two-sided 95% standard normal quantile, Phi^-1(0.975).
const Z_975: f64 = 1.959_963_984_540_054;

/// Midranks (1-based, ties get the average rank) of `values`.
pub(crate) fn midranks(values: &[f64]) -> Vec<f64> {
    let mut order: Vec<usize> = (0..values.len()).collect();
    order.sort_unstable_by(|&a, &b| values[a].total_cmp(&values[b]));
    let mut ranks = vec![0.0; values.len()];
    let mut i = 0;
    while i < order.len() {
        let mut j = i + 1;
        while j < order.len() && values[order[j]] == values[order[i]] {
            j += 1;
        }
        // Positions i..j (0-based) share the average of ranks i+1..=j.
        let rank = (i + 1 + j) as f64 / 2.0;
        for &o in &order[i..j] {
            ranks[o] = rank;
        }
        i = j;
    }
    ranks
}

/// An AUC with its DeLong variance and 95% interval.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct AucEstimate {
    /// P(score of a positive > score of a negative) + 0.5 P(equal).
    pub auc: f64,
    /// DeLong variance estimate.
    pub variance: f64,
    /// AUC -+ 1.96 sqrt(variance), clipped to [0, 1].
    pub ci: [f64; 2],
}

/// Area under the ROC curve with ties counted one half (the Mann-Whitney U statistic
/// divided by n0 n1), with the DeLong, DeLong & Clarke-Pearson (1988, Biometrics 44:837)
/// variance computed by midranks as in Sun & Xu (2014, IEEE Signal Processing Letters
/// 21:1389).
///
/// # Formula
/// With midranks R over all scores, R+ within positives, R- within negatives:
/// V10_i = (R_i - R+_i) / n0 for each positive, V01_j = 1 - (R_j - R-_j) / n1 for each
/// negative; AUC = mean V10; Var = var(V10) / n1 + var(V01) / n0 (sample variances).
///
/// # Errors
/// [`ShiftError::OneClass`] unless there are at least two positives and two negatives.
///
/// # Examples
/// ```
/// use weighbridge::shift::roc_auc;
/// let est = roc_auc(&[0.1, 0.4, 0.35, 0.8], &[false, false, true, true]).unwrap();
/// assert_eq!(est.auc, 0.75);
/// ```
pub fn roc_auc(scores: &[f64], positive: &[bool]) -> Result<AucEstimate, ShiftError> {
    assert_eq!(scores.len(), positive.len());
    let pos: Vec<f64> = scores
        .iter()
        .zip(positive)
        .filter(|p| *p.1)
        .map(|p| *p.0)
        .collect();
    let neg: Vec<f64> = scores
        .iter()
        .zip(positive)
        .filter(|p| !*p.1)
        .map(|p| *p.0)
        .collect();
    let (n1, n0) = (pos.len(), neg.len());
    if n1 < 2 || n0 < 2 {
        return Err(ShiftError::OneClass {
            positives: n1,
            negatives: n0,
        });
    }
    let all = midranks(scores);
    let rp = midranks(&pos);
    let rn = midranks(&neg);
    let (mut v10, mut v01) = (Vec::with_capacity(n1), Vec::with_capacity(n0));
    let (mut ip, mut ineg) = (0, 0);
    for (r, &is_pos) in all.iter().zip(positive) {
        if is_pos {
            v10.push((r - rp[ip]) / n0 as f64);
            ip += 1;
        } else {
            v01.push(1.0 - (r - rn[ineg]) / n1 as f64);
            ineg += 1;
        }
    }
    let mean = |v: &[f64]| v.iter().sum::<f64>() / v.len() as f64;
    let var =
        |v: &[f64], m: f64| v.iter().map(|x| (x - m) * (x - m)).sum::<f64>() / (v.len() - 1) as f64;
    let auc = mean(&v10);
    let variance = var(&v10, auc) / n1 as f64 + var(&v01, mean(&v01)) / n0 as f64;
    let half = Z_975 * variance.sqrt();
    Ok(AucEstimate {
        auc,
        variance,
        ci: [(auc - half).max(0.0), (auc + half).min(1.0)],
    })
}

/// Cross-validated AUC and the permutation test, as reported.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct AucSummary {
    /// AUC of the pooled out-of-fold scores (pool = positive class).
    pub auc: f64,
    /// 95% DeLong interval of `auc` (treats the out-of-fold scores as fixed).
    pub ci: [f64; 2],
    /// DeLong standard error.
    pub standard_error: f64,
    /// Permutation p-value (1 + #{AUC_perm >= AUC}) / (1 + B).
    pub permutation_p: f64,
    /// B.
    pub permutations: usize,
    /// Folds.
    pub folds: usize,
    /// Labeled rows in the cross-validation.
    pub labeled_rows: usize,
    /// Pool rows in the cross-validation.
    pub pool_rows: usize,
}

/// K-fold cross-validated domain-classifier AUC with a DeLong interval and a permutation
/// test of "no shift".
///
/// The classifier two-sample test of Lopez-Paz & Oquab (2017, ICLR, "Revisiting classifier
/// two-sample tests") scores held-out rows with a classifier trained on other rows and
/// compares the held-out statistic with its distribution under random relabeling. Here the
/// statistic is the AUC of the pooled out-of-fold scores (stratified folds, same solver and
/// penalty as the main fit, started at the main fit to save iterations, on at most
/// `cv_max_rows` fitting rows) and the null distribution
/// comes from B random relabelings of those scores (scores held fixed, labels permuted):
/// p = (1 + #{AUC_b >= AUC}) / (1 + B) (Phipson & Smyth 2010). Holding the scores fixed
/// is exact for one train/test split; with K folds each fold's model saw the other folds'
/// labels, which under "no shift" makes the cross-validated AUC slightly below 0.5 (the test
/// errs conservative).
pub(crate) fn cross_validated_auc(
    design: &Design,
    full_fit: &[f64],
    labels: &[bool],
    rows: &FitRowChoice,
    (n, m): (usize, usize),
    options: &ShiftOptions,
    rng: &mut ChaCha8Rng,
) -> Result<AucSummary, ShiftError> {
    let n0 = rows.labeled.len();
    let n1 = rows.pool.len();
    let (k0, k1) = match options.cv_max_rows() {
        Some(cap) if n0 + n1 > cap => {
            let half = cap / 2;
            if n0 <= n1 {
                let k0 = n0.min(half);
                (k0, (cap - k0).min(n1))
            } else {
                let k1 = n1.min(half);
                ((cap - k1).min(n0), k1)
            }
        }
        _ => (n0, n1),
    };
    // Fit-matrix rows: class 0 at 0..n0, class 1 at n0..n0+n1.
    let mut class0: Vec<usize> = sample_sorted(rng, n0, k0);
    let mut class1: Vec<usize> = sample_sorted(rng, n1, k1)
        .into_iter()
        .map(|r| n0 + r)
        .collect();
    class0.shuffle(rng);
    class1.shuffle(rng);
    let folds = options.cv_folds();
    let mut fold_of = vec![usize::MAX; n0 + n1];
    for (pos, &r) in class0.iter().enumerate() {
        fold_of[r] = pos % folds;
    }
    for (pos, &r) in class1.iter().enumerate() {
        fold_of[r] = pos % folds;
    }
    let cv_rows: Vec<usize> = (0..n0 + n1).filter(|&r| fold_of[r] != usize::MAX).collect();
    let s0 = n as f64 / k0 as f64;
    let s1 = m as f64 / k1 as f64;
    let x = design.fit_matrix();
    let nf = design.n_fit_rows();
    let cols = 1 + design.n_terms();
    let params = LogisticParams(options.classifier().clone()).check()?;
    let per_fold: Vec<Result<Vec<(usize, f64)>, ShiftError>> = (0..folds)
        .into_par_iter()
        .map(|f| {
            let train: Vec<usize> = cv_rows
                .iter()
                .copied()
                .filter(|&r| fold_of[r] != f)
                .collect();
            let t = train.len();
            let mut buf = vec![0.0; t * cols];
            for j in 0..cols {
                let src = &x[j * nf..(j + 1) * nf];
                for (o, &r) in buf[j * t..(j + 1) * t].iter_mut().zip(&train) {
                    *o = src[r];
                }
            }
            let y: Vec<bool> = train.iter().map(|&r| labels[r]).collect();
            let s: Vec<f64> = y.iter().map(|&p| if p { s1 } else { s0 }).collect();
            let model = fit_logistic_from(&buf, t, &y, Some(&s), &params, Some(full_fit))?;
            let beta = model.coefficients();
            Ok(cv_rows
                .iter()
                .copied()
                .filter(|&r| fold_of[r] == f)
                .map(|r| (r, (0..cols).map(|j| beta[j] * x[j * nf + r]).sum::<f64>()))
                .collect())
        })
        .collect();
    let mut score = vec![0.0; n0 + n1];
    for fold in per_fold {
        for (r, s) in fold? {
            score[r] = s;
        }
    }
    let scores: Vec<f64> = cv_rows.iter().map(|&r| score[r]).collect();
    let positive: Vec<bool> = cv_rows.iter().map(|&r| labels[r]).collect();
    let est = roc_auc(&scores, &positive)?;
    let permutation_p = permutation_p_value(&scores, &positive, options.permutations(), rng.gen());
    Ok(AucSummary {
        auc: est.auc,
        ci: est.ci,
        standard_error: est.variance.sqrt(),
        permutation_p,
        permutations: options.permutations(),
        folds,
        labeled_rows: k0,
        pool_rows: k1,
    })
}

/// Monte Carlo permutation p-value of the AUC for fixed `scores`: each of the B
/// permutations draws which rows are positive uniformly at random (same count), and
/// p = (1 + #{rank sum_b >= observed rank sum}) / (1 + B) (Phipson & Smyth 2010, Statistical
/// Applications in Genetics and Molecular Biology 9:39). The AUC is an increasing function
/// of the positives' rank sum, so comparing rank sums (half-integers, exact in floating
/// point) compares AUCs without rounding ties.
pub fn permutation_p_value(
    scores: &[f64],
    positive: &[bool],
    permutations: usize,
    seed: u64,
) -> f64 {
    let ranks = midranks(scores);
    let total_n = scores.len();
    let n1 = positive.iter().filter(|p| **p).count();
    let observed: f64 = ranks
        .iter()
        .zip(positive)
        .filter(|p| *p.1)
        .map(|p| p.0)
        .sum();
    let total_rank = total_n as f64 * (total_n as f64 + 1.0) / 2.0;
    // Draw the smaller class; the positives' rank sum follows.
    let (draw, draws_positive) = if n1 <= total_n - n1 {
        (n1, true)
    } else {
        (total_n - n1, false)
    };
    // Uniform subset of `draw` positions by rejection against a bitset (N bits stay in
    // cache; at most half the positions are drawn, so at most half the draws are rejected).
    // The bitset is cleared after each permutation, so every permutation depends only on its
    // own seed and the result does not depend on the thread count.
    let exceed: usize = (0..permutations)
        .into_par_iter()
        .map_init(
            || (vec![0u64; total_n.div_ceil(64)], Vec::with_capacity(draw)),
            |(taken, chosen), b| {
                let mut rng = ChaCha8Rng::seed_from_u64(seed);
                rng.set_stream(b as u64);
                let mut sum = 0.0f64;
                chosen.clear();
                while chosen.len() < draw {
                    let i = rng.gen_range(0..total_n);
                    let (word, bit) = (i / 64, 1u64 << (i % 64));
                    if taken[word] & bit == 0 {
                        taken[word] |= bit;
                        chosen.push(i);
                        sum += ranks[i];
                    }
                }
                for &i in chosen.iter() {
                    taken[i / 64] = 0;
                }
                let positives_sum = if draws_positive {
                    sum
                } else {
                    total_rank - sum
                };
                usize::from(positives_sum >= observed)
            },
        )
        .sum();
    (1 + exceed) as f64 / (1 + permutations) as f64
}

/// Kish (1965, Survey Sampling, section 11.7) effective sample size
/// ESS = (sum w)^2 / sum w^2, computed on w / max w so that it cannot overflow.
///
/// # Errors
/// [`ShiftError::InvalidWeight`] for a negative or non-finite weight;
/// [`ShiftError::TooFewRows`] when all weights are zero or the slice is empty.
///
/// # Examples
/// ```
/// use weighbridge::shift::kish_effective_sample_size;
/// assert_eq!(kish_effective_sample_size(&[1.0, 1.0, 1.0, 1.0]).unwrap(), 4.0);
/// // (3 + 1)^2 / (9 + 1) = 1.6
/// assert!((kish_effective_sample_size(&[3.0, 1.0]).unwrap() - 1.6).abs() < 1e-12);
/// ```
pub fn kish_effective_sample_size(weights: &[f64]) -> Result<f64, ShiftError> {
    if let Some(i) = weights.iter().position(|w| !(w.is_finite() && *w >= 0.0)) {
        return Err(ShiftError::InvalidWeight {
            index: i,
            value: weights[i],
        });
    }
    let max = weights.iter().fold(0.0f64, |a, &b| a.max(b));
    if max == 0.0 {
        return Err(ShiftError::TooFewRows {
            set: "weights",
            rows: weights.len(),
            needed: 1,
            reason: "at least one positive weight",
        });
    }
    // Divide by the power of two below the largest weight (exact), so that squares of
    // weights near 1e160 or 1e-300 neither overflow nor underflow.
    let scale = super::weights::power_of_two_below(max);
    let (s, s2) = weights.iter().fold((0.0, 0.0), |(s, s2), w| {
        let v = w / scale;
        (s + v, s2 + v * v)
    });
    Ok(s * s / s2)
}

/// Pool units whose weight alone keeps their conformal p-value above q:
/// w_j / (W + w_j) > q (design.md 2.2, the p-value floor).
pub fn unreachable_count(pool_weights: &[f64], calibration_total: f64, fdr: f64) -> usize {
    pool_weights
        .iter()
        .filter(|&&w| w / (calibration_total + w) > fdr)
        .count()
}

/// Overlap of the two sets on the classifier's probability scale.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Overlap {
    /// Which probability is binned.
    pub probability: String,
    /// Bin edges on [0, 1] (bins + 1 values).
    pub bin_edges: Vec<f64>,
    /// Calibration rows per bin.
    pub labeled_counts: Vec<usize>,
    /// Pool rows per bin.
    pub pool_counts: Vec<usize>,
    /// Share of pool rows with balanced probability above 0.9.
    pub pool_share_above_0_9: f64,
    /// Share of pool rows with balanced probability above 0.95.
    pub pool_share_above_0_95: f64,
}

/// Histograms of the balanced probability w / (1 + w) and the pool's share above 0.9 and
/// 0.95 (cf. the 0.1 / 0.9 trimming rule of Crump, Hotz, Imbens & Mitnik 2009, Biometrika
/// 96:187). The balanced probability is P(pool | x) as if both sets had equal size: with
/// unequal sizes the raw e(x) sits near m / (n + m) for every row even without shift, so
/// fixed cut-offs on it would measure the size ratio rather than the overlap.
pub(crate) fn overlap(labeled_balanced: &[f64], pool_balanced: &[f64], bins: usize) -> Overlap {
    let count = |values: &[f64]| {
        let mut c = vec![0; bins];
        for &v in values {
            c[((v * bins as f64) as usize).min(bins - 1)] += 1;
        }
        c
    };
    let share = |t: f64| {
        pool_balanced.iter().filter(|&&v| v > t).count() as f64 / pool_balanced.len() as f64
    };
    Overlap {
        probability: "w/(1+w): P(pool | x) at equal set sizes".into(),
        bin_edges: (0..=bins).map(|i| i as f64 / bins as f64).collect(),
        labeled_counts: count(labeled_balanced),
        pool_counts: count(pool_balanced),
        pool_share_above_0_9: share(0.9),
        pool_share_above_0_95: share(0.95),
    }
}

/// Balance of one feature between the labeled set and the pool.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct FeatureBalance {
    /// Feature name (`x`, `x^2`, `x*y`).
    pub feature: String,
    /// SMD with unit weights on the labeled rows.
    pub smd_unweighted: f64,
    /// SMD with the labeled rows weighted by w.
    pub smd_weighted: f64,
}

/// Weighted mean and variance with the reliability-weights correction
/// S / (S^2 - sum w^2) (Austin & Stuart 2015, Statistics in Medicine 34:3661, section 4.1);
/// with unit weights this is the usual n - 1 sample variance.
fn weighted_mean_var(values: &[f64], weights: Option<&[f64]>) -> (f64, f64) {
    let w = |i: usize| weights.map_or(1.0, |w| w[i]);
    let (s, s2, sx) = values
        .iter()
        .enumerate()
        .fold((0.0, 0.0, 0.0), |(s, s2, sx), (i, v)| {
            let wi = w(i);
            (s + wi, s2 + wi * wi, sx + wi * v)
        });
    let mean = sx / s;
    let ss: f64 = values
        .iter()
        .enumerate()
        .map(|(i, v)| w(i) * (v - mean) * (v - mean))
        .sum();
    let denom = s * s - s2;
    let var = if denom > 0.0 { s * ss / denom } else { 0.0 };
    (mean, var)
}

fn smd_from(mean_pool: f64, var_pool: f64, mean_lab: f64, var_lab: f64) -> f64 {
    let diff = mean_pool - mean_lab;
    let pooled = ((var_pool + var_lab) / 2.0).sqrt();
    if pooled > 0.0 {
        diff / pooled
    } else if diff == 0.0 {
        0.0
    } else {
        diff.signum() * f64::INFINITY
    }
}

/// Standardized mean difference of a continuous feature, pool minus labeled
/// (Austin 2009, Statistics in Medicine 28:3083, equation for continuous covariates):
///
/// # Formula
/// SMD = (mean_pool - mean_labeled) / sqrt((s_pool^2 + s_labeled^2) / 2),
///
/// with the labeled mean and variance weighted by `labeled_weights` when given (the weighted
/// variance uses the reliability-weights correction of Austin & Stuart 2015), and the pool
/// unweighted (it is the target). A zero pooled SD gives 0 for equal means and +-inf
/// otherwise.
///
/// # Examples
/// ```
/// use weighbridge::shift::standardized_mean_difference;
/// // Means 2 and 4, sample variances 1 and 1: SMD = 2.
/// let smd = standardized_mean_difference(&[1.0, 2.0, 3.0], None, &[3.0, 4.0, 5.0]);
/// assert!((smd - 2.0).abs() < 1e-12);
/// ```
pub fn standardized_mean_difference(
    labeled: &[f64],
    labeled_weights: Option<&[f64]>,
    pool: &[f64],
) -> f64 {
    let (ml, vl) = weighted_mean_var(labeled, labeled_weights);
    let (mp, vp) = weighted_mean_var(pool, None);
    smd_from(mp, vp, ml, vl)
}

/// SMD of every input feature, calibration rows (unweighted and weighted) against the pool.
pub(crate) fn feature_balance(
    labeled: FeatureView<'_>,
    pool: FeatureView<'_>,
    calibration: &[usize],
    calibration_weights: &[f64],
) -> Result<Vec<FeatureBalance>, ShiftError> {
    Ok((0..labeled.n_features())
        .into_par_iter()
        .map(|f| {
            let col = labeled.column(f);
            let lab: Vec<f64> = calibration.iter().map(|&i| col[i]).collect();
            let (mp, vp) = weighted_mean_var(pool.column(f), None);
            let (mu, vu) = weighted_mean_var(&lab, None);
            let (mw, vw) = weighted_mean_var(&lab, Some(calibration_weights));
            FeatureBalance {
                feature: labeled.names()[f].clone(),
                smd_unweighted: smd_from(mp, vp, mu, vu),
                smd_weighted: smd_from(mp, vp, mw, vw),
            }
        })
        .collect())
}

/// Weighted balance on squares and pairwise products of the standardized inputs.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Adequacy {
    /// One entry per square `x^2` and per product `x*y` of kept inputs.
    pub features: Vec<FeatureBalance>,
    /// Largest |weighted SMD| among the squares (0 if none).
    pub max_abs_weighted_squares: f64,
    /// Largest |weighted SMD| among the products (0 if none).
    pub max_abs_weighted_products: f64,
    /// The feature with the largest |weighted SMD|, if any.
    pub worst_feature: Option<String>,
    /// |weighted SMD| above which the warning fires (`warnings::smd_threshold` with base
    /// 0.1 over all squares and products).
    pub threshold: f64,
}

/// Sums needed for the means and variances of all squares and products at once:
/// S = sum w, S2 = sum w^2, M1 = sum w z z', M2 = sum w (z o z)(z o z)'.
struct Moments {
    s: f64,
    s2: f64,
    m1: Array2<f64>,
    m2: Array2<f64>,
}

fn moments(
    design: &Design,
    view: FeatureView<'_>,
    rows: Option<&[usize]>,
    weights: Option<&[f64]>,
) -> Moments {
    const CHUNK: usize = 4096;
    let k = design.n_kept();
    let count = rows.map_or(view.n_rows(), <[usize]>::len);
    let parts: Vec<Moments> = (0..count.div_ceil(CHUNK))
        .into_par_iter()
        .map(|c| {
            let lo = c * CHUNK;
            let len = CHUNK.min(count - lo);
            let mut z = vec![0.0; len * k];
            design.fill_base(view, len, |t| rows.map_or(lo + t, |r| r[lo + t]), &mut z);
            let w: Vec<f64> = (0..len)
                .map(|t| weights.map_or(1.0, |w| w[lo + t]))
                .collect();
            let z2: Vec<f64> = z.iter().map(|v| v * v).collect();
            let scaled = |src: &[f64]| {
                let mut out = src.to_vec();
                for a in 0..k {
                    for (o, wt) in out[a * len..(a + 1) * len].iter_mut().zip(&w) {
                        *o *= wt;
                    }
                }
                out
            };
            let zw = scaled(&z);
            let z2w = scaled(&z2);
            fn view2(b: &[f64], len: usize, k: usize) -> ArrayView2<'_, f64> {
                ArrayView2::from_shape((len, k).strides((1, len)), b).expect("chunk fits")
            }
            let mut m1 = Array2::zeros((k, k));
            let mut m2 = Array2::zeros((k, k));
            general_mat_mul(
                1.0,
                &view2(&z, len, k).t(),
                &view2(&zw, len, k),
                0.0,
                &mut m1,
            );
            general_mat_mul(
                1.0,
                &view2(&z2, len, k).t(),
                &view2(&z2w, len, k),
                0.0,
                &mut m2,
            );
            Moments {
                s: w.iter().sum(),
                s2: w.iter().map(|v| v * v).sum(),
                m1,
                m2,
            }
        })
        .collect();
    let mut total = Moments {
        s: 0.0,
        s2: 0.0,
        m1: Array2::zeros((k, k)),
        m2: Array2::zeros((k, k)),
    };
    for p in parts {
        total.s += p.s;
        total.s2 += p.s2;
        total.m1 += &p.m1;
        total.m2 += &p.m2;
    }
    total
}

impl Moments {
    /// Mean and (reliability-weights) variance of z_a z_b.
    fn mean_var(&self, a: usize, b: usize) -> (f64, f64) {
        let mean = self.m1[[a, b]] / self.s;
        let second = self.m2[[a, b]] / self.s;
        let denom = self.s * self.s - self.s2;
        let var = if denom > 0.0 {
            (self.s * self.s / denom * (second - mean * mean)).max(0.0)
        } else {
            0.0
        };
        (mean, var)
    }
}

/// Weight-model adequacy (design.md 2.6): SMD, unweighted and weighted, of z_a^2 and
/// z_a z_b (a < b) for the standardized kept inputs z, calibration rows against the pool.
/// A large weighted SMD here means the classifier missed part of the shift (a linear model
/// cannot see a variance shift). Balance on higher moments and interactions is the check
/// recommended by Austin & Stuart (2015, section 4.2); the SMD formula is Austin (2009).
pub(crate) fn adequacy(
    design: &Design,
    labeled: FeatureView<'_>,
    pool: FeatureView<'_>,
    calibration: &[usize],
    calibration_weights: &[f64],
) -> Adequacy {
    let pool_m = moments(design, pool, None, None);
    let lab_u = moments(design, labeled, Some(calibration), None);
    let lab_w = moments(
        design,
        labeled,
        Some(calibration),
        Some(calibration_weights),
    );
    let names = design.kept_names();
    let k = names.len();
    let mut features = Vec::with_capacity(k * (k + 1) / 2);
    let entry = |a: usize, b: usize, name: String| {
        let (mp, vp) = pool_m.mean_var(a, b);
        let (mu, vu) = lab_u.mean_var(a, b);
        let (mw, vw) = lab_w.mean_var(a, b);
        FeatureBalance {
            feature: name,
            smd_unweighted: smd_from(mp, vp, mu, vu),
            smd_weighted: smd_from(mp, vp, mw, vw),
        }
    };
    for (a, name) in names.iter().enumerate() {
        features.push(entry(a, a, format!("{name}^2")));
    }
    for a in 0..k {
        for b in a + 1..k {
            features.push(entry(a, b, format!("{}*{}", names[a], names[b])));
        }
    }
    let max_abs =
        |it: &[FeatureBalance]| it.iter().fold(0.0f64, |m, f| m.max(f.smd_weighted.abs()));
    let worst_feature = features
        .iter()
        .max_by(|x, y| x.smd_weighted.abs().total_cmp(&y.smd_weighted.abs()))
        .map(|f| f.feature.clone());
    let threshold = super::warnings::smd_threshold(
        super::warnings::ADEQUACY_SMD_HIGH,
        super::kish_effective_sample_size(calibration_weights).unwrap_or(0.0),
        pool.n_rows(),
        features.len(),
    );
    Adequacy {
        max_abs_weighted_squares: max_abs(&features[..k]),
        max_abs_weighted_products: max_abs(&features[k..]),
        worst_feature,
        threshold,
        features,
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::shift::features::Expansion;
    use crate::shift::test_support::{names, normal_table};

    #[test]
    fn midranks_average_ties() {
        assert_eq!(midranks(&[3.0, 1.0, 3.0, 2.0]), vec![3.5, 1.0, 3.5, 2.0]);
    }

    #[test]
    fn delong_matches_pairwise_definition() {
        // The DeLong components by their O(n0 n1) definition (DeLong et al. 1988, eq. for
        // V10 and V01) against the midrank shortcut.
        let scores = [0.1, 0.5, 0.5, 0.7, 0.2, 0.5, 0.9, 0.3, 0.3];
        let pos = [false, true, false, true, false, true, true, false, true];
        let est = roc_auc(&scores, &pos).unwrap();
        let p: Vec<f64> = scores
            .iter()
            .zip(&pos)
            .filter(|x| *x.1)
            .map(|x| *x.0)
            .collect();
        let q: Vec<f64> = scores
            .iter()
            .zip(&pos)
            .filter(|x| !*x.1)
            .map(|x| *x.0)
            .collect();
        let psi = |a: f64, b: f64| {
            if a > b {
                1.0
            } else if a == b {
                0.5
            } else {
                0.0
            }
        };
        let v10: Vec<f64> = p
            .iter()
            .map(|&a| q.iter().map(|&b| psi(a, b)).sum::<f64>() / q.len() as f64)
            .collect();
        let v01: Vec<f64> = q
            .iter()
            .map(|&b| p.iter().map(|&a| psi(a, b)).sum::<f64>() / p.len() as f64)
            .collect();
        let auc = v10.iter().sum::<f64>() / v10.len() as f64;
        let var = |v: &[f64]| {
            let m = v.iter().sum::<f64>() / v.len() as f64;
            v.iter().map(|x| (x - m) * (x - m)).sum::<f64>() / (v.len() - 1) as f64
        };
        let variance = var(&v10) / p.len() as f64 + var(&v01) / q.len() as f64;
        assert!((est.auc - auc).abs() < 1e-15);
        assert!((est.variance - variance).abs() < 1e-15);
    }

    #[test]
    fn permutation_p_is_in_range_and_small_for_separated_scores() {
        let scores: Vec<f64> = (0..40).map(|i| i as f64).collect();
        let pos: Vec<bool> = (0..40).map(|i| i >= 20).collect();
        let p = permutation_p_value(&scores, &pos, 199, 5);
        // Perfect separation: no permutation reaches it, p = 1 / 200.
        assert_eq!(p, 1.0 / 200.0);
        let flipped: Vec<bool> = pos.iter().map(|p| !p).collect();
        assert_eq!(permutation_p_value(&scores, &flipped, 199, 5), 1.0);
    }

    #[test]
    fn permutation_p_is_valid_under_the_null() {
        // A Monte Carlo permutation p-value is valid: P(p <= a) <= a when labels are
        // exchangeable (Phipson & Smyth 2010). 400 null data sets, a = 0.1: the rejection
        // share must stay within binomial noise of 0.1 (SE 0.015).
        let mut rng = ChaCha8Rng::seed_from_u64(9);
        let mut rejections = 0;
        for rep in 0..400 {
            let scores: Vec<f64> = (0..40).map(|_| (rng.gen::<f64>() * 10.0).floor()).collect();
            let pos: Vec<bool> = (0..40).map(|i| i % 3 == 0).collect();
            if permutation_p_value(&scores, &pos, 99, rep) <= 0.1 {
                rejections += 1;
            }
        }
        let share = rejections as f64 / 400.0;
        assert!(share < 0.145 && share > 0.055, "{share}");
    }

    #[test]
    fn ess_handles_huge_weights() {
        let w = [1e300, 1e300, 0.0];
        assert_eq!(kish_effective_sample_size(&w).unwrap(), 2.0);
        assert!(matches!(
            kish_effective_sample_size(&[1.0, -1.0]),
            Err(ShiftError::InvalidWeight { index: 1, .. })
        ));
    }

    #[test]
    fn unreachable_floor() {
        // W = 9: w = 1 gives floor 0.1 (not > 0.1); w = 2 gives 2/11 > 0.1.
        assert_eq!(unreachable_count(&[1.0, 2.0, 0.5], 9.0, 0.1), 1);
    }

    #[test]
    fn adequacy_moments_match_direct_smd() {
        // Squares and products through the moment matrices against the direct two-pass SMD
        // on explicitly built product columns (Austin 2009 formula).
        let nm = names(3);
        let lab = normal_table(700, &[0.0, 0.5, -1.0], &[1.0, 2.0, 0.5], 11);
        let pool = normal_table(900, &[0.3, 0.0, -1.0], &[1.5, 1.0, 0.7], 12);
        let lv = FeatureView::new(&lab, 700, &nm).unwrap();
        let pv = FeatureView::new(&pool, 900, &nm).unwrap();
        let lrows: Vec<usize> = (0..700).collect();
        let prows: Vec<usize> = (0..900).collect();
        let design = Design::build(lv, pv, &lrows, &prows, Expansion::None).unwrap();
        let cal: Vec<usize> = (0..700).step_by(2).collect();
        let w: Vec<f64> = cal
            .iter()
            .map(|&i| 0.5 + (i as f64 * 0.01).sin().abs())
            .collect();
        let ad = adequacy(&design, lv, pv, &cal, &w);
        let z = |v: FeatureView<'_>, rows: &[usize]| {
            let mut out = vec![0.0; rows.len() * 3];
            design.fill_base(v, rows.len(), |t| rows[t], &mut out);
            out
        };
        let zl = z(lv, &cal);
        let zp = z(pv, &prows);
        let (nl, np) = (cal.len(), prows.len());
        for (entry, (a, b)) in
            ad.features
                .iter()
                .zip([(0, 0), (1, 1), (2, 2), (0, 1), (0, 2), (1, 2)])
        {
            let lprod: Vec<f64> = (0..nl).map(|r| zl[a * nl + r] * zl[b * nl + r]).collect();
            let pprod: Vec<f64> = (0..np).map(|r| zp[a * np + r] * zp[b * np + r]).collect();
            let direct_w = standardized_mean_difference(&lprod, Some(&w), &pprod);
            let direct_u = standardized_mean_difference(&lprod, None, &pprod);
            assert!(
                (entry.smd_weighted - direct_w).abs() < 1e-10,
                "{}",
                entry.feature
            );
            assert!(
                (entry.smd_unweighted - direct_u).abs() < 1e-10,
                "{}",
                entry.feature
            );
        }
        assert_eq!(ad.features[3].feature, "x0*x1");
    }
}
