//! Where the density-ratio weights of a run come from, in one place for every command
//! (`select`, `shift`, and the commands that audit or check a shortlist).
//!
//! A run has three choices (design.md 2.5):
//! * no weights: every weight 1, i.e. no shift is assumed;
//! * given weights: a column present in both files, already read into
//!   [`UnitTable::weight`];
//! * fitted weights: a domain classifier on the tables' feature columns
//!   ([`super::assess_shift`]), `w(x) = (n / m) e(x) / (1 - e(x))` with
//!   `e(x) = P(pool | x)`.
//!
//! With fitted weights in held-out mode ([`FitRows::HeldOut`]) the labeled rows that fit the
//! classifier must not calibrate: [`Weighting::calibration`] drops them from the labeled set
//! handed to the selection, and keeps the weights of the rows that remain.
//!
//! No I/O happens here: the caller reads the tables and writes the results.

use std::borrow::Cow;

use linfa::ParamGuard;

use super::{
    assess_shift, FeatureView, FitRows, ShiftAssessment, ShiftError, ShiftOptions, ShiftParams,
};
use crate::io::{Role, UnitTable};

/// How the weights of a run are obtained.
#[derive(Clone, Debug, PartialEq)]
pub enum WeightSource {
    /// Every weight 1: no shift assumed.
    None,
    /// Density-ratio weights (pool / labeled) given in a column of both files. The tables
    /// must have been read with that column (`ReadOptions::weight_column`).
    Given { column: String },
    /// Weights fitted by the domain classifier on the tables' feature columns (the tables
    /// must have been read with the same `ReadOptions::features`).
    Fitted { params: ShiftParams },
}

/// Why weights could not be obtained.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum WeightingError {
    /// Given weights were asked for but the column was not read from one table.
    #[error("the weight column `{column}` was not read from the {role}")]
    GivenColumnNotRead { column: String, role: Role },
    /// Fitted weights were asked for but a table has no feature columns.
    #[error(
        "fitted weights need feature columns, but none were read from the {role}; choose them \
         with --features"
    )]
    NoFeatures { role: Role },
    /// The two tables hold different feature columns.
    #[error(
        "the feature columns differ: labeled file [{labeled}] but pool file [{pool}]; select \
         the same features, in the same order, in both files",
        labeled = .labeled.join(", "),
        pool = .pool.join(", ")
    )]
    FeatureMismatch {
        labeled: Vec<String>,
        pool: Vec<String>,
    },
    /// The shift options are invalid or the classifier could not be fit.
    #[error(transparent)]
    Shift(#[from] ShiftError),
}

/// Weights obtained for one run. Borrows given weights from the tables.
#[derive(Clone, Debug)]
pub enum Weighting<'a> {
    /// Every weight 1.
    None,
    /// Weights read from a column of both files.
    Given {
        column: String,
        labeled: &'a [f64],
        pool: &'a [f64],
    },
    /// Weights fitted by the domain classifier, with every diagnostic.
    Fitted(Box<FittedWeights>),
}

/// Fitted weights: the checked options and the classifier's assessment.
#[derive(Clone, Debug)]
pub struct FittedWeights {
    /// The options the fit ran with.
    pub options: ShiftOptions,
    /// Per-row probabilities and weights, which labeled rows calibrate, the diagnostics.
    pub assessment: ShiftAssessment,
}

/// A column-major feature view of a table, for the shift module.
///
/// # Errors
/// [`ShiftError::NoFeatures`] when the table has no feature columns; the buffer checks of
/// [`FeatureView::new`] (never triggered by tables from [`crate::io::read_units`]).
pub fn feature_view(table: &UnitTable) -> Result<FeatureView<'_>, ShiftError> {
    FeatureView::new(&table.features, table.len(), &table.feature_names)
}

