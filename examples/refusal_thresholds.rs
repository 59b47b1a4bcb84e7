//! Evidence for the refusal thresholds of fitted weights (src/shift/reliability.rs,
//! docs/validation.md "Refusing degenerate fitted weights").
//!
//! The calibration check ([`weighbridge::check::calibration_check`]) on the demo scenario's
//! labeled set (invented data, src/workflows/demo.rs) with the logistic tilt along the true
//! log density ratio at strengths 1 to 5, and the capped stress tilt at strengths 2 and 3:
//! every replicate fits the weights as `select --fit-weights` would and records its
//! diagnostics (Kish ESS share, Pareto k-hat, cross-validated AUC) and the false discovery
//! proportion of conditional calibration and of weighted BH. The replicates are then pooled
//! and grouped by diagnostic, and the mean FDP per group printed as a markdown table.
//!
//! Run: `cargo run --release --example refusal_thresholds` (about a minute on 2 cores)
//! prints the markdown block between the `refusal:begin` / `refusal:end` markers of
//! docs/validation.md; with `--ci` it fails when the committed block differs. Seeded: the
//! same output on a machine.

use weighbridge::check::{
    calibration_check, CheckOptions, CheckWeights, ReplicateDiagnostics, Tilt,
};
use weighbridge::demo::{labeled_table, THRESHOLD};
use weighbridge::select::SelectOptions;
use weighbridge::shift::reliability::{AUC_NO_OVERLAP, ESS_FRACTION_FLOOR};
use weighbridge::shift::ShiftParams;
use weighbridge::table::UnitTable;

const ROWS: usize = 2000;
const REPLICATES: usize = 150;
const FDR: f64 = 0.2;

fn labeled(seed: u64) -> (UnitTable, Vec<f64>) {
    labeled_table(ROWS, seed)
}

fn mean_se(values: &[f64]) -> String {
    if values.is_empty() {
        return "-".into();
    }
    let n = values.len() as f64;
    let mean = values.iter().sum::<f64>() / n;
    let var = values.iter().map(|v| (v - mean) * (v - mean)).sum::<f64>() / (n - 1.0).max(1.0);
    format!("{mean:.3} +- {:.3}", 2.0 * (var / n).sqrt())
}

#[path = "support/marked_block.rs"]
mod marked_block;

const BEGIN: &str = "<!-- refusal:begin -->";
const END: &str = "<!-- refusal:end -->";

fn main() -> std::process::ExitCode {
    marked_block::print_or_compare(
        &study(),
        BEGIN,
        END,
        "cargo run --release --example refusal_thresholds",
    )
}

