//! Refusal of unreliable fitted weights (design.md 2.9, src/shift/reliability.rs): exit code
//! 3 and nothing written; `--allow-unreliable-weights` runs and marks every output; given
//! weights are never refused; `shift` reports what `select` would do.
//!
//! The data are invented here (seeded): a labeled set around 0 and a pool around 3.5 in one
//! of two features, so that a domain classifier separates them almost perfectly (AUC > 0.99,
//! Kish ESS about 1% of the labeled rows, k-hat above 1: a textbook no-overlap case).

use std::fmt::Write as _;
use std::fs;
use std::path::{Path, PathBuf};
use std::process::{Command, Output};

use rand::SeedableRng;
use rand_distr::{Distribution, StandardNormal};
use serde_json::Value;
use tempfile::TempDir;

/// Writes labeled.csv and pool.csv with the pool's f1 centred at `pool_mean`; both files
/// carry a weight column `w` equal to the true density ratio exp(mu f1 - mu^2 / 2).
fn write_case(dir: &Path, pool_mean: f64, seed: u64) -> (PathBuf, PathBuf) {
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(seed);
    let mut draw = || -> f64 { StandardNormal.sample(&mut rng) };
    let ratio = |f1: f64| (pool_mean * f1 - pool_mean * pool_mean / 2.0).exp();
    let mut labeled = String::from("id,y,pred,w,f1,f2\n");
    for i in 0..500 {
        let (a, b) = (draw(), draw());
        let y = a + b + draw();
        let _ = writeln!(
            labeled,
            "L{i},{y:.5},{:.5},{:e},{a:.5},{b:.5}",
            a + b,
            ratio(a)
        );
    }
    let mut pool = String::from("id,pred,w,f1,f2\n");
    for i in 0..1500 {
        let (a, b) = (pool_mean + draw(), draw());
        let _ = writeln!(pool, "P{i},{:.5},{:e},{a:.5},{b:.5}", a + b, ratio(a));
    }
    let (l, p) = (dir.join("labeled.csv"), dir.join("pool.csv"));
    fs::write(&l, labeled).unwrap();
    fs::write(&p, pool).unwrap();
    (l, p)
}

fn run(command: &str, labeled: &Path, pool: &Path, out: &Path, extra: &[&str]) -> Output {
    Command::new(env!("CARGO_BIN_EXE_weighbridge"))
        .arg(command)
        .args(["--labeled", labeled.to_str().unwrap()])
        .args(["--pool", pool.to_str().unwrap()])
        .args(["--outcome", "y", "--prediction", "pred", "--id", "id"])
        .args(["--threshold", "2", "--out", out.to_str().unwrap()])
        .args(extra)
        .output()
        .expect("run weighbridge")
}

const FIT: [&str; 3] = ["--fit-weights", "--features", "f1,f2"];

#[test]
fn near_separable_fitted_weights_are_refused_with_exit_3_and_nothing_written() {
    let dir = TempDir::new().unwrap();
    let (labeled, pool) = write_case(dir.path(), 3.5, 1);
    let out = dir.path().join("out");
    let o = run("select", &labeled, &pool, &out, &FIT);
    let stderr = String::from_utf8_lossy(&o.stderr);
    assert_eq!(o.status.code(), Some(3), "{stderr}");
    assert!(!out.exists(), "a refused run writes nothing");
    // The message names each diagnostic, its value and threshold, and what to try.
    assert!(stderr.starts_with("refused:"), "{stderr}");
    for needle in [
        "auc",
        "AUC 0.99",
        "threshold",
        "--classifier boosted",
        "--allow-unreliable-weights",
    ] {
        assert!(stderr.contains(needle), "missing {needle}: {stderr}");
    }
    assert!(o.stdout.is_empty());
}

