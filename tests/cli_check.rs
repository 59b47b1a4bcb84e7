//! End-to-end tests of `weighbridge check` on the README fixtures (invented demo data, see
//! fixtures/README.md). The statistical behaviour (FDR <= q under a known shift with exact
//! weights) is checked in `src/check.rs`; here the command's contract: outputs, fields,
//! determinism, errors.

use std::fs;
use std::path::{Path, PathBuf};
use std::process::{Command, Output};

use serde_json::Value;
use tempfile::TempDir;

fn fixture(name: &str) -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("fixtures")
        .join(name)
}

fn check(out: &Path, extra: &[&str]) -> Output {
    let labeled = fixture("labeled.csv");
    let pool = fixture("pool.csv");
    Command::new(env!("CARGO_BIN_EXE_weighbridge"))
        .args(["check", "--labeled", labeled.to_str().unwrap()])
        .args(["--pool", pool.to_str().unwrap(), "--threshold", "6.5"])
        .args(["--out", out.to_str().unwrap(), "--quiet"])
        .args(extra)
        .output()
        .expect("run weighbridge")
}

#[test]
fn check_writes_results_per_procedure_and_is_reproducible() {
    let dir = TempDir::new().unwrap();
    let args = ["--features", "f1..f5", "--replicates", "12", "--fdr", "0.2"];
    let (a, b) = (dir.path().join("a"), dir.path().join("b"));
    for out in [&a, &b] {
        let output = check(out, &args);
        assert!(
            output.status.success(),
            "{}",
            String::from_utf8_lossy(&output.stderr)
        );
    }
    let bytes = fs::read(a.join("check.json")).unwrap();
    let report: Value = serde_json::from_slice(&bytes).unwrap();
    // The recorded command lines differ in --out only; everything else is the same.
    let without_command = |mut v: Value| {
        v["command_line"].take();
        v
    };
    let other: Value = serde_json::from_slice(&fs::read(b.join("check.json")).unwrap()).unwrap();
    assert_eq!(
        without_command(report.clone()),
        without_command(other),
        "same seed, same content"
    );
    assert_eq!(report["command_line"][1], "check");
    for (results, procedure) in ["results", "results_exact_weights"]
        .iter()
        .flat_map(|r| ["conditional", "bh", "unweighted"].map(|p| (*r, p)))
    {
        let r = &report[results][procedure];
        for field in [
            "fdr",
            "fdr_se",
            "power",
            "power_se",
            "mean_selected",
            "flagged_share",
            "refused_share",
        ] {
            let value = r[field]
                .as_f64()
                .unwrap_or_else(|| panic!("{procedure}.{field}"));
            assert!(value >= 0.0, "{procedure}.{field} = {value}");
        }
        assert!(r["fdr"].as_f64().unwrap() <= 1.0);
    }
    assert_eq!(report["replicates"].as_u64(), Some(12));
    assert_eq!(report["tilt"].as_str(), Some("logistic"));
    assert_eq!(report["stress_test"].as_bool(), Some(false));
    assert!(report["flags"].is_array());
    assert_eq!(report["fdr"].as_f64(), Some(0.2));
    assert!(report["reading"].as_array().unwrap().len() >= 3);
    // Rows are split between the two parts (the fixture has 300 labeled rows).
    let total = report["mean_pseudo_labeled"].as_f64().unwrap()
        + report["mean_pseudo_pool"].as_f64().unwrap();
    assert!((total - 300.0).abs() < 1e-9, "{total}");
}

#[test]
fn exact_weights_mode_runs() {
    let dir = TempDir::new().unwrap();
    let out = dir.path().join("exact");
    let output = check(
        &out,
        &[
            "--features",
            "f1..f5",
            "--replicates",
            "10",
            "--weights",
            "exact",
        ],
    );
    assert!(
        output.status.success(),
        "{}",
        String::from_utf8_lossy(&output.stderr)
    );
    let report: Value = serde_json::from_slice(&fs::read(out.join("check.json")).unwrap()).unwrap();
    assert!(report["weights"].as_str().unwrap().contains("exact"));
}

#[test]
fn bad_settings_are_input_errors_and_write_nothing() {
    let dir = TempDir::new().unwrap();
    let out = dir.path().join("bad");
    for (args, expected) in [
        (
            vec!["--features", "f1..f5", "--replicates", "1"],
            "replicates",
        ),
        (vec!["--features", "f1..f5", "--strength", "-1"], "strength"),
        (vec!["--features", "f1..f5", "--fdr", "1.5"], "--fdr"),
        (vec!["--features", "f1..f9"], "f6"),
        (vec!["--replicates", "5"], "--features"),
    ] {
        let output = check(&out, &args);
        assert_eq!(output.status.code(), Some(2), "{args:?}");
        let stderr = String::from_utf8_lossy(&output.stderr);
        assert!(stderr.contains(expected), "{args:?}: {stderr}");
        assert!(!out.exists(), "{args:?} wrote output");
    }
}

#[test]
fn stress_tests_are_labelled_and_ess_never_reads_zero_percent() {
    let dir = TempDir::new().unwrap();
    let out = dir.path().join("stress");
    let labeled = fixture("labeled.csv");
    let pool = fixture("pool.csv");
    let output = Command::new(env!("CARGO_BIN_EXE_weighbridge"))
        .args(["check", "--labeled", labeled.to_str().unwrap()])
        .args(["--pool", pool.to_str().unwrap(), "--threshold", "6.5"])
        .args(["--out", out.to_str().unwrap(), "--features", "f1..f5"])
        .args([
            "--replicates",
            "6",
            "--stress-test",
            "capped",
            "--strength",
            "3",
        ])
        .output()
        .unwrap();
    assert!(output.status.success());
    let stdout = String::from_utf8_lossy(&output.stdout);
    assert!(stdout.contains("STRESS TEST"), "{stdout}");
    assert!(!stdout.contains(" 0% of the calibrating"), "{stdout}");
    let report: Value = serde_json::from_slice(&fs::read(out.join("check.json")).unwrap()).unwrap();
    assert_eq!(report["tilt"].as_str(), Some("capped"));
    assert_eq!(report["stress_test"].as_bool(), Some(true));
}
