//! Features that survive real descriptor tables (design.md 2.9): one absurd cell (a unit
//! slip such as 1e12 among values of order 1) must neither hide a shift nor pass silently.
//!
//! A mean and standard deviation, or a median and robust scale, leave such a cell about as
//! far out as it was, and a logistic fit then bends to it: in the measured case one pool cell
//! of 1e12 moved a feature's SMD from -0.48 to 0.03 and the shift report said nothing. So
//! before the fit and before the balance diagnostics every feature goes through one of:
//!
//! * [`FeatureTransform::Clip`] (the default): on the fitting rows (labeled and pool
//!   together), take the order statistics at 1% and 99% without interpolation, `lo` =
//!   x_(ceil(0.01 (N - 1))) and `hi` = x_(floor(0.99 (N - 1))) (0-based, sorted), so that a
//!   single extreme value cannot pull them once N >= 100; the fences are
//!   `lo - 2 (hi - lo)` and `hi + 2 (hi - lo)`, and a value beyond a fence is set to it
//!   (winsorized) and reported by feature, set, row and value. For normal data the fences
//!   sit about 11.6 SD from the mean and are never reached in practice; for a lognormal(0, 1)
//!   feature about 3 in 10^4 values are clipped. Our choice, common practice for outer fences
//!   (Tukey's are at 3 IQR from the quartiles; ours are wider because descriptor tables are
//!   often skewed).
//! * [`FeatureTransform::Rank`]: the normal-scores quantile transform fitted on the fitting
//!   rows, `z = Phi^-1((r - 0.5) / N)` with `r` the mid-rank of a fitted value, and linear
//!   interpolation between the fitted values for other values (clamped at the extremes), as
//!   scikit-learn's `QuantileTransformer(output_distribution="normal")` does (from memory).
//!   For heavy-tailed features; it discards the distances between values, so a shift in the
//!   extreme tail is seen only as far as it changes ranks.
//! * [`FeatureTransform::None`]: the raw values.
//!
//! Squares of a heavy-tailed feature give a few rows extreme leverage; [`heavy_tails`]
//! measures the excess kurtosis of each (transformed) feature so that the warnings can say
//! when `--expand squares` is risky.

use std::borrow::Cow;

use rayon::prelude::*;
use serde::Serialize;

use super::FeatureView;

/// Lower order-statistic level of the clipping fences.
pub const CLIP_LOW_LEVEL: f64 = 0.01;
/// Upper order-statistic level of the clipping fences.
pub const CLIP_HIGH_LEVEL: f64 = 0.99;
/// Fences at this many (hi - lo) spans beyond [lo, hi].
pub const FENCE_SPANS: f64 = 2.0;
/// Excess kurtosis above which a feature counts as heavy-tailed for squares (common
/// practice, our choice: a normal has 0, an exponential 6, a lognormal(0, 1) about 110).
pub const HEAVY_TAIL_KURTOSIS: f64 = 10.0;

/// How features are made robust before the domain classifier and the balance diagnostics.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Default)]
#[serde(rename_all = "snake_case")]
pub enum FeatureTransform {
    /// Winsorize values beyond wide outer fences, and report them (the default).
    #[default]
    Clip,
    /// Normal-scores quantile (rank) transform.
    Rank,
    /// Raw values.
    None,
}

/// One value beyond a fence.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct FarOutValue {
    /// `labeled` or `pool`.
    pub set: &'static str,
    /// 0-based data row in that set.
    pub row: usize,
    /// The row's id, when the caller knows it.
    pub id: Option<String>,
    /// The value as read.
    pub value: f64,
}

/// Clipping of one feature.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ClipReport {
    pub feature: String,
    /// The 1% and 99% order statistics of the fitting rows.
    pub low_quantile: f64,
    pub high_quantile: f64,
    /// The fences; values beyond them were set to them.
    pub lower_fence: f64,
    pub upper_fence: f64,
    pub clipped_labeled: usize,
    pub clipped_pool: usize,
    /// The value farthest beyond a fence (in fence spans).
    pub most_extreme: FarOutValue,
}

/// Features after the transform: column-major buffers (borrowed when unchanged) and what
/// was clipped.
#[derive(Debug, Clone)]
pub struct Prepared<'a> {
    pub labeled: Cow<'a, [f64]>,
    pub pool: Cow<'a, [f64]>,
    /// Features with at least one clipped value (clip transform only).
    pub clipped: Vec<ClipReport>,
}

