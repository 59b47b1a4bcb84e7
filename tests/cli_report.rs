//! `--report` on select, shift, audit and rescreen: report.html is written with the other
//! outputs, is self-contained (no scripts, no external addresses) and carries the cautions
//! (design.md section 1) and, with fitted weights, the three plots. Structural checks only;
//! tests/scripts/render_report.sh renders the demo's report in headless Chromium.

use std::fs;
use std::path::{Path, PathBuf};
use std::process::Command;

use tempfile::TempDir;

fn fixture(name: &str) -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("fixtures")
        .join(name)
}

fn run_ok(args: &[&str]) {
    let output = Command::new(env!("CARGO_BIN_EXE_weighbridge"))
        .args(args)
        .output()
        .expect("run weighbridge");
    assert!(
        output.status.success(),
        "{args:?}: {}",
        String::from_utf8_lossy(&output.stderr)
    );
}

fn check_page(path: &Path, svgs: usize) -> String {
    let html = fs::read_to_string(path).unwrap();
    assert!(
        html.starts_with("<!DOCTYPE html>") || html.starts_with("<!doctype html>"),
        "{path:?}"
    );
    assert!(!html.contains("<script"), "{path:?} has a script");
    assert!(
        !html.contains("http://") && !html.contains("https://"),
        "{path:?} refers outside"
    );
    assert!(
        html.contains("not a safety, clinical or"),
        "{path:?} lacks the cautions"
    );
    assert_eq!(html.matches("<svg").count(), svgs, "{path:?} plots");
    html
}

#[test]
fn every_command_writes_a_self_contained_report() {
    let dir = TempDir::new().unwrap();
    let labeled = fixture("labeled.csv");
    let pool = fixture("pool.csv");
    let (l, p) = (labeled.to_str().unwrap(), pool.to_str().unwrap());
    let out = |name: &str| dir.path().join(name);
    let select = out("select");
    run_ok(&[
        "select",
        "--labeled",
        l,
        "--pool",
        p,
        "--threshold",
        "6.5",
        "--fit-weights",
        "--features",
        "f1..f5",
        "--permutations",
        "19",
        "--report",
        "--quiet",
        "--out",
        select.to_str().unwrap(),
    ]);
    check_page(&select.join("report.html"), 4);
    let shift = out("shift");
    run_ok(&[
        "shift",
        "--labeled",
        l,
        "--pool",
        p,
        "--features",
        "f1..f5",
        "--permutations",
        "19",
        "--report",
        "--quiet",
        "--out",
        shift.to_str().unwrap(),
    ]);
    check_page(&shift.join("report.html"), 3);
    let list = out("list.csv");
    fs::write(&list, "id\nLKS-P-000001\nLKS-P-000002\n").unwrap();
    let audit = out("audit");
    run_ok(&[
        "audit",
        "--shortlist",
        list.to_str().unwrap(),
        "--labeled",
        l,
        "--pool",
        p,
        "--threshold",
        "6.5",
        "--weight-column",
        "w",
        "--report",
        "--quiet",
        "--out",
        audit.to_str().unwrap(),
    ]);
    let html = check_page(&audit.join("report.html"), 0);
    assert!(html.contains("LKS-P-000002"));
    let rescreen = out("rescreen");
    run_ok(&[
        "rescreen",
        "--previous",
        select.to_str().unwrap(),
        "--labeled",
        l,
        "--pool",
        p,
        "--threshold",
        "6.5",
        "--weight-column",
        "w",
        "--report",
        "--quiet",
        "--out",
        rescreen.to_str().unwrap(),
    ]);
    check_page(&rescreen.join("report.html"), 1);
    // Without --report nothing extra is written.
    let plain = out("plain");
    run_ok(&[
        "select",
        "--labeled",
        l,
        "--pool",
        p,
        "--threshold",
        "6.5",
        "--quiet",
        "--out",
        plain.to_str().unwrap(),
    ]);
    assert!(!plain.join("report.html").exists());
}
