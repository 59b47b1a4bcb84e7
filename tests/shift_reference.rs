//! The shift module against outside references, read from tests/data/shift_reference.json
//! (made by tests/scripts/make_shift_fixtures.py with numpy 2.2.6, scikit-learn 1.6.1,
//! arviz 0.22.0; seed in the file) and against linfa-logistic 0.8 run here.

use linfa::prelude::*;
use linfa_logistic::LogisticRegression;
use ndarray::{Array1, Array2};
use serde_json::Value;
use weighbridge::shift::{
    assess_shift_with, fit_logistic, kish_effective_sample_size, pareto_khat, roc_auc,
    standardized_mean_difference, Design, Expansion, FeatureView, LogisticParams, ShiftParams,
};

/// Tolerances, in one place.
mod tol {
    /// Coefficients vs scikit-learn lbfgs at tol 1e-10 (both solvers near machine accuracy;
    /// lbfgs stops on the projected gradient of the mean loss, which bounds the error).
    pub const SKLEARN_COEF: f64 = 1e-6;
    /// Coefficients vs linfa-logistic 0.8: its L-BFGS (argmin) stops on the gradient norm of
    /// the summed loss and reports no convergence flag, so agreement is only as good as its
    /// stopping rule (gradient_tolerance 1e-8 here; observed differences about 2e-8).
    pub const LINFA_COEF: f64 = 1e-6;
    /// AUC and DeLong variance: same arithmetic, different summation order.
    pub const AUC: f64 = 1e-12;
    /// k-hat vs arviz psislw: same algorithm, different summation order.
    pub const KHAT: f64 = 1e-9;
    /// SMD and ESS vs numpy hand computation.
    pub const SMD: f64 = 1e-10;
}

fn fixture() -> Value {
    let path = concat!(
        env!("CARGO_MANIFEST_DIR"),
        "/tests/data/shift_reference.json"
    );
    serde_json::from_str(&std::fs::read_to_string(path).expect("fixture present")).expect("json")
}

fn floats(v: &Value) -> Vec<f64> {
    v.as_array()
        .unwrap()
        .iter()
        .map(|x| x.as_f64().unwrap())
        .collect()
}

struct Tables {
    names: Vec<String>,
    labeled: Vec<f64>,
    pool: Vec<f64>,
    n0: usize,
    n1: usize,
}

fn tables(f: &Value) -> Tables {
    let l = &f["logistic"];
    Tables {
        names: l["names"]
            .as_array()
            .unwrap()
            .iter()
            .map(|s| s.as_str().unwrap().to_string())
            .collect(),
        labeled: floats(&l["labeled"]),
        pool: floats(&l["pool"]),
        n0: l["labeled_rows"].as_u64().unwrap() as usize,
        n1: l["pool_rows"].as_u64().unwrap() as usize,
    }
}

fn design(t: &Tables, expansion: Expansion) -> Design {
    let lv = FeatureView::new(&t.labeled, t.n0, &t.names).unwrap();
    let pv = FeatureView::new(&t.pool, t.n1, &t.names).unwrap();
    let lrows: Vec<usize> = (0..t.n0).collect();
    let prows: Vec<usize> = (0..t.n1).collect();
    Design::build(lv, pv, &lrows, &prows, expansion).unwrap()
}

#[test]
fn logistic_fit_matches_scikit_learn() {
    // scikit-learn 1.6.1 LogisticRegression(C = 1/alpha, solver="lbfgs", tol=1e-10) on
    // StandardScaler'd features, with and without sample weights, with squared features.
    let f = fixture();
    let t = tables(&f);
    for case in f["logistic"]["cases"].as_array().unwrap() {
        let alpha = case["alpha"].as_f64().unwrap();
        let expansion = match case["expansion"].as_str().unwrap() {
            "none" => Expansion::None,
            "squares" => Expansion::Squares,
            other => panic!("unknown expansion {other}"),
        };
        let d = design(&t, expansion);
        assert_eq!(d.dropped(), &["flat".to_string()]);
        let n = d.n_fit_rows();
        let y: Vec<bool> = (0..n).map(|r| r >= t.n0).collect();
        let s: Vec<f64> = y
            .iter()
            .map(|&p| {
                if p {
                    case["pool_sample_weight"].as_f64().unwrap()
                } else {
                    case["labeled_sample_weight"].as_f64().unwrap()
                }
            })
            .collect();
        let params = LogisticParams::default()
            .alpha(alpha)
            .tolerance(1e-12)
            .check()
            .unwrap();
        let model = fit_logistic(d.fit_matrix(), n, &y, Some(&s), &params).unwrap();
        assert!(
            model.report().converged,
            "alpha {alpha}: {:?}",
            model.report()
        );
        let expected = floats(&case["coefficients"]);
        assert_eq!(model.coefficients().len(), expected.len());
        for (j, (got, want)) in model.coefficients().iter().zip(&expected).enumerate() {
            assert!(
                (got - want).abs() < tol::SKLEARN_COEF,
                "alpha {alpha} {expansion:?} coefficient {j}: {got} vs scikit-learn {want}"
            );
        }
    }
}

