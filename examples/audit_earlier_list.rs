//! Library example: audit a shortlist that was made without accounting for the shift.
//!
//! Run: `cargo run --release --example audit_earlier_list` (CI runs it with `--ci`).
//! In the invented demo scenario, an earlier list is made by BH on unweighted conformal
//! p-values at FDR 0.1; the audit recomputes it with the exact weights and reports the
//! smallest BH level at which the whole list would have been selected, with and without
//! weights, and how much of it sits where the labeled set gives little support.

use weighbridge::audit::audit_shortlist;
use weighbridge::demo::{false_discovery_proportion, generate, THRESHOLD};
use weighbridge::pvalue::PValueKind;
use weighbridge::score::Thresholds;
use weighbridge::select::{run_selection, LabeledInput, PoolInput, Procedure, SelectOptions};

fn main() {
    let quick = std::env::args().any(|a| a == "--ci");
    let (n, m) = if quick { (1000, 5000) } else { (3000, 30000) };
    let s = generate(n, m, 11);
    let labeled = |weighted: bool| LabeledInput {
        outcome: &s.labeled.outcome,
        prediction: &s.labeled.prediction,
        thresholds: Thresholds::Constant(THRESHOLD),
        weights: weighted.then_some(&s.labeled.true_weight[..]),
    };
    let pool = |weighted: bool| PoolInput {
        prediction: &s.pool.prediction,
        thresholds: Thresholds::Constant(THRESHOLD),
        weights: weighted.then_some(&s.pool.true_weight[..]),
    };
    // The earlier list: unweighted BH on conservative p-values.
    let earlier = run_selection(
        &SelectOptions {
            procedure: Procedure::Bh,
            pvalues: Some(PValueKind::Conservative),
            ..SelectOptions::default()
        },
        labeled(false),
        pool(false),
    )
    .expect("valid inputs");
    let listed: Vec<usize> = (0..m).filter(|&j| earlier.selected[j]).collect();
    let (false_hits, chosen) = false_discovery_proportion(&s.pool, &earlier.selected);
    println!("earlier list: {chosen} units, {false_hits} of them inactive (the demo knows)");

    let audit = audit_shortlist(
        &SelectOptions::default(),
        labeled(true),
        pool(true),
        &listed,
        None,
    )
    .expect("valid inputs");
    println!(
        "smallest BH level for the whole list: {:.3} without weights, {:.3} with weights",
        audit.fdr_level_unweighted, audit.fdr_level_weighted
    );
    println!(
        "survive the weighted selection: {} of {}; poorly covered: {}",
        audit.survivors_count, audit.listed_count, audit.poorly_covered_count
    );
    for warning in &audit.warnings {
        println!("finding: {warning}");
    }
    assert!(audit.fdr_level_unweighted <= 0.1 * (1.0 + 1e-12));
    assert!(audit.fdr_level_weighted > audit.fdr_level_unweighted);
}
