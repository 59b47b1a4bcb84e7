//! Warnings about the shift and the weights: documented thresholds, each warning naming the
//! diagnostic, its value, the threshold, and what it means for the shortlist, worst first
//! (design.md 2.6).
//!
//! Thresholds are common practice unless a source is named beside them.

use serde::Serialize;

use super::ShiftSummary;
use crate::warning::{Level, Warning};

/// Cross-validated AUC above this: the sets barely overlap (common practice).
pub const AUC_HIGH: f64 = 0.95;
/// Kish ESS below this fraction of the calibration rows (common practice).
pub const ESS_FRACTION_LOW: f64 = 0.1;
/// |weighted SMD| above this on an input feature (Austin 2009: 0.1 marks meaningful
/// imbalance), unless sampling noise alone can reach it (see [`smd_threshold`]).
pub const SMD_HIGH: f64 = 0.1;
/// |weighted SMD| above this on a squared or product feature (same rule as `SMD_HIGH`).
pub const ADEQUACY_SMD_HIGH: f64 = 0.1;
/// Family-wise error rate of the noise bound in [`smd_threshold`] (common practice).
pub const SMD_NOISE_LEVEL: f64 = 0.05;

/// The |SMD| above which a family of `features` weighted SMDs is flagged:
/// max(`base`, z sqrt(1 / ESS + 1 / m)), z = Phi^-1(1 - 0.05 / (2 features)).
///
/// sqrt(1 / ESS + 1 / m) is the standard error of an SMD between a weighted labeled mean
/// (Kish effective size ESS) and a pool mean (m rows) when the sets are balanced (delta
/// method, unit pooled SD); z is the two-sided Bonferroni bound, so with no imbalance the
/// largest of `features` SMDs exceeds the threshold with probability about 5% at most.
/// Without it, hundreds of product features on a few thousand rows cross 0.1 by noise
/// alone (32 features, n = m = 2000, no shift: largest product |SMD| 0.118). Our choice,
/// common practice for multiple comparisons.
pub fn smd_threshold(base: f64, ess: f64, pool_rows: usize, features: usize) -> f64 {
    use statrs::distribution::{ContinuousCDF, Normal};
    if features == 0 || ess.is_nan() || ess <= 0.0 || pool_rows == 0 {
        return base;
    }
    let z = Normal::new(0.0, 1.0)
        .expect("standard normal")
        .inverse_cdf(1.0 - SMD_NOISE_LEVEL / (2.0 * features as f64));
    base.max(z * (1.0 / ess + 1.0 / pool_rows as f64).sqrt())
}
/// Share of the pool that can never be selected above this (common practice, our choice).
pub const UNREACHABLE_SHARE_HIGH: f64 = 0.01;
/// Share of the pool with balanced probability above 0.9 above this (common practice; the
/// 0.9 cut-off follows Crump, Hotz, Imbens & Mitnik 2009).
pub const OUTSIDE_OVERLAP_SHARE_HIGH: f64 = 0.1;

/// Share of fitting rows at a clipped boosted probability above this (common practice, our
/// choice: a few such rows are expected at the tails).
pub const PROBABILITY_CLIPPED_SHARE_HIGH: f64 = 0.01;

/// How bad a warning is, in the words earlier outputs used (`severe`, `caution`). Severe
/// ones come first. The ordered scale every output now also writes is
/// [`crate::warning::Level`] ([`Severity::level`]).
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum Severity {
    /// The weights, and so the FDR guarantee in practice, should not be trusted as they are.
    Severe,
    /// Worth a look; the shortlist may still be usable.
    Caution,
}

impl Severity {
    /// The place on the ordered scale: severe is `high`, caution is `medium`.
    pub fn level(self) -> Level {
        match self {
            Severity::Severe => Level::High,
            Severity::Caution => Level::Medium,
        }
    }
}

