//! One shift assessment from start to end ([`assess_shift`]): choose the fitting rows, build
//! the design, fit the domain classifier, turn e(x) into weights, compute every diagnostic
//! and the warnings; and the result types ([`ShiftAssessment`], [`ShiftSummary`],
//! [`FitSummary`], [`RowResults`]). The steps are listed in the [`shift`](super) module doc.

use linfa::ParamGuard;
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use serde::Serialize;

use super::boosted;
use super::diagnostics::{self, kish_effective_sample_size};
use super::features::{Design, Expansion};
use super::logistic::{fit_logistic, FitReport, LogisticModel};
use super::options::ClassifierKind;
use super::psis::{khat_threshold, pareto_khat};
use super::robust::{self, ClipReport, FeatureTransform};
use super::warnings::{self, ShiftWarning};
use super::weights::{self, CapReport, FitRowChoice};
use super::{FeatureBalance, FeatureView, FitRows, ShiftError, ShiftOptions, ShiftParams};

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
    /// Solver report (iterations, gradient norm, convergence, loss). For boosted trees:
    /// iterations = trees over all folds, converged = true, gradient norm and loss null.
    #[serde(flatten)]
    pub report: FitReport,
    /// Which domain classifier.
    pub classifier: ClassifierKind,
    /// Boosted trees only: folds, trees per fold, early stopping, probability clipping.
    pub boosted: Option<boosted::BoostedReport>,
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
    /// Intercept then one coefficient per term, on the standardized scale (logistic only;
    /// empty for boosted trees).
    pub coefficients: Vec<f64>,
    /// Newton tolerance the convergence flag refers to.
    pub tolerance: f64,
    /// Rows whose log-weight was clamped to +-[`weights::LOG_WEIGHT_LIMIT`] to stay finite.
    pub clamped_weights: usize,
    /// How the features were made robust before the fit and the diagnostics.
    pub feature_transform: FeatureTransform,
    /// Features with values beyond the clipping fences, which were set to the fences
    /// (clip transform): the fences, counts and the most extreme cell.
    pub clipped_features: Vec<ClipReport>,
    /// Features whose excess kurtosis (after the transform, on the fitting rows) exceeds
    /// [`robust::HEAVY_TAIL_KURTOSIS`]: (name, excess kurtosis).
    pub heavy_tailed_features: Vec<(String, f64)>,
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
    /// Why `select` and `rescreen` would refuse these weights if fitted for a selection
    /// (design.md 2.9; empty when they would not): diagnostic, value, threshold, message.
    pub refusal_reasons: Vec<super::Unreliable>,
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
    let (n, m) = check_sizes(labeled, pool, options)?;
    let mut rng = ChaCha8Rng::seed_from_u64(options.seed);
    let rows = weights::choose_fit_rows(n, m, options, &mut rng);
    // Robust features first: the fit and every diagnostic see the transformed values.
    let prepared = robust::prepare(
        labeled,
        pool,
        &rows.labeled,
        &rows.pool,
        options.feature_transform,
    );
    let labeled = FeatureView {
        values: &prepared.labeled,
        ..labeled
    };
    let pool = FeatureView {
        values: &prepared.pool,
        ..pool
    };
    let kurtosis = robust::heavy_tails(labeled, pool, &rows.labeled, &rows.pool);
    let heavy_tailed_features: Vec<(String, f64)> = labeled
        .names()
        .iter()
        .zip(&kurtosis)
        .filter(|(_, k)| **k > robust::HEAVY_TAIL_KURTOSIS)
        .map(|(name, k)| (name.clone(), *k))
        .collect();
    // Trees find squares and interactions themselves: the design then only serves the
    // balance and adequacy diagnostics.
    let expansion = match options.classifier_kind {
        ClassifierKind::Logistic => options.expansion,
        ClassifierKind::Boosted => Expansion::None,
    };
    let design = Design::build(labeled, pool, &rows.labeled, &rows.pool, expansion)?;
    let (weighted, auc_details, mut fit) = match options.classifier_kind {
        ClassifierKind::Logistic => {
            let (labels, model) = fit_domain_classifier(&design, &rows, options)?;
            let labeled_eta = design.linear_predictor(labeled, model.coefficients());
            let pool_eta = design.linear_predictor(pool, model.coefficients());
            let weighted = weigh_rows(&labeled_eta, &pool_eta, &rows, options);
            let auc_details = diagnostics::cross_validated_auc(
                &design,
                model.coefficients(),
                &labels,
                &rows,
                (n, m),
                options,
                &mut rng,
            )?;
            let fit = fit_summary(&model, &design, &rows, options, weighted.fitted.clamped);
            (weighted, auc_details, fit)
        }
        ClassifierKind::Boosted => {
            let boosted = fit_boosted(labeled, pool, &rows, options)?;
            let weighted = weigh_rows(&boosted.labeled_eta, &boosted.pool_eta, &rows, options);
            let auc_details = boosted_auc(&boosted, &rows, options, &mut rng)?;
            let fit =
                boosted_fit_summary(&boosted, &design, &rows, options, weighted.fitted.clamped);
            (weighted, auc_details, fit)
        }
    };
    fit.clipped_features = prepared.clipped.clone();
    fit.heavy_tailed_features = heavy_tailed_features;
    let summary = shift_summary(labeled, pool, &design, &weighted, fit, auc_details, options)?;

    let Weighted {
        fitted,
        labeled_in_fit,
        pool_in_fit,
        labeled_calibrates,
        ..
    } = weighted;
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

