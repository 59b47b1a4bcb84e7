//! Library example: select a shortlist with given density-ratio weights.
//!
//! Run: `cargo run --release --example select_with_given_weights` (CI runs it with `--ci`).
//! Uses the invented demo scenario (`weighbridge::demo`): 3000 labeled compounds, 30000 in
//! the pool, the exact density ratio as weights; selects with conditional calibration at
//! FDR 0.1 and, because the demo knows the truth, prints the realized false discovery
//! proportion.

use weighbridge::demo::{false_discovery_proportion, generate, THRESHOLD};
use weighbridge::score::Thresholds;
use weighbridge::select::{run_selection, LabeledInput, PoolInput, SelectOptions};

fn main() {
    let quick = std::env::args().any(|a| a == "--ci");
    let (n, m) = if quick { (1000, 5000) } else { (3000, 30000) };
    let scenario = generate(n, m, 7);
    let options = SelectOptions::default(); // conditional calibration, q = 0.1, homogeneous pruning
    let outcome = run_selection(
        &options,
        LabeledInput {
            outcome: &scenario.labeled.outcome,
            prediction: &scenario.labeled.prediction,
            thresholds: Thresholds::Constant(THRESHOLD),
            weights: Some(&scenario.labeled.true_weight),
        },
        PoolInput {
            prediction: &scenario.pool.prediction,
            thresholds: Thresholds::Constant(THRESHOLD),
            weights: Some(&scenario.pool.true_weight),
        },
    )
    .expect("valid inputs");
    let (false_hits, chosen) = false_discovery_proportion(&scenario.pool, &outcome.selected);
    println!(
        "selected {} of {} (first step {:?}, BH on the same p-values {}), {} inactive",
        outcome.selected_count, m, outcome.first_step_count, outcome.bh_selected_count, false_hits
    );
    println!(
        "labeled effective sample size {:.0} of {n}",
        outcome.labeled_ess
    );
    for warning in &outcome.warnings {
        println!("warning: {warning}");
    }
    assert_eq!(chosen, outcome.selected_count);
    assert!(outcome.p_values.iter().all(|p| *p > 0.0 && *p <= 1.0));
}