/// One warning.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ShiftWarning {
    /// Stable machine-readable name of the warning; equal to `diagnostic` for shift
    /// warnings.
    pub code: String,
    /// Machine-readable diagnostic name (e.g. `khat`, `ess_fraction`).
    pub diagnostic: String,
    /// The diagnostic's value.
    pub value: f64,
    /// The threshold it crossed.
    pub threshold: f64,
    /// Severity, in the earlier words (`severe`, `caution`).
    pub severity: Severity,
    /// The same on the ordered scale: `high` (severe) or `medium` (caution).
    pub level: Level,
    /// 3 (high) or 2 (medium): the level as a number, larger is worse.
    pub level_rank: u8,
    /// Plain-words meaning for the shortlist.
    pub message: String,
}

impl ShiftWarning {
    /// The warning in the shape every output shares (`warning_details`).
    pub fn to_warning(&self) -> Warning {
        Warning {
            code: self.code.clone(),
            severity: self.level.legacy_severity(),
            level: self.level,
            level_rank: self.level_rank,
            diagnostic: self.diagnostic.clone(),
            value: Some(self.value),
            threshold: Some(self.threshold),
            message: self.message.clone(),
            title: self.diagnostic.clone(),
        }
    }
}

/// Order of warnings, worst first: problems that make the weights wrong (solver,
/// clamping, a weight model that misses part of the shift) before those that make them
/// unreliable (k-hat, ESS, AUC near 1), before lost power (unreachable units), before
/// cautions (absurd cells that were clipped, squares of heavy-tailed features, remaining
/// mean imbalance, pool outside the overlap).
pub const ORDER: [&str; 12] = [
    "converged",
    "clamped_weights",
    "adequacy_smd",
    "khat",
    "ess_fraction",
    "auc",
    "unreachable_share",
    "far_out_values",
    "probability_clipped",
    "squares_heavy_tail",
    "smd_weighted",
    "pool_share_above_0_9",
];

fn warn(
    diagnostic: &str,
    value: f64,
    threshold: f64,
    severity: Severity,
    message: String,
) -> ShiftWarning {
    ShiftWarning {
        code: diagnostic.into(),
        diagnostic: diagnostic.into(),
        value,
        threshold,
        severity,
        level: severity.level(),
        level_rank: severity.level().rank(),
        message,
    }
}

