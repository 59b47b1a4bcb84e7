//! The pruning draw's consequences, the resolution diagnostic and the q-values, as the
//! binary writes them (candidates.csv, summary.json), on the README example.
//!
//! References:
//! - exact draw quantities: recomputed here by brute force from candidates.csv's own
//!   `first_step` and `conditional_count` columns (the pruning rule of design.md 2.4 applied
//!   on a fine grid of draws), and against the share of non-empty shortlists over 40 seeds
//!   (binomial error);
//! - `resolution.floor_count`: a direct count from the input files (pool prediction above
//!   every labeled inactive's prediction: the clipped score's floor, design.md 2.1-2.2);
//! - `q_value`, `q_value_by`: statsmodels 0.15.0 `multipletests(method="fdr_bh" / "fdr_by")`
//!   on numpy's conservative weighted p-values (tests/data/qvalue_statsmodels.csv, made by
//!   tests/scripts/make_qvalue_fixture.py).

use std::path::{Path, PathBuf};
use std::process::Command;

use serde_json::Value;
use tempfile::TempDir;

const THRESHOLD: f64 = 6.5;

fn fixture(name: &str) -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("fixtures")
        .join(name)
}

fn run_select(out: &Path, flags: &str) {
    let output = Command::new(env!("CARGO_BIN_EXE_weighbridge"))
        .arg("select")
        .arg("--labeled")
        .arg(fixture("labeled.csv"))
        .arg("--pool")
        .arg(fixture("pool.csv"))
        .arg("--out")
        .arg(out)
        .args(["--threshold", "6.5", "--weight-column", "w"])
        .args(if flags.contains("--fdr") {
            vec![]
        } else {
            vec!["--fdr", "0.1"]
        })
        .args(flags.split_whitespace())
        .output()
        .expect("run the weighbridge binary");
    assert!(
        output.status.success(),
        "stderr: {}",
        String::from_utf8_lossy(&output.stderr)
    );
}

/// A CSV file as (header, rows).
fn read_csv(path: &Path) -> (Vec<String>, Vec<Vec<String>>) {
    let mut reader = csv::Reader::from_path(path).expect("open csv");
    let header = reader
        .headers()
        .expect("header")
        .iter()
        .map(String::from)
        .collect();
    let rows = reader
        .records()
        .map(|r| r.expect("row").iter().map(String::from).collect())
        .collect();
    (header, rows)
}

fn column(header: &[String], rows: &[Vec<String>], name: &str) -> Vec<String> {
    let i = header
        .iter()
        .position(|h| h == name)
        .unwrap_or_else(|| panic!("no column {name}"));
    rows.iter().map(|r| r[i].clone()).collect()
}

fn numbers(cells: &[String]) -> Vec<f64> {
    cells
        .iter()
        .map(|c| c.parse::<f64>().expect("number"))
        .collect()
}

fn summary(out: &Path) -> Value {
    serde_json::from_slice(&std::fs::read(out.join("summary.json")).expect("summary")).unwrap()
}

/// r*(xi) of homogeneous pruning (design.md 2.4) and which units it keeps.
fn prune(first: &[bool], counts: &[f64], xi: f64) -> Vec<bool> {
    let mut keys: Vec<f64> = (0..first.len())
        .filter(|&j| first[j])
        .map(|j| xi * counts[j])
        .collect();
    keys.sort_by(f64::total_cmp);
    let r = (1..=keys.len())
        .rev()
        .find(|&r| keys[r - 1] <= r as f64)
        .unwrap_or(0);
    (0..first.len())
        .map(|j| first[j] && xi * counts[j] <= r as f64)
        .collect()
}

