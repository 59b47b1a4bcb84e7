//! End-to-end tests of `weighbridge audit` on the README fixtures (invented demo data, see
//! fixtures/README.md). Expected values are recomputed here from `select`'s own outputs
//! and from the definition of BH-adjusted p-values (Benjamini & Hochberg 1995; the
//! adjusted form `min_{l >= k} m p_(l) / l`, as statsmodels' `multipletests(fdr_bh)`
//! computes it — our implementation is checked against statsmodels in
//! tests/reference_multiple_testing.rs).

use std::collections::HashMap;
use std::fs;
use std::path::{Path, PathBuf};
use std::process::{Command, Output};

use serde_json::Value;
use tempfile::TempDir;

const TOLERANCE: f64 = 1e-12; // common practice: same formula, different summation order

fn fixture(name: &str) -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("fixtures")
        .join(name)
}

fn run(args: &[&str]) -> Output {
    Command::new(env!("CARGO_BIN_EXE_weighbridge"))
        .args(args)
        .output()
        .expect("run weighbridge")
}

fn ok(output: &Output) {
    assert!(
        output.status.success(),
        "stdout {}\nstderr {}",
        String::from_utf8_lossy(&output.stdout),
        String::from_utf8_lossy(&output.stderr)
    );
}

fn rows(path: &Path) -> Vec<HashMap<String, String>> {
    let mut reader = csv::Reader::from_path(path).unwrap();
    let header: Vec<String> = reader.headers().unwrap().iter().map(String::from).collect();
    reader
        .records()
        .map(|r| {
            let r = r.unwrap();
            header
                .iter()
                .cloned()
                .zip(r.iter().map(String::from))
                .collect()
        })
        .collect()
}

fn select(out: &Path, extra: &[&str]) {
    let labeled = fixture("labeled.csv");
    let pool = fixture("pool.csv");
    let mut args = vec![
        "select",
        "--labeled",
        labeled.to_str().unwrap(),
        "--pool",
        pool.to_str().unwrap(),
        "--threshold",
        "6.5",
        "--quiet",
        "--out",
        out.to_str().unwrap(),
    ];
    args.extend_from_slice(extra);
    ok(&run(&args));
}

fn audit(shortlist: &Path, out: &Path, extra: &[&str]) -> Output {
    let labeled = fixture("labeled.csv");
    let pool = fixture("pool.csv");
    let mut args = vec![
        "audit",
        "--shortlist",
        shortlist.to_str().unwrap(),
        "--labeled",
        labeled.to_str().unwrap(),
        "--pool",
        pool.to_str().unwrap(),
        "--threshold",
        "6.5",
        "--quiet",
        "--out",
        out.to_str().unwrap(),
    ];
    args.extend_from_slice(extra);
    run(&args)
}

/// BH-adjusted p-values by the definition: sort, `m p_(k) / k`, running minimum from the top.
fn adjusted(p: &[f64]) -> Vec<f64> {
    let m = p.len();
    let mut order: Vec<usize> = (0..m).collect();
    order.sort_by(|&a, &b| p[a].total_cmp(&p[b]));
    let mut out = vec![0.0; m];
    let mut running = f64::INFINITY;
    for k in (1..=m).rev() {
        let j = order[k - 1];
        running = running.min(m as f64 * p[j] / k as f64);
        out[j] = running.min(1.0);
    }
    out
}

