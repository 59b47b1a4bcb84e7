//! Audit of an earlier shortlist: was it distorted by covariate shift?
//!
//! Given the pool positions of a list chosen earlier (by ranking, by unweighted conformal
//! selection, by hand), this computes for each listed unit its unweighted and weighted
//! conformal p-values (design.md 2.2, over the whole pool), whether it survives the weighted
//! selection at level q (design.md 2.3/2.4), and whether it sits where the labeled set gives
//! little support. For the list as a whole it reports the smallest FDR level at which BH
//! would have selected every listed unit — the largest BH-adjusted p-value over the list
//! (Benjamini & Hochberg 1995; adjusted p-values as in Wright 1992) — with and without
//! weights, and the share of the list in poorly covered regions.
//!
//! A unit is "poorly covered" when any of these holds (each reported separately):
//! * it is unreachable at level q: its p-value floor `w_j / (W + w_j)` exceeds q
//!   (design.md 2.2);
//! * its weight exceeds the largest labeled weight: the pool is denser there, relative to
//!   the labeled set, than anywhere the labeled set was observed (common practice);
//! * with fitted weights, its domain-classifier probability exceeds 0.9, the trimming rule
//!   of Crump, Hotz, Imbens & Mitnik (2009). The probability is taken on the equal-size
//!   scale `w / (1 + w)` (what e(x) would be with as many labeled as pool units), as the
//!   shift diagnostics do; the raw e(x) mostly reflects the ratio of the set sizes.

use serde::Serialize;

use crate::conformal::pvalue::{pool_pvalues, CalibrationSet};
use crate::conformal::score::{labeled_scores_toward, pool_scores_toward};
use crate::selection::bh::bh_adjusted;
use crate::selection::pipeline::{
    run_selection, LabeledInput, PoolInput, SelectError, SelectOptions,
};
use crate::warning::{prose_number, Level, Warning};

/// e(x) above which a unit counts as poorly covered (Crump et al. 2009 trimming rule).
pub const POOL_PROBABILITY_LIMIT: f64 = 0.9;

/// Per listed unit, in the order of the list.
#[derive(Clone, Debug, Serialize)]
pub struct AuditedUnit {
    /// Position of the unit in the pool.
    pub pool_index: usize,
    pub p_value_unweighted: f64,
    pub p_value_weighted: f64,
    /// Smallest BH level at which this unit alone would be selected, without / with weights.
    pub adjusted_unweighted: f64,
    pub adjusted_weighted: f64,
    /// Selected by the weighted selection at level q.
    pub survives: bool,
    pub weight: f64,
    /// e(x) when weights were fitted.
    pub pool_probability: Option<f64>,
    pub unreachable: bool,
    pub beyond_labeled_weights: bool,
    pub high_pool_probability: bool,
    pub poorly_covered: bool,
}

/// The audit of one list.
#[derive(Clone, Debug)]
pub struct AuditOutcome {
    pub units: Vec<AuditedUnit>,
    pub listed_count: usize,
    pub survivors_count: usize,
    /// Largest unweighted BH-adjusted p-value over the list.
    pub fdr_level_unweighted: f64,
    /// Largest weighted BH-adjusted p-value over the list.
    pub fdr_level_weighted: f64,
    pub poorly_covered_count: usize,
    /// The weighted selection on the whole pool.
    pub weighted_selected_count: usize,
    pub largest_labeled_weight: f64,
    /// Findings about the list, then the weighted selection's own warnings.
    pub warnings: Vec<Warning>,
}