#[test]
fn homogeneous_draw_matches_brute_force_and_seed_frequencies() {
    let dir = TempDir::new().unwrap();
    let out = dir.path().join("out");
    run_select(&out, "");
    let (header, rows) = read_csv(&out.join("candidates.csv"));
    let first: Vec<bool> = column(&header, &rows, "first_step")
        .iter()
        .map(|c| c == "true")
        .collect();
    let counts = numbers(&column(&header, &rows, "conditional_count"));
    let probability = numbers(&column(&header, &rows, "selection_probability"));
    let s = summary(&out);
    let draw = &s["draw"];

    // Brute force over 20,000 grid midpoints of xi; boundaries r / K fall in at most one
    // cell per distinct K, so the tolerance is that many cells.
    let grid = 20_000;
    let m = first.len();
    let mut unit = vec![0.0; m];
    let mut empty = 0.0;
    let mut mean = 0.0;
    for g in 0..grid {
        let xi = (g as f64 + 0.5) / grid as f64;
        let kept = prune(&first, &counts, xi);
        let size = kept.iter().filter(|&&k| k).count();
        if size == 0 {
            empty += 1.0 / grid as f64;
        }
        mean += size as f64 / grid as f64;
        for j in 0..m {
            if kept[j] {
                unit[j] += 1.0 / grid as f64;
            }
        }
    }
    let mut distinct: Vec<u64> = counts.iter().map(|&k| k as u64).collect();
    distinct.sort_unstable();
    distinct.dedup();
    let tol = distinct.len() as f64 / grid as f64 + 1e-12;
    let empty_probability = draw["empty_probability"].as_f64().unwrap();
    assert!(
        (empty - empty_probability).abs() <= tol,
        "{empty} vs {empty_probability}"
    );
    let expected = draw["expected_selected_count"].as_f64().unwrap();
    assert!(
        (mean - expected).abs() <= m as f64 * tol,
        "{mean} vs {expected}"
    );
    for j in 0..m {
        assert!((unit[j] - probability[j]).abs() <= tol, "unit {j}");
    }
    // Exactly (1e-9): every K of the first step is equal here, so the shortlist is all of
    // R1 with probability |R1| / K (design.md 2.4, the README example: 83 / 285).
    let r1: Vec<f64> = (0..m).filter(|&j| first[j]).map(|j| counts[j]).collect();
    assert!(!r1.is_empty());
    if r1.iter().all(|&k| k == r1[0]) {
        let p = (r1.len() as f64 / r1[0]).min(1.0);
        assert!((empty_probability - (1.0 - p)).abs() < 1e-9);
        assert!((expected - p * r1.len() as f64).abs() < 1e-9);
    }
    let sizes = draw["sizes"].as_array().unwrap();
    let total: f64 = sizes
        .iter()
        .map(|x| x["probability"].as_f64().unwrap())
        .sum();
    assert!((total - 1.0).abs() < 1e-12);

    // Over 40 seeds, the share of non-empty shortlists agrees with 1 - empty_probability
    // within 3 binomial standard errors.
    let seeds = 40;
    let mut non_empty = 0;
    for seed in 1..=seeds {
        let out = dir.path().join(format!("seed{seed}"));
        run_select(&out, &format!("--seed {seed}"));
        let s = summary(&out);
        // The p-values and first step do not depend on the seed (conservative p-values).
        assert_eq!(
            s["draw"]["empty_probability"].as_f64().unwrap(),
            empty_probability
        );
        if s["selected_count"].as_u64().unwrap() > 0 {
            non_empty += 1;
        }
    }
    let p = 1.0 - empty_probability;
    let se = (p * (1.0 - p) / seeds as f64).sqrt();
    let share = non_empty as f64 / seeds as f64;
    assert!(
        (share - p).abs() <= 3.0 * se + 1e-12,
        "{share} vs {p} +- {se}"
    );
}

#[test]
fn floor_count_is_a_direct_count() {
    let dir = TempDir::new().unwrap();
    let out = dir.path().join("out");
    run_select(&out, "");
    let (lh, lrows) = read_csv(&fixture("labeled.csv"));
    let (ph, prows) = read_csv(&fixture("pool.csv"));
    let y = numbers(&column(&lh, &lrows, "y"));
    let mu = numbers(&column(&lh, &lrows, "pred"));
    // Clipped score: labeled V = c - mu for inactives (y <= c), +inf for actives; a pool
    // unit is at its floor when c - mu_j is below every labeled score.
    let smallest = y
        .iter()
        .zip(&mu)
        .filter(|(&y, _)| y <= THRESHOLD)
        .map(|(_, &m)| THRESHOLD - m)
        .fold(f64::INFINITY, f64::min);
    let direct = numbers(&column(&ph, &prows, "pred"))
        .iter()
        .filter(|&&p| THRESHOLD - p < smallest)
        .count();
    let s = summary(&out);
    assert_eq!(
        s["resolution"]["floor_count"].as_u64().unwrap() as usize,
        direct
    );
    // The README example: 285 pool units (from the run that found the resolution limit).
    assert_eq!(direct, 285);
    // bh_needs_at_least = ceil(m * smallest floor / q) (design.md 2.2 floor).
    let w = numbers(&column(&ph, &prows, "w"));
    let total: f64 = numbers(&column(&lh, &lrows, "w")).iter().sum();
    let wmin = w.iter().copied().fold(f64::INFINITY, f64::min);
    let floor = wmin / (total + wmin);
    let needs = (w.len() as f64 * floor / 0.1).ceil() as u64;
    assert_eq!(
        s["resolution"]["bh_needs_at_least"].as_u64().unwrap(),
        needs
    );
    assert!((s["resolution"]["smallest_floor_pvalue"].as_f64().unwrap() - floor).abs() < 1e-15);
}

