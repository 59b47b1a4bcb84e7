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
//!    Kish ESS, Pareto k-hat, balance (SMD) on the features and on their squares and
//!    products, weight quantiles, unreachable pool units (`diagnostics`);
//! 6. warnings with documented thresholds, worst first (`warnings`).
//!
//! No I/O happens here: inputs are column-major slices, outputs are plain structs (the
//! summary structs implement `serde::Serialize`).

pub mod diagnostics;
pub mod features;
pub mod logistic;
pub mod warnings;
pub mod weights;

use linfa::ParamGuard;
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use serde::Serialize;

pub use diagnostics::{
    kish_effective_sample_size, pareto_khat, roc_auc, standardized_mean_difference, AucEstimate,
    FeatureBalance,
};
pub use features::{Design, Expansion};
pub use logistic::{fit_logistic, FitReport, LogisticModel, LogisticParams, LogisticValidParams};
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

/// Unchecked options for [`assess_shift`]; call [`ParamGuard::check`] (or pass to
/// [`assess_shift_with`]) to validate. Setters state their defaults.
#[derive(Debug, Clone, PartialEq)]
pub struct ShiftParams(ShiftOptions);

/// Validated options for [`assess_shift`]. Obtain through [`ShiftParams`].
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ShiftOptions {
    classifier: LogisticValidParams,
    expansion: Expansion,
    fit_rows: FitRows,
    cap_quantile: Option<f64>,
    max_pool_sample: Option<usize>,
    cv_folds: usize,
    cv_max_rows: Option<usize>,
    permutations: usize,
    seed: u64,
    fdr: f64,
    histogram_bins: usize,
}

