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
    for name in ["batch.csv", "design.csv", "design.json"] {
        assert_eq!(
            fs::read(a.join(name)).unwrap(),
            fs::read(b.join(name)).unwrap(),
            "{name}: same seed, same bytes"
        );
    }
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