/// An earlier list made by unweighted BH (conservative p-values) at q = 0.2, audited with
/// the given weights: per-unit p-values equal select's, the list's levels equal the largest
/// adjusted p-values, the unweighted level is at most 0.2 (it was made that way), and
/// survivors are exactly the listed units the weighted selection selects.
#[test]
fn audit_of_an_unweighted_list() {
    let dir = TempDir::new().unwrap();
    let unweighted = dir.path().join("unweighted");
    select(
        &unweighted,
        &[
            "--procedure",
            "bh",
            "--pvalues",
            "conservative",
            "--fdr",
            "0.2",
        ],
    );
    let weighted = dir.path().join("weighted");
    select(&weighted, &["--weight-column", "w", "--fdr", "0.2"]);
    let unweighted_rows = rows(&unweighted.join("candidates.csv"));
    let weighted_rows = rows(&weighted.join("candidates.csv"));
    let listed: Vec<&str> = unweighted_rows
        .iter()
        .filter(|r| r["selected"] == "true")
        .map(|r| r["id"].as_str())
        .collect();
    assert!(
        listed.len() > 10,
        "the earlier list is too short: {}",
        listed.len()
    );
    let shortlist = dir.path().join("earlier.csv");
    fs::write(&shortlist, format!("id\n{}\n", listed.join("\n"))).unwrap();

    let out = dir.path().join("audit");
    ok(&audit(
        &shortlist,
        &out,
        &["--weight-column", "w", "--fdr", "0.2"],
    ));
    let audit_rows = rows(&out.join("audit.csv"));
    let summary: Value =
        serde_json::from_slice(&fs::read(out.join("audit.json")).unwrap()).unwrap();
    assert_eq!(audit_rows.len(), listed.len());
    assert_eq!(
        summary["listed_count"].as_u64().unwrap() as usize,
        listed.len()
    );

    let p_unweighted: Vec<f64> = unweighted_rows
        .iter()
        .map(|r| r["p_value"].parse().unwrap())
        .collect();
    let p_weighted: Vec<f64> = weighted_rows
        .iter()
        .map(|r| r["p_value"].parse().unwrap())
        .collect();
    let adj_unweighted = adjusted(&p_unweighted);
    let adj_weighted = adjusted(&p_weighted);
    let index: HashMap<&str, usize> = unweighted_rows
        .iter()
        .enumerate()
        .map(|(j, r)| (r["id"].as_str(), j))
        .collect();
    let mut level_unweighted: f64 = 0.0;
    let mut level_weighted: f64 = 0.0;
    let mut survivors = 0;
    for row in &audit_rows {
        let j = index[row["id"].as_str()];
        let pu: f64 = row["p_value_unweighted"].parse().unwrap();
        let pw: f64 = row["p_value_weighted"].parse().unwrap();
        assert!((pu - p_unweighted[j]).abs() < TOLERANCE);
        assert!((pw - p_weighted[j]).abs() < TOLERANCE);
        let lu: f64 = row["bh_level_unweighted"].parse().unwrap();
        assert!((lu - adj_unweighted[j]).abs() < TOLERANCE);
        level_unweighted = level_unweighted.max(adj_unweighted[j]);
        level_weighted = level_weighted.max(adj_weighted[j]);
        assert_eq!(row["survives"], weighted_rows[j]["selected"]);
        survivors += usize::from(row["survives"] == "true");
        let weight: f64 = row["weight"].parse().unwrap();
        assert!((weight - weighted_rows[j]["weight"].parse::<f64>().unwrap()).abs() < TOLERANCE);
    }
    let reported_unweighted = summary["fdr_level_unweighted"].as_f64().unwrap();
    let reported_weighted = summary["fdr_level_weighted"].as_f64().unwrap();
    assert!((reported_unweighted - level_unweighted).abs() < TOLERANCE);
    assert!((reported_weighted - level_weighted).abs() < TOLERANCE);
    assert!(reported_unweighted <= 0.2 * (1.0 + 1e-12));
    assert_eq!(
        summary["survivors_count"].as_u64().unwrap() as usize,
        survivors
    );
    let poorly: usize = audit_rows
        .iter()
        .filter(|r| r["poorly_covered"] == "true")
        .count();
    assert_eq!(
        summary["poorly_covered_count"].as_u64().unwrap() as usize,
        poorly
    );
}

/// Units the labeled set cannot vouch for are flagged: a listed unit that is unreachable
/// (weight floor above q, design.md 2.2) must be poorly covered with a reason.
#[test]
fn unreachable_listed_units_are_poorly_covered() {
    let dir = TempDir::new().unwrap();
    let candidates = dir.path().join("c");
    select(&candidates, &["--weight-column", "w"]);
    let unreachable: Vec<String> = rows(&candidates.join("candidates.csv"))
        .into_iter()
        .filter(|r| !r["never_selectable_because"].is_empty())
        .map(|r| r["id"].clone())
        .collect();
    assert!(
        !unreachable.is_empty(),
        "the fixtures have an unreachable unit (README)"
    );
    let shortlist = dir.path().join("list.csv");
    fs::write(
        &shortlist,
        format!("id\n{}\nLKS-P-000001\n", unreachable.join("\n")),
    )
    .unwrap();
    let out = dir.path().join("audit");
    ok(&audit(&shortlist, &out, &["--weight-column", "w"]));
    for row in rows(&out.join("audit.csv")) {
        if unreachable.contains(&row["id"]) {
            assert_eq!(row["poorly_covered"], "true");
            assert_eq!(row["unreachable"], "true");
            assert!(row["why_poorly_covered"].contains("floor"));
        }
    }
}