impl Default for ShiftParams {
    fn default() -> Self {
        Self(ShiftOptions {
            classifier: LogisticParams::default().check_unwrap(),
            expansion: Expansion::None,
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

/// Per-row results for one set (labeled or pool), in input row order.
#[derive(Debug, Clone, PartialEq)]
pub struct RowResults {
    /// e(x) = P(pool | x) at the real set sizes (n labeled, m pool rows).
    pub pool_probability: Vec<f64>,
    /// Density-ratio weight w(x) = (n / m) e(x) / (1 - e(x)) after capping (if any).
    pub weight: Vec<f64>,
    /// True for rows in the classifier's fitting sample.
    pub in_fit: Vec<bool>,
}

/// The classifier fit as reported in shift.json.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct FitSummary {
    /// Solver report (iterations, gradient norm, convergence, loss).
    #[serde(flatten)]
    pub report: FitReport,
    /// Penalty alpha (scikit-learn C = 1 / alpha).
    pub alpha: f64,
    /// Expansion used.
    pub expansion: Expansion,
    /// Fitting rows mode.
    pub fit_rows: FitRows,
    /// Labeled rows in the fit.
    pub labeled_rows_fit: usize,
    /// Pool rows in the fit.
    pub pool_rows_fit: usize,
    /// Sample weight given to each fitted labeled row (n / labeled rows fit).
    pub labeled_sample_weight: f64,
    /// Sample weight given to each fitted pool row (m / pool rows fit).
    pub pool_sample_weight: f64,
    /// Columns (input or expanded) dropped because they were constant on the fitting rows.
    pub dropped_constant_columns: Vec<String>,
    /// Model terms, in coefficient order after the intercept.
    pub terms: Vec<String>,
    /// Intercept then one coefficient per term, on the standardized scale.
    pub coefficients: Vec<f64>,
    /// Newton tolerance the convergence flag refers to.
    pub tolerance: f64,
    /// Rows whose log-weight was clamped to +-[`weights::LOG_WEIGHT_LIMIT`] to stay finite.
    pub clamped_weights: usize,
}

/// Every number [`assess_shift`] reports; serialized as shift.json's body.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ShiftSummary {
    /// Cross-validated domain-classifier AUC (pool = positive class).
    pub auc: f64,
    /// 95% DeLong interval for the AUC, clipped to [0, 1].
    pub auc_ci: [f64; 2],
    /// Permutation p-value of "no shift".
    pub permutation_p: f64,
    /// Kish effective sample size of the calibration weights.
    pub ess: f64,
    /// ESS / number of calibration rows.
    pub ess_fraction: f64,
    /// Pareto k-hat of the calibration weights (PSIS). Infinite (JSON null) when the tail
    /// has 4 or fewer values.
    pub khat: f64,
    /// Sample-size dependent k-hat threshold min(1 - 1/log10(S), 0.7).
    pub khat_threshold: f64,
    /// Pool units with w_j / (W + w_j) > q: never selectable at level q.
    pub unreachable_count: usize,
    /// The level q used for `unreachable_count`.
    pub fdr: f64,
    /// Did the classifier's Newton solver converge.
    pub converged: bool,
    /// Newton iterations of the main fit.
    pub iterations: usize,
    /// Warnings, worst first.
    pub warnings: Vec<ShiftWarning>,
    /// Labeled rows used for calibration (not used for fitting only).
    pub calibration_rows: usize,
    /// Pool rows.
    pub pool_rows: usize,
    /// Classifier fit details.
    pub fit: FitSummary,
    /// AUC details (cross-validation, interval, permutation test).
    pub auc_details: diagnostics::AucSummary,
    /// Weight summary (constant, capping, quantiles, largest share).
    pub weights: weights::WeightSummary,
    /// Overlap of e(x) between the sets.
    pub overlap: diagnostics::Overlap,
    /// SMD per input feature, unweighted and weighted.
    pub balance: Vec<FeatureBalance>,
    /// |weighted SMD| above which an input feature is flagged: 0.1 (Austin 2009) or the
    /// sampling-noise bound [`warnings::smd_threshold`] when larger.
    pub smd_threshold: f64,
    /// Weighted balance on squared and pairwise-product features (weight-model adequacy).
    pub adequacy: diagnostics::Adequacy,
}

/// Result of [`assess_shift`]: per-row values and the summary.
#[derive(Debug, Clone, PartialEq)]
pub struct ShiftAssessment {
    /// Labeled rows, in input order.
    pub labeled: RowResults,
    /// Per labeled row: may it calibrate? False only for the fitting rows in
    /// [`FitRows::HeldOut`] mode. Diagnostics use the calibrating rows only.
    pub labeled_calibrates: Vec<bool>,
    /// Pool rows, in input order.
    pub pool: RowResults,
    /// Diagnostics, fit report, warnings.
    pub summary: ShiftSummary,
}

/// Validate `params` and run [`assess_shift`].
///
/// # Errors
/// As [`ParamGuard::check`] and [`assess_shift`].
pub fn assess_shift_with(
    labeled: FeatureView<'_>,
    pool: FeatureView<'_>,
    params: ShiftParams,
) -> Result<ShiftAssessment, ShiftError> {
    let options = params.check()?;
    assess_shift(labeled, pool, &options)
}

/// Fit the domain classifier, derive weights, compute every diagnostic and the warnings.
///
/// # Cost
/// Memory: the fitting matrix, (fitting rows) x (1 + terms) doubles (270 MB for 10^6 rows
/// x 32 features; squares double the terms, pairwise products multiply them by about
/// d / 2, so use `max_pool_sample` with them), plus a few vectors per row. Time on 2 cores
/// for 10^6 pool + 2 x 10^4 labeled rows x 32 features: fit 1.2-2.8 s, whole call 4-6 s
/// (see `examples/bench_fit.rs`).
///
/// # Errors
/// [`ShiftError::FeatureMismatch`] when the two views have different feature names,
/// [`ShiftError::TooFewRows`] when a set is too small for the folds or the split,
/// [`ShiftError::AllConstant`] when no feature varies, solver failures.
///
/// # Examples
/// ```
/// use weighbridge::shift::{assess_shift_with, FeatureView, ShiftParams};
/// let names = vec!["x".to_string()];
/// let labeled: Vec<f64> = (0..40).map(|i| (i as f64 * 0.37).sin()).collect();
/// let pool: Vec<f64> = (0..40).map(|i| (i as f64 * 0.53).cos() + 0.5).collect();
/// let a = assess_shift_with(
///     FeatureView::new(&labeled, 40, &names).unwrap(),
///     FeatureView::new(&pool, 40, &names).unwrap(),
///     ShiftParams::new().permutations(99),
/// )
/// .unwrap();
/// assert!(a.labeled.weight.iter().all(|w| w.is_finite() && *w > 0.0));
/// assert!(a.summary.auc > 0.5);
/// ```
pub fn assess_shift(
    labeled: FeatureView<'_>,
    pool: FeatureView<'_>,
    options: &ShiftOptions,
) -> Result<ShiftAssessment, ShiftError> {
    if labeled.names() != pool.names() {
        return Err(ShiftError::FeatureMismatch {
            labeled: labeled.names().to_vec(),
            pool: pool.names().to_vec(),
        });
    }
    let n = labeled.n_rows();
    let m = pool.n_rows();
    let folds = options.cv_folds;
    let needed_labeled = match options.fit_rows {
        FitRows::All => folds,
        FitRows::HeldOut { labeled_fraction } => {
            // Enough rows that the fitting part has `folds` rows and calibration has one.
            ((folds as f64 / labeled_fraction).ceil() as usize).max(folds + 1)
        }
    };
    if n < needed_labeled {
        return Err(ShiftError::TooFewRows {
            set: "labeled set",
            rows: n,
            needed: needed_labeled,
            reason: "cross-validation folds and the fitting split",
        });
    }
    if m < folds {
        return Err(ShiftError::TooFewRows {
            set: "pool",
            rows: m,
            needed: folds,
            reason: "one pool row per cross-validation fold",
        });
    }

    let mut rng = ChaCha8Rng::seed_from_u64(options.seed);
    let rows = weights::choose_fit_rows(n, m, options, &mut rng);
    let design = Design::build(labeled, pool, &rows.labeled, &rows.pool, options.expansion)?;
    let labels: Vec<bool> = (0..rows.labeled.len())
        .map(|_| false)
        .chain((0..rows.pool.len()).map(|_| true))
        .collect();
    let sample_weights: Vec<f64> = (0..rows.labeled.len())
        .map(|_| rows.labeled_sample_weight)
        .chain((0..rows.pool.len()).map(|_| rows.pool_sample_weight))
        .collect();
    let model = fit_logistic(
        design.fit_matrix(),
        design.n_fit_rows(),
        &labels,
        Some(&sample_weights),
        &options.classifier,
    )?;

    let labeled_eta = design.linear_predictor(labeled, model.coefficients());
    let pool_eta = design.linear_predictor(pool, model.coefficients());
    let mut fitted = weights::weights_from_linear_predictor(&labeled_eta, &pool_eta, n, m);
    let labeled_in_fit = weights::row_mask(n, &rows.labeled);
    let pool_in_fit = weights::row_mask(m, &rows.pool);
    let labeled_calibrates: Vec<bool> = match options.fit_rows {
        FitRows::All => vec![true; n],
        FitRows::HeldOut { .. } => labeled_in_fit.iter().map(|used| !used).collect(),
    };
    let calibration: Vec<usize> = (0..n).filter(|&i| labeled_calibrates[i]).collect();
    let cap = options
        .cap_quantile
        .map(|q| weights::cap_weights(&mut fitted, &calibration, q));

    let auc_details = diagnostics::cross_validated_auc(
        &design,
        model.coefficients(),
        &labels,
        &rows,
        (n, m),
        options,
        &mut rng,
    )?;
    let cal_weights: Vec<f64> = calibration
        .iter()
        .map(|&i| fitted.labeled_weight[i])
        .collect();
    let ess = kish_effective_sample_size(&cal_weights)?;
    let n_cal = cal_weights.len();
    let log_w: Vec<f64> = cal_weights.iter().map(|w| w.ln()).collect();
    let khat = pareto_khat(&log_w)?;
    let khat_threshold = diagnostics::khat_threshold(n_cal);
    let total_w: f64 = cal_weights.iter().sum();
    let unreachable_count =
        diagnostics::unreachable_count(&fitted.pool_weight, total_w, options.fdr);
    let overlap = diagnostics::overlap(
        &calibration
            .iter()
            .map(|&i| fitted.labeled_balanced[i])
            .collect::<Vec<_>>(),
        &fitted.pool_balanced,
        options.histogram_bins,
    );
    let balance = diagnostics::feature_balance(labeled, pool, &calibration, &cal_weights)?;
    let adequacy = diagnostics::adequacy(&design, labeled, pool, &calibration, &cal_weights);
    let weight_summary = weights::summarize(&cal_weights, &fitted.pool_weight, n, m, cap);

    let fit = FitSummary {
        report: model.report().clone(),
        alpha: options.classifier.alpha,
        tolerance: options.classifier.tolerance,
        expansion: options.expansion,
        fit_rows: options.fit_rows,
        labeled_rows_fit: rows.labeled.len(),
        pool_rows_fit: rows.pool.len(),
        labeled_sample_weight: rows.labeled_sample_weight,
        pool_sample_weight: rows.pool_sample_weight,
        dropped_constant_columns: design.dropped().to_vec(),
        terms: design.term_names(),
        coefficients: model.coefficients().to_vec(),
        clamped_weights: fitted.clamped,
    };
    let mut summary = ShiftSummary {
        auc: auc_details.auc,
        auc_ci: auc_details.ci,
        permutation_p: auc_details.permutation_p,
        ess,
        ess_fraction: ess / n_cal as f64,
        khat,
        khat_threshold,
        unreachable_count,
        fdr: options.fdr,
        converged: fit.report.converged,
        iterations: fit.report.iterations,
        warnings: Vec::new(),
        calibration_rows: n_cal,
        pool_rows: m,
        fit,
        auc_details,
        weights: weight_summary,
        overlap,
        smd_threshold: warnings::smd_threshold(warnings::SMD_HIGH, ess, m, balance.len()),
        balance,
        adequacy,
    };
    summary.warnings = warnings::collect(&summary);

    Ok(ShiftAssessment {
        labeled: RowResults {
            pool_probability: fitted.labeled_probability,
            weight: fitted.labeled_weight,
            in_fit: labeled_in_fit,
        },
        labeled_calibrates,
        pool: RowResults {
            pool_probability: fitted.pool_probability,
            weight: fitted.pool_weight,
            in_fit: pool_in_fit,
        },
        summary,
    })
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

#[cfg(test)]
mod tests {
    use super::test_support::{names, normal_table};
    use super::*;

    fn run(
        lab: &[f64],
        n: usize,
        pool: &[f64],
        m: usize,
        nm: &[String],
        params: ShiftParams,
    ) -> ShiftAssessment {
        assess_shift_with(
            FeatureView::new(lab, n, nm).unwrap(),
            FeatureView::new(pool, m, nm).unwrap(),
            params,
        )
        .unwrap()
    }

    fn diagnostics_named(a: &ShiftAssessment) -> Vec<&str> {
        a.summary
            .warnings
            .iter()
            .map(|w| w.diagnostic.as_str())
            .collect()
    }

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

    #[test]
    fn no_shift_gives_no_warnings() {
        // Same distribution in both sets: the AUC interval should cover 0.5, the
        // permutation test should not reject, and no threshold should be crossed
        // (statistical fact; one seeded draw).
        let nm = names(4);
        let lab = normal_table(3000, &[0.0; 4], &[1.0; 4], 21);
        let pool = normal_table(3000, &[0.0; 4], &[1.0; 4], 22);
        let a = run(
            &lab,
            3000,
            &pool,
            3000,
            &nm,
            ShiftParams::new().permutations(199),
        );
        let s = &a.summary;
        assert!(s.auc_ci[0] <= 0.5 && 0.5 <= s.auc_ci[1], "{:?}", s.auc_ci);
        assert!(s.permutation_p > 0.05, "{}", s.permutation_p);
        assert!(s.warnings.is_empty(), "{:#?}", s.warnings);
        assert!(s.converged);
        assert!(s.ess_fraction > 0.95);
        // No shift: weights near 1 (density ratio scale).
        assert!((s.weights.labeled_quantiles[4] - 1.0).abs() < 0.1);
    }

    #[test]
    fn many_product_features_without_shift_do_not_warn() {
        // 32 features give 528 squares and products; with n = m = 2000 and no shift the
        // largest |SMD| among them crosses 0.1 by noise alone, which the noise-aware bound
        // must absorb (statistical fact; one seeded draw).
        let nm = names(32);
        let lab = normal_table(2000, &[0.0; 32], &[1.0; 32], 91);
        let pool = normal_table(2000, &[0.0; 32], &[1.0; 32], 92);
        let a = run(
            &lab,
            2000,
            &pool,
            2000,
            &nm,
            ShiftParams::new().permutations(99),
        );
        assert!(a.summary.adequacy.max_abs_weighted_products > 0.1);
        assert!(a.summary.warnings.is_empty(), "{:#?}", a.summary.warnings);
    }

    #[test]
    fn extreme_shift_warns_and_weights_stay_finite() {
        let nm = names(3);
        let lab = normal_table(1500, &[0.0; 3], &[1.0; 3], 31);
        let pool = normal_table(1500, &[4.0, 0.0, 0.0], &[1.0; 3], 32);
        let a = run(
            &lab,
            1500,
            &pool,
            1500,
            &nm,
            ShiftParams::new().permutations(99),
        );
        let found = diagnostics_named(&a);
        for expected in ["auc", "ess_fraction", "khat", "unreachable_share"] {
            assert!(found.contains(&expected), "missing {expected}: {found:?}");
        }
        assert_eq!(a.summary.warnings[0].severity, Severity::Severe);
        let ranks: Vec<usize> = found
            .iter()
            .map(|d| warnings::ORDER.iter().position(|o| o == d).unwrap())
            .collect();
        assert!(
            ranks.windows(2).all(|p| p[0] < p[1]),
            "not worst first: {found:?}"
        );
        assert!(a.summary.permutation_p < 0.05);
        for w in a.labeled.weight.iter().chain(&a.pool.weight) {
            assert!(w.is_finite() && *w > 0.0);
        }
        let j = serde_json::to_value(&a.summary.warnings[0]).unwrap();
        for key in ["diagnostic", "value", "threshold", "severity", "message"] {
            assert!(j.get(key).is_some());
        }
    }

    #[test]
    fn separated_sets_never_give_nan_or_infinite_weights() {
        let nm = names(2);
        let lab = normal_table(400, &[0.0, 0.0], &[1.0, 1.0], 41);
        let pool = normal_table(400, &[60.0, 0.0], &[1.0, 1.0], 42);
        let a = run(
            &lab,
            400,
            &pool,
            400,
            &nm,
            ShiftParams::new().alpha(1e-4).permutations(9),
        );
        for v in a
            .labeled
            .weight
            .iter()
            .chain(&a.pool.weight)
            .chain(&a.labeled.pool_probability)
        {
            assert!(v.is_finite());
        }
        assert!(a.summary.ess.is_finite());
        assert!(a.summary.fit.coefficients.iter().all(|c| c.is_finite()));
    }

    #[test]
    fn variance_shift_is_flagged_until_squares_are_added() {
        // Pool narrower than the labeled set in x0: a linear classifier cannot see it, the
        // weighted SMD of x0^2 stays large; with squared features it clears (design.md 2.5).
        let nm = names(2);
        let lab = normal_table(4000, &[0.0, 0.0], &[1.0, 1.0], 51);
        let pool = normal_table(4000, &[0.0, 0.0], &[0.6, 1.0], 52);
        let linear = run(
            &lab,
            4000,
            &pool,
            4000,
            &nm,
            ShiftParams::new().permutations(19),
        );
        assert!(
            diagnostics_named(&linear).contains(&"adequacy_smd"),
            "{:#?}",
            linear.summary.warnings
        );
        assert_eq!(
            linear.summary.adequacy.worst_feature.as_deref(),
            Some("x0^2")
        );
        let squares = run(
            &lab,
            4000,
            &pool,
            4000,
            &nm,
            ShiftParams::new()
                .permutations(19)
                .expansion(Expansion::Squares),
        );
        assert!(squares.summary.adequacy.max_abs_weighted_squares < warnings::ADEQUACY_SMD_HIGH);
        assert!(
            !diagnostics_named(&squares).contains(&"adequacy_smd"),
            "{:#?}",
            squares.summary.warnings
        );
    }

    #[test]
    fn held_out_rows_do_not_calibrate() {
        let nm = names(2);
        let lab = normal_table(1000, &[0.0, 0.0], &[1.0, 1.0], 61);
        let pool = normal_table(2000, &[0.5, 0.0], &[1.0, 1.0], 62);
        let a = run(
            &lab,
            1000,
            &pool,
            2000,
            &nm,
            ShiftParams::new()
                .permutations(19)
                .fit_rows(FitRows::HeldOut {
                    labeled_fraction: 0.3,
                }),
        );
        let fit_rows = a.labeled.in_fit.iter().filter(|b| **b).count();
        assert_eq!(fit_rows, 300);
        assert_eq!(a.summary.calibration_rows, 700);
        assert!(a
            .labeled
            .in_fit
            .iter()
            .zip(&a.labeled_calibrates)
            .all(|(f, c)| f != c));
        assert_eq!(a.pool.in_fit.iter().filter(|b| **b).count(), 600);
        // ESS refers to the calibrating rows only.
        let w: Vec<f64> = (0..1000)
            .filter(|&i| a.labeled_calibrates[i])
            .map(|i| a.labeled.weight[i])
            .collect();
        assert!((a.summary.ess - kish_effective_sample_size(&w).unwrap()).abs() < 1e-9);
    }

    #[test]
    fn pool_sample_is_class_ratio_corrected() {
        // Fitting on a 10% pool sample with sample weight m / sample keeps e(x) on the
        // full-pool scale: the mean pool log-weight stays near the full fit's (uncorrected
        // it would drop by log(10) = 2.3).
        let nm = names(2);
        let lab = normal_table(1000, &[0.0, 0.0], &[1.0, 1.0], 71);
        let pool = normal_table(10_000, &[0.5, -0.3], &[1.0, 1.0], 72);
        let full = run(
            &lab,
            1000,
            &pool,
            10_000,
            &nm,
            ShiftParams::new().permutations(9),
        );
        let sampled = run(
            &lab,
            1000,
            &pool,
            10_000,
            &nm,
            ShiftParams::new()
                .permutations(9)
                .max_pool_sample(Some(1000)),
        );
        assert_eq!(sampled.summary.fit.pool_rows_fit, 1000);
        assert_eq!(sampled.summary.fit.pool_sample_weight, 10.0);
        let mean_log = |w: &[f64]| w.iter().map(|v| v.ln()).sum::<f64>() / w.len() as f64;
        let (a, b) = (mean_log(&full.pool.weight), mean_log(&sampled.pool.weight));
        assert!((a - b).abs() < 0.1, "{a} vs {b}");
        assert!(sampled.pool.weight.iter().all(|w| w.is_finite()));
    }

    #[test]
    fn capping_is_reported() {
        let nm = names(1);
        let lab = normal_table(500, &[0.0], &[1.0], 81);
        let pool = normal_table(500, &[1.0], &[1.0], 82);
        let a = run(
            &lab,
            500,
            &pool,
            500,
            &nm,
            ShiftParams::new().permutations(9).cap_quantile(Some(0.9)),
        );
        let cap = a.summary.weights.cap.as_ref().expect("cap reported");
        assert!(cap.labeled_capped + cap.pool_capped >= 99);
        assert!(a
            .labeled
            .weight
            .iter()
            .chain(&a.pool.weight)
            .all(|&w| w <= cap.cap));
    }
}