#[test]
fn allowing_unreliable_weights_runs_and_marks_every_output() {
    let dir = TempDir::new().unwrap();
    let (labeled, pool) = write_case(dir.path(), 3.5, 1);
    let out = dir.path().join("out");
    let mut args = FIT.to_vec();
    args.extend(["--allow-unreliable-weights", "--report"]);
    let o = run("select", &labeled, &pool, &out, &args);
    assert_eq!(
        o.status.code(),
        Some(0),
        "{}",
        String::from_utf8_lossy(&o.stderr)
    );
    let stdout = String::from_utf8_lossy(&o.stdout);
    assert!(stdout.contains("UNRELIABLE WEIGHTS"), "{stdout}");
    let summary: Value =
        serde_json::from_slice(&fs::read(out.join("summary.json")).unwrap()).unwrap();
    let mark = &summary["unreliable_weights"];
    assert_eq!(mark["allowed_by"], "--allow-unreliable-weights");
    let reasons: Vec<&str> = mark["reasons"]
        .as_array()
        .unwrap()
        .iter()
        .map(|r| r["diagnostic"].as_str().unwrap())
        .collect();
    assert!(reasons.contains(&"auc"), "{reasons:?}");
    for r in mark["reasons"].as_array().unwrap() {
        assert!(r["value"].is_number() && r["threshold"].is_number());
    }
    assert_eq!(summary["shift"]["refusal_reasons"], mark["reasons"]);
    let csv = fs::read_to_string(out.join("candidates.csv")).unwrap();
    let mut reader = csv::Reader::from_reader(csv.as_bytes());
    let header = reader.headers().unwrap().clone();
    // Where it was added (the twelfth column); later columns come after it.
    let column = header
        .iter()
        .position(|h| h == "unreliable_weights")
        .unwrap();
    assert_eq!(column, 11, "{header:?}");
    assert!(reader.records().all(|r| &r.unwrap()[column] == "true"));
    let html = fs::read_to_string(out.join("report.html")).unwrap();
    assert!(html.contains("UNRELIABLE WEIGHTS"));
}

#[test]
fn allowed_run_with_no_reachable_unit_writes_an_empty_shortlist_and_says_why() {
    let dir = TempDir::new().unwrap();
    let (labeled, pool) = write_case(dir.path(), 9.0, 2);
    let out = dir.path().join("out");
    let refused = run("select", &labeled, &pool, &out, &FIT);
    assert_eq!(refused.status.code(), Some(3));
    let mut args = FIT.to_vec();
    args.push("--allow-unreliable-weights");
    let o = run("select", &labeled, &pool, &out, &args);
    assert_eq!(
        o.status.code(),
        Some(0),
        "{}",
        String::from_utf8_lossy(&o.stderr)
    );
    let summary: Value =
        serde_json::from_slice(&fs::read(out.join("summary.json")).unwrap()).unwrap();
    assert_eq!(summary["selected_count"], 0);
    assert_eq!(summary["unreachable_count"], 1500);
    let warnings = summary["warnings"].to_string();
    assert!(
        warnings.contains("no pool unit can be selected") && warnings.contains("overlap"),
        "{warnings}"
    );
}

#[test]
fn given_weights_are_not_refused() {
    // The same sets with their true density ratio as given weights: the guarantee holds
    // with the true ratio whatever its effective sample size (design.md 2.9).
    let dir = TempDir::new().unwrap();
    let (labeled, pool) = write_case(dir.path(), 3.5, 1);
    let out = dir.path().join("out");
    let o = run("select", &labeled, &pool, &out, &["--weight-column", "w"]);
    assert_eq!(
        o.status.code(),
        Some(0),
        "{}",
        String::from_utf8_lossy(&o.stderr)
    );
    let summary: Value =
        serde_json::from_slice(&fs::read(out.join("summary.json")).unwrap()).unwrap();
    assert!(summary["unreliable_weights"].is_null());
}

#[test]
fn rescreen_refuses_too_and_shift_reports_what_select_would_do() {
    let dir = TempDir::new().unwrap();
    let (labeled, pool) = write_case(dir.path(), 3.5, 1);
    let first = dir.path().join("round1");
    let o = run("select", &labeled, &pool, &first, &["--weight-column", "w"]);
    assert!(o.status.success());
    let out = dir.path().join("round2");
    let mut args = vec!["--previous", first.to_str().unwrap()];
    args.extend(FIT);
    let o = run("rescreen", &labeled, &pool, &out, &args);
    assert_eq!(
        o.status.code(),
        Some(3),
        "{}",
        String::from_utf8_lossy(&o.stderr)
    );
    assert!(!out.exists());

    let shift_out = dir.path().join("shift");
    let o = Command::new(env!("CARGO_BIN_EXE_weighbridge"))
        .arg("shift")
        .args(["--labeled", labeled.to_str().unwrap()])
        .args(["--pool", pool.to_str().unwrap(), "--id", "id"])
        .args(["--features", "f1,f2", "--out", shift_out.to_str().unwrap()])
        .args(["--permutations", "19"])
        .output()
        .unwrap();
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    let report: Value =
        serde_json::from_slice(&fs::read(shift_out.join("shift.json")).unwrap()).unwrap();
    let reasons = report["refusal_reasons"].as_array().unwrap();
    assert!(
        reasons.iter().any(|r| r["diagnostic"] == "auc"),
        "{reasons:?}"
    );
}