/// Obtain the weights of a run.
///
/// # Errors
/// [`WeightingError::GivenColumnNotRead`] when given weights are asked for but a table has
/// none; [`WeightingError::NoFeatures`] and [`WeightingError::FeatureMismatch`] for fitted
/// weights without (the same) feature columns; [`WeightingError::Shift`] for invalid shift
/// options or a failed fit (too few rows, every feature constant, ...).
///
/// # Examples
/// ```
/// use weighbridge::io::{Role, UnitTable};
/// use weighbridge::shift::weighting::{obtain_weights, WeightSource};
/// let table = |role, rows: usize| UnitTable {
///     path: "x.csv".into(),
///     role,
///     ids: (0..rows).map(|i| i.to_string()).collect(),
///     outcome: None,
///     prediction: vec![0.0; rows],
///     threshold: None,
///     weight: None,
///     feature_names: vec![],
///     features: vec![],
///     kept: Default::default(),
///     dropped_missing_outcome: 0,
///     censored_outcomes: 0,
/// };
/// let (labeled, pool) = (table(Role::Labeled, 3), table(Role::Pool, 4));
/// let weighting = obtain_weights(&WeightSource::None, &labeled, &pool).unwrap();
/// assert!(weighting.pool_weights().is_none()); // every weight 1
/// assert_eq!(weighting.calibration(&labeled).rows(), 3);
/// ```
pub fn obtain_weights<'a>(
    source: &WeightSource,
    labeled: &'a UnitTable,
    pool: &'a UnitTable,
) -> Result<Weighting<'a>, WeightingError> {
    match source {
        WeightSource::None => Ok(Weighting::None),
        WeightSource::Given { column } => {
            let given = |table: &'a UnitTable| {
                table
                    .weight
                    .as_deref()
                    .ok_or_else(|| WeightingError::GivenColumnNotRead {
                        column: column.clone(),
                        role: table.role,
                    })
            };
            Ok(Weighting::Given {
                column: column.clone(),
                labeled: given(labeled)?,
                pool: given(pool)?,
            })
        }
        WeightSource::Fitted { params } => {
            for table in [labeled, pool] {
                if table.feature_names.is_empty() {
                    return Err(WeightingError::NoFeatures { role: table.role });
                }
            }
            if labeled.feature_names != pool.feature_names {
                return Err(WeightingError::FeatureMismatch {
                    labeled: labeled.feature_names.clone(),
                    pool: pool.feature_names.clone(),
                });
            }
            let options = params.clone().check()?;
            let mut assessment =
                assess_shift(feature_view(labeled)?, feature_view(pool)?, &options)?;
            name_far_out_cells(&mut assessment, labeled, pool);
            Ok(Weighting::Fitted(Box::new(FittedWeights {
                options,
                assessment,
            })))
        }
    }
}

/// Give each clipped cell the id of its row, and rebuild the warnings so that they name it.
fn name_far_out_cells(assessment: &mut ShiftAssessment, labeled: &UnitTable, pool: &UnitTable) {
    let summary = &mut assessment.summary;
    if summary.fit.clipped_features.is_empty() {
        return;
    }
    for c in &mut summary.fit.clipped_features {
        let e = &mut c.most_extreme;
        let ids = if e.set == "pool" {
            &pool.ids
        } else {
            &labeled.ids
        };
        e.id = ids.get(e.row).cloned();
    }
    summary.warnings = super::warnings::collect(summary);
}

/// The labeled rows that calibrate, with their weights: what the selection's labeled side
/// needs. Borrows the table's columns when every row calibrates, copies the calibrating rows
/// otherwise (held-out fitting).
#[derive(Clone, Debug)]
pub struct Calibration<'s> {
    /// Outcomes (empty when the table has no outcome column).
    pub outcome: Cow<'s, [f64]>,
    pub prediction: Cow<'s, [f64]>,
    /// Per-row thresholds, when the table has them.
    pub threshold: Option<Cow<'s, [f64]>>,
    /// Weights of the calibrating rows; `None` = every weight 1.
    pub weights: Option<Cow<'s, [f64]>>,
    /// Ids of the calibrating rows.
    pub ids: Cow<'s, [String]>,
}

impl Calibration<'_> {
    /// Number of calibrating rows.
    pub fn rows(&self) -> usize {
        self.prediction.len()
    }
}

fn keep_rows<'s, T: Clone>(values: &'s [T], keep: Option<&[bool]>) -> Cow<'s, [T]> {
    match keep {
        None => Cow::Borrowed(values),
        Some(keep) => Cow::Owned(
            values
                .iter()
                .zip(keep)
                .filter(|(_, &k)| k)
                .map(|(v, _)| v.clone())
                .collect(),
        ),
    }
}