/// All warnings for a summary, worst first (the fixed order of `ORDER`).
pub fn collect(s: &ShiftSummary) -> Vec<ShiftWarning> {
    let mut out = Vec::new();
    if !s.converged {
        out.push(warn(
            "converged",
            s.fit.report.gradient_norm,
            s.fit.tolerance,
            Severity::Severe,
            format!(
                "the domain classifier did not converge after {} iterations (gradient norm {:.3e}); its weights are not the penalized fit and should not be used",
                s.iterations, s.fit.report.gradient_norm
            ),
        ));
    }
    if s.fit.clamped_weights > 0 {
        out.push(warn(
            "clamped_weights",
            s.fit.clamped_weights as f64,
            0.0,
            Severity::Severe,
            format!(
                "{} rows had log-weights beyond +-{} and were clamped; some rows lie far outside the other set and their weights are meaningless",
                s.fit.clamped_weights,
                super::weights::LOG_WEIGHT_LIMIT
            ),
        ));
    }
    // NaN-safe: an infinite or undefined k-hat warns too.
    if matches!(
        s.khat.partial_cmp(&s.khat_threshold),
        Some(std::cmp::Ordering::Greater) | None
    ) {
        out.push(warn(
            "khat",
            s.khat,
            s.khat_threshold,
            Severity::Severe,
            format!(
                "Pareto k-hat of the labeled weights is {:.2} (threshold {:.2}): {}",
                s.khat,
                s.khat_threshold,
                khat_reading(
                    s.khat,
                    s.khat_threshold,
                    s.weights.largest_weight_share,
                    s.ess,
                    s.calibration_rows
                )
            ),
        ));
    }
    if s.ess_fraction < ESS_FRACTION_LOW {
        out.push(warn(
            "ess_fraction",
            s.ess_fraction,
            ESS_FRACTION_LOW,
            Severity::Severe,
            format!(
                "the labeled weights are worth only {:.0} of {} labeled compounds ({:.1}%, threshold {:.0}%): p-values rest on very few effective calibration points, so the shortlist will be small or noisy",
                s.ess,
                s.calibration_rows,
                100.0 * s.ess_fraction,
                100.0 * ESS_FRACTION_LOW
            ),
        ));
    }
    if s.auc > AUC_HIGH {
        out.push(warn(
            "auc",
            s.auc,
            AUC_HIGH,
            Severity::Severe,
            format!(
                "the domain classifier tells labeled compounds from pool compounds with AUC {:.3} (threshold {AUC_HIGH}): the two sets barely overlap, weights are extreme, and much of the pool is unlike anything assayed",
                s.auc
            ),
        ));
    }
    let m = s.pool_rows.max(1) as f64;
    let unreachable_share = s.unreachable_count as f64 / m;
    if unreachable_share > UNREACHABLE_SHARE_HIGH {
        out.push(warn(
            "unreachable_share",
            unreachable_share,
            UNREACHABLE_SHARE_HIGH,
            Severity::Severe,
            format!(
                "{} pool compounds ({:.1}%, threshold {:.0}%) can never be selected at q = {}: their weight alone keeps their p-value above q, because the labeled set does not cover that part of the pool",
                s.unreachable_count,
                100.0 * unreachable_share,
                100.0 * UNREACHABLE_SHARE_HIGH,
                crate::selection::level_text(s.fdr)
            ),
        ));
    }
    let worst_adequacy = s
        .adequacy
        .max_abs_weighted_squares
        .max(s.adequacy.max_abs_weighted_products);
    let adequacy_limit = s.adequacy.threshold;
    if worst_adequacy > adequacy_limit {
        out.push(warn(
            "adequacy_smd",
            worst_adequacy,
            adequacy_limit,
            Severity::Severe,
            format!(
                "after weighting, `{}` is still imbalanced (|SMD| {:.2}, threshold {:.2}): the weight model misses part of the shift (e.g. a difference in spread), which can break the FDR control of every weighted procedure; refit with squared and/or pairwise features",
                s.adequacy.worst_feature.as_deref().unwrap_or("?"),
                worst_adequacy,
                adequacy_limit
            ),
        ));
    }
    for c in &s.fit.clipped_features {
        let e = &c.most_extreme;
        let fence = if e.value > c.upper_fence {
            c.upper_fence
        } else {
            c.lower_fence
        };
        let count = c.clipped_labeled + c.clipped_pool;
        out.push(warn(
            "far_out_values",
            e.value,
            fence,
            Severity::Caution,
            format!(
                "feature `{}`: {} row {}{} has the value {}, far outside the range of the \
                 other values (1% to 99%: {} to {}); {} value{} of `{}` beyond the fences {} \
                 and {} ({} labeled, {} pool) {} set to the fences before the fit and the \
                 balance diagnostics, so they neither drive nor hide the shift. Check the \
                 cell: a unit slip or a missing-value code?",
                c.feature,
                e.set,
                e.row + 1,
                e.id.as_ref()
                    .map(|id| format!(" (id {id})"))
                    .unwrap_or_default(),
                short_number(e.value),
                short_number(c.low_quantile),
                short_number(c.high_quantile),
                count,
                if count == 1 { "" } else { "s" },
                c.feature,
                short_number(c.lower_fence),
                short_number(c.upper_fence),
                c.clipped_labeled,
                c.clipped_pool,
                if count == 1 { "was" } else { "were" }
            ),
        ));
    }
    if let Some(b) = &s.fit.boosted {
        let clipped = b.out_of_fold_clipped_low + b.out_of_fold_clipped_high;
        let share = clipped as f64 / b.rows.max(1) as f64;
        if share > PROBABILITY_CLIPPED_SHARE_HIGH {
            out.push(warn(
                "probability_clipped",
                share,
                PROBABILITY_CLIPPED_SHARE_HIGH,
                Severity::Caution,
                format!(
                    "the boosted trees put {clipped} of {} fitting rows ({:.1}%) at a clipped \
                     probability ({} labeled-side, {} pool-side; bounds {} and {}): the trees \
                     are sure those rows belong to one set, so their weights are set by the \
                     clip, not estimated",
                    b.rows,
                    100.0 * share,
                    b.out_of_fold_clipped_low,
                    b.out_of_fold_clipped_high,
                    b.probability_clip,
                    1.0 - b.probability_clip
                ),
            ));
        }
    }
    if matches!(
        s.fit.expansion,
        super::Expansion::Squares | super::Expansion::SquaresAndPairwise
    ) && s.fit.feature_transform != super::FeatureTransform::Rank
    {
        if let Some((name, k)) = s
            .fit
            .heavy_tailed_features
            .iter()
            .max_by(|a, b| a.1.total_cmp(&b.1))
        {
            out.push(warn(
                "squares_heavy_tail",
                *k,
                super::robust::HEAVY_TAIL_KURTOSIS,
                Severity::Caution,
                format!(
                    "`{name}` is heavy-tailed (excess kurtosis {k:.1}, threshold {}; {} \
                     feature(s) in all) and --expand squares squares it: a few rows get \
                     extreme leverage and extreme weights. Prefer --feature-transform rank \
                     with squares, or check the weights with `weighbridge check`.",
                    super::robust::HEAVY_TAIL_KURTOSIS,
                    s.fit.heavy_tailed_features.len()
                ),
            ));
        }
    }
    let worst_balance = s
        .balance
        .iter()
        .max_by(|a, b| a.smd_weighted.abs().total_cmp(&b.smd_weighted.abs()));
    if let Some(f) = worst_balance {
        let v = f.smd_weighted.abs();
        let limit = s.smd_threshold;
        if v > limit {
            let count = s
                .balance
                .iter()
                .filter(|f| f.smd_weighted.abs() > limit)
                .count();
            out.push(warn(
                "smd_weighted",
                v,
                limit,
                Severity::Caution,
                format!(
                    "{count} feature(s) remain imbalanced after weighting, worst `{}` with |SMD| {:.2} (threshold {:.2}): the weighted labeled set still differs from the pool, so p-values may be miscalibrated for compounds that differ in these features",
                    f.feature, v, limit
                ),
            ));
        }
    }
    let outside = s.overlap.pool_share_above_0_9;
    if outside > OUTSIDE_OVERLAP_SHARE_HIGH {
        out.push(warn(
            "pool_share_above_0_9",
            outside,
            OUTSIDE_OVERLAP_SHARE_HIGH,
            Severity::Caution,
            format!(
                "{:.1}% of the pool (threshold {:.0}%) lies where the classifier puts balanced pool probability above 0.9, i.e. pool density more than 9 times the labeled density: those compounds carry large weights and are hard to select",
                100.0 * outside,
                100.0 * OUTSIDE_OVERLAP_SHARE_HIGH
            ),
        ));
    }
    let rank = |w: &ShiftWarning| {
        ORDER
            .iter()
            .position(|d| *d == w.diagnostic)
            .unwrap_or(ORDER.len())
    };
    out.sort_by_key(rank);
    out
}

