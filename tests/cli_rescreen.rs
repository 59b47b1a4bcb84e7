//! End-to-end tests of `weighbridge rescreen`: a previous run on the README fixtures
//! (invented demo data, fixtures/README.md) and a grown pool made by the same demo
//! generator with 1000 more pool units (its first 2000 pool rows are the fixture's, checked
//! below). Expected counts are recomputed here from the two candidates.csv files.

use std::collections::HashMap;
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

fn run(args: &[&str]) -> Output {
    Command::new(env!("CARGO_BIN_EXE_weighbridge"))
        .args(args)
        .output()
        .expect("run weighbridge")
}

fn ok(output: &Output) {
    assert!(
        output.status.success(),
        "{}",
        String::from_utf8_lossy(&output.stderr)
    );
}

fn rows(path: &Path) -> Vec<HashMap<String, String>> {
    let mut reader = csv::Reader::from_path(path).unwrap();
    let header: Vec<String> = reader.headers().unwrap().iter().map(String::from).collect();
    reader
        .records()
        .map(|r| {
            header
                .iter()
                .cloned()
                .zip(r.unwrap().iter().map(String::from))
                .collect()
        })
        .collect()
}

fn s(path: &Path) -> &str {
    path.to_str().unwrap()
}

/// The fixture pool plus 1000 new units, all predicted far below the threshold (so the
/// pool grows by units that cannot be selected and the BH line gets stricter).
fn grown_pool(dir: &Path) -> PathBuf {
    let mut text = fs::read_to_string(fixture("pool.csv")).unwrap();
    assert!(text.starts_with("id,pred,w,f1,f2,f3,f4,f5\n"));
    for i in 0..1000 {
        text.push_str(&format!("NEW-{i:04},3.0,1.0,0,0,0,0,0\n"));
    }
    let path = dir.join("grown.csv");
    fs::write(&path, text).unwrap();
    path
}

#[test]
fn rescreen_counts_agree_with_both_runs() {
    let dir = TempDir::new().unwrap();
    let pool = grown_pool(dir.path());
    let labeled = fixture("labeled.csv");
    let fixture_pool = fixture("pool.csv");
    let previous = dir.path().join("round1");
    // Round 1: plain BH on conservative p-values, no weights. Round 2: the grown pool.
    let common = [
        "--threshold",
        "6.5",
        "--procedure",
        "bh",
        "--pvalues",
        "conservative",
        "--fdr",
        "0.1",
        "--quiet",
    ];
    let mut args = vec![
        "select",
        "--labeled",
        s(&labeled),
        "--pool",
        s(&fixture_pool),
        "--out",
        s(&previous),
    ];
    args.extend(common);
    ok(&run(&args));
    let current = dir.path().join("round2");
    let mut args = vec![
        "rescreen",
        "--previous",
        s(&previous),
        "--labeled",
        s(&labeled),
        "--pool",
        s(&pool),
        "--out",
        s(&current),
    ];
    args.extend(common);
    ok(&run(&args));

    let before: HashMap<String, bool> = rows(&previous.join("candidates.csv"))
        .into_iter()
        .map(|r| (r["id"].clone(), r["selected"] == "true"))
        .collect();
    let after = rows(&current.join("candidates.csv"));
    let changes = rows(&current.join("changes.csv"));
    let report: Value =
        serde_json::from_slice(&fs::read(current.join("changes.json")).unwrap()).unwrap();
    let count = |key: &str| report[key].as_u64().unwrap() as usize;
    assert_eq!(after.len(), 3000);
    assert_eq!(changes.len(), 3000);
    assert_eq!(count("new_units"), 1000);
    assert_eq!(count("previous_pool"), 2000);
    let mut kept = 0;
    let mut dropped = 0;
    let mut newly = 0;
    let mut new_selected = 0;
    for (row, change) in after.iter().zip(&changes) {
        assert_eq!(row["id"], change["id"]);
        let now = row["selected"] == "true";
        match before.get(&row["id"]) {
            None => {
                new_selected += usize::from(now);
                assert!(change["change"].starts_with("new to the pool"));
            }
            Some(&was) => match (was, now) {
                (true, true) => kept += 1,
                (true, false) => {
                    dropped += 1;
                    assert_eq!(change["change"], "dropped");
                    assert!(!change["why"].is_empty(), "a dropped unit is explained");
                }
                (false, true) => newly += 1,
                (false, false) => {}
            },
        }
    }
    assert_eq!(count("kept"), kept);
    assert_eq!(count("dropped"), dropped);
    assert_eq!(count("newly_selected"), newly);
    assert_eq!(count("new_selected"), new_selected);
    // Same labeled set and weights: no old unit's p-value can move, so every drop is the
    // stricter BH line of the larger pool (design.md 2.3).
    assert_eq!(count("dropped_p_value_moved"), 0);
    assert_eq!(count("dropped_pool_grew"), dropped);
    assert!(
        dropped > 0,
        "the grown pool must push some marginal units out"
    );
}

#[test]
fn weights_that_move_are_named() {
    let dir = TempDir::new().unwrap();
    let labeled = fixture("labeled.csv");
    let pool = fixture("pool.csv");
    let previous = dir.path().join("given");
    ok(&run(&[
        "select",
        "--labeled",
        s(&labeled),
        "--pool",
        s(&pool),
        "--threshold",
        "6.5",
        "--weight-column",
        "w",
        "--quiet",
        "--out",
        s(&previous),
    ]));
    let current = dir.path().join("unweighted");
    ok(&run(&[
        "rescreen",
        "--previous",
        s(&previous),
        "--labeled",
        s(&labeled),
        "--pool",
        s(&pool),
        "--threshold",
        "6.5",
        "--procedure",
        "bh",
        "--pvalues",
        "conservative",
        "--quiet",
        "--out",
        s(&current),
    ]));
    let changes = rows(&current.join("changes.csv"));
    let moved: Vec<_> = changes
        .iter()
        .filter(|c| c["change"] == "dropped" || c["change"] == "newly selected")
        .collect();
    assert!(!moved.is_empty());
    for c in moved {
        assert!(c["why"].contains("weight moved"), "{c:?}");
    }
}

#[test]
fn a_missing_previous_folder_is_an_input_error() {
    let dir = TempDir::new().unwrap();
    let out = dir.path().join("out");
    let output = run(&[
        "rescreen",
        "--previous",
        s(&dir.path().join("nope")),
        "--labeled",
        s(&fixture("labeled.csv")),
        "--pool",
        s(&fixture("pool.csv")),
        "--threshold",
        "6.5",
        "--out",
        s(&out),
    ]);
    assert_eq!(output.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&output.stderr).contains("--previous"));
    assert!(!out.exists());
}