impl Weighting<'_> {
    /// Weights of every labeled row in input order (including rows that do not calibrate);
    /// `None` = every weight 1.
    pub fn labeled_weights(&self) -> Option<&[f64]> {
        match self {
            Weighting::None => None,
            Weighting::Given { labeled, .. } => Some(labeled),
            Weighting::Fitted(f) => Some(&f.assessment.labeled.weight),
        }
    }

    /// Weights of the pool rows in input order; `None` = every weight 1.
    pub fn pool_weights(&self) -> Option<&[f64]> {
        match self {
            Weighting::None => None,
            Weighting::Given { pool, .. } => Some(pool),
            Weighting::Fitted(f) => Some(&f.assessment.pool.weight),
        }
    }

    /// Per labeled row: may it calibrate? `None` = every row calibrates. Only held-out
    /// fitting excludes rows (those that fit the classifier).
    pub fn labeled_calibrates(&self) -> Option<&[bool]> {
        match self {
            Weighting::Fitted(f) if matches!(f.options.fit_rows(), FitRows::HeldOut { .. }) => {
                Some(&f.assessment.labeled_calibrates)
            }
            _ => None,
        }
    }

    /// The fit and its diagnostics, when the weights were fitted.
    pub fn fitted(&self) -> Option<&FittedWeights> {
        match self {
            Weighting::Fitted(f) => Some(f),
            _ => None,
        }
    }

    /// The labeled rows that calibrate, with their weights.
    ///
    /// # Panics
    /// If `labeled` is not the labeled table the weights were obtained for (length differs).
    pub fn calibration<'s>(&'s self, labeled: &'s UnitTable) -> Calibration<'s> {
        let keep = self.labeled_calibrates();
        if let Some(keep) = keep {
            assert_eq!(keep.len(), labeled.len(), "labeled table / weights length");
        }
        if let Some(w) = self.labeled_weights() {
            assert_eq!(w.len(), labeled.len(), "labeled table / weights length");
        }
        Calibration {
            outcome: keep_rows(labeled.outcome.as_deref().unwrap_or_default(), keep),
            prediction: keep_rows(&labeled.prediction, keep),
            threshold: labeled.threshold.as_deref().map(|t| keep_rows(t, keep)),
            weights: self.labeled_weights().map(|w| keep_rows(w, keep)),
            ids: keep_rows(&labeled.ids, keep),
        }
    }

    /// One line saying where the weights came from, e.g. "given in column w" or "fitted by a
    /// domain classifier on 5 features (f1, ..., f5), fit on all rows".
    pub fn describe(&self) -> String {
        match self {
            Weighting::None => no_weights_text(),
            Weighting::Given { column, .. } => given_weights_text(column),
            Weighting::Fitted(f) => {
                let names = &f.assessment.summary.balance;
                let list: Vec<&str> = names.iter().map(|b| b.feature.as_str()).collect();
                let shown = if list.len() > 6 {
                    format!("{}, ..., {}", list[..3].join(", "), list[list.len() - 1])
                } else {
                    list.join(", ")
                };
                format!(
                    "fitted by a domain classifier ({}) on {} feature{} ({shown}), {}",
                    match f.options.classifier_kind() {
                        super::ClassifierKind::Logistic => "logistic regression",
                        super::ClassifierKind::Boosted => "cross-fitted boosted trees",
                    },
                    list.len(),
                    if list.len() == 1 { "" } else { "s" },
                    fit_rows_words(f.options.fit_rows())
                )
            }
        }
    }
}

/// "fit on all rows" / "fit on a held-out 50% of the labeled rows and of the pool".
pub fn fit_rows_words(fit_rows: FitRows) -> String {
    match fit_rows {
        FitRows::All => "fit on all rows".to_string(),
        FitRows::HeldOut { labeled_fraction } => format!(
            "fit on a held-out {:.0}% of the labeled rows and of the pool",
            100.0 * labeled_fraction
        ),
    }
}