/// The study's markdown block.
fn study() -> String {
    let mut out = String::new();
    macro_rules! println {
        ($($arg:tt)*) => {{
            out.push_str(&format!($($arg)*));
            out.push('\n');
        }};
    }
    let (table, log_ratio) = labeled(7);
    let mut records: Vec<(String, ReplicateDiagnostics)> = Vec::new();
    let runs: Vec<(Tilt, f64)> = [1.0, 2.0, 3.0, 4.0, 5.0]
        .iter()
        .map(|&s| (Tilt::Logistic, s))
        .chain([(Tilt::Capped, 2.0), (Tilt::Capped, 3.0)])
        .collect();
    for (tilt, strength) in runs {
        let options = CheckOptions {
            replicates: REPLICATES,
            strength,
            pool_share: 0.5,
            tilt,
            select: SelectOptions {
                fdr: FDR,
                ..SelectOptions::default()
            },
            weights: CheckWeights::Fitted(ShiftParams::new().permutations(1).cv_folds(2)),
        };
        let outcome = calibration_check(&table, &log_ratio, Some(THRESHOLD), &options, &|_| {})
            .expect("check runs");
        let label = format!("{tilt:?} S={strength}").to_lowercase();
        eprintln!(
            "{label}: conditional FDR {:.3}, refused share {:.2}",
            outcome.results.conditional.fdr, outcome.results.conditional.refused_share
        );
        records.extend(
            outcome
                .replicate_records
                .into_iter()
                .map(|r| (label.clone(), r)),
        );
    }

    println!(
        "{} replicates ({REPLICATES} per run) of the demo labeled set ({ROWS} rows), pool share \
         0.5, q = {FDR}; runs: logistic tilt S = 1..5, capped stress tilt S = 2, 3. Mean FDP +- \
         2 SE per group of replicates.\n",
        records.len()
    );
    println!("| group | replicates | conditional FDR | weighted BH FDR |");
    println!("|---|---|---|---|");
    type Pred = Box<dyn Fn(&ReplicateDiagnostics) -> bool>;
    let khat_over = |r: &ReplicateDiagnostics| r.khat.is_nan() || r.khat > r.khat_threshold;
    let groups: Vec<(String, Pred)> = vec![
        ("all".into(), Box::new(|_| true)),
        (
            "ESS share >= 0.10".into(),
            Box::new(|r: &ReplicateDiagnostics| r.ess_fraction >= 0.10),
        ),
        (
            "ESS share 0.05..0.10".into(),
            Box::new(|r: &ReplicateDiagnostics| (0.05..0.10).contains(&r.ess_fraction)),
        ),
        (
            "ESS share 0.02..0.05".into(),
            Box::new(|r: &ReplicateDiagnostics| (0.02..0.05).contains(&r.ess_fraction)),
        ),
        (
            "ESS share < 0.02".into(),
            Box::new(|r: &ReplicateDiagnostics| r.ess_fraction < 0.02),
        ),
        (
            "k-hat <= threshold".into(),
            Box::new(move |r: &ReplicateDiagnostics| !khat_over(r)),
        ),
        (
            "k-hat > threshold".into(),
            Box::new(move |r: &ReplicateDiagnostics| khat_over(r)),
        ),
        (
            "AUC 0.95..0.99".into(),
            Box::new(|r: &ReplicateDiagnostics| r.auc > 0.95 && r.auc <= 0.99),
        ),
        (
            format!("AUC > {AUC_NO_OVERLAP}"),
            Box::new(|r: &ReplicateDiagnostics| r.auc > AUC_NO_OVERLAP),
        ),
        (
            "refused (any of the three)".into(),
            Box::new(move |r: &ReplicateDiagnostics| {
                khat_over(r) || r.ess_fraction < ESS_FRACTION_FLOOR || r.auc > AUC_NO_OVERLAP
            }),
        ),
        (
            "kept".into(),
            Box::new(move |r: &ReplicateDiagnostics| {
                !(khat_over(r) || r.ess_fraction < ESS_FRACTION_FLOOR || r.auc > AUC_NO_OVERLAP)
            }),
        ),
    ];
    for (name, keep) in &groups {
        let chosen: Vec<&ReplicateDiagnostics> =
            records.iter().map(|(_, r)| r).filter(|r| keep(r)).collect();
        let cond: Vec<f64> = chosen.iter().map(|r| r.fdp_conditional).collect();
        let bh: Vec<f64> = chosen.iter().map(|r| r.fdp_bh).collect();
        println!(
            "| {name} | {} | {} | {} |",
            chosen.len(),
            mean_se(&cond),
            mean_se(&bh)
        );
    }
    println!("\nPer run: share of replicates refused, and FDR of the kept ones.\n");
    println!("| run | refused | conditional FDR kept | conditional FDR refused |");
    println!("|---|---|---|---|");
    let mut labels: Vec<String> = records.iter().map(|(l, _)| l.clone()).collect();
    labels.dedup();
    for label in labels {
        let run: Vec<&ReplicateDiagnostics> = records
            .iter()
            .filter(|(l, _)| *l == label)
            .map(|(_, r)| r)
            .collect();
        let refused = |r: &&ReplicateDiagnostics| {
            khat_over(r) || r.ess_fraction < ESS_FRACTION_FLOOR || r.auc > AUC_NO_OVERLAP
        };
        let kept: Vec<f64> = run
            .iter()
            .filter(|r| !refused(r))
            .map(|r| r.fdp_conditional)
            .collect();
        let gone: Vec<f64> = run
            .iter()
            .filter(|r| refused(r))
            .map(|r| r.fdp_conditional)
            .collect();
        println!(
            "| {label} | {:.2} | {} | {} |",
            gone.len() as f64 / run.len() as f64,
            mean_se(&kept),
            mean_se(&gone)
        );
    }
    out
}