/// Check that both views have the same features and enough rows for the folds and the
/// split; returns `(n, m)`.
fn check_sizes(
    labeled: FeatureView<'_>,
    pool: FeatureView<'_>,
    options: &ShiftOptions,
) -> Result<(usize, usize), ShiftError> {
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
    Ok((n, m))
}

/// Fit the domain classifier (label 0 = labeled row, 1 = pool row) on the design's rows,
/// each class with its sample weight; returns the labels and the model.
fn fit_domain_classifier(
    design: &Design,
    rows: &FitRowChoice,
    options: &ShiftOptions,
) -> Result<(Vec<bool>, LogisticModel), ShiftError> {
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
    Ok((labels, model))
}

/// Per-row weights and which rows fit and calibrate.
struct Weighted {
    fitted: weights::Fitted,
    labeled_in_fit: Vec<bool>,
    pool_in_fit: Vec<bool>,
    labeled_calibrates: Vec<bool>,
    /// Indices of the calibrating labeled rows.
    calibration: Vec<usize>,
    cap: Option<CapReport>,
}

/// Turn the classifier's log-odds of every row into weights and cap them if asked.
fn weigh_rows(
    labeled_eta: &[f64],
    pool_eta: &[f64],
    rows: &FitRowChoice,
    options: &ShiftOptions,
) -> Weighted {
    let (n, m) = (labeled_eta.len(), pool_eta.len());
    let mut fitted = weights::weights_from_linear_predictor(labeled_eta, pool_eta, n, m);
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
    Weighted {
        fitted,
        labeled_in_fit,
        pool_in_fit,
        labeled_calibrates,
        calibration,
        cap,
    }
}

/// A cross-fitted boosted domain classifier and the log-odds of every row.
struct BoostedRun {
    fit: boosted::BoostedFit,
    /// Labels of the fitting rows (labeled rows first, then pool rows).
    labels: Vec<bool>,
    labeled_eta: Vec<f64>,
    pool_eta: Vec<f64>,
}

/// Cross-fit boosted trees on the fitting rows (labeled then pool, each class with its
/// sample weight); every fitting row gets its out-of-fold log-odds, every other row the mean
/// of the fold models' (`boosted::BoostedFit::predict_log_odds`).
fn fit_boosted(
    labeled: FeatureView<'_>,
    pool: FeatureView<'_>,
    rows: &FitRowChoice,
    options: &ShiftOptions,
) -> Result<BoostedRun, ShiftError> {
    let d = labeled.n_features();
    let (nl, np) = (rows.labeled.len(), rows.pool.len());
    let n_fit = nl + np;
    let mut x = Vec::with_capacity(n_fit * d);
    for f in 0..d {
        let (lc, pc) = (labeled.column(f), pool.column(f));
        x.extend(rows.labeled.iter().map(|&r| lc[r]));
        x.extend(rows.pool.iter().map(|&r| pc[r]));
    }
    let labels: Vec<bool> = (0..n_fit).map(|i| i >= nl).collect();
    let sample_weights: Vec<f64> = labels
        .iter()
        .map(|&p| {
            if p {
                rows.pool_sample_weight
            } else {
                rows.labeled_sample_weight
            }
        })
        .collect();
    let params = boosted::BoostedParams {
        seed: options.seed,
        folds: options.cv_folds,
        ..(*options.boosted).clone()
    };
    let fit = boosted::cross_fit(&x, n_fit, &labels, &sample_weights, &params)?;
    drop(x);
    let oof = fit.out_of_fold_log_odds();
    // Out-of-fold values where a row was fit, fold-mean predictions elsewhere.
    let eta_of = |view: FeatureView<'_>, fit_rows: &[usize], offset: usize| -> Vec<f64> {
        let total = view.n_rows();
        let in_fit = weights::row_mask(total, fit_rows);
        let others: Vec<usize> = (0..total).filter(|&r| !in_fit[r]).collect();
        let mut eta = vec![0.0; total];
        for (k, &r) in fit_rows.iter().enumerate() {
            eta[r] = oof[offset + k];
        }
        if !others.is_empty() {
            let mut rest = Vec::with_capacity(others.len() * d);
            for f in 0..d {
                let column = view.column(f);
                rest.extend(others.iter().map(|&r| column[r]));
            }
            for (&r, v) in others.iter().zip(fit.predict_log_odds(&rest, others.len())) {
                eta[r] = v;
            }
        }
        eta
    };
    let labeled_eta = eta_of(labeled, &rows.labeled, 0);
    let pool_eta = eta_of(pool, &rows.pool, nl);
    Ok(BoostedRun {
        fit,
        labels,
        labeled_eta,
        pool_eta,
    })
}