/// Values of feature `f` on the fitting rows.
fn fit_values(
    labeled: FeatureView<'_>,
    pool: FeatureView<'_>,
    labeled_rows: &[usize],
    pool_rows: &[usize],
    f: usize,
) -> Vec<f64> {
    let (lc, pc) = (labeled.column(f), pool.column(f));
    labeled_rows
        .iter()
        .map(|&r| lc[r])
        .chain(pool_rows.iter().map(|&r| pc[r]))
        .collect()
}

/// The 1% / 99% order statistics (no interpolation) of `values` (reordered in place).
fn order_statistics(values: &mut [f64]) -> (f64, f64) {
    let last = values.len() - 1;
    let lo_at = (CLIP_LOW_LEVEL * last as f64).ceil() as usize;
    let hi_at = ((CLIP_HIGH_LEVEL * last as f64).floor() as usize).max(lo_at);
    let (_, hi, _) = values.select_nth_unstable_by(hi_at, f64::total_cmp);
    let hi = *hi;
    let (_, lo, _) = values[..=hi_at].select_nth_unstable_by(lo_at, f64::total_cmp);
    (*lo, hi)
}

/// Apply `transform` to both sets, fitted on the given fitting rows.
pub fn prepare<'a>(
    labeled: FeatureView<'a>,
    pool: FeatureView<'a>,
    labeled_rows: &[usize],
    pool_rows: &[usize],
    transform: FeatureTransform,
) -> Prepared<'a> {
    let borrowed = |labeled: FeatureView<'a>, pool: FeatureView<'a>| Prepared {
        labeled: Cow::Borrowed(labeled.values),
        pool: Cow::Borrowed(pool.values),
        clipped: Vec::new(),
    };
    if labeled_rows.len() + pool_rows.len() == 0 {
        return borrowed(labeled, pool);
    }
    match transform {
        FeatureTransform::None => borrowed(labeled, pool),
        FeatureTransform::Clip => clip(labeled, pool, labeled_rows, pool_rows),
        FeatureTransform::Rank => rank(labeled, pool, labeled_rows, pool_rows),
    }
}

fn clip<'a>(
    labeled: FeatureView<'a>,
    pool: FeatureView<'a>,
    labeled_rows: &[usize],
    pool_rows: &[usize],
) -> Prepared<'a> {
    let fences: Vec<(f64, f64, f64, f64)> = (0..labeled.n_features())
        .into_par_iter()
        .map(|f| {
            let mut v = fit_values(labeled, pool, labeled_rows, pool_rows, f);
            let (lo, hi) = order_statistics(&mut v);
            let span = hi - lo;
            (lo, hi, lo - FENCE_SPANS * span, hi + FENCE_SPANS * span)
        })
        .collect();
    let outside = |f: usize, x: f64| {
        let (_, _, low, high) = fences[f];
        x < low || x > high
    };
    let any = (0..labeled.n_features()).any(|f| {
        labeled.column(f).iter().any(|&x| outside(f, x))
            || pool.column(f).iter().any(|&x| outside(f, x))
    });
    if !any {
        return Prepared {
            labeled: Cow::Borrowed(labeled.values),
            pool: Cow::Borrowed(pool.values),
            clipped: Vec::new(),
        };
    }
    let mut out_labeled = labeled.values.to_vec();
    let mut out_pool = pool.values.to_vec();
    let mut clipped = Vec::new();
    for (f, &(lo, hi, low, high)) in fences.iter().enumerate() {
        let span = (hi - lo).max(f64::MIN_POSITIVE);
        let mut report = ClipReport {
            feature: labeled.names()[f].clone(),
            low_quantile: lo,
            high_quantile: hi,
            lower_fence: low,
            upper_fence: high,
            clipped_labeled: 0,
            clipped_pool: 0,
            most_extreme: FarOutValue {
                set: "labeled",
                row: 0,
                id: None,
                value: f64::NAN,
            },
        };
        let mut worst = 0.0f64;
        for (set, view, out) in [
            ("labeled", labeled, &mut out_labeled),
            ("pool", pool, &mut out_pool),
        ] {
            let n = view.n_rows();
            let column = &mut out[f * n..(f + 1) * n];
            for (row, x) in column.iter_mut().enumerate() {
                if *x < low || *x > high {
                    let beyond = if *x < low { low - *x } else { *x - high } / span;
                    if beyond > worst || worst == 0.0 {
                        worst = beyond;
                        report.most_extreme = FarOutValue {
                            set,
                            row,
                            id: None,
                            value: *x,
                        };
                    }
                    *x = x.clamp(low, high);
                    if set == "labeled" {
                        report.clipped_labeled += 1;
                    } else {
                        report.clipped_pool += 1;
                    }
                }
            }
        }
        if report.clipped_labeled + report.clipped_pool > 0 {
            clipped.push(report);
        }
    }
    Prepared {
        labeled: Cow::Owned(out_labeled),
        pool: Cow::Owned(out_pool),
        clipped,
    }
}

