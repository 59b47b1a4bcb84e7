//! Covariate shift between the labeled set and the pool: a domain classifier, density-ratio
//! weights, shift diagnostics and warnings (design.md sections 2.5 and 2.6).
//!
//! Data flow for one call of [`assess_shift`]:
//! 1. choose the rows the classifier is fit on ([`FitRows`], optional pool sample) and give
//!    each class a sample weight so that the fitted probabilities refer to the full labeled
//!    set and the full pool (`weights`);
//! 2. standardize the features on those rows, drop constant columns, optionally add squares
//!    and pairwise products ([`Expansion`], `features`);
//! 3. fit an L2-penalized logistic regression, label 0 = labeled row, 1 = pool row, by damped
//!    Newton (`logistic`);
//! 4. predict e(x) = P(pool | x) for every row and turn it into the density-ratio weight
//!    w(x) = (n / m) e(x) / (1 - e(x)), optionally capped at a quantile (`weights`);
//! 5. diagnostics: cross-validated AUC with DeLong interval and permutation test, overlap,
//!    Kish ESS, Pareto k-hat (`psis`), balance (SMD) on the features and on their squares
//!    and products, weight quantiles, unreachable pool units (`diagnostics`);
//! 6. warnings with documented thresholds, worst first (`warnings`).
//!
//! The steps run in `assess` ([`assess_shift`]), with options from `options`
//! ([`ShiftParams`]). `weighting` decides where a run's weights come from (none, a given
//! column, or this fit) and which labeled rows calibrate.
//!
//! No I/O happens here: inputs are column-major slices, outputs are plain structs (the
//! summary structs implement `serde::Serialize`).

pub mod assess;
pub mod boosted;
pub mod diagnostics;
pub mod features;
pub mod logistic;
pub mod options;
pub mod psis;
pub mod reliability;
pub mod robust;
pub mod warnings;
pub mod weighting;
pub mod weights;

pub use assess::{
    assess_shift, assess_shift_with, FitSummary, RowResults, ShiftAssessment, ShiftSummary,
};
pub use diagnostics::{
    kish_effective_sample_size, roc_auc, standardized_mean_difference, AucEstimate, FeatureBalance,
};
pub use features::{Design, Expansion};
pub use logistic::{fit_logistic, FitReport, LogisticModel, LogisticParams, LogisticValidParams};
pub use options::{ClassifierKind, FitRows, ShiftOptions, ShiftParams};
pub use psis::pareto_khat;
pub use reliability::{unreliable_weights, Unreliable};
pub use robust::{ClipReport, FeatureTransform};
pub use warnings::{Severity, ShiftWarning};
pub use weights::CapReport;

/// Everything that can go wrong in the shift module. Each variant names the offending value.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum ShiftError {
    /// The feature buffer length does not match rows x features.
    #[error(
        "feature buffer has {len} values, expected {rows} rows x {features} features = {expected}"
    )]
    BufferLength {
        len: usize,
        rows: usize,
        features: usize,
        expected: usize,
    },
    /// A feature value is NaN or infinite.
    #[error("feature `{feature}` row {row} is not finite ({value})")]
    NonFinite {
        feature: String,
        row: usize,
        value: f64,
    },
    /// The labeled set and the pool have different feature names.
    #[error("labeled features {labeled:?} differ from pool features {pool:?}")]
    FeatureMismatch {
        labeled: Vec<String>,
        pool: Vec<String>,
    },
    /// No feature columns were given.
    #[error("at least one feature column is needed")]
    NoFeatures,
    /// Every feature column is constant on the fitting rows.
    #[error("every feature column is constant on the fitting rows: {dropped:?}")]
    AllConstant { dropped: Vec<String> },
    /// Too few rows in one set for the requested cross-validation or split.
    #[error("{set} has {rows} rows, need at least {needed} ({reason})")]
    TooFewRows {
        set: &'static str,
        rows: usize,
        needed: usize,
        reason: &'static str,
    },
    /// A numeric option is outside its valid range.
    #[error("{name} must be {expected}, got {value}")]
    InvalidOption {
        name: &'static str,
        expected: &'static str,
        value: f64,
    },
    /// The Hessian could not be factorized even after adding a ridge.
    #[error("Hessian is not positive definite at iteration {iteration} (pivot {pivot})")]
    NotPositiveDefinite { iteration: usize, pivot: usize },
    /// A weight vector for a diagnostic contains a negative or non-finite value.
    #[error("weight {index} is {value}; weights must be finite and >= 0")]
    InvalidWeight { index: usize, value: f64 },
    /// Labels for the classifier contained only one class.
    #[error(
        "the classifier needs both classes, got {positives} positives and {negatives} negatives"
    )]
    OneClass { positives: usize, negatives: usize },
    /// Error raised by linfa (dataset handling).
    #[error(transparent)]
    Linfa(#[from] linfa::Error),
}

/// Read-only view of a column-major feature table: the value of feature `f` at row `r` is
/// `values[f * n_rows + r]`.
#[derive(Debug, Clone, Copy)]
pub struct FeatureView<'a> {
    values: &'a [f64],
    n_rows: usize,
    names: &'a [String],
}

impl<'a> FeatureView<'a> {
    /// Wrap a column-major buffer.
    ///
    /// # Errors
    /// [`ShiftError::BufferLength`] when `values.len() != n_rows * names.len()`,
    /// [`ShiftError::NoFeatures`] when `names` is empty, [`ShiftError::NonFinite`] for a NaN or
    /// infinite value (missing data must be handled before this point, explicitly).
    pub fn new(values: &'a [f64], n_rows: usize, names: &'a [String]) -> Result<Self, ShiftError> {
        if names.is_empty() {
            return Err(ShiftError::NoFeatures);
        }
        let expected = n_rows * names.len();
        if values.len() != expected {
            return Err(ShiftError::BufferLength {
                len: values.len(),
                rows: n_rows,
                features: names.len(),
                expected,
            });
        }
        if let Some(pos) = values.iter().position(|v| !v.is_finite()) {
            return Err(ShiftError::NonFinite {
                feature: names[pos / n_rows.max(1)].clone(),
                row: pos % n_rows.max(1),
                value: values[pos],
            });
        }
        Ok(Self {
            values,
            n_rows,
            names,
        })
    }

    /// Number of rows.
    pub fn n_rows(&self) -> usize {
        self.n_rows
    }

    /// Number of feature columns.
    pub fn n_features(&self) -> usize {
        self.names.len()
    }

    /// Feature names in column order.
    pub fn names(&self) -> &'a [String] {
        self.names
    }

    /// One feature column (contiguous).
    pub fn column(&self, feature: usize) -> &'a [f64] {
        &self.values[feature * self.n_rows..(feature + 1) * self.n_rows]
    }
}

/// Shared tolerances and small helpers for this module's tests.
#[cfg(test)]
pub(crate) mod test_support {
    /// Draw `rows x features` standard normals (column-major) shifted by `mean` and scaled
    /// by `scale` per feature, from a seeded generator.
    pub fn normal_table(rows: usize, mean: &[f64], scale: &[f64], seed: u64) -> Vec<f64> {
        use rand::SeedableRng;
        use rand_distr::{Distribution, StandardNormal};
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(seed);
        let mut out = Vec::with_capacity(rows * mean.len());
        for f in 0..mean.len() {
            for _ in 0..rows {
                let z: f64 = StandardNormal.sample(&mut rng);
                out.push(mean[f] + scale[f] * z);
            }
        }
        out
    }

    /// Feature names x0, x1, ...
    pub fn names(count: usize) -> Vec<String> {
        (0..count).map(|i| format!("x{i}")).collect()
    }
}