#[test]
fn q_values_match_statsmodels() {
    let reference = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/data/qvalue_statsmodels.csv");
    let (rh, rrows) = read_csv(&reference);
    let dir = TempDir::new().unwrap();
    for (procedure, column_name, reference_column) in [
        ("conditional", "q_value", "q_value_bh"),
        ("by", "q_value_by", "q_value_by"),
    ] {
        let out = dir.path().join(procedure);
        run_select(
            &out,
            &format!("--procedure {procedure} --pvalues conservative"),
        );
        let (header, rows) = read_csv(&out.join("candidates.csv"));
        assert_eq!(column(&header, &rows, "id"), column(&rh, &rrows, "id"));
        let p = numbers(&column(&header, &rows, "p_value"));
        let p_ref = numbers(&column(&rh, &rrows, "p_value"));
        let got = numbers(&column(&header, &rows, column_name));
        let want = numbers(&column(&rh, &rrows, reference_column));
        for j in 0..p.len() {
            assert!(
                (p[j] - p_ref[j]).abs() <= 1e-12 * p_ref[j].max(1e-300),
                "p {j}"
            );
            assert!(
                (got[j] - want[j]).abs() <= 1e-12,
                "{column_name} {j}: {} vs {}",
                got[j],
                want[j]
            );
        }
    }
    // Outside BY runs the BY column is empty.
    let (header, rows) = read_csv(&dir.path().join("conditional").join("candidates.csv"));
    assert!(column(&header, &rows, "q_value_by")
        .iter()
        .all(String::is_empty));
}

#[test]
fn level_curve_entries_equal_separate_runs() {
    // Reference: the same binary run separately at each level (conditional calibration's
    // own draw summary, and --procedure bh's selected count).
    let dir = TempDir::new().unwrap();
    let out = dir.path().join("curve");
    run_select(&out, "");
    let s = summary(&out);
    let curve = s["level_curve"]
        .as_array()
        .expect("level_curve for a small pool");
    let levels: Vec<f64> = curve.iter().map(|p| p["fdr"].as_f64().unwrap()).collect();
    assert_eq!(levels, vec![0.05, 0.1, 0.2, 0.3, 0.5]);
    for point in curve {
        let q = point["fdr"].as_f64().unwrap();
        let conditional = dir.path().join(format!("c{q}"));
        run_select(&conditional, &format!("--fdr {q}"));
        let c = summary(&conditional);
        let expected = c["draw"]["expected_selected_count"].as_f64().unwrap();
        assert!((point["conditional_expected_count"].as_f64().unwrap() - expected).abs() < 1e-9);
        let empty = c["draw"]["empty_probability"].as_f64().unwrap();
        assert!((point["conditional_empty_probability"].as_f64().unwrap() - empty).abs() < 1e-9);
        let bh = dir.path().join(format!("b{q}"));
        run_select(&bh, &format!("--fdr {q} --procedure bh"));
        assert_eq!(point["bh_count"], summary(&bh)["selected_count"], "q = {q}");
    }
    // stable_levels lists exactly the levels whose shortlist does not depend on the draw.
    let stable: Vec<f64> = curve
        .iter()
        .filter(|p| p["conditional_fixed"].as_bool().unwrap())
        .map(|p| p["fdr"].as_f64().unwrap())
        .collect();
    let listed: Vec<f64> = s["resolution"]["stable_levels"]
        .as_array()
        .unwrap()
        .iter()
        .map(|v| v.as_f64().unwrap())
        .collect();
    assert_eq!(stable, listed);
}
