//! End-to-end tests of how inputs are read: a named pipe, `-` for standard input, a sparse
//! file of 8 GB, oversized cells in messages, ids in both files, control characters in ids.
//!
//! The real binary runs in a temporary folder. Expected behaviour is the contract of issue
//! 11 and design.md section 4 (exit 2 with a located message and no output folder on bad
//! input); the inputs are the README's fixtures (invented demo data, fixtures/README.md).

use std::fs;
use std::io::Write;
use std::path::{Path, PathBuf};
use std::process::{Command, Output, Stdio};

use serde_json::Value;
use tempfile::TempDir;

fn weighbridge() -> Command {
    Command::new(env!("CARGO_BIN_EXE_weighbridge"))
}

fn fixture(name: &str) -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("fixtures")
        .join(name)
}

/// `select` on the fixtures with `labeled` and `pool` as given, into `out`.
fn select(labeled: &Path, pool: &Path, out: &Path) -> Command {
    let mut command = weighbridge();
    command
        .arg("select")
        .arg("--labeled")
        .arg(labeled)
        .arg("--pool")
        .arg(pool)
        .args(["--threshold", "6.5", "--quiet", "--out"])
        .arg(out);
    command
}

fn run_with_stdin(mut command: Command, stdin: &[u8]) -> Output {
    let mut child = command
        .stdin(Stdio::piped())
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn()
        .unwrap();
    let mut pipe = child.stdin.take().unwrap();
    let data = stdin.to_vec();
    let writer = std::thread::spawn(move || {
        // The binary may stop reading early on an error; a broken pipe is fine then.
        let _ = pipe.write_all(&data);
    });
    let output = child.wait_with_output().unwrap();
    writer.join().unwrap();
    output
}

fn summary(out: &Path) -> Value {
    serde_json::from_str(&fs::read_to_string(out.join("summary.json")).unwrap()).unwrap()
}

fn candidate_ids(out: &Path) -> Vec<String> {
    let mut reader = csv::Reader::from_path(out.join("candidates.csv")).unwrap();
    reader
        .records()
        .map(|record| record.unwrap()[0].to_string())
        .collect()
}

#[test]
fn named_pipe_input_completes_with_the_same_result_as_the_file() {
    let dir = TempDir::new().unwrap();
    let reference = dir.path().join("reference");
    let output = select(&fixture("labeled.csv"), &fixture("pool.csv"), &reference)
        .output()
        .unwrap();
    assert!(output.status.success(), "{output:?}");

    let fifo = dir.path().join("pool.csv");
    let status = Command::new("mkfifo").arg(&fifo).status().unwrap();
    assert!(status.success());
    let fifo_writer = fifo.clone();
    let writer = std::thread::spawn(move || {
        fs::write(fifo_writer, fs::read(fixture("pool.csv")).unwrap()).unwrap();
    });
    let out = dir.path().join("from-fifo");
    let mut child = select(&fixture("labeled.csv"), &fifo, &out)
        .stderr(Stdio::piped())
        .spawn()
        .unwrap();
    // A hang would be the old bug: give it a generous deadline, then fail.
    let deadline = std::time::Instant::now() + std::time::Duration::from_secs(60);
    let status = loop {
        if let Some(status) = child.try_wait().unwrap() {
            break status;
        }
        if std::time::Instant::now() > deadline {
            child.kill().unwrap();
            panic!("select on a named pipe did not finish within 60 s");
        }
        std::thread::sleep(std::time::Duration::from_millis(20));
    };
    writer.join().unwrap();
    assert!(status.success());
    assert_eq!(candidate_ids(&out), candidate_ids(&reference));
    assert_eq!(
        summary(&out)["selected_count"],
        summary(&reference)["selected_count"]
    );
}