/// Normal scores of the distinct sorted fitted values: `Phi^-1((midrank - 0.5) / N)`.
fn normal_scores(sorted: &[f64]) -> (Vec<f64>, Vec<f64>) {
    use statrs::distribution::{ContinuousCDF, Normal};
    let normal = Normal::new(0.0, 1.0).expect("standard normal");
    let n = sorted.len() as f64;
    let (mut xs, mut zs) = (Vec::new(), Vec::new());
    let mut i = 0;
    while i < sorted.len() {
        let mut j = i;
        while j + 1 < sorted.len() && sorted[j + 1] == sorted[i] {
            j += 1;
        }
        // 1-based mid-rank of the tie block i..=j.
        let midrank = (i + j) as f64 / 2.0 + 1.0;
        xs.push(sorted[i]);
        zs.push(normal.inverse_cdf((midrank - 0.5) / n));
        i = j + 1;
    }
    (xs, zs)
}

/// The quantile transform of `x`: interpolate linearly between the fitted values, clamp
/// outside them.
fn quantile_map(xs: &[f64], zs: &[f64], x: f64) -> f64 {
    let k = xs.partition_point(|&v| v < x);
    if k < xs.len() && xs[k] == x {
        return zs[k];
    }
    if k == 0 {
        return zs[0];
    }
    if k == xs.len() {
        return zs[xs.len() - 1];
    }
    let (a, b) = (xs[k - 1], xs[k]);
    zs[k - 1] + (x - a) / (b - a) * (zs[k] - zs[k - 1])
}

fn rank<'a>(
    labeled: FeatureView<'a>,
    pool: FeatureView<'a>,
    labeled_rows: &[usize],
    pool_rows: &[usize],
) -> Prepared<'a> {
    let maps: Vec<(Vec<f64>, Vec<f64>)> = (0..labeled.n_features())
        .into_par_iter()
        .map(|f| {
            let mut v = fit_values(labeled, pool, labeled_rows, pool_rows, f);
            v.sort_unstable_by(f64::total_cmp);
            normal_scores(&v)
        })
        .collect();
    let apply = |view: FeatureView<'_>| -> Vec<f64> {
        let n = view.n_rows();
        let mut out = view.values.to_vec();
        out.par_chunks_mut(n.max(1))
            .enumerate()
            .for_each(|(f, column)| {
                let (xs, zs) = &maps[f];
                for x in column.iter_mut() {
                    *x = quantile_map(xs, zs, *x);
                }
            });
        out
    };
    Prepared {
        labeled: Cow::Owned(apply(labeled)),
        pool: Cow::Owned(apply(pool)),
        clipped: Vec::new(),
    }
}