/// Audit the pool units at positions `listed`.
///
/// `options` fixes the level q, procedure, p-value kind, score and seed of the weighted
/// selection; the unweighted p-values use the same kind, score and seed with every weight 1.
/// `pool_probability` is e(x) per pool unit when weights were fitted.
///
/// # Errors
/// As [`run_selection`]; an empty list or a position outside the pool is a
/// [`SelectError::LengthMismatch`].
pub fn audit_shortlist(
    options: &SelectOptions,
    labeled: LabeledInput<'_>,
    pool: PoolInput<'_>,
    listed: &[usize],
    pool_probability: Option<&[f64]>,
) -> Result<AuditOutcome, SelectError> {
    let m = pool.prediction.len();
    if let Some(&bad) = listed.iter().find(|&&j| j >= m) {
        return Err(SelectError::LengthMismatch {
            what: "shortlist position",
            expected: m,
            got: bad,
        });
    }
    let weighted = run_selection(options, labeled, pool)?;
    let settings = &weighted.settings;
    let q = settings.fdr;

    let labeled_v = labeled_scores_toward(
        settings.score,
        settings.direction,
        labeled.outcome,
        labeled.prediction,
        labeled.thresholds,
    );
    let pool_v = pool_scores_toward(
        settings.score,
        settings.direction,
        pool.prediction,
        pool.thresholds,
    );
    let unweighted_calibration = CalibrationSet::new(&labeled_v, None)?;
    let unweighted = pool_pvalues(
        settings.pvalues,
        &unweighted_calibration,
        &pool_v,
        None,
        settings.seed,
    )?
    .values();

    let adjusted_unweighted = bh_adjusted(&unweighted, 1.0)?;
    let adjusted_weighted = bh_adjusted(&weighted.p_values, 1.0)?;
    let largest_labeled_weight = labeled
        .weights
        .map_or(1.0, |w| w.iter().copied().fold(f64::NEG_INFINITY, f64::max));

    let units: Vec<AuditedUnit> = listed
        .iter()
        .map(|&j| {
            let weight = weighted.weights[j];
            let probability = pool_probability.map(|e| e[j]);
            let unreachable = weighted.unreachable[j];
            let beyond_labeled_weights = weight > largest_labeled_weight;
            let high_pool_probability = probability.is_some_and(|e| e > POOL_PROBABILITY_LIMIT);
            AuditedUnit {
                pool_index: j,
                p_value_unweighted: unweighted[j],
                p_value_weighted: weighted.p_values[j],
                adjusted_unweighted: adjusted_unweighted[j],
                adjusted_weighted: adjusted_weighted[j],
                survives: weighted.selected[j],
                weight,
                pool_probability: probability,
                unreachable,
                beyond_labeled_weights,
                high_pool_probability,
                poorly_covered: unreachable || beyond_labeled_weights || high_pool_probability,
            }
        })
        .collect();

    let level =
        |values: &dyn Fn(&AuditedUnit) -> f64| units.iter().map(values).fold(0.0_f64, f64::max);
    let fdr_level_unweighted = level(&|u| u.adjusted_unweighted);
    let fdr_level_weighted = level(&|u| u.adjusted_weighted);
    let survivors_count = units.iter().filter(|u| u.survives).count();
    let poorly_covered_count = units.iter().filter(|u| u.poorly_covered).count();

    let mut outcome = AuditOutcome {
        listed_count: units.len(),
        units,
        survivors_count,
        fdr_level_unweighted,
        fdr_level_weighted,
        poorly_covered_count,
        weighted_selected_count: weighted.selected_count,
        largest_labeled_weight,
        warnings: vec![],
    };
    outcome.warnings = audit_warnings(&outcome, q, weighted.weights_vary);
    outcome.warnings.extend(weighted.warnings);
    crate::warning::worst_first(&mut outcome.warnings);
    Ok(outcome)
}

