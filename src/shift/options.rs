//! Options of the shift assessment: which rows the classifier is fit on ([`FitRows`]), the
//! unchecked builder [`ShiftParams`] with its documented defaults, and the validated
//! [`ShiftOptions`] that [`assess_shift`](super::assess_shift) takes.

use linfa::ParamGuard;
use serde::Serialize;

use super::{Expansion, LogisticParams, LogisticValidParams, ShiftError};

/// Which rows the domain classifier is fit on.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
#[serde(rename_all = "snake_case", tag = "mode")]
pub enum FitRows {
    /// All labeled rows and all pool rows (or the pool sample). Practical; the weights then
    /// depend on the calibration rows, which the exact guarantee does not cover.
    All,
    /// A seeded random fraction of the labeled rows plus the same fraction of the pool. Those
    /// labeled rows are used for fitting only and do not calibrate.
    HeldOut {
        /// Fraction of labeled rows (and of pool rows) used for fitting, in (0, 1).
        labeled_fraction: f64,
    },
}

/// Which domain classifier estimates e(x) = P(pool | x).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Default)]
#[serde(rename_all = "snake_case")]
pub enum ClassifierKind {
    /// L2-penalized logistic regression on the standardized (optionally expanded) features.
    #[default]
    Logistic,
    /// Cross-fitted gradient-boosted trees ([`super::boosted`]): out-of-fold log-odds for
    /// every fitting row, the mean of the fold models for the other rows.
    Boosted,
}

/// Unchecked options for [`assess_shift`](super::assess_shift); call [`ParamGuard::check`]
/// (or pass to [`assess_shift_with`](super::assess_shift_with)) to validate. Setters state their defaults.
#[derive(Debug, Clone, PartialEq)]
pub struct ShiftParams(ShiftOptions);

/// Validated options for [`assess_shift`](super::assess_shift). Obtain through [`ShiftParams`].
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ShiftOptions {
    pub(super) classifier: LogisticValidParams,
    pub(super) classifier_kind: ClassifierKind,
    pub(super) boosted: Box<super::boosted::BoostedParams>,
    pub(super) expansion: Expansion,
    pub(super) feature_transform: super::FeatureTransform,
    pub(super) fit_rows: FitRows,
    pub(super) cap_quantile: Option<f64>,
    pub(super) max_pool_sample: Option<usize>,
    pub(super) cv_folds: usize,
    pub(super) cv_max_rows: Option<usize>,
    pub(super) permutations: usize,
    pub(super) seed: u64,
    pub(super) fdr: f64,
    pub(super) histogram_bins: usize,
}

impl Default for ShiftParams {
    fn default() -> Self {
        Self(ShiftOptions {
            classifier: LogisticParams::default().check_unwrap(),
            classifier_kind: ClassifierKind::Logistic,
            boosted: Box::default(),
            expansion: Expansion::None,
            feature_transform: super::FeatureTransform::Clip,
            fit_rows: FitRows::All,
            cap_quantile: None,
            max_pool_sample: None,
            cv_folds: 5,
            cv_max_rows: Some(200_000),
            permutations: 1000,
            seed: 1,
            fdr: 0.1,
            histogram_bins: 20,
        })
    }
}