/// Excess kurtosis per feature on the given rows of both sets, m4 / m2^2 - 3 (population
/// moments); 0 for a constant feature.
pub fn heavy_tails(
    labeled: FeatureView<'_>,
    pool: FeatureView<'_>,
    labeled_rows: &[usize],
    pool_rows: &[usize],
) -> Vec<f64> {
    (0..labeled.n_features())
        .into_par_iter()
        .map(|f| {
            let v = fit_values(labeled, pool, labeled_rows, pool_rows, f);
            let n = v.len() as f64;
            let mean = v.iter().sum::<f64>() / n;
            let (m2, m4) = v.iter().fold((0.0, 0.0), |(a, b), x| {
                let d = (x - mean) * (x - mean);
                (a + d, b + d * d)
            });
            let (m2, m4) = (m2 / n, m4 / n);
            if m2 > 0.0 {
                m4 / (m2 * m2) - 3.0
            } else {
                0.0
            }
        })
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::shift::test_support::{names, normal_table};

    fn view<'a>(values: &'a [f64], rows: usize, names: &'a [String]) -> FeatureView<'a> {
        FeatureView::new(values, rows, names).unwrap()
    }

    #[test]
    fn order_statistics_ignore_one_extreme_value() {
        // 0..=99 and one 1e12: N = 101, lo = x_(ceil(1.0)) = 1, hi = x_(floor(99.0)) = 99
        // (hand computation): the 1e12 does not move them.
        let mut v: Vec<f64> = (0..100).map(f64::from).collect();
        v.push(1e12);
        assert_eq!(order_statistics(&mut v), (1.0, 99.0));
    }

    #[test]
    fn one_absurd_cell_is_clipped_and_named() {
        let nm = names(2);
        let lab = normal_table(500, &[0.0, 0.0], &[1.0, 1.0], 1);
        let mut pool = normal_table(400, &[0.5, 0.0], &[1.0, 1.0], 2);
        pool[400 + 17] = 1e12; // feature x1, pool row 17
        let rows_l: Vec<usize> = (0..500).collect();
        let rows_p: Vec<usize> = (0..400).collect();
        let p = prepare(
            view(&lab, 500, &nm),
            view(&pool, 400, &nm),
            &rows_l,
            &rows_p,
            FeatureTransform::Clip,
        );
        assert_eq!(p.clipped.len(), 1);
        let c = &p.clipped[0];
        assert_eq!(c.feature, "x1");
        assert_eq!((c.clipped_labeled, c.clipped_pool), (0, 1));
        assert_eq!(c.most_extreme.set, "pool");
        assert_eq!(c.most_extreme.row, 17);
        assert_eq!(c.most_extreme.value, 1e12);
        assert_eq!(p.pool[400 + 17], c.upper_fence);
        // Standard normal data: the fences are far out (about 11.6 SD) and nothing else moves.
        assert!(
            c.upper_fence > 8.0 && c.upper_fence < 15.0,
            "{}",
            c.upper_fence
        );
        let changed = p.pool.iter().zip(&pool).filter(|(a, b)| a != b).count();
        assert_eq!(changed, 1);
        assert!(matches!(p.labeled, Cow::Owned(_)));
    }

    #[test]
    fn clean_data_is_borrowed_unchanged() {
        let nm = names(3);
        let lab = normal_table(2000, &[0.0; 3], &[1.0; 3], 3);
        let pool = normal_table(2000, &[0.3; 3], &[1.0; 3], 4);
        let rows: Vec<usize> = (0..2000).collect();
        let p = prepare(
            view(&lab, 2000, &nm),
            view(&pool, 2000, &nm),
            &rows,
            &rows,
            FeatureTransform::Clip,
        );
        assert!(p.clipped.is_empty());
        assert!(matches!(p.labeled, Cow::Borrowed(_)) && matches!(p.pool, Cow::Borrowed(_)));
    }

    #[test]
    fn rank_transform_gives_normal_scores() {
        // Four distinct values: z = Phi^-1((r - 0.5) / 4) for r = 1..4, i.e. +-0.318639 and
        // +-1.150349 (standard normal table); ties share their mid-rank; values between
        // fitted ones interpolate, values outside clamp.
        let nm = names(1);
        let lab = [10.0, 20.0];
        let pool = [30.0, 1e12];
        let p = prepare(
            view(&lab, 2, &nm),
            view(&pool, 2, &nm),
            &[0, 1],
            &[0, 1],
            FeatureTransform::Rank,
        );
        let expected = [-1.150_349, -0.318_639, 0.318_639, 1.150_349];
        for (got, want) in p.labeled.iter().chain(p.pool.iter()).zip(expected) {
            assert!((got - want).abs() < 1e-5, "{got} vs {want}");
        }
        let (xs, zs) = normal_scores(&[1.0, 2.0, 2.0, 3.0]);
        assert_eq!(xs, vec![1.0, 2.0, 3.0]);
        assert!(zs[1].abs() < 1e-12, "tie block mid-rank 2.5 -> z = 0");
        assert!((quantile_map(&xs, &zs, 1.5) - zs[0] / 2.0).abs() < 1e-12);
        assert_eq!(quantile_map(&xs, &zs, -5.0), zs[0]);
        assert_eq!(quantile_map(&xs, &zs, 9.0), zs[2]);
    }

    #[test]
    fn kurtosis_separates_heavy_tails() {
        let nm = names(2);
        let mut lab = normal_table(4000, &[0.0, 0.0], &[1.0, 1.0], 5);
        for x in &mut lab[4000..] {
            *x = x.exp(); // lognormal(0, 1): excess kurtosis about 110 (population value)
        }
        let rows: Vec<usize> = (0..4000).collect();
        let k = heavy_tails(view(&lab, 4000, &nm), view(&lab, 4000, &nm), &rows, &[]);
        assert!(k[0].abs() < 0.5, "normal: {}", k[0]);
        assert!(k[1] > HEAVY_TAIL_KURTOSIS, "lognormal: {}", k[1]);
    }
}