/// Why fitting on all rows is the default (design.md 2.5 and 2.7), for every output that
/// reports fitted weights.
pub const FIT_ROWS_DEFAULT_REASON: &str = "Fitting on all rows is the default: in simulation, \
fitting the classifier on the same labeled rows that calibrate was no worse than a held-out \
fit, while a held-out fit costs calibration rows (the real risk is a weight model that misses \
part of the shift, see the adequacy diagnostic). Weights fitted on the data are not covered \
by the exact FDR guarantee in either mode. The calibration check by simulation \
(`weighbridge check`, run once with each --fit-rows mode) is the tool to confirm this on data \
like yours.";

/// The fitting mode and its justification in plain words: which mode was used, how many
/// labeled rows calibrate, and why fitting on all rows is the default.
pub fn fit_rows_statement(
    fit_rows: FitRows,
    labeled_rows: usize,
    calibration_rows: usize,
) -> String {
    match fit_rows {
        FitRows::All => format!(
            "Weights were fitted on all rows (the default); all {labeled_rows} labeled rows \
             calibrate. {FIT_ROWS_DEFAULT_REASON}"
        ),
        FitRows::HeldOut { .. } => format!(
            "Weights were {}: those {} labeled rows fit the classifier only and do not \
             calibrate, so {calibration_rows} of {labeled_rows} labeled rows calibrate. \
             {FIT_ROWS_DEFAULT_REASON}",
            fit_rows_words(fit_rows),
            labeled_rows - calibration_rows
        ),
    }
}

/// [`Weighting::describe`] of a run without weights.
pub fn no_weights_text() -> String {
    "none (every weight 1: no shift assumed)".to_string()
}