impl ShiftParams {
    /// Defaults as documented on each setter.
    pub fn new() -> Self {
        Self::default()
    }
    /// L2 penalty alpha on the standardized slopes (loss summed over rows, intercept
    /// unpenalized; scikit-learn C = 1 / alpha). Defaults to 1.0 (scikit-learn's default C).
    pub fn alpha(mut self, alpha: f64) -> Self {
        self.0.classifier = LogisticValidParams {
            alpha,
            ..self.0.classifier
        };
        self
    }
    /// Newton stopping tolerance on the infinity norm of the gradient of the mean loss.
    /// Defaults to 1e-8.
    pub fn tolerance(mut self, tolerance: f64) -> Self {
        self.0.classifier.tolerance = tolerance;
        self
    }
    /// Maximum Newton iterations. Defaults to 100.
    pub fn max_iterations(mut self, max_iterations: usize) -> Self {
        self.0.classifier.max_iterations = max_iterations;
        self
    }
    /// Extra classifier features. Defaults to [`Expansion::None`].
    pub fn expansion(mut self, expansion: Expansion) -> Self {
        self.0.expansion = expansion;
        self
    }
    /// The domain classifier. Defaults to [`ClassifierKind::Logistic`]. With
    /// [`ClassifierKind::Boosted`] the expansion is not used for the fit (trees find
    /// squares and interactions themselves) and the boosted trees' settings come from
    /// [`ShiftParams::boosted`]; their seed and folds follow [`ShiftParams::seed`] and
    /// [`ShiftParams::cv_folds`].
    pub fn classifier_kind(mut self, kind: ClassifierKind) -> Self {
        self.0.classifier_kind = kind;
        self
    }
    /// Settings of the boosted trees (used with [`ClassifierKind::Boosted`]). Defaults to
    /// [`super::boosted::BoostedParams::default`].
    pub fn boosted(mut self, params: super::boosted::BoostedParams) -> Self {
        self.0.boosted = Box::new(params);
        self
    }
    /// How features are made robust before the fit and the balance diagnostics
    /// ([`super::robust`]). Defaults to [`super::FeatureTransform::Clip`].
    pub fn feature_transform(mut self, transform: super::FeatureTransform) -> Self {
        self.0.feature_transform = transform;
        self
    }
    /// Rows the classifier is fit on. Defaults to [`FitRows::All`].
    pub fn fit_rows(mut self, fit_rows: FitRows) -> Self {
        self.0.fit_rows = fit_rows;
        self
    }
    /// Cap weights at this quantile (type 7) of all fitted weights, in (0, 1]. Defaults to
    /// `None` (no capping). Capping is always reported.
    pub fn cap_quantile(mut self, quantile: Option<f64>) -> Self {
        self.0.cap_quantile = quantile;
        self
    }
    /// Fit on a seeded random sample of at most this many pool rows (class ratio corrected by
    /// sample weights), predict on all. Defaults to `None` (all pool rows).
    pub fn max_pool_sample(mut self, rows: Option<usize>) -> Self {
        self.0.max_pool_sample = rows;
        self
    }
    /// Folds for the cross-validated AUC. Defaults to 5.
    pub fn cv_folds(mut self, folds: usize) -> Self {
        self.0.cv_folds = folds;
        self
    }
    /// Cross-validate on a seeded random subset of at most this many fitting rows (the
    /// smaller set kept whole up to half of it). Defaults to `Some(200_000)`.
    pub fn cv_max_rows(mut self, rows: Option<usize>) -> Self {
        self.0.cv_max_rows = rows;
        self
    }
    /// Label permutations for the "no shift" test. Defaults to 1000.
    pub fn permutations(mut self, permutations: usize) -> Self {
        self.0.permutations = permutations;
        self
    }
    /// Seed of every random choice (splits, samples, folds, permutations). Defaults to 1.
    pub fn seed(mut self, seed: u64) -> Self {
        self.0.seed = seed;
        self
    }
    /// Target FDR level q, used to count unreachable pool units. Defaults to 0.1.
    pub fn fdr(mut self, fdr: f64) -> Self {
        self.0.fdr = fdr;
        self
    }
    /// Bins of the e(x) overlap histograms on [0, 1]. Defaults to 20.
    pub fn histogram_bins(mut self, bins: usize) -> Self {
        self.0.histogram_bins = bins;
        self
    }
}

fn invalid(name: &'static str, expected: &'static str, value: f64) -> ShiftError {
    ShiftError::InvalidOption {
        name,
        expected,
        value,
    }
}

impl ParamGuard for ShiftParams {
    type Checked = ShiftOptions;
    type Error = ShiftError;