/// What a Pareto k-hat of the labeled weights means for this shortlist, in plain words:
/// how much the few largest labeled weights decide the p-values. `largest_share` is the
/// largest calibration weight's share of their total, `ess` their Kish effective size out
/// of `rows`.
///
/// The bands follow the usual reading of k-hat (Vehtari, Simpson, Gelman, Yao & Gabry,
/// Pareto smoothed importance sampling, 2024, from memory): below 0.5 the weights' variance
/// is finite and weighted averages settle quickly; up to the threshold (0.7) they settle
/// slowly; above it a few rows decide them; above 1 the weights' mean itself need not exist.
pub fn khat_reading(
    khat: f64,
    threshold: f64,
    largest_share: f64,
    ess: f64,
    rows: usize,
) -> String {
    let share = format!("{:.1}%", 100.0 * largest_share);
    let worth = format!("{ess:.0} of {rows}");
    if khat.is_nan() {
        format!(
            "the tail of the labeled weights could not be measured (too few distinct weights); \
             the largest labeled weight holds {share} of the total and the weights are worth \
             {worth} labeled rows, so judge them by those figures"
        )
    } else if khat > 1.0 {
        format!(
            "the labeled weights are so heavy-tailed that their average need not exist: the \
             largest one alone holds {share} of the total weight (the weights are worth {worth} \
             labeled rows), so one or two assayed units set every p-value of this shortlist \
             and its FDR is not the level asked for"
        )
    } else if khat > threshold {
        format!(
            "a handful of labeled units carry most of the calibration (the largest weight holds \
             {share} of the total; the weights are worth {worth} labeled rows): the p-values of \
             this shortlist lean on them, another assay of those few units could change it, \
             and its FDR level is not trustworthy"
        )
    } else if khat > 0.5 {
        format!(
            "the labeled weights have a heavy but usable tail (the largest holds {share} of the \
             total; worth {worth} labeled rows): the p-values are usable but noisier than the \
             effective sample size alone suggests"
        )
    } else {
        format!(
            "the labeled weights have a light tail (the largest holds {share} of the total; \
             worth {worth} labeled rows): no few assayed units dominate the p-values"
        )
    }
}