/// AUC of the boosted classifier's out-of-fold log-odds on the fitting rows (they are
/// cross-validated by construction), with its DeLong interval and the permutation test.
fn boosted_auc(
    run: &BoostedRun,
    rows: &FitRowChoice,
    options: &ShiftOptions,
    rng: &mut ChaCha8Rng,
) -> Result<diagnostics::AucSummary, ShiftError> {
    use rand::Rng;
    let scores = run.fit.out_of_fold_log_odds();
    let est = diagnostics::roc_auc(scores, &run.labels)?;
    let permutation_p =
        diagnostics::permutation_p_value(scores, &run.labels, options.permutations(), rng.gen());
    Ok(diagnostics::AucSummary {
        auc: est.auc,
        ci: est.ci,
        standard_error: est.variance.sqrt(),
        permutation_p,
        permutations: options.permutations(),
        folds: options.cv_folds,
        labeled_rows: rows.labeled.len(),
        pool_rows: rows.pool.len(),
    })
}

/// The boosted fit as reported: `iterations` counts the trees over all folds; `converged`
/// is true (every fold model finished, by early stopping or at the tree limit); gradient
/// norm and loss do not apply (null).
fn boosted_fit_summary(
    run: &BoostedRun,
    design: &Design,
    rows: &FitRowChoice,
    options: &ShiftOptions,
    clamped_weights: usize,
) -> FitSummary {
    let report = run.fit.report().clone();
    FitSummary {
        report: FitReport {
            iterations: report.trees_per_fold.iter().sum(),
            gradient_norm: f64::NAN,
            converged: true,
            loss: f64::NAN,
        },
        classifier: ClassifierKind::Boosted,
        boosted: Some(report),
        alpha: options.classifier.alpha,
        tolerance: options.classifier.tolerance,
        expansion: Expansion::None,
        fit_rows: options.fit_rows,
        labeled_rows_fit: rows.labeled.len(),
        pool_rows_fit: rows.pool.len(),
        labeled_sample_weight: rows.labeled_sample_weight,
        pool_sample_weight: rows.pool_sample_weight,
        dropped_constant_columns: design.dropped().to_vec(),
        terms: design.kept_names().to_vec(),
        coefficients: Vec::new(),
        clamped_weights,
        feature_transform: options.feature_transform,
        clipped_features: Vec::new(),
        heavy_tailed_features: Vec::new(),
    }
}

/// The classifier fit as reported.
fn fit_summary(
    model: &LogisticModel,
    design: &Design,
    rows: &FitRowChoice,
    options: &ShiftOptions,
    clamped_weights: usize,
) -> FitSummary {
    FitSummary {
        report: model.report().clone(),
        classifier: ClassifierKind::Logistic,
        boosted: None,
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
        clamped_weights,
        feature_transform: options.feature_transform,
        clipped_features: Vec::new(),
        heavy_tailed_features: Vec::new(),
    }
}