#[test]
fn listed_ids_missing_from_the_pool_are_skipped_and_named() {
    let dir = TempDir::new().unwrap();
    let shortlist = dir.path().join("list.csv");
    fs::write(&shortlist, "id\nLKS-P-000001\nNOT-THERE\nLKS-P-000002\n").unwrap();
    let out = dir.path().join("audit");
    let output = audit(&shortlist, &out, &["--weight-column", "w"]);
    assert_eq!(output.status.code(), Some(0), "{output:?}");
    // Without --quiet the printed summary names the skipped id.
    let labeled = fixture("labeled.csv");
    let pool = fixture("pool.csv");
    let loud_out = dir.path().join("audit-loud");
    let output = run(&[
        "audit",
        "--shortlist",
        shortlist.to_str().unwrap(),
        "--labeled",
        labeled.to_str().unwrap(),
        "--pool",
        pool.to_str().unwrap(),
        "--threshold",
        "6.5",
        "--weight-column",
        "w",
        "--out",
        loud_out.to_str().unwrap(),
    ]);
    assert_eq!(output.status.code(), Some(0), "{output:?}");
    let stdout = String::from_utf8_lossy(&output.stdout);
    assert!(
        stdout.contains("NOT-THERE") && stdout.contains("line 3"),
        "{stdout}"
    );
    let json: serde_json::Value =
        serde_json::from_str(&fs::read_to_string(out.join("audit.json")).unwrap()).unwrap();
    assert_eq!(json["unknown_ids"], serde_json::json!(["NOT-THERE"]));
    assert_eq!(json["unknown_ids_count"], 1);
    assert_eq!(json["listed_count"], 2);
    let rows = fs::read_to_string(out.join("audit.csv")).unwrap();
    assert!(!rows.contains("NOT-THERE"), "{rows}");

    // Nothing left to audit: still exit 2.
    let none = dir.path().join("none.csv");
    fs::write(&none, "id\nNOT-THERE\n").unwrap();
    let out_none = dir.path().join("audit-none");
    let output = audit(&none, &out_none, &["--weight-column", "w"]);
    assert_eq!(output.status.code(), Some(2));
    assert!(!out_none.exists());
}

#[test]
fn listed_ids_missing_from_the_pool_are_an_input_error_when_strict() {
    let dir = TempDir::new().unwrap();
    let shortlist = dir.path().join("list.csv");
    fs::write(&shortlist, "id\nLKS-P-000001\nNOT-THERE\n").unwrap();
    let out = dir.path().join("audit");
    let output = audit(
        &shortlist,
        &out,
        &["--weight-column", "w", "--unknown-ids", "error"],
    );
    assert_eq!(output.status.code(), Some(2));
    let stderr = String::from_utf8_lossy(&output.stderr);
    assert!(
        stderr.contains("NOT-THERE") && stderr.contains("line 3"),
        "{stderr}"
    );
    assert!(!out.exists());
}

#[test]
fn duplicate_and_missing_shortlist_column_are_input_errors() {
    let dir = TempDir::new().unwrap();
    let out = dir.path().join("audit");
    let duplicate = dir.path().join("dup.csv");
    fs::write(&duplicate, "id\nLKS-P-000001\nLKS-P-000001\n").unwrap();
    let output = audit(&duplicate, &out, &[]);
    assert_eq!(output.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&output.stderr).contains("already appears on line 2"));
    let wrong_column = dir.path().join("col.csv");
    fs::write(&wrong_column, "compound\nLKS-P-000001\n").unwrap();
    let output = audit(&wrong_column, &out, &[]);
    assert_eq!(output.status.code(), Some(2));
    let stderr = String::from_utf8_lossy(&output.stderr);
    assert!(
        stderr.contains("`id`") && stderr.contains("compound"),
        "{stderr}"
    );
    let empty = dir.path().join("empty.csv");
    fs::write(&empty, "id\n").unwrap();
    assert_eq!(audit(&empty, &out, &[]).status.code(), Some(2));
    assert!(!out.exists());
}

/// Fitted weights (`--fit-weights --features f1..f5`, the same flags as `select`): the
/// audit's weighted p-values equal `select --fit-weights`'s on the same data.
#[test]
fn audit_with_fitted_weights_matches_select() {
    let dir = TempDir::new().unwrap();
    let fitted = dir.path().join("fitted");
    select(
        &fitted,
        &[
            "--fit-weights",
            "--features",
            "f1..f5",
            "--permutations",
            "19",
        ],
    );
    let fitted_rows = rows(&fitted.join("candidates.csv"));
    let listed: Vec<&str> = fitted_rows
        .iter()
        .take(25)
        .map(|r| r["id"].as_str())
        .collect();
    let shortlist = dir.path().join("list.csv");
    fs::write(&shortlist, format!("id\n{}\n", listed.join("\n"))).unwrap();
    let out = dir.path().join("audit");
    ok(&audit(
        &shortlist,
        &out,
        &[
            "--fit-weights",
            "--features",
            "f1..f5",
            "--permutations",
            "19",
        ],
    ));
    let summary: Value =
        serde_json::from_slice(&fs::read(out.join("audit.json")).unwrap()).unwrap();
    assert!(
        summary["weights"].as_str().unwrap().contains("fitted"),
        "{}",
        summary["weights"]
    );
    for (row, reference) in rows(&out.join("audit.csv")).iter().zip(&fitted_rows) {
        assert_eq!(row["id"], reference["id"]);
        let pw: f64 = row["p_value_weighted"].parse().unwrap();
        let reference_p: f64 = reference["p_value"].parse().unwrap();
        assert!((pw - reference_p).abs() < TOLERANCE);
        assert!(!row["pool_probability"].is_empty());
    }
}
