//! Are fitted weights reliable enough to select with? (design.md 2.9)
//!
//! Three diagnostics, and only these, say that fitted weights extrapolate rather than
//! estimate, so that a weighted selection on them has no FDR control worth the name:
//!
//! * Pareto k-hat of the calibrating labeled weights above its sample-size threshold
//!   min(1 - 1/log10(S), 0.7) (Vehtari, Simpson, Gelman, Yao & Gabry 2024, PSIS): the weight
//!   tail is so heavy that weighted averages do not settle;
//! * Kish effective sample size below [`ESS_FRACTION_FLOOR`] of the calibrating rows (Kish
//!   1965): a handful of labeled rows carry the whole calibration;
//! * cross-validated domain-classifier AUC above [`AUC_NO_OVERLAP`]: the sets barely overlap,
//!   so most of the pool has no labeled neighbour at all.
//!
//! Balance and weight-model adequacy diagnostics stay warnings: they say the weights may be
//! biased, not that they are degenerate, and a user can act on them (more features, squares).
//!
//! The floors were chosen from the calibration-check simulations recorded in
//! docs/validation.md ("Refusing degenerate fitted weights"): at q = 0.2, replicates past any
//! of them had realized conditional-calibration FDR 0.24 (0.30 below the ESS floor, against
//! 0.07-0.11 for ESS between 2% and 10%), the others 0.12.
//!
//! Given weights are never judged here: with the true density ratio the guarantee holds
//! whatever its effective sample size.

use serde::Serialize;

use super::ShiftSummary;

/// Kish ESS below this share of the calibrating rows makes fitted weights unreliable. Our
/// choice from simulation (docs/validation.md); the softer warning stays at
/// [`super::warnings::ESS_FRACTION_LOW`].
pub const ESS_FRACTION_FLOOR: f64 = 0.02;

/// Cross-validated AUC above this means no overlap between the sets. Our choice from
/// simulation (docs/validation.md); the softer warning stays at
/// [`super::warnings::AUC_HIGH`].
pub const AUC_NO_OVERLAP: f64 = 0.99;

/// What to try when fitted weights are refused, in plain words.
pub const REMEDIES: &str = "more or fewer --features (a feature that separates the sets \
completely makes weights explode), --classifier boosted for a shift a linear model cannot \
describe, assaying a calibration batch drawn from the pool with known probabilities, or \
trimming the pool to the region the labeled set covers; --allow-unreliable-weights runs anyway \
and marks every output";

/// One reason why fitted weights are unreliable.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Unreliable {
    /// Diagnostic name, as in the warnings (`khat`, `ess_fraction`, `auc`).
    pub diagnostic: String,
    /// Its value on this run.
    pub value: f64,
    /// The threshold it crossed.
    pub threshold: f64,
    /// Plain words.
    pub message: String,
}

/// The reasons, worst first, why the fitted weights of `s` are unreliable; empty when
/// they can be used.
///
/// A k-hat that could not be estimated (4 or fewer tail values: infinite) counts as
/// unreliable only when there are enough rows for the estimate to mean something; with
/// very few calibrating rows the ESS floor decides.
pub fn unreliable_weights(s: &ShiftSummary) -> Vec<Unreliable> {
    let mut out = Vec::new();
    let khat_exceeds = matches!(
        s.khat.partial_cmp(&s.khat_threshold),
        Some(std::cmp::Ordering::Greater) | None
    );
    if khat_exceeds && s.calibration_rows >= 25 {
        out.push(Unreliable {
            diagnostic: "khat".into(),
            value: s.khat,
            threshold: s.khat_threshold,
            message: format!(
                "Pareto k-hat of the labeled weights is {} (threshold {:.2}): a few labeled rows \
                 carry weights so large that the weighted p-values do not settle",
                if s.khat.is_finite() {
                    format!("{:.2}", s.khat)
                } else {
                    "not estimable (infinite)".to_string()
                },
                s.khat_threshold
            ),
        });
    }
    if s.ess_fraction.is_nan() || s.ess_fraction < ESS_FRACTION_FLOOR {
        out.push(Unreliable {
            diagnostic: "ess_fraction".into(),
            value: s.ess_fraction,
            threshold: ESS_FRACTION_FLOOR,
            message: format!(
                "the labeled weights are worth {} of {} calibrating rows ({}, floor {}%): the \
                 calibration rests on a handful of rows",
                two_significant(s.ess),
                s.calibration_rows,
                percent_two_significant(s.ess_fraction),
                100.0 * ESS_FRACTION_FLOOR
            ),
        });
    }
    if s.auc.is_nan() || s.auc > AUC_NO_OVERLAP {
        out.push(Unreliable {
            diagnostic: "auc".into(),
            value: s.auc,
            threshold: AUC_NO_OVERLAP,
            message: format!(
                "the domain classifier separates labeled from pool rows with cross-validated \
                 AUC {:.3} (threshold {AUC_NO_OVERLAP}): the sets barely overlap, so the weights \
                 extrapolate to pool rows unlike any labeled row",
                s.auc
            ),
        });
    }
    out
}

/// A number with two significant digits (`0.0071`, `14`, `2300`); `0` and non-finite as such.
pub fn two_significant(v: f64) -> String {
    if !v.is_finite() || v == 0.0 {
        return format!("{v}");
    }
    let magnitude = v.abs().log10().floor() as i32;
    if magnitude >= 1 {
        let scale = 10f64.powi(magnitude - 1);
        format!("{}", (v / scale).round() * scale)
    } else {
        let digits = (1 - magnitude) as usize;
        format!("{v:.digits$}")
    }
}

/// A share as a percentage with two significant digits (`0.71%`, `14%`), never `0%` for a
/// positive share.
pub fn percent_two_significant(share: f64) -> String {
    format!("{}%", two_significant(100.0 * share))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn two_significant_digits() {
        assert_eq!(two_significant(0.0071234), "0.0071");
        assert_eq!(two_significant(0.7), "0.70");
        assert_eq!(two_significant(14.2), "14");
        assert_eq!(two_significant(2345.0), "2300");
        assert_eq!(two_significant(0.0), "0");
        assert_eq!(percent_two_significant(0.00712), "0.71%");
        assert_eq!(percent_two_significant(0.5), "50%");
        assert_eq!(percent_two_significant(0.000_04), "0.0040%");
    }
}
