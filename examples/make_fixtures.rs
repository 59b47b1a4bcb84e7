//! Makes every input file in `fixtures/` from the demo's invented scenario (our own
//! simulation, no real compounds), so that the README's worked examples run on files that
//! exist and anyone can see how they were made.
//!
//! ```sh
//! cargo run --release --example make_fixtures -- fixtures   # (re)write the files
//! cargo run --release --example make_fixtures -- --ci       # CI: make them twice, compare
//! ```
//!
//! With `--ci` the files are made twice into temporary folders; both runs must be
//! byte-identical to each other and to the committed files in `fixtures/`.
//!
//! Files (see `fixtures/README.md`):
//! - `labeled.csv`, `pool.csv`: the scenario with seed 5, 300 labeled and 2000 pool units
//!   (what `weighbridge demo --labeled 300 --pool 2000 --seed 5` writes).
//! - `grown_pool.csv`: `pool.csv` unchanged, then 600 units added to the library later
//!   (same pool distribution, seed 6, ids `LKS-Q-...`), for `rescreen`.
//! - `earlier_list.csv`: an earlier shortlist picked by prediction alone (the 40 pool units
//!   with the highest prediction, in that order), for `audit`.
//! - `assay_export.csv`: one table as an assay system exports it (seed 21): 400 assayed and
//!   2400 untested compounds interleaved, potency as IC50 in nM (lower is better, empty for
//!   untested rows, `>30000` above the assay's range, `NA` where the measurement failed),
//!   the model's predicted IC50 in nM, a `series` label and five descriptors on chemist-like
//!   scales (`MolWt`, `LogP`, `TPSA`, `HBD`, `RotB`), for `--table --lower-is-better`.

use std::error::Error;
use std::fs;
use std::path::{Path, PathBuf};

use rand::seq::SliceRandom;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha20Rng;
use weighbridge::workflows::demo::{generate, DemoSet};

/// Seed of the worked examples' scenario (fixtures/README.md says why 5).
const SEED: u64 = 5;
/// Seed of the units added to the library later (`grown_pool.csv`).
const GROWN_SEED: u64 = 6;
const GROWN_COUNT: usize = 600;
/// Length of the earlier shortlist.
const EARLIER_COUNT: usize = 40;
/// Seed and sizes of the one-table export.
const EXPORT_SEED: u64 = 21;
const EXPORT_ASSAYED: usize = 400;
const EXPORT_UNTESTED: usize = 2400;
/// The assay's upper limit in nM: weaker compounds are reported as `>10000`.
const ASSAY_LIMIT_NM: f64 = 30_000.0;

