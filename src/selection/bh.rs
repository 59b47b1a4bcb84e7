//! Benjamini–Hochberg and Benjamini–Yekutieli selection, BH-adjusted p-values, units that
//! can never be selected, and the one comparison rule [`within_level`] (design.md section 2.3).
//!
//! * BH (Benjamini & Hochberg 1995): `k* = max{k : p_(k) <= q k / m}`; select the `k*`
//!   smallest p-values.
//! * BY (Benjamini & Yekutieli 2001): BH at level `q / sum_{k<=m} 1/k`.
//!
//! Floating point: every decision "p <= q k / m" (BH, BY, and `R1`, `K_j` of conditional
//! calibration, unreachable) goes through [`within_level`], which lets exact ties pass with
//! a one-sided relative tolerance of [`TIE_TOLERANCE`].

use rayon::prelude::*;
use thiserror::Error;

use crate::conformal::pvalue::{weight_of, PValueError};

/// One-sided relative tolerance of every level comparison: `p <= t` is decided as
/// `numerator <= t * denominator * (1 + TIE_TOLERANCE)`, so that boundary cases that are
/// exact ties in rational arithmetic (common with integer-like weights and q = 0.2, 0.5)
/// pass whatever rounding the algebra took. Common practice; the value is far above the
/// rounding of a few floating-point operations (about 1e-16) and far below any gap that
/// continuous data produce by chance.
pub const TIE_TOLERANCE: f64 = 1e-12;

