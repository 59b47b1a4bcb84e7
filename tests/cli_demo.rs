//! End-to-end test of `weighbridge demo`: the real binary writes its invented scenario and
//! the weighted selection into a temporary folder; the files are parsed structurally and
//! the printed table is checked against the files it describes.
//!
//! References: the output contract of `src/cli/demo.rs` (file names, columns) and of
//! design.md section 4, the cautions of design.md section 1, and the pool's hidden true
//! outcomes (pool_truth.csv) for the counts the demo prints.

use std::fs;
use std::path::Path;
use std::process::{Command, Output};

use serde_json::Value;
use tempfile::TempDir;

fn demo(args: &[&str]) -> Output {
    Command::new(env!("CARGO_BIN_EXE_weighbridge"))
        .arg("demo")
        .args(args)
        .output()
        .expect("run the weighbridge binary")
}

fn read_table(path: &Path) -> (Vec<String>, Vec<csv::StringRecord>) {
    let mut reader = csv::Reader::from_path(path)
        .unwrap_or_else(|e| panic!("cannot read {}: {e}", path.display()));
    let header = reader
        .headers()
        .unwrap()
        .iter()
        .map(str::to_string)
        .collect();
    let rows = reader.records().map(Result::unwrap).collect();
    (header, rows)
}

fn column(header: &[String], name: &str) -> usize {
    header
        .iter()
        .position(|h| h == name)
        .unwrap_or_else(|| panic!("no column `{name}` in {header:?}"))
}

#[test]
fn demo_writes_its_inputs_and_results_and_states_the_cautions() {
    let dir = TempDir::new().unwrap();
    let out = dir.path().join("demo");
    let output = demo(&[
        "--labeled",
        "400",
        "--pool",
        "4000",
        "--out",
        out.to_str().unwrap(),
    ]);
    let stdout = String::from_utf8_lossy(&output.stdout);
    assert!(
        output.status.success(),
        "exit {:?}\nstdout:\n{stdout}\nstderr:\n{}",
        output.status.code(),
        String::from_utf8_lossy(&output.stderr)
    );
    for name in [
        "labeled.csv",
        "pool.csv",
        "pool_truth.csv",
        "candidates.csv",
        "summary.json",
    ] {
        assert!(out.join(name).is_file(), "{name} is written");
    }

    // Inputs: the documented columns and sizes.
    let (labeled_header, labeled_rows) = read_table(&out.join("labeled.csv"));
    let (pool_header, pool_rows) = read_table(&out.join("pool.csv"));
    let features = ["f1", "f2", "f3", "f4", "f5"];
    let mut expected = vec!["id", "y", "pred", "w"];
    expected.extend(features);
    assert_eq!(labeled_header, expected);
    expected.remove(1);
    assert_eq!(pool_header, expected, "the pool has no outcome");
    assert_eq!(labeled_rows.len(), 400);
    assert_eq!(pool_rows.len(), 4000);
    for (header, rows) in [(&labeled_header, &labeled_rows), (&pool_header, &pool_rows)] {
        let w = column(header, "w");
        for row in rows.iter() {
            for (i, cell) in row.iter().enumerate().skip(1) {
                let value: f64 = cell.parse().expect("numeric cell");
                assert!(value.is_finite());
                if i == w {
                    assert!(value > 0.0, "weights are positive");
                }
            }
        }
    }

    // pool_truth.csv and candidates.csv follow the pool's ids in order.
    let pool_ids: Vec<&str> = pool_rows.iter().map(|r| &r[0]).collect();
    let (truth_header, truth_rows) = read_table(&out.join("pool_truth.csv"));
    assert_eq!(truth_header, ["id", "y"]);
    let truth_ids: Vec<&str> = truth_rows.iter().map(|r| &r[0]).collect();
    assert_eq!(truth_ids, pool_ids);
    let (candidates_header, candidate_rows) = read_table(&out.join("candidates.csv"));
    let candidate_ids: Vec<&str> = candidate_rows.iter().map(|r| &r[0]).collect();
    assert_eq!(candidate_ids, pool_ids);
    let selected_column = column(&candidates_header, "selected");
    let selected: Vec<bool> = candidate_rows
        .iter()
        .map(|r| match &r[selected_column] {
            "true" => true,
            "false" => false,
            other => panic!("selected is `{other}`"),
        })
        .collect();

    // summary.json parses and agrees with the files.
    let summary: Value =
        serde_json::from_slice(&fs::read(out.join("summary.json")).unwrap()).unwrap();
    assert_eq!(summary["n_labeled"].as_u64(), Some(400));
    assert_eq!(summary["n_pool"].as_u64(), Some(4000));
    assert_eq!(summary["procedure"], "conditional");
    let selected_count = selected.iter().filter(|&&s| s).count();
    assert_eq!(
        summary["selected_count"].as_u64(),
        Some(selected_count as u64)
    );

    // The printed table's row for the weighted selection: its "selected" and "inactive"
    // counts are the shortlist's size and how many of it have a true outcome at or below
    // the demo threshold (pool_truth.csv).
    let threshold = weighbridge::demo::THRESHOLD;
    let inactive = truth_rows
        .iter()
        .zip(&selected)
        .filter(|(row, &s)| s && row[1].parse::<f64>().unwrap() <= threshold)
        .count();
    let line = stdout
        .lines()
        .find(|l| l.starts_with("conditional calibration, weighted"))
        .unwrap_or_else(|| panic!("no row for the weighted selection:\n{stdout}"));
    let numbers: Vec<&str> = line.split_whitespace().rev().take(3).collect();
    assert_eq!(
        numbers[2].parse::<usize>().unwrap(),
        selected_count,
        "{line}"
    );
    assert_eq!(numbers[1].parse::<usize>().unwrap(), inactive, "{line}");

    // The cautions of design.md section 1.
    assert!(stdout.contains("Cautions"), "{stdout}");
    for phrase in [
        "average over repeated screens",
        "covariate shift",
        "not chosen by looking at the outcome",
        "Estimated weights add error",
        "not a safety, clinical or regulatory decision",
        "fairness review",
    ] {
        assert!(
            stdout.contains(phrase),
            "stdout lacks `{phrase}`:\n{stdout}"
        );
    }
    assert!(stdout.contains("invented"), "says the data are invented");
}

#[test]
fn demo_rejects_a_tiny_scenario_without_writing() {
    let dir = TempDir::new().unwrap();
    let out = dir.path().join("demo");
    let output = demo(&["--labeled", "3", "--out", out.to_str().unwrap()]);
    assert_eq!(output.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&output.stderr).contains("--labeled"));
    assert!(!out.exists());
}