type Files = Vec<(&'static str, Vec<u8>)>;

fn main() -> Result<(), Box<dyn Error>> {
    let args: Vec<String> = std::env::args().skip(1).collect();
    match args.first().map(String::as_str) {
        Some("--ci") => ci(),
        Some(dir) if args.len() == 1 && !dir.starts_with('-') => {
            let dir = PathBuf::from(dir);
            fs::create_dir_all(&dir)?;
            for (name, bytes) in make()? {
                fs::write(dir.join(name), bytes)?;
                println!("wrote {}", dir.join(name).display());
            }
            Ok(())
        }
        _ => Err("usage: make_fixtures DIR | make_fixtures --ci".into()),
    }
}

/// Make the files twice and compare both runs with the committed `fixtures/`.
fn ci() -> Result<(), Box<dyn Error>> {
    let committed = Path::new(env!("CARGO_MANIFEST_DIR")).join("fixtures");
    let (first, second) = (make()?, make()?);
    let mut failures = Vec::new();
    for ((name, a), (_, b)) in first.iter().zip(&second) {
        if a != b {
            failures.push(format!(
                "{name}: two runs differ (the generator is not deterministic)"
            ));
            continue;
        }
        match fs::read(committed.join(name)) {
            Ok(c) if &c == a => println!("fixtures/{name}: reproduced exactly ({} bytes)", a.len()),
            Ok(_) => failures.push(format!(
                "fixtures/{name}: differs from a fresh run; regenerate with \
                 `cargo run --release --example make_fixtures -- fixtures` and commit"
            )),
            Err(e) => failures.push(format!("fixtures/{name}: cannot read ({e})")),
        }
    }
    if failures.is_empty() {
        Ok(())
    } else {
        Err(failures.join("\n").into())
    }
}

fn make() -> Result<Files, Box<dyn Error>> {
    let scenario = generate(300, 2000, SEED);
    let pool_csv = scenario.pool.to_csv(false);
    let mut files: Files = vec![
        ("labeled.csv", scenario.labeled.to_csv(true)),
        ("pool.csv", pool_csv.clone()),
    ];

    // The library grew: the old pool unchanged, then new units (header dropped).
    let mut added = generate(1, GROWN_COUNT, GROWN_SEED).pool;
    for id in &mut added.ids {
        *id = id.replacen("LKS-P-", "LKS-Q-", 1);
    }
    let added_csv = added.to_csv(false);
    let body = added_csv
        .iter()
        .position(|&b| b == b'\n')
        .map(|i| &added_csv[i + 1..])
        .ok_or("generated CSV has no header line")?;
    let mut grown = pool_csv;
    grown.extend_from_slice(body);
    files.push(("grown_pool.csv", grown));

    files.push(("earlier_list.csv", earlier_list(&scenario.pool)));
    files.push(("assay_export.csv", assay_export()?));
    Ok(files)
}

/// The pool's `EARLIER_COUNT` highest predictions (ties by id), one id per line.
fn earlier_list(pool: &DemoSet) -> Vec<u8> {
    let mut order: Vec<usize> = (0..pool.len()).collect();
    order.sort_by(|&a, &b| {
        pool.prediction[b]
            .total_cmp(&pool.prediction[a])
            .then_with(|| pool.ids[a].cmp(&pool.ids[b]))
    });
    let mut out = b"id\n".to_vec();
    for &j in order.iter().take(EARLIER_COUNT) {
        out.extend_from_slice(pool.ids[j].as_bytes());
        out.push(b'\n');
    }
    out
}

/// IC50 in nM of a pIC50-like activity, three significant digits.
fn nanomolar(p: f64) -> f64 {
    let nm = 10f64.powf(9.0 - p);
    let digits = 3 - 1 - nm.abs().log10().floor() as i32;
    let scale = 10f64.powi(digits);
    (nm * scale).round() / scale
}

/// The one-table export: assayed and untested compounds interleaved in a seeded order.
fn assay_export() -> Result<Vec<u8>, Box<dyn Error>> {
    let scenario = generate(EXPORT_ASSAYED, EXPORT_UNTESTED, EXPORT_SEED);
    let mut rows: Vec<(&DemoSet, usize, bool)> = (0..EXPORT_ASSAYED)
        .map(|i| (&scenario.labeled, i, true))
        .chain((0..EXPORT_UNTESTED).map(|j| (&scenario.pool, j, false)))
        .collect();
    let mut rng = ChaCha20Rng::seed_from_u64(EXPORT_SEED);
    rows.shuffle(&mut rng);

    let mut writer = csv::Writer::from_writer(Vec::new());
    writer.write_record([
        "compound_id",
        "series",
        "potency_nM",
        "predicted_nM",
        "MolWt",
        "LogP",
        "TPSA",
        "HBD",
        "RotB",
    ])?;
    for (number, (set, i, assayed)) in rows.into_iter().enumerate() {
        let x = set.features[i];
        let series = if x[0] < -0.6 {
            "older amides"
        } else if x[1] > 0.8 {
            "pyrazoles"
        } else {
            "spirocycles"
        };
        let potency = if !assayed {
            String::new()
        } else if rng.gen::<f64>() < 0.01 {
            "NA".to_string()
        } else {
            let nm = nanomolar(set.outcome[i]);
            if nm > ASSAY_LIMIT_NM {
                format!(">{ASSAY_LIMIT_NM}")
            } else {
                nm.to_string()
            }
        };
        writer.write_record([
            format!("CPD-{:05}", number + 1),
            series.to_string(),
            potency,
            nanomolar(set.prediction[i]).to_string(),
            format!("{:.2}", 420.0 + 55.0 * x[0]),
            format!("{:.2}", 3.1 + 0.9 * x[1]),
            format!("{:.1}", 85.0 + 18.0 * x[2]),
            format!("{}", (2.0 + x[3]).round().max(0.0)),
            format!("{}", (6.0 + 2.0 * x[4]).round().max(0.0)),
        ])?;
    }
    Ok(writer.into_inner()?)
}