/// Broken preconditions of the selection procedures.
#[derive(Debug, Error, PartialEq)]
#[non_exhaustive]
pub enum SelectionError {
    /// The FDR level is not in (0, 1].
    #[error("the FDR level must be in (0, 1], got {0}")]
    FdrOutOfRange(f64),
    /// A p-value is NaN or outside [0, 1].
    #[error("p-value {index} is {value}; p-values must lie in [0, 1]")]
    BadPValue { index: usize, value: f64 },
    /// Weights or scores were rejected.
    #[error(transparent)]
    PValue(#[from] PValueError),
    /// A pool score is NaN.
    #[error("pool score {index} is NaN")]
    NanPoolScore { index: usize },
}

/// Check an FDR level.
///
/// # Errors
/// [`SelectionError::FdrOutOfRange`] unless `0 < q <= 1`.
pub fn check_fdr(q: f64) -> Result<f64, SelectionError> {
    if q > 0.0 && q <= 1.0 {
        Ok(q)
    } else {
        Err(SelectionError::FdrOutOfRange(q))
    }
}

/// The BH line at rank `k` of `m`: `q k / m`.
#[inline]
pub fn bh_level(q: f64, k: usize, m: usize) -> f64 {
    q * k as f64 / m as f64
}

/// The one comparison rule: is `numerator / denominator <= level`?
///
/// Decided as `numerator <= level * denominator * (1 + TIE_TOLERANCE)`.
///
/// # Examples
/// ```
/// use weighbridge::selection::bh::{bh_level, within_level};
/// // 3/20 <= 0.1 * 3 / 2 = 0.15: an exact tie in rational arithmetic, which passes
/// // although 0.1 * 3 / 2 rounds to 0.15000000000000002 or 0.1499999...
/// assert!(within_level(3.0, 20.0, bh_level(0.1, 3, 2)));
/// assert!(!within_level(3.1, 20.0, bh_level(0.1, 3, 2)));
/// ```
#[inline]
pub fn within_level(numerator: f64, denominator: f64, level: f64) -> bool {
    numerator <= level * denominator * (1.0 + TIE_TOLERANCE)
}

fn check_pvalues(p: &[f64]) -> Result<(), SelectionError> {
    if let Some(index) = p.iter().position(|x| !(0.0..=1.0).contains(x)) {
        return Err(SelectionError::BadPValue {
            index,
            value: p[index],
        });
    }
    Ok(())
}

/// Indices that sort `p` ascending (stable, so ties keep input order): the order
/// [`bh_adjusted`] walks, kept as the reference its faster sort is tested against.
#[cfg(test)]
fn ascending_order(p: &[f64]) -> Vec<usize> {
    let mut order: Vec<usize> = (0..p.len()).collect();
    order.par_sort_by(|&a, &b| p[a].total_cmp(&p[b]));
    order
}

/// A selection: which units were selected and how many.
#[derive(Clone, Debug, PartialEq)]
pub struct Selection {
    /// `selected[j]` is true when unit `j` is selected.
    pub selected: Vec<bool>,
    /// Number of selected units.
    pub count: usize,
}

/// Number of p-values BH selects at level `q`: `k* = max{k : p_(k) <= q k / m}` (0 if none).
///
/// # Errors
/// `q` outside (0, 1] or a p-value outside [0, 1].
pub fn bh_count(p: &[f64], q: f64) -> Result<usize, SelectionError> {
    Ok(benjamini_hochberg(p, q)?.count)
}

/// Smallest rank `k` in `1..=m` at which `p` passes the BH line (`p <= q k / m` under
/// [`within_level`]), or `m + 1` if it passes at none. The decision is monotone in `k`
/// (`q k / m` is computed by monotone floating-point operations), so a guess from
/// `p m / q` corrected by a step or two is exact.
pub(crate) fn first_passing_rank(p: f64, q: f64, m: usize) -> usize {
    let guess = (p * m as f64 / q).ceil();
    let mut k = if guess >= 1.0 {
        (guess.min((m + 1) as f64)) as usize
    } else {
        1
    };
    while k > 1 && within_level(p, 1.0, bh_level(q, k - 1, m)) {
        k -= 1;
    }
    while k <= m && !within_level(p, 1.0, bh_level(q, k, m)) {
        k += 1;
    }
    k
}

/// Benjamini–Hochberg (1995) step-up selection at FDR level `q`.
///
/// # Formula
/// `k* = max{k : p_(k) <= q k / m}`; the `k*` smallest p-values are selected.
/// Computed in `O(m)` without sorting: with `r_j` the smallest rank at which `p_j` passes
/// the line, `p_(k) <= q k / m` holds exactly when `#{j : r_j <= k} >= k`, so
/// `k* = max{k : #{j : r_j <= k} >= k}` and the selected units are `{j : r_j <= k*}`.
///
/// # Errors
/// `q` outside (0, 1] or a p-value outside [0, 1].
///
/// # Examples
/// ```
/// use weighbridge::selection::bh::benjamini_hochberg;
/// // p_(2) = 0.02 <= 0.05 * 2 / 4 = 0.025, p_(3) = 0.04 > 0.0375, p_(4) = 0.6 > 0.05.
/// let s = benjamini_hochberg(&[0.6, 0.01, 0.04, 0.02], 0.05).unwrap();
/// assert_eq!(s.selected, vec![false, true, false, true]);
/// ```
pub fn benjamini_hochberg(p: &[f64], q: f64) -> Result<Selection, SelectionError> {
    check_fdr(q)?;
    check_pvalues(p)?;
    let m = p.len();
    let ranks: Vec<usize> = p.par_iter().map(|&x| first_passing_rank(x, q, m)).collect();
    let mut passing_at = vec![0usize; m + 2];
    for &r in &ranks {
        passing_at[r] += 1;
    }
    let mut cumulative = 0;
    let mut count = 0;
    for (k, &c) in passing_at.iter().enumerate().take(m + 1).skip(1) {
        cumulative += c;
        if cumulative >= k {
            count = k;
        }
    }
    let selected: Vec<bool> = ranks.iter().map(|&r| r <= count).collect();
    debug_assert_eq!(selected.iter().filter(|&&s| s).count(), count);
    Ok(Selection { selected, count })
}

/// `sum_{k<=m} 1/k`, the Benjamini–Yekutieli correction factor.
pub fn harmonic_number(m: usize) -> f64 {
    // Summed from the smallest term up for accuracy.
    (1..=m).rev().map(|k| 1.0 / k as f64).sum()
}

/// Benjamini–Yekutieli (2001) selection: BH at level `q / sum_{k<=m} 1/k`; valid under any
/// dependence between the p-values.
///
/// # Errors
/// `q` outside (0, 1] or a p-value outside [0, 1].
pub fn benjamini_yekutieli(p: &[f64], q: f64) -> Result<Selection, SelectionError> {
    check_fdr(q)?;
    if p.is_empty() {
        return Ok(Selection {
            selected: vec![],
            count: 0,
        });
    }
    benjamini_hochberg(p, q / harmonic_number(p.len()))
}

/// BH-adjusted p-values: `min(1, min_{l >= k} m p_(l) / l)` at rank `k`; unit `j` is
/// selected by BH at level `q` exactly when its adjusted p-value is `<= q` (up to
/// [`TIE_TOLERANCE`]). With `factor = sum 1/k` these are the BY-adjusted p-values.
///
/// # Errors
/// A p-value outside [0, 1].
pub fn bh_adjusted(p: &[f64], factor: f64) -> Result<Vec<f64>, SelectionError> {
    check_pvalues(p)?;
    let m = p.len();
    // (p, index) pairs sorted by p, ties by index: the order of a stable sort of the
    // indices by p (`ascending_order`), but comparing values held beside each other instead
    // of reading p[a], p[b] at random for every comparison (about 6x faster at 10^6).
    let pairs: Vec<(f64, usize)> = p.iter().copied().zip(0..m).collect();
    Ok(bh_adjusted_pairs(pairs, factor))
}

/// BH-adjusted p-values from `pairs` of `(p_j, j)`, in any order, where the `j` are
/// 0..m each once; the result is indexed by `j`. The same sort and walk as [`bh_adjusted`]
/// (which calls this), so the same bits. The pairs are sorted in place (16 bytes per unit)
/// and the adjusted values scattered into the result (8 bytes per unit): one sort, not a
/// second one back into input order, for the streamed selection.
///
/// # Panics
/// If a `j` is m or more (a repeated `j` is not detected; its unit keeps the last value).
pub fn bh_adjusted_pairs(mut pairs: Vec<(f64, usize)>, factor: f64) -> Vec<f64> {
    let m = pairs.len();
    pairs.par_sort_unstable_by(|a, b| a.0.total_cmp(&b.0).then(a.1.cmp(&b.1)));
    let mut adjusted = vec![0.0; m];
    let mut running = f64::INFINITY;
    for k in (1..=m).rev() {
        let (pj, j) = pairs[k - 1];
        running = running.min(factor * m as f64 * pj / k as f64);
        adjusted[j] = running.min(1.0);
    }
    adjusted
}

/// Units that can never be selected at level `q`: their p-value floor `w_j / (W + w_j)`
/// exceeds `q` (design.md 2.2), decided with [`within_level`].
pub fn unreachable(
    total_labeled_weight: f64,
    pool_weights: Option<&[f64]>,
    m: usize,
    q: f64,
) -> Vec<bool> {
    (0..m)
        .map(|j| {
            let w = weight_of(pool_weights, j);
            !within_level(w, total_labeled_weight + w, q)
        })
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn fdr_level_range() {
        assert!(check_fdr(1.0).is_ok());
        assert!(check_fdr(1e-9).is_ok());
        for bad in [0.0, -0.1, 1.5, f64::NAN, f64::INFINITY] {
            assert!(matches!(
                check_fdr(bad),
                Err(SelectionError::FdrOutOfRange(_))
            ));
        }
    }

    /// The pair sort walks the same order as the stable index sort it replaced, so the
    /// q-values are bit for bit those of the plain loop over `ascending_order`.
    #[test]
    fn bh_adjusted_equals_the_stable_index_order_walk() {
        use rand::seq::SliceRandom;
        use rand::{Rng, SeedableRng};
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(4);
        for case in 0..200 {
            let m = rng.gen_range(1..3000);
            let grid = rng.gen_range(1..50);
            let p: Vec<f64> = (0..m)
                .map(|_| f64::from(rng.gen_range(0..=grid)) / f64::from(grid))
                .collect();
            let factor = if case % 2 == 0 {
                1.0
            } else {
                harmonic_number(m)
            };
            let order = ascending_order(&p);
            let mut expected = vec![0.0; m];
            let mut running = f64::INFINITY;
            for k in (1..=m).rev() {
                let j = order[k - 1];
                running = running.min(factor * m as f64 * p[j] / k as f64);
                expected[j] = running.min(1.0);
            }
            let got = bh_adjusted(&p, factor).unwrap();
            assert_eq!(
                got.iter().map(|x| x.to_bits()).collect::<Vec<_>>(),
                expected.iter().map(|x| x.to_bits()).collect::<Vec<_>>(),
                "case {case}"
            );
            // bh_adjusted_pairs takes the pairs in any order.
            let mut pairs: Vec<(f64, usize)> = p.iter().copied().zip(0..m).collect();
            pairs.shuffle(&mut rng);
            let from_shuffled = bh_adjusted_pairs(pairs, factor);
            assert_eq!(
                from_shuffled
                    .iter()
                    .map(|x| x.to_bits())
                    .collect::<Vec<_>>(),
                expected.iter().map(|x| x.to_bits()).collect::<Vec<_>>(),
                "case {case}, shuffled pairs"
            );
        }
    }

    #[test]
    fn bh_adjusted_and_by() {
        let p = [0.01, 0.04, 0.03, 0.2];
        let adj = bh_adjusted(&p, 1.0).unwrap();
        // Hand computation: sorted .01 .03 .04 .2 -> 4p/k = .04 .06 .0533 .2 -> running min
        assert!((adj[0] - 0.04).abs() < 1e-15);
        assert!((adj[2] - 0.16 / 3.0).abs() < 1e-15);
        assert!((adj[1] - 0.16 / 3.0).abs() < 1e-15);
        assert!((adj[3] - 0.2).abs() < 1e-15);
        assert!((harmonic_number(3) - 11.0 / 6.0).abs() < 1e-15);
        assert_eq!(benjamini_yekutieli(&[], 0.1).unwrap().count, 0);
    }
}