/// [`Weighting::describe`] of weights given in `column`.
pub fn given_weights_text(column: &str) -> String {
    format!("given in column {column}")
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A table with `rows` rows and one feature `x` taking the values `feature`.
    fn table(role: Role, feature: Vec<f64>, weight: Option<Vec<f64>>) -> UnitTable {
        let rows = feature.len();
        UnitTable {
            path: "t.csv".into(),
            role,
            ids: (0..rows).map(|i| format!("{role:?}-{i}")).collect(),
            outcome: (role == Role::Labeled).then(|| (0..rows).map(|i| i as f64).collect()),
            prediction: (0..rows).map(|i| 0.5 * i as f64).collect(),
            threshold: Some(vec![1.0; rows]),
            weight,
            feature_names: vec!["x".to_string()],
            features: feature,
            kept: Default::default(),
            dropped_missing_outcome: 0,
            censored_outcomes: 0,
        }
    }

    /// Deterministic, non-constant feature values (a low-discrepancy sequence, shifted).
    fn spread(rows: usize, offset: f64) -> Vec<f64> {
        (0..rows)
            .map(|i| offset + ((i as f64 * 0.618_033_988_75) % 1.0))
            .collect()
    }

    #[test]
    fn no_weights_calibrate_with_every_row_borrowed() {
        let labeled = table(Role::Labeled, spread(6, 0.0), None);
        let pool = table(Role::Pool, spread(4, 0.0), None);
        let w = obtain_weights(&WeightSource::None, &labeled, &pool).unwrap();
        assert!(w.labeled_weights().is_none() && w.pool_weights().is_none());
        let c = w.calibration(&labeled);
        assert_eq!(c.rows(), 6);
        assert!(matches!(c.prediction, Cow::Borrowed(_)));
        assert!(c.weights.is_none());
        assert!(w.describe().contains("no shift"));
    }

    #[test]
    fn given_weights_come_from_the_tables() {
        let labeled = table(Role::Labeled, spread(3, 0.0), Some(vec![1.0, 2.0, 3.0]));
        let pool = table(Role::Pool, spread(2, 0.0), Some(vec![4.0, 5.0]));
        let source = WeightSource::Given {
            column: "w".to_string(),
        };
        let w = obtain_weights(&source, &labeled, &pool).unwrap();
        assert_eq!(w.labeled_weights(), Some(&[1.0, 2.0, 3.0][..]));
        assert_eq!(w.pool_weights(), Some(&[4.0, 5.0][..]));
        assert_eq!(
            w.calibration(&labeled).weights.as_deref(),
            Some(&[1.0, 2.0, 3.0][..])
        );
        let unread = table(Role::Pool, spread(2, 0.0), None);
        assert!(matches!(
            obtain_weights(&source, &labeled, &unread),
            Err(WeightingError::GivenColumnNotRead {
                role: Role::Pool,
                ..
            })
        ));
    }

    #[test]
    fn fitted_weights_need_the_same_features() {
        let labeled = table(Role::Labeled, spread(40, 0.0), None);
        let mut pool = table(Role::Pool, spread(40, 0.3), None);
        let source = WeightSource::Fitted {
            params: ShiftParams::new().permutations(9),
        };
        pool.feature_names = vec!["y".to_string()];
        assert!(matches!(
            obtain_weights(&source, &labeled, &pool),
            Err(WeightingError::FeatureMismatch { .. })
        ));
        pool.feature_names.clear();
        pool.features.clear();
        assert!(matches!(
            obtain_weights(&source, &labeled, &pool),
            Err(WeightingError::NoFeatures { role: Role::Pool })
        ));
    }

    #[test]
    fn constant_features_are_a_shift_error() {
        let labeled = table(Role::Labeled, vec![2.0; 30], None);
        let pool = table(Role::Pool, vec![2.0; 30], None);
        let source = WeightSource::Fitted {
            params: ShiftParams::new().permutations(9),
        };
        assert!(matches!(
            obtain_weights(&source, &labeled, &pool),
            Err(WeightingError::Shift(ShiftError::AllConstant { .. }))
        ));
    }

    #[test]
    fn held_out_fitting_rows_do_not_calibrate() {
        let labeled = table(Role::Labeled, spread(100, 0.0), None);
        let pool = table(Role::Pool, spread(200, 0.2), None);
        let source = WeightSource::Fitted {
            params: ShiftParams::new()
                .permutations(9)
                .fit_rows(FitRows::HeldOut {
                    labeled_fraction: 0.3,
                }),
        };
        let w = obtain_weights(&source, &labeled, &pool).unwrap();
        let keep = w.labeled_calibrates().expect("held-out mode marks rows");
        assert_eq!(keep.iter().filter(|k| !**k).count(), 30);
        let c = w.calibration(&labeled);
        assert_eq!(c.rows(), 70);
        let all = w.labeled_weights().unwrap();
        let expected: Vec<f64> = (0..100).filter(|&i| keep[i]).map(|i| all[i]).collect();
        assert_eq!(c.weights.as_deref(), Some(&expected[..]));
        let expected_ids: Vec<String> = (0..100)
            .filter(|&i| keep[i])
            .map(|i| labeled.ids[i].clone())
            .collect();
        assert_eq!(&c.ids[..], &expected_ids[..]);
        // Outcomes, predictions and thresholds move with their rows.
        let outcome = labeled.outcome.as_ref().unwrap();
        assert!(c
            .outcome
            .iter()
            .zip(c.ids.iter())
            .all(|(y, id)| outcome[labeled.ids.iter().position(|i| i == id).unwrap()] == *y));
        assert_eq!(c.threshold.as_ref().unwrap().len(), 70);
        assert_eq!(w.fitted().unwrap().assessment.summary.calibration_rows, 70);
        let statement = fit_rows_statement(w.fitted().unwrap().options.fit_rows(), 100, 70);
        assert!(statement.contains("70 of 100"), "{statement}");
        assert!(w.describe().contains("held-out 30%"), "{}", w.describe());
    }

    #[test]
    fn fitting_on_all_rows_keeps_every_row() {
        let labeled = table(Role::Labeled, spread(60, 0.0), None);
        let pool = table(Role::Pool, spread(60, 0.2), None);
        let source = WeightSource::Fitted {
            params: ShiftParams::new().permutations(9),
        };
        let w = obtain_weights(&source, &labeled, &pool).unwrap();
        assert!(w.labeled_calibrates().is_none());
        assert_eq!(w.calibration(&labeled).rows(), 60);
        assert_eq!(w.pool_weights().unwrap().len(), 60);
        assert!(w
            .describe()
            .starts_with("fitted by a domain classifier (logistic regression) on 1 feature (x)"));
    }
}