/// Every diagnostic on the calibrating rows, and the warnings.
fn shift_summary(
    labeled: FeatureView<'_>,
    pool: FeatureView<'_>,
    design: &Design,
    weighted: &Weighted,
    fit: FitSummary,
    auc_details: diagnostics::AucSummary,
    options: &ShiftOptions,
) -> Result<ShiftSummary, ShiftError> {
    let (n, m) = (labeled.n_rows(), pool.n_rows());
    let (fitted, calibration) = (&weighted.fitted, &weighted.calibration);
    let cal_weights: Vec<f64> = calibration
        .iter()
        .map(|&i| fitted.labeled_weight[i])
        .collect();
    let ess = kish_effective_sample_size(&cal_weights)?;
    let n_cal = cal_weights.len();
    let log_w: Vec<f64> = cal_weights.iter().map(|w| w.ln()).collect();
    let khat = pareto_khat(&log_w)?;
    let khat_threshold = khat_threshold(n_cal);
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
    let balance = diagnostics::feature_balance(labeled, pool, calibration, &cal_weights)?;
    let adequacy = diagnostics::adequacy(design, labeled, pool, calibration, &cal_weights);
    let weight_summary = weights::summarize(
        &cal_weights,
        &fitted.pool_weight,
        n,
        m,
        weighted.cap.clone(),
    );

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
        refusal_reasons: Vec::new(),
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
    summary.refusal_reasons = super::unreliable_weights(&summary);
    Ok(summary)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::shift::test_support::{names, normal_table};
    use crate::shift::Severity;

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
    fn one_absurd_cell_neither_hides_the_shift_nor_passes_silently() {
        // A mean shift of -0.5 in x1 (true log ratio -0.5 x1 + const). One pool cell of
        // x1 = 1e12 (a unit slip): with the default clip transform the weights stay what the
        // clean data give (labeled log-weights within 0.05 of the clean fit's at the median
        // and 0.25 at worst: our tolerance, a few percent of the weights' own spread) and a
        // warning names the feature and the row; without it the fit bends to the cell and the
        // shift disappears (AUC near 0.5).
        let nm = names(3);
        let lab = normal_table(1000, &[0.0; 3], &[1.0; 3], 101);
        let clean = normal_table(3000, &[0.0, -0.5, 0.0], &[1.0; 3], 102);
        let mut bad = clean.clone();
        bad[3000 + 17] = 1e12;
        let fit = |pool: &[f64], transform| {
            run(
                &lab,
                1000,
                pool,
                3000,
                &nm,
                ShiftParams::new()
                    .permutations(19)
                    .feature_transform(transform),
            )
        };
        let reference = fit(&clean, FeatureTransform::Clip);
        let robust = fit(&bad, FeatureTransform::Clip);
        let raw = fit(&bad, FeatureTransform::None);
        let mut diffs: Vec<f64> = reference
            .labeled
            .weight
            .iter()
            .zip(&robust.labeled.weight)
            .map(|(a, b)| (a.ln() - b.ln()).abs())
            .collect();
        diffs.sort_by(f64::total_cmp);
        assert!(diffs[500] < 0.05, "median |log ratio| {}", diffs[500]);
        assert!(diffs[999] < 0.25, "largest |log ratio| {}", diffs[999]);
        assert!(reference.summary.fit.clipped_features.is_empty());
        let c = &robust.summary.fit.clipped_features;
        assert_eq!(c.len(), 1);
        assert_eq!((c[0].feature.as_str(), c[0].most_extreme.row), ("x1", 17));
        let w = robust
            .summary
            .warnings
            .iter()
            .find(|w| w.diagnostic == "far_out_values")
            .expect("far-out warning");
        assert!(
            w.message.contains("`x1`") && w.message.contains("pool row 18"),
            "{}",
            w.message
        );
        assert!(robust.summary.auc > 0.6, "{}", robust.summary.auc);
        assert!(raw.summary.auc < 0.55, "{}", raw.summary.auc);
    }

    #[test]
    fn squares_of_heavy_tails_are_flagged_unless_ranked() {
        let nm = names(2);
        let mut lab = normal_table(2000, &[0.0, 0.0], &[1.0, 1.0], 111);
        let mut pool = normal_table(2000, &[0.2, 0.0], &[1.0, 1.0], 112);
        for x in lab[2000..].iter_mut().chain(pool[2000..].iter_mut()) {
            *x = (1.5 * *x).exp(); // lognormal: heavy right tail
        }
        let squares = |transform| {
            run(
                &lab,
                2000,
                &pool,
                2000,
                &nm,
                ShiftParams::new()
                    .permutations(9)
                    .expansion(Expansion::Squares)
                    .feature_transform(transform),
            )
        };
        let clipped = squares(FeatureTransform::Clip);
        assert!(diagnostics_named(&clipped).contains(&"squares_heavy_tail"));
        assert_eq!(clipped.summary.fit.heavy_tailed_features[0].0, "x1");
        let ranked = squares(FeatureTransform::Rank);
        assert!(!diagnostics_named(&ranked).contains(&"squares_heavy_tail"));
        assert!(ranked.summary.fit.heavy_tailed_features.is_empty());
    }

    /// Spearman rank correlation: Pearson correlation of mid-ranks (the textbook definition),
    /// on the mid-ranks the AUC code uses.
    fn spearman(a: &[f64], b: &[f64]) -> f64 {
        let ranks = diagnostics::midranks;
        let (ra, rb) = (ranks(a), ranks(b));
        let n = a.len() as f64;
        let (ma, mb) = (ra.iter().sum::<f64>() / n, rb.iter().sum::<f64>() / n);
        let cov: f64 = ra.iter().zip(&rb).map(|(x, y)| (x - ma) * (y - mb)).sum();
        let va: f64 = ra.iter().map(|x| (x - ma) * (x - ma)).sum();
        let vb: f64 = rb.iter().map(|y| (y - mb) * (y - mb)).sum();
        cov / (va * vb).sqrt()
    }

    #[test]
    fn boosted_trees_recover_a_variance_shift_that_a_linear_classifier_cannot_see() {
        // Pool x0 ~ N(0, 0.6^2), labeled x0 ~ N(0, 1), two noise features: the true log
        // ratio is x0^2 (1/2 - 1/0.72) + const, a function of |x0| only. A linear logistic
        // model has rank correlation about 0 with it; cross-fitted boosted trees recover it
        // (scikit-learn's cross-fitted HistGradientBoosting reaches about 0.7 to 0.75 on
        // such a case, tests/boosted_reference.rs; our bar 0.70 over the labeled rows).
        let nm = names(3);
        let lab = normal_table(2000, &[0.0; 3], &[1.0; 3], 121);
        let pool = normal_table(2000, &[0.0; 3], &[0.6, 1.0, 1.0], 122);
        let truth: Vec<f64> = lab[..2000].iter().map(|x| -x * x).collect();
        let fit = |kind| {
            run(
                &lab,
                2000,
                &pool,
                2000,
                &nm,
                ShiftParams::new().permutations(19).classifier_kind(kind),
            )
        };
        let linear = fit(ClassifierKind::Logistic);
        let boosted = fit(ClassifierKind::Boosted);
        let log_w =
            |a: &ShiftAssessment| a.labeled.weight.iter().map(|w| w.ln()).collect::<Vec<_>>();
        let s_linear = spearman(&log_w(&linear), &truth);
        let s_boosted = spearman(&log_w(&boosted), &truth);
        assert!(s_linear.abs() < 0.2, "linear {s_linear}");
        assert!(s_boosted >= 0.70, "boosted {s_boosted}");
        let b = boosted
            .summary
            .fit
            .boosted
            .as_ref()
            .expect("boosted report");
        assert_eq!(b.trees_per_fold.len(), 5);
        assert_eq!(boosted.summary.fit.classifier, ClassifierKind::Boosted);
        assert!(boosted.summary.auc > 0.55, "{}", boosted.summary.auc);
        // Cross-fitting: every fitting row's log-odds is out of fold, and the weights are
        // exp(eta + log(n/m)) of those values.
        assert!(boosted.labeled.in_fit.iter().all(|f| *f));
        // Deterministic for a seed.
        assert_eq!(
            fit(ClassifierKind::Boosted).labeled.weight,
            boosted.labeled.weight
        );
    }

    #[test]
    fn boosted_trees_predict_rows_outside_the_fit() {
        // A pool sample: pool rows outside the sample get the fold models' mean log-odds.
        let nm = names(2);
        let lab = normal_table(600, &[0.0, 0.0], &[1.0, 1.0], 131);
        let pool = normal_table(3000, &[0.8, 0.0], &[1.0, 1.0], 132);
        let a = run(
            &lab,
            600,
            &pool,
            3000,
            &nm,
            ShiftParams::new()
                .permutations(9)
                .classifier_kind(ClassifierKind::Boosted)
                .max_pool_sample(Some(800)),
        );
        assert_eq!(a.pool.in_fit.iter().filter(|f| **f).count(), 800);
        assert!(a.pool.weight.iter().all(|w| w.is_finite() && *w > 0.0));
        // Pool rows with larger x0 look more like the pool: mean weight rises with x0.
        let (mut hi, mut lo) = (Vec::new(), Vec::new());
        for (j, w) in a.pool.weight.iter().enumerate() {
            if pool[j] > 1.5 {
                hi.push(*w);
            } else if pool[j] < 0.0 {
                lo.push(*w);
            }
        }
        let mean = |v: &[f64]| v.iter().sum::<f64>() / v.len() as f64;
        assert!(mean(&hi) > mean(&lo), "{} vs {}", mean(&hi), mean(&lo));
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
