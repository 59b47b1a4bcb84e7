//! `weighbridge batch` end to end on the README fixtures (invented demo data): the files and
//! columns it writes, that the design's probabilities sum to the requested size (the
//! definition of the expected size of a Poisson sample), determinism, and errors. The
//! statistics (exact weights keep FDR <= q; the ranked design against a uniform one) are
//! checked by simulation in src/workflows/batch.rs.

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

fn batch(out: &Path, extra: &[&str]) -> Output {
    Command::new(env!("CARGO_BIN_EXE_weighbridge"))
        .args(["batch", "--pool", fixture("pool.csv").to_str().unwrap()])
        .args(["--out", out.to_str().unwrap()])
        .args(extra)
        .output()
        .expect("run weighbridge")
}

fn rows(path: &Path) -> (Vec<String>, Vec<Vec<String>>) {
    let text = fs::read_to_string(path).unwrap();
    let mut lines = text.lines();
    let header = lines.next().unwrap().split(',').map(String::from).collect();
    let rows = lines
        .map(|l| l.split(',').map(String::from).collect())
        .collect();
    (header, rows)
}

#[test]
fn batch_writes_the_units_to_assay_and_the_design() {
    let dir = TempDir::new().unwrap();
    let (a, b) = (dir.path().join("a"), dir.path().join("b"));
    for out in [&a, &b] {
        let o = batch(out, &["--size", "40", "--fdr", "0.2"]);
        assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    }
    for name in ["batch.csv", "design.csv"] {
        assert_eq!(
            fs::read(a.join(name)).unwrap(),
            fs::read(b.join(name)).unwrap(),
            "{name}: same seed, same bytes"
        );
    }
    // design.json records the command line, which differs in --out; everything else is
    // the same.
    let json = |dir: &std::path::Path| {
        let mut v: serde_json::Value =
            serde_json::from_slice(&fs::read(dir.join("design.json")).unwrap()).unwrap();
        let line = v["command_line"].take();
        (v, line)
    };
    let ((first, first_line), (second, second_line)) = (json(&a), json(&b));
    assert_eq!(first, second, "design.json: same seed, same content");
    assert_ne!(
        first_line, second_line,
        "the command lines name different --out"
    );
    let (header, design) = rows(&a.join("design.csv"));
    assert_eq!(header, ["id", "inclusion_probability", "in_batch"]);
    assert_eq!(design.len(), 2000, "every pool unit");
    let pi: Vec<f64> = design.iter().map(|r| r[1].parse().unwrap()).collect();
    assert!((pi.iter().sum::<f64>() - 40.0).abs() < 1e-6);
    assert!(pi.iter().all(|&p| p > 0.0 && p <= 0.5));
    let drawn: Vec<&Vec<String>> = design.iter().filter(|r| r[2] == "true").collect();
    let (header, chosen) = rows(&a.join("batch.csv"));
    assert_eq!(header, ["id", "inclusion_probability", "prediction"]);
    assert_eq!(chosen.len(), drawn.len());
    for (c, d) in chosen.iter().zip(&drawn) {
        assert_eq!(
            (&c[0], &c[1]),
            (&d[0], &d[1]),
            "batch.csv lists the drawn units"
        );
    }
    let json: Value = serde_json::from_slice(&fs::read(a.join("design.json")).unwrap()).unwrap();
    assert_eq!(json["design"], "ranked");
    assert_eq!(json["drawn_size"].as_u64(), Some(chosen.len() as u64));
    assert!((json["expected_size"].as_f64().unwrap() - 40.0).abs() < 1e-6);
    assert_eq!(json["pool_id_checksum"].as_str().unwrap().len(), 16);
    assert!(json["reading"].as_array().unwrap().len() >= 5);
    assert!(
        json["largest_weight"].as_f64().unwrap()
            <= json["reachable_weight_bound"].as_f64().unwrap()
    );
    // Another seed, another draw; the uniform design gives every unit N / M.
    let c = dir.path().join("c");
    assert!(
        batch(&c, &["--size", "40", "--design", "uniform", "--seed", "3"])
            .status
            .success()
    );
    let (_, uniform) = rows(&c.join("design.csv"));
    assert!(uniform.iter().all(|r| r[1] == "0.02"));
}