    fn check_ref(&self) -> Result<&ShiftOptions, ShiftError> {
        let o = &self.0;
        LogisticParams(o.classifier.clone()).check_ref()?;
        if let FitRows::HeldOut { labeled_fraction } = o.fit_rows {
            if !(labeled_fraction > 0.0 && labeled_fraction < 1.0) {
                return Err(invalid("labeled_fraction", "in (0, 1)", labeled_fraction));
            }
        }
        if let Some(q) = o.cap_quantile {
            if !(q > 0.0 && q <= 1.0) {
                return Err(invalid("cap_quantile", "in (0, 1]", q));
            }
        }
        if let Some(m) = o.max_pool_sample {
            if m < 2 {
                return Err(invalid("max_pool_sample", "at least 2", m as f64));
            }
        }
        if o.cv_folds < 2 {
            return Err(invalid("cv_folds", "at least 2", o.cv_folds as f64));
        }
        if let Some(m) = o.cv_max_rows {
            if m < 4 * o.cv_folds {
                return Err(invalid("cv_max_rows", "at least 4 x cv_folds", m as f64));
            }
        }
        if o.permutations < 1 {
            return Err(invalid("permutations", "at least 1", 0.0));
        }
        if !(o.fdr > 0.0 && o.fdr <= 1.0) {
            return Err(invalid("fdr", "in (0, 1]", o.fdr));
        }
        if o.histogram_bins < 1 {
            return Err(invalid("histogram_bins", "at least 1", 0.0));
        }
        Ok(o)
    }

    fn check(self) -> Result<ShiftOptions, ShiftError> {
        self.check_ref()?;
        Ok(self.0)
    }
}

impl ShiftOptions {
    /// Classifier settings (penalty, tolerance, iterations).
    pub fn classifier(&self) -> &LogisticValidParams {
        &self.classifier
    }
    /// Feature expansion.
    pub fn expansion(&self) -> Expansion {
        self.expansion
    }
    /// The domain classifier.
    pub fn classifier_kind(&self) -> ClassifierKind {
        self.classifier_kind
    }
    /// Feature transform.
    pub fn feature_transform(&self) -> super::FeatureTransform {
        self.feature_transform
    }
    /// Fitting rows.
    pub fn fit_rows(&self) -> FitRows {
        self.fit_rows
    }
    /// Capping quantile.
    pub fn cap_quantile(&self) -> Option<f64> {
        self.cap_quantile
    }
    /// Pool sample size for fitting.
    pub fn max_pool_sample(&self) -> Option<usize> {
        self.max_pool_sample
    }
    /// Cross-validation folds.
    pub fn cv_folds(&self) -> usize {
        self.cv_folds
    }
    /// Row cap for cross-validation.
    pub fn cv_max_rows(&self) -> Option<usize> {
        self.cv_max_rows
    }
    /// Number of permutations.
    pub fn permutations(&self) -> usize {
        self.permutations
    }
    /// Seed.
    pub fn seed(&self) -> u64 {
        self.seed
    }
    /// FDR level q.
    pub fn fdr(&self) -> f64 {
        self.fdr
    }
    /// Histogram bins.
    pub fn histogram_bins(&self) -> usize {
        self.histogram_bins
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::shift::test_support::names;
    use crate::shift::FeatureView;

    #[test]
    fn options_are_validated_once() {
        let bad = [
            ShiftParams::new().alpha(-1.0),
            ShiftParams::new().fdr(1.5),
            ShiftParams::new().cv_folds(1),
            ShiftParams::new().cap_quantile(Some(0.0)),
            ShiftParams::new().fit_rows(FitRows::HeldOut {
                labeled_fraction: 1.0,
            }),
            ShiftParams::new().max_pool_sample(Some(1)),
        ];
        for p in bad {
            assert!(matches!(p.check(), Err(ShiftError::InvalidOption { .. })));
        }
        let nm = names(1);
        let err = FeatureView::new(&[1.0, f64::NAN], 2, &nm).unwrap_err();
        assert!(matches!(err, ShiftError::NonFinite { row: 1, .. }));
    }
}