#[test]
fn assess_shift_reports_the_scikit_learn_fit() {
    // The one-call entry point in "all rows" mode fits with unit sample weights, so its
    // reported coefficients are scikit-learn 1.6.1's for alpha = 1 (first fixture case).
    let f = fixture();
    let t = tables(&f);
    let case = &f["logistic"]["cases"][0];
    assert_eq!(case["alpha"].as_f64(), Some(1.0));
    let a = assess_shift_with(
        FeatureView::new(&t.labeled, t.n0, &t.names).unwrap(),
        FeatureView::new(&t.pool, t.n1, &t.names).unwrap(),
        ShiftParams::new().tolerance(1e-12).permutations(99),
    )
    .unwrap();
    let expected = floats(&case["coefficients"]);
    for (got, want) in a.summary.fit.coefficients.iter().zip(&expected) {
        assert!((got - want).abs() < tol::SKLEARN_COEF, "{got} vs {want}");
    }
    assert_eq!(
        a.summary.fit.dropped_constant_columns,
        vec!["flat".to_string()]
    );
    // shift.json fields exist with the documented names.
    let json = serde_json::to_value(&a.summary).unwrap();
    for key in [
        "auc",
        "auc_ci",
        "permutation_p",
        "ess",
        "ess_fraction",
        "khat",
        "unreachable_count",
        "converged",
        "iterations",
        "warnings",
    ] {
        assert!(json.get(key).is_some(), "shift.json lacks {key}");
    }
    // ESS is exactly Kish's formula on the reported calibration weights.
    let w = &a.labeled.weight;
    let by_hand = w.iter().sum::<f64>().powi(2) / w.iter().map(|v| v * v).sum::<f64>();
    assert!((a.summary.ess - by_hand).abs() < 1e-9 * by_hand);
}

#[test]
fn logistic_fit_agrees_with_linfa_logistic() {
    // linfa-logistic 0.8.1 minimizes sum log-loss + alpha/2 |slopes|^2 with an unpenalized
    // intercept: the same objective as ours with the same alpha. Its probabilities refer to
    // the larger class, which is the pool here (450 > 300 rows); checked below.
    let f = fixture();
    let t = tables(&f);
    let d = design(&t, Expansion::None);
    let n = d.n_fit_rows();
    let k = d.n_terms();
    let x = d.fit_matrix();
    let records = Array2::from_shape_fn((n, k), |(r, j)| x[(j + 1) * n + r]);
    let targets: Array1<bool> = (0..n).map(|r| r >= t.n0).collect();
    for alpha in [1.0, 25.0] {
        let linfa_model = LogisticRegression::default()
            .alpha(alpha)
            .gradient_tolerance(1e-8)
            .max_iterations(10_000)
            .fit(&Dataset::new(records.clone(), targets.clone()))
            .unwrap();
        assert!(
            linfa_model.labels().pos.class,
            "linfa's positive class must be the pool"
        );
        let ours = LogisticParams::default()
            .alpha(alpha)
            .check()
            .unwrap()
            .fit(&Dataset::new(records.clone(), targets.clone()))
            .unwrap();
        assert!((ours.coefficients()[0] - linfa_model.intercept()).abs() < tol::LINFA_COEF);
        for (a, b) in ours.coefficients()[1..].iter().zip(linfa_model.params()) {
            assert!(
                (a - b).abs() < tol::LINFA_COEF,
                "alpha {alpha}: {a} vs linfa {b}"
            );
        }
    }
}

#[test]
fn auc_matches_roc_auc_score_with_ties() {
    // sklearn.metrics.roc_auc_score 1.6.1, and the DeLong variance from its O(n0 n1)
    // definition in numpy (DeLong, DeLong & Clarke-Pearson 1988).
    let f = fixture();
    for case in f["auc"].as_array().unwrap() {
        let scores = floats(&case["scores"]);
        let pos: Vec<bool> = case["positive"]
            .as_array()
            .unwrap()
            .iter()
            .map(|b| b.as_bool().unwrap())
            .collect();
        let est = roc_auc(&scores, &pos).unwrap();
        let want = case["roc_auc_score"].as_f64().unwrap();
        assert!((est.auc - want).abs() < tol::AUC, "{} vs {want}", est.auc);
        let var = case["delong_variance"].as_f64().unwrap();
        assert!(
            (est.variance - var).abs() < tol::AUC,
            "{} vs {var}",
            est.variance
        );
    }
}

#[test]
fn khat_matches_arviz_psislw() {
    // arviz 0.22.0 az.psislw(log_w, reff=1.0)[1]; null in the file means inf.
    let f = fixture();
    for case in f["khat"].as_array().unwrap() {
        let name = case["name"].as_str().unwrap();
        let got = pareto_khat(&floats(&case["log_weights"])).unwrap();
        match case["khat"].as_f64() {
            Some(want) => assert!(
                (got - want).abs() < tol::KHAT,
                "{name}: {got} vs arviz {want}"
            ),
            None => assert!(got.is_infinite(), "{name}: {got} vs arviz inf"),
        }
    }
}

#[test]
fn smd_and_ess_match_hand_computation() {
    // numpy 2.2.6 by hand: Austin (2009) SMD, weighted variance with S/(S^2 - sum w^2)
    // (Austin & Stuart 2015); Kish (1965) ESS.
    let f = fixture();
    for case in f["smd"].as_array().unwrap() {
        let lab = floats(&case["labeled"]);
        let pool = floats(&case["pool"]);
        let w = floats(&case["weights"]);
        let u = standardized_mean_difference(&lab, None, &pool);
        let wt = standardized_mean_difference(&lab, Some(&w), &pool);
        assert!((u - case["smd_unweighted"].as_f64().unwrap()).abs() < tol::SMD);
        assert!((wt - case["smd_weighted"].as_f64().unwrap()).abs() < tol::SMD);
        let ess = kish_effective_sample_size(&w).unwrap();
        assert!((ess - case["ess"].as_f64().unwrap()).abs() < tol::SMD * ess);
    }
}