#[test]
fn bad_sizes_are_input_errors_and_write_nothing() {
    let dir = TempDir::new().unwrap();
    for size in ["0", "-5", "1000", "nan"] {
        let out = dir.path().join(format!("x{size}"));
        let o = batch(&out, &["--size", size]);
        assert_eq!(o.status.code(), Some(2), "size {size}");
        assert!(!out.exists());
        let stderr = String::from_utf8_lossy(&o.stderr);
        assert!(
            stderr.contains("--size") || stderr.contains("size"),
            "{stderr}"
        );
    }
}

/// Runs `select --batch-design` with the given labeled rows (id, y, pred).
fn select_with_design(dir: &Path, design: &Path, labeled: &str, extra: &[&str]) -> Output {
    let path = dir.join("assayed.csv");
    fs::write(&path, labeled).unwrap();
    Command::new(env!("CARGO_BIN_EXE_weighbridge"))
        .args(["select", "--labeled", path.to_str().unwrap()])
        .args(["--pool", fixture("pool.csv").to_str().unwrap()])
        .args(["--threshold", "6.5", "--fdr", "0.2"])
        .args(["--batch-design", design.to_str().unwrap()])
        .args(extra)
        .output()
        .expect("run weighbridge")
}

/// The drawn units of a design with an outcome for each (a made-up value: here the
/// mechanics are checked, not the statistics).
fn assayed_rows(design: &Path, skip: usize) -> (String, Vec<String>) {
    let (_, chosen) = rows(&design.join("batch.csv"));
    let mut text = String::from("id,y,pred\n");
    for (k, r) in chosen.iter().enumerate().skip(skip) {
        let pred: f64 = r[2].parse().unwrap();
        let y = if k % 3 == 0 { pred - 2.0 } else { pred + 1.0 };
        text.push_str(&format!("{},{y},{pred}\n", r[0]));
    }
    (text, chosen.iter().map(|r| r[0].clone()).collect())
}

#[test]
fn select_with_a_batch_design_uses_exact_weights_and_never_selects_an_assayed_unit() {
    let dir = TempDir::new().unwrap();
    let design = dir.path().join("design");
    assert!(batch(&design, &["--size", "60", "--fdr", "0.2"])
        .status
        .success());
    let (labeled, drawn) = assayed_rows(&design, 0);
    let out = dir.path().join("out");
    let o = select_with_design(
        dir.path(),
        &design,
        &labeled,
        &["--out", out.to_str().unwrap()],
    );
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    let (header, candidates) = rows(&out.join("candidates.csv"));
    let id = header.iter().position(|h| h == "id").unwrap();
    let weight = header.iter().position(|h| h == "weight").unwrap();
    assert_eq!(
        candidates.len(),
        2000 - drawn.len(),
        "drawn units leave the pool"
    );
    assert!(candidates.iter().all(|r| !drawn.contains(&r[id])));
    // Weights are (1 - pi) / pi of the design.
    let (_, design_rows) = rows(&design.join("design.csv"));
    let pi: std::collections::HashMap<&str, f64> = design_rows
        .iter()
        .map(|r| (r[0].as_str(), r[1].parse().unwrap()))
        .collect();
    for r in &candidates {
        let p = pi[r[id].as_str()];
        let w: f64 = r[weight].parse().unwrap();
        assert!((w - (1.0 - p) / p).abs() <= 1e-12 * w.max(1.0), "{}", r[id]);
    }
    let summary: Value =
        serde_json::from_slice(&fs::read(out.join("summary.json")).unwrap()).unwrap();
    assert!(summary["inputs"]["weights"]
        .as_str()
        .unwrap()
        .starts_with("exact by design"));
    assert!(summary["warnings"]
        .to_string()
        .contains("must not be used to retrain"));
}