#[test]
fn standard_input_is_one_input_file() {
    let dir = TempDir::new().unwrap();
    let reference = dir.path().join("reference");
    assert!(
        select(&fixture("labeled.csv"), &fixture("pool.csv"), &reference)
            .status()
            .unwrap()
            .success()
    );
    let out = dir.path().join("from-stdin");
    let output = run_with_stdin(
        select(Path::new("-"), &fixture("pool.csv"), &out),
        &fs::read(fixture("labeled.csv")).unwrap(),
    );
    assert!(output.status.success(), "{output:?}");
    assert_eq!(candidate_ids(&out), candidate_ids(&reference));

    // A bad cell on standard input is located as `standard input line N`.
    let mut bad = fs::read_to_string(fixture("labeled.csv")).unwrap();
    bad = bad.replacen("5.5670", "five", 1);
    let out = dir.path().join("bad-stdin");
    let output = run_with_stdin(
        select(Path::new("-"), &fixture("pool.csv"), &out),
        bad.as_bytes(),
    );
    assert_eq!(output.status.code(), Some(2), "{output:?}");
    let stderr = String::from_utf8_lossy(&output.stderr);
    assert!(
        stderr.contains("standard input line 2") && stderr.contains("`y`"),
        "{stderr}"
    );
    assert!(!out.exists());

    // Both inputs `-` is a usage error naming both flags.
    let out = dir.path().join("both");
    let output = run_with_stdin(select(Path::new("-"), Path::new("-"), &out), b"");
    assert_eq!(output.status.code(), Some(2), "{output:?}");
    let stderr = String::from_utf8_lossy(&output.stderr);
    assert!(
        stderr.contains("--labeled") && stderr.contains("--pool"),
        "{stderr}"
    );
    assert!(!out.exists());
}

#[test]
fn eight_gigabyte_sparse_file_exits_2_at_line_3() {
    let dir = TempDir::new().unwrap();
    let pool = dir.path().join("pool.csv");
    let text = fs::read_to_string(fixture("pool.csv")).unwrap();
    let head: String = text.lines().take(2).map(|l| format!("{l}\n")).collect();
    fs::write(&pool, head).unwrap();
    fs::OpenOptions::new()
        .write(true)
        .open(&pool)
        .unwrap()
        .set_len(8 << 30)
        .unwrap();
    let out = dir.path().join("out");
    let output = select(&fixture("labeled.csv"), &pool, &out)
        .output()
        .unwrap();
    assert_eq!(output.status.code(), Some(2), "{output:?}");
    let stderr = String::from_utf8_lossy(&output.stderr);
    assert!(stderr.contains("pool.csv line 3"), "{stderr}");
    assert!(stderr.len() < 2000, "stderr is {} bytes", stderr.len());
    assert!(!out.exists());
}

#[test]
fn control_character_in_an_id_is_a_located_error() {
    let dir = TempDir::new().unwrap();
    let pool = dir.path().join("pool.csv");
    let text = fs::read_to_string(fixture("pool.csv")).unwrap();
    fs::write(&pool, text.replacen("LKS-P-000002", "LKS-P\0-000002", 1)).unwrap();
    let out = dir.path().join("out");
    let output = select(&fixture("labeled.csv"), &pool, &out)
        .output()
        .unwrap();
    assert_eq!(output.status.code(), Some(2), "{output:?}");
    let stderr = String::from_utf8_lossy(&output.stderr);
    assert!(
        stderr.contains("pool.csv line 3") && stderr.contains("U+0000"),
        "{stderr}"
    );
    assert!(!out.exists());
}

/// The fixtures with every weight (column `w`) multiplied by `scale`, and optionally the
/// first labeled weight replaced by `first_labeled`.
fn scaled_weights(dir: &Path, scale: f64, first_labeled: Option<&str>) -> (PathBuf, PathBuf) {
    let mut paths = Vec::new();
    for name in ["labeled.csv", "pool.csv"] {
        let mut reader = csv::Reader::from_path(fixture(name)).unwrap();
        let header = reader.headers().unwrap().clone();
        let w = header.iter().position(|h| h == "w").unwrap();
        let path = dir.join(name);
        let mut writer = csv::Writer::from_path(&path).unwrap();
        writer.write_record(&header).unwrap();
        for (row, record) in reader.records().enumerate() {
            let mut cells: Vec<String> = record.unwrap().iter().map(str::to_string).collect();
            let value: f64 = cells[w].parse().unwrap();
            cells[w] = format!("{:e}", value * scale);
            if let (0, Some(first), "labeled.csv") = (row, first_labeled, name) {
                cells[w] = first.to_string();
            }
            writer.write_record(&cells).unwrap();
        }
        writer.flush().unwrap();
        paths.push(path);
    }
    (paths.remove(0), paths.remove(0))
}

fn weighted_select(labeled: &Path, pool: &Path, out: &Path) -> Output {
    select(labeled, pool, out)
        .args(["--weight-column", "w"])
        .output()
        .unwrap()
}

