//! Seeded mutation test of the CSV/TSV readers (issue: nothing lost, nothing hung): a few
//! thousand mutated copies of the README fixtures — byte flips, truncation, inserted
//! quotes, swapped delimiters, NUL bytes, a BOM, CRLF line ends, duplicated, deleted and
//! empty lines — must each be read without a panic, either as a table or as an error, and
//! through the binary a sample must exit 0 or 2 with no output folder after an error. The
//! property is the reader's contract (every bad input a located error), so there is no
//! external reference here; the mutations are the usual ones of file fuzzers (common
//! practice). Longer runs: the cargo-fuzz target in fuzz/ (DEVELOPERS.md).

use std::fs;
use std::path::{Path, PathBuf};
use std::process::Command;

use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use tempfile::TempDir;
use weighbridge::table::{read_units, ReadOptions, Role};

const MUTANTS_PER_FILE: usize = 1500;
const BINARY_SAMPLE: usize = 40;

fn fixture(name: &str) -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("fixtures")
        .join(name)
}

/// The header and the first `rows` data lines of a fixture.
fn head(name: &str, rows: usize) -> Vec<u8> {
    let text = fs::read_to_string(fixture(name)).unwrap();
    let mut out = String::new();
    for line in text.lines().take(rows + 1) {
        out.push_str(line);
        out.push('\n');
    }
    out.into_bytes()
}

/// One seeded mutation of `base` (1 to 3 edits).
fn mutate(base: &[u8], rng: &mut ChaCha8Rng) -> Vec<u8> {
    let mut bytes = base.to_vec();
    for _ in 0..rng.gen_range(1..=3) {
        let len = bytes.len().max(1);
        let at = rng.gen_range(0..len).min(bytes.len());
        match rng.gen_range(0..10) {
            0 if !bytes.is_empty() => {
                let i = at.min(bytes.len() - 1);
                bytes[i] = rng.gen();
            }
            1 => bytes.truncate(at),
            2 => bytes.insert(at, b'"'),
            3 => {
                let to = [b'\t', b';', b'|'][rng.gen_range(0..3)];
                for b in bytes.iter_mut().filter(|b| **b == b',') {
                    if rng.gen_bool(0.5) {
                        *b = to;
                    }
                }
            }
            4 => bytes.insert(at, 0),
            5 => {
                let mut with_bom = vec![0xEF, 0xBB, 0xBF];
                with_bom.extend_from_slice(&bytes);
                bytes = with_bom;
            }
            6 => {
                let mut crlf = Vec::with_capacity(bytes.len() + 64);
                for &b in &bytes {
                    if b == b'\n' {
                        crlf.push(b'\r');
                    }
                    crlf.push(b);
                }
                bytes = crlf;
            }
            7 => {
                // Duplicate the line at `at`.
                let start = bytes[..at]
                    .iter()
                    .rposition(|b| *b == b'\n')
                    .map_or(0, |p| p + 1);
                let end = bytes[at..]
                    .iter()
                    .position(|b| *b == b'\n')
                    .map_or(bytes.len(), |p| at + p + 1);
                let line = bytes[start..end].to_vec();
                bytes.splice(end..end, line);
            }
            8 => {
                // Delete the line at `at`.
                let start = bytes[..at]
                    .iter()
                    .rposition(|b| *b == b'\n')
                    .map_or(0, |p| p + 1);
                let end = bytes[at..]
                    .iter()
                    .position(|b| *b == b'\n')
                    .map_or(bytes.len(), |p| at + p + 1);
                bytes.drain(start..end);
            }
            _ => bytes.insert(at, b'\n'),
        }
    }
    bytes
}

fn read_options(labeled: bool) -> (Role, ReadOptions) {
    let mut options = ReadOptions::new("pred");
    options.features = vec!["f1..f5".to_string()];
    options.weight_column = Some("w".to_string());
    if labeled {
        options.outcome = Some("y".to_string());
        (Role::Labeled, options)
    } else {
        (Role::Pool, options)
    }
}

#[test]
fn mutated_files_are_read_or_rejected_without_a_panic() {
    let dir = TempDir::new().unwrap();
    let mut rng = ChaCha8Rng::seed_from_u64(20_261_202);
    let mut outcomes = [0usize; 2];
    for (name, labeled) in [("labeled.csv", true), ("pool.csv", false)] {
        let base = head(name, 40);
        let (role, options) = read_options(labeled);
        for k in 0..MUTANTS_PER_FILE {
            let bytes = mutate(&base, &mut rng);
            let path = dir.path().join(format!("m{k}.csv"));
            fs::write(&path, &bytes).unwrap();
            let result = std::panic::catch_unwind(|| read_units(&path, role, &options));
            match result {
                Ok(Ok(table)) => {
                    outcomes[0] += 1;
                    assert_eq!(table.prediction.len(), table.ids.len());
                }
                Ok(Err(e)) => {
                    outcomes[1] += 1;
                    let message = e.to_string();
                    assert!(!message.is_empty());
                    assert!(
                        message.len() < 2000,
                        "{name} mutant {k}: a {} byte message",
                        message.len()
                    );
                }
                Err(_) => panic!(
                    "{name} mutant {k} panicked the reader; bytes: {:?}",
                    String::from_utf8_lossy(&bytes)
                ),
            }
        }
    }
    // Both kinds occur: the mutations are neither all harmless nor all fatal.
    assert!(outcomes[0] > 100 && outcomes[1] > 100, "{outcomes:?}");
}

#[test]
fn the_binary_exits_0_or_2_and_writes_nothing_on_error() {
    let dir = TempDir::new().unwrap();
    let mut rng = ChaCha8Rng::seed_from_u64(7);
    let pool = head("pool.csv", 60);
    let labeled_path = fixture("labeled.csv");
    for k in 0..BINARY_SAMPLE {
        let path = dir.path().join(format!("pool{k}.csv"));
        fs::write(&path, mutate(&pool, &mut rng)).unwrap();
        let out = dir.path().join(format!("out{k}"));
        let o = Command::new(env!("CARGO_BIN_EXE_weighbridge"))
            .args(["select", "--labeled", labeled_path.to_str().unwrap()])
            .args(["--pool", path.to_str().unwrap(), "--threshold", "6.5"])
            .args(["--weight-column", "w", "--quiet"])
            .args(["--out", out.to_str().unwrap()])
            .output()
            .unwrap();
        match o.status.code() {
            Some(0) => assert!(out.join("candidates.csv").exists()),
            Some(2) => {
                assert!(!out.exists(), "mutant {k}: output folder after an error");
                assert!(
                    o.stderr.len() < 4000,
                    "mutant {k}: {} bytes of stderr",
                    o.stderr.len()
                );
            }
            other => panic!(
                "mutant {k}: exit {other:?}: {}",
                String::from_utf8_lossy(&o.stderr)
            ),
        }
    }
}