#[test]
fn batch_design_errors_are_located() {
    let dir = TempDir::new().unwrap();
    let design = dir.path().join("design");
    assert!(batch(&design, &["--size", "60", "--fdr", "0.2"])
        .status
        .success());
    let out = dir.path().join("out");
    let out_args = ["--out", out.to_str().unwrap()];
    // Outcomes missing for part of the batch: an error naming how many, unless allowed.
    let (partial, drawn) = assayed_rows(&design, 2);
    let o = select_with_design(dir.path(), &design, &partial, &out_args);
    assert_eq!(o.status.code(), Some(2));
    let stderr = String::from_utf8_lossy(&o.stderr);
    assert!(
        stderr.contains(&format!("2 of the {} units drawn", drawn.len())),
        "{stderr}"
    );
    assert!(!out.exists());
    let mut allowed = out_args.to_vec();
    allowed.push("--allow-missing-batch");
    let o = select_with_design(dir.path(), &design, &partial, &allowed);
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    let summary: Value =
        serde_json::from_slice(&fs::read(out.join("summary.json")).unwrap()).unwrap();
    assert!(summary["warnings"]
        .to_string()
        .contains("missing at random"));
    // An assayed id that is not in the design, or not drawn.
    let (mut labeled, _) = assayed_rows(&design, 0);
    labeled.push_str("NOT-IN-POOL,7.0,7.0\n");
    let out2 = dir.path().join("out2");
    let o = select_with_design(
        dir.path(),
        &design,
        &labeled,
        &["--out", out2.to_str().unwrap()],
    );
    assert_eq!(o.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&o.stderr).contains("NOT-IN-POOL"));
    let (_, design_rows) = rows(&design.join("design.csv"));
    let undrawn = design_rows.iter().find(|r| r[2] == "false").unwrap()[0].clone();
    let (mut labeled, _) = assayed_rows(&design, 0);
    labeled.push_str(&format!("{undrawn},7.0,7.0\n"));
    let o = select_with_design(
        dir.path(),
        &design,
        &labeled,
        &["--out", out2.to_str().unwrap()],
    );
    assert_eq!(o.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&o.stderr).contains("was not drawn"));
    // A design made from another pool.
    let other = dir.path().join("other_pool.csv");
    let pool_text = fs::read_to_string(fixture("pool.csv")).unwrap();
    let fewer: String = pool_text
        .lines()
        .take(1500)
        .map(|l| format!("{l}\n"))
        .collect();
    fs::write(&other, fewer).unwrap();
    let other_design = dir.path().join("other_design");
    let o = Command::new(env!("CARGO_BIN_EXE_weighbridge"))
        .args(["batch", "--pool", other.to_str().unwrap(), "--size", "30"])
        .args(["--out", other_design.to_str().unwrap(), "--quiet"])
        .output()
        .unwrap();
    assert!(o.status.success());
    let (labeled, _) = assayed_rows(&other_design, 0);
    let o = select_with_design(
        dir.path(),
        &other_design,
        &labeled,
        &["--out", out2.to_str().unwrap()],
    );
    assert_eq!(o.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&o.stderr).contains("not the pool the design was made from"));
    // --out equal to the design folder.
    let (labeled, _) = assayed_rows(&design, 0);
    let o = select_with_design(
        dir.path(),
        &design,
        &labeled,
        &["--out", design.to_str().unwrap()],
    );
    assert_eq!(o.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&o.stderr).contains("batch design folder"));
    assert!(!out2.exists());
}

#[test]
fn batch_copies_kept_columns_verbatim() {
    let dir = TempDir::new().unwrap();
    let out = dir.path().join("kept");
    let o = batch(&out, &["--size", "40", "--keep-columns", "f2,w"]);
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    let (header, chosen) = rows(&out.join("batch.csv"));
    assert_eq!(
        header,
        ["id", "inclusion_probability", "prediction", "f2", "w"]
    );
    // The cells are the pool file's text, byte for byte (no reformatting of numbers).
    let (pool_header, pool_rows) = rows(&fixture("pool.csv"));
    let column = |name: &str| pool_header.iter().position(|h| h == name).unwrap();
    let (f2, w) = (column("f2"), column("w"));
    assert!(!chosen.is_empty());
    for row in &chosen {
        let source = pool_rows.iter().find(|r| r[0] == row[0]).unwrap();
        assert_eq!((&row[3], &row[4]), (&source[f2], &source[w]), "{}", row[0]);
    }
    let json: Value = serde_json::from_slice(&fs::read(out.join("design.json")).unwrap()).unwrap();
    assert_eq!(
        json["columns"]["keep_columns"],
        serde_json::json!(["f2", "w"])
    );
    // A kept column the pool lacks is a usage error with a suggestion.
    let o = batch(
        &dir.path().join("bad"),
        &["--size", "40", "--keep-columns", "F2"],
    );
    assert_eq!(o.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&o.stderr).contains("f2"));
}