#[test]
fn one_huge_labeled_weight_gives_a_finite_ess_and_the_low_ess_warning() {
    // Kish ESS of 299 weights near 1 and one of 1e160: (sum w)^2 / sum w^2 = 1 to within
    // 1e-150 (hand computation), so 1.0 of 300 rows, far below the 10% warning threshold.
    let dir = TempDir::new().unwrap();
    let (labeled, pool) = scaled_weights(dir.path(), 1.0, Some("1e160"));
    let out = dir.path().join("out");
    let output = weighted_select(&labeled, &pool, &out);
    assert!(output.status.success(), "{output:?}");
    let summary = summary(&out);
    let ess = summary["labeled_ess"].as_f64().expect("a finite ESS");
    assert!((ess - 1.0).abs() < 1e-9, "{ess}");
    let warnings = summary["warnings"].as_array().unwrap();
    assert!(
        warnings
            .iter()
            .any(|w| w.as_str().unwrap().contains("effective sample size")),
        "{warnings:?}"
    );
}

#[test]
fn weights_from_1e_minus_300_to_1e306_select_as_the_unscaled_ones() {
    // Only ratios of weights enter the p-values (design.md 2.2), so scaling every weight by
    // one constant must leave the shortlist and the ESS as they are.
    let dir = TempDir::new().unwrap();
    let reference = dir.path().join("reference");
    let output = weighted_select(&fixture("labeled.csv"), &fixture("pool.csv"), &reference);
    assert!(output.status.success(), "{output:?}");
    let expected_ess = summary(&reference)["labeled_ess"].as_f64().unwrap();
    for (k, scale) in [1e-300, 1e300, 1e306].into_iter().enumerate() {
        let sub = dir.path().join(format!("s{k}"));
        fs::create_dir(&sub).unwrap();
        let (labeled, pool) = scaled_weights(&sub, scale, None);
        let out = sub.join("out");
        let output = weighted_select(&labeled, &pool, &out);
        assert!(output.status.success(), "scale {scale}: {output:?}");
        assert_eq!(
            candidate_ids(&out),
            candidate_ids(&reference),
            "scale {scale}"
        );
        let scaled = summary(&out);
        assert_eq!(
            scaled["selected_count"],
            summary(&reference)["selected_count"]
        );
        let ess = scaled["labeled_ess"].as_f64().expect("finite ESS");
        // Decimal scaling rounds each weight once (relative 1e-16), so 1e-9 is generous.
        assert!(
            (ess - expected_ess).abs() < 1e-9 * expected_ess,
            "scale {scale}: {ess}"
        );
    }
}

#[test]
fn ids_in_both_files_are_named_in_a_warning() {
    // The pool with two labeled ids appended: both must be named, with the count.
    let dir = TempDir::new().unwrap();
    let pool = dir.path().join("pool.csv");
    let mut text = fs::read_to_string(fixture("pool.csv")).unwrap();
    text.push_str("LKS-A-000001,5.0,1.0,0,0,0,0,0\nLKS-A-000002,5.0,1.0,0,0,0,0,0\n");
    fs::write(&pool, text).unwrap();
    let out = dir.path().join("out");
    let output = select(&fixture("labeled.csv"), &pool, &out)
        .output()
        .unwrap();
    assert!(output.status.success(), "{output:?}");
    let warnings = summary(&out)["warnings"].clone();
    let shared = warnings
        .as_array()
        .unwrap()
        .iter()
        .map(|w| w.as_str().unwrap())
        .find(|w| w.starts_with("ids in both files"))
        .unwrap_or_else(|| panic!("no shared-id warning in {warnings}"));
    assert!(
        shared.contains("2 id(s)")
            && shared.contains("`LKS-A-000001`")
            && shared.contains("`LKS-A-000002`"),
        "{shared}"
    );
    // The fixtures themselves share no id.
    let clean = dir.path().join("clean");
    assert!(
        select(&fixture("labeled.csv"), &fixture("pool.csv"), &clean)
            .status()
            .unwrap()
            .success()
    );
    assert!(!summary(&clean)["warnings"]
        .to_string()
        .contains("ids in both files"));
}

#[test]
fn a_ten_megabyte_header_cell_does_not_flood_stderr() {
    let dir = TempDir::new().unwrap();
    let pool = dir.path().join("pool.csv");
    let text = fs::read_to_string(fixture("pool.csv")).unwrap();
    let huge = "h".repeat(10 << 20);
    // Replace the prediction column's name, so `pred` is missing and the header is listed.
    fs::write(&pool, text.replacen("pred", &huge, 1)).unwrap();
    let out = dir.path().join("out");
    let output = select(&fixture("labeled.csv"), &pool, &out)
        .output()
        .unwrap();
    assert_eq!(output.status.code(), Some(2), "{output:?}");
    let stderr = String::from_utf8_lossy(&output.stderr);
    assert!(stderr.len() < 4096, "stderr is {} bytes", stderr.len());
    assert!(
        stderr.contains("pool.csv line 1") && stderr.contains('…'),
        "{stderr}"
    );
    assert!(!out.exists());
}