/// A number for a message: 4 significant digits, scientific when very large or small.
fn short_number(v: f64) -> String {
    if v != 0.0 && (v.abs() >= 1e6 || v.abs() < 1e-3) {
        format!("{v:.3e}")
    } else {
        format!("{}", (v * 1e4).round() / 1e4)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn khat_readings_follow_the_bands() {
        // Bands of the usual k-hat reading (Vehtari et al., PSIS, from memory): <= 0.5,
        // up to the threshold, above it, above 1; NaN when not estimable.
        let read = |k: f64| khat_reading(k, 0.7, 0.0123, 150.4, 300);
        let texts = [read(0.2), read(0.6), read(0.8), read(1.5), read(f64::NAN)];
        for text in &texts {
            // Every reading says what the weights are worth for this shortlist.
            assert!(
                text.contains("1.2%") && text.contains("150 of 300"),
                "{text}"
            );
        }
        assert!(texts[0].contains("light tail"));
        assert!(texts[1].contains("usable"));
        assert!(texts[2].contains("not trustworthy"));
        assert!(texts[3].contains("need not exist"));
        assert!(texts[4].contains("could not be measured"));
        // At the threshold itself the weights are still usable (k-hat must exceed it).
        assert!(read(0.7).contains("usable"));
    }

    #[test]
    fn smd_threshold_values() {
        // One feature: z = Phi^-1(0.975) = 1.959964 (standard normal table); ESS = m = 100:
        // SE = sqrt(0.02), bound 0.27718.
        assert!((smd_threshold(0.1, 100.0, 100, 1) - 1.959_964 * 0.02f64.sqrt()).abs() < 1e-5);
        // Large samples: the 0.1 rule of Austin (2009) applies unchanged.
        assert_eq!(smd_threshold(0.1, 1e6, 1_000_000, 500), 0.1);
        // More features, higher bound.
        assert!(smd_threshold(0.1, 400.0, 400, 500) > smd_threshold(0.1, 400.0, 400, 5));
    }
}