/// Plain-words findings about the list, most serious first. Levels (our choice): poorly
/// covered listed units and a list distorted by the shift are `medium`, listed units the
/// weighted selection drops are `low`.
fn audit_warnings(o: &AuditOutcome, q: f64, weights_vary: bool) -> Vec<Warning> {
    let mut warnings = Vec::new();
    if o.listed_count == 0 {
        return warnings;
    }
    let share = |count: usize| 100.0 * count as f64 / o.listed_count as f64;
    if o.poorly_covered_count > 0 {
        warnings.push(
            Warning::new(
                "poorly_covered",
                Level::Medium,
                "poorly_covered_count",
                format!(
                    "{} of {} listed units ({:.0}%) sit where the labeled set gives little \
                     support (unreachable at FDR {q}, a weight above every labeled weight, or \
                     e(x) > {}). Their place on the list rests on the model's extrapolation.",
                    o.poorly_covered_count,
                    o.listed_count,
                    share(o.poorly_covered_count),
                    POOL_PROBABILITY_LIMIT
                ),
            )
            .measured(o.poorly_covered_count as f64, 0.0)
            .titled("poorly covered"),
        );
    }
    if weights_vary && o.fdr_level_weighted > o.fdr_level_unweighted {
        warnings.push(
            Warning::new(
                "distorted_by_shift",
                Level::Medium,
                "fdr_level_weighted",
                format!(
                    "accounting for the shift, BH would need FDR level {} to select the whole \
                     list, against {} without weights.",
                    prose_number(o.fdr_level_weighted),
                    prose_number(o.fdr_level_unweighted)
                ),
            )
            .measured(o.fdr_level_weighted, o.fdr_level_unweighted)
            .titled("distorted by shift"),
        );
    }
    if o.survivors_count < o.listed_count {
        warnings.push(
            Warning::new(
                "not_surviving",
                Level::Low,
                "survivors_count",
                format!(
                    "{} of {} listed units ({:.0}%) are not selected by the weighted selection \
                     at FDR {q}.",
                    o.listed_count - o.survivors_count,
                    o.listed_count,
                    share(o.listed_count - o.survivors_count)
                ),
            )
            .measured(o.survivors_count as f64, o.listed_count as f64)
            .titled("not surviving"),
        );
    }
    warnings
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::conformal::score::Thresholds;
    use crate::selection::pipeline::Procedure;

    /// Hand example (design.md 2.2): 9 inactive labeled units with scores 0.1..0.9
    /// (threshold 1, predictions 0.9..0.1), pool predictions 1.5 (score -0.5), 0.95 (0.05)
    /// and 0.05 (0.95).
    #[test]
    fn unweighted_levels_by_hand() {
        let y = vec![0.0; 9];
        let mu: Vec<f64> = (1..=9).rev().map(|i| i as f64 / 10.0).collect();
        let pool = [1.5, 0.95, 0.05];
        let options = SelectOptions {
            fdr: 0.5,
            procedure: Procedure::Bh,
            pvalues: Some(crate::conformal::pvalue::PValueKind::Conservative),
            ..SelectOptions::default()
        };
        let o = audit_shortlist(
            &options,
            LabeledInput {
                outcome: &y,
                prediction: &mu,
                thresholds: Thresholds::Constant(1.0),
                weights: None,
            },
            PoolInput {
                prediction: &pool,
                thresholds: Thresholds::Constant(1.0),
                weights: None,
            },
            &[0, 1],
            None,
        )
        .unwrap();
        // p = (0 + 1)/10 = 0.1 and (0 + 1)/10 = 0.1 (score 0.05 < 0.1), third (9 + 1)/10 = 1.
        assert_eq!(o.units[0].p_value_unweighted, 0.1);
        assert_eq!(o.units[1].p_value_unweighted, 0.1);
        // BH-adjusted: sorted .1 .1 1 -> 3 * .1 / 2 = .15 for both.
        assert!((o.fdr_level_unweighted - 0.15).abs() < 1e-15);
        assert_eq!(o.fdr_level_unweighted, o.fdr_level_weighted);
        assert_eq!(o.survivors_count, 2);
        assert_eq!(o.poorly_covered_count, 0);
    }

    #[test]
    fn position_outside_pool_is_an_error() {
        let options = SelectOptions::default();
        let r = audit_shortlist(
            &options,
            LabeledInput {
                outcome: &[0.0; 20],
                prediction: &[0.1; 20],
                thresholds: Thresholds::Constant(1.0),
                weights: None,
            },
            PoolInput {
                prediction: &[0.5],
                thresholds: Thresholds::Constant(1.0),
                weights: None,
            },
            &[3],
            None,
        );
        assert!(matches!(r, Err(SelectError::LengthMismatch { .. })));
    }
}
