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

/// The calibration-batch step (issue 14 item 4): the batch is drawn and "assayed", the
/// drawn compounds leave the pool (none can be on the exact-weight shortlist), the two
/// files rerun as an ordinary weighted selection, and batch_summary.json's figures agree
/// with pool_truth.csv. References: design.md 2.8 (weights (1 - pi) / pi), the output
/// contract in `src/cli/demo.rs`'s help, and the simulation's truth for the figures.
#[test]
fn demo_shows_the_calibration_batch_step() {
    let dir = TempDir::new().unwrap();
    let out = dir.path().join("demo");
    let output = demo(&[
        "--labeled",
        "400",
        "--pool",
        "4000",
        "--screens",
        "2",
        "--out",
        out.to_str().unwrap(),
    ]);
    let stdout = String::from_utf8_lossy(&output.stdout);
    assert!(output.status.success(), "{stdout}");
    assert!(stdout.contains("Calibration batch"), "{stdout}");

    let (assayed_header, assayed) = read_table(&out.join("batch_assayed.csv"));
    assert_eq!(
        assayed_header,
        ["id", "y", "pred", "inclusion_probability", "w"]
    );
    let (pool_header, left) = read_table(&out.join("batch_pool.csv"));
    assert_eq!(pool_header, ["id", "pred", "inclusion_probability", "w"]);
    // A batch of 300 expected (the default for a pool of 4000 is min(300, 4000 / 10)): the
    // drawn size is within 5 standard deviations (at most sqrt(300) ~ 17) of it.
    assert!(
        (assayed.len() as f64 - 300.0).abs() < 5.0 * 300f64.sqrt(),
        "{} drawn",
        assayed.len()
    );
    let (_, pool_rows) = read_table(&out.join("pool.csv"));
    let (_, truth_rows) = read_table(&out.join("pool_truth.csv"));
    let truth: std::collections::HashMap<&str, f64> = truth_rows
        .iter()
        .map(|r| (&r[0], r[1].parse().unwrap()))
        .collect();
    // Drawn and left partition the pool; the drawn units' outcomes are their true values;
    // the weights are (1 - pi) / pi.
    let drawn: std::collections::HashSet<&str> = assayed.iter().map(|r| &r[0]).collect();
    assert_eq!(drawn.len() + left.len(), pool_rows.len());
    for row in left.iter() {
        assert!(!drawn.contains(&row[0]), "{} is in both", &row[0]);
    }
    for row in assayed.iter().chain(left.iter()) {
        let n = row.len();
        let pi: f64 = row[n - 2].parse().unwrap();
        let w: f64 = row[n - 1].parse().unwrap();
        assert!(pi > 0.0 && pi < 1.0);
        assert!((w - (1.0 - pi) / pi).abs() <= 1e-12 * w.max(1.0));
    }
    for row in assayed.iter() {
        let y: f64 = row[1].parse().unwrap();
        assert!((y - truth[&row[0]]).abs() < 1e-9, "{row:?}");
    }

    // The exact-weight selection: one row per compound left in the pool; no batch unit.
    let (cand_header, cand) = read_table(&out.join("batch_candidates.csv"));
    let cand_ids: Vec<&str> = cand.iter().map(|r| &r[0]).collect();
    let left_ids: Vec<&str> = left.iter().map(|r| &r[0]).collect();
    assert_eq!(cand_ids, left_ids);
    let selected_col = column(&cand_header, "selected");
    let chosen: Vec<&str> = cand
        .iter()
        .filter(|r| &r[selected_col] == "true")
        .map(|r| &r[0])
        .collect();
    assert!(chosen.iter().all(|id| !drawn.contains(id)));

    // batch_summary.json: the figures, recomputed from pool_truth.csv.
    let summary: Value =
        serde_json::from_slice(&fs::read(out.join("batch_summary.json")).unwrap()).unwrap();
    assert_eq!(summary["design"]["design"], "ranked");
    assert_eq!(
        summary["design"]["drawn_size"].as_u64(),
        Some(assayed.len() as u64)
    );
    assert_eq!(
        summary["selection"]["selected_count"].as_u64(),
        Some(chosen.len() as u64)
    );
    assert_eq!(
        summary["selection"]["n_labeled"].as_u64(),
        Some(assayed.len() as u64)
    );
    let threshold = weighbridge::demo::THRESHOLD;
    let exact = &summary["comparison"][1];
    assert_eq!(exact["shortlist"], "calibration batch, exact weights");
    let inactive = chosen.iter().filter(|id| truth[*id] <= threshold).count();
    let active = left_ids.iter().filter(|id| truth[*id] > threshold).count();
    assert_eq!(exact["selected"].as_u64(), Some(chosen.len() as u64));
    assert_eq!(exact["truly_inactive"].as_u64(), Some(inactive as u64));
    assert_eq!(exact["pool_units"].as_u64(), Some(left.len() as u64));
    assert_eq!(
        exact["calibration_units"].as_u64(),
        Some(assayed.len() as u64)
    );
    let fdp = if chosen.is_empty() {
        0.0
    } else {
        inactive as f64 / chosen.len() as f64
    };
    let power = (chosen.len() - inactive) as f64 / active as f64;
    assert!((exact["false_discovery_proportion"].as_f64().unwrap() - fdp).abs() < 1e-12);
    assert!((exact["power"].as_f64().unwrap() - power).abs() < 1e-12);
    // The fitted-weight row describes the demo's own shortlist (candidates.csv).
    let fitted = &summary["comparison"][0];
    let main: Value = serde_json::from_slice(&fs::read(out.join("summary.json")).unwrap()).unwrap();
    assert_eq!(fitted["selected"], main["selected_count"]);
    assert_eq!(fitted["pool_units"].as_u64(), Some(4000));

    // The printed row and the report carry the same figures.
    let line = stdout
        .lines()
        .find(|l| l.starts_with("calibration batch, exact weights"))
        .unwrap_or_else(|| panic!("no printed row:\n{stdout}"));
    let cells: Vec<&str> = line.split_whitespace().collect();
    let n = cells.len();
    assert_eq!(
        cells[n - 4].parse::<usize>().unwrap(),
        chosen.len(),
        "{line}"
    );
    assert_eq!(cells[n - 3].parse::<usize>().unwrap(), inactive, "{line}");
    let html = fs::read_to_string(out.join("report.html")).unwrap();
    assert!(html.contains("id=\"calibration-batch\""));
    assert!(
        stdout.contains(weighbridge::demo::BATCH_LABEL),
        "repeated-screens row"
    );

    // The two files rerun as an ordinary weighted selection: same shortlist (same seed and
    // level as the demo's defaults).
    let rerun = dir.path().join("rerun");
    let output = Command::new(env!("CARGO_BIN_EXE_weighbridge"))
        .args([
            "select",
            "--labeled",
            out.join("batch_assayed.csv").to_str().unwrap(),
            "--pool",
            out.join("batch_pool.csv").to_str().unwrap(),
            "--threshold",
            "6.5",
            "--weight-column",
            "w",
            "--fdr",
            "0.1",
            "--quiet",
            "--out",
            rerun.to_str().unwrap(),
        ])
        .output()
        .unwrap();
    assert!(
        output.status.success(),
        "{}",
        String::from_utf8_lossy(&output.stderr)
    );
    let (rerun_header, rerun_rows) = read_table(&rerun.join("candidates.csv"));
    let rerun_selected = column(&rerun_header, "selected");
    let rerun_chosen: Vec<&str> = rerun_rows
        .iter()
        .filter(|r| &r[rerun_selected] == "true")
        .map(|r| &r[0])
        .collect();
    assert_eq!(rerun_chosen, chosen);
}

#[test]
fn demo_batch_step_can_be_skipped_and_rejects_a_size_the_pool_cannot_hold() {
    let dir = TempDir::new().unwrap();
    let out = dir.path().join("demo");
    let args = ["--labeled", "100", "--pool", "500", "--screens", "0"];
    let output = demo(
        &[
            &args[..],
            &["--batch-size", "0", "--out", out.to_str().unwrap()],
        ]
        .concat(),
    );
    assert!(output.status.success());
    assert!(!out.join("batch_summary.json").exists());
    assert!(out.join("summary.json").exists());
    let bad = dir.path().join("bad");
    let output = demo(
        &[
            &args[..],
            &["--batch-size", "400", "--out", bad.to_str().unwrap()],
        ]
        .concat(),
    );
    assert_eq!(output.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&output.stderr).contains("--batch-size"));
    assert!(!bad.exists());
}
