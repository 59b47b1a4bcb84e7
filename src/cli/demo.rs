//! `weighbridge demo`: the whole job on an invented screening scenario (see
//! `crate::demo`), with the truth known, so that the output can say how far the shortlist
//! can be trusted and what ignoring the shift would have done.

use std::fmt::Write as _;
use std::path::PathBuf;

use clap::Args;

use crate::demo::{
    false_discovery_proportion, generate, repeated_screens, select_in_scenario, COMPARED, THRESHOLD,
};
use crate::report::{candidates_csv, select_summary, RunInputs, CAUTIONS};
use crate::table::OutputSet;

use super::{commit_outputs, print_stdout, Failure};

const DEMO_HELP: &str = "\
Generates an invented compound library (our own simulation, no real data): a labeled set of
assayed compounds chosen with a bias on two descriptors and a pool ten times larger, with a
model's predictions and the exact density-ratio weights. Runs the selection with and without
weights and, because the demo knows every compound's true activity, reports how many of each
shortlist are really inactive.

Writes into --out: labeled.csv, pool.csv (the inputs), candidates.csv, summary.json
(the weighted selection) and pool_truth.csv (the hidden true activities).

Example:
  cargo run --release -- demo --out weighbridge-demo";

/// Arguments of `demo`.
#[derive(Debug, Args)]
#[command(after_long_help = DEMO_HELP)]
pub struct DemoArgs {
    /// Output folder (created if missing).
    #[arg(long, default_value = "weighbridge-demo", value_name = "DIR")]
    pub out: PathBuf,
    /// Seed of the invented data and of the selection's random draws.
    #[arg(long, default_value_t = crate::random::DEFAULT_SEED)]
    pub seed: u64,
    /// Number of labeled (already assayed) compounds.
    #[arg(long, default_value_t = 3000)]
    pub labeled: usize,
    /// Number of untested compounds in the pool.
    #[arg(long, default_value_t = 30000)]
    pub pool: usize,
    /// Target false discovery rate.
    #[arg(long, default_value_t = 0.1)]
    pub fdr: f64,
    /// How many further invented screens to average over (0 to skip).
    #[arg(long, default_value_t = 20)]
    pub screens: usize,
}

/// Run `demo`.
pub fn run(args: DemoArgs) -> Result<(), Failure> {
    if args.labeled < 10 || args.pool < 10 {
        return Err(Failure::Input(
            "--labeled and --pool must each be at least 10".to_string(),
        ));
    }
    let scenario = generate(args.labeled, args.pool, args.seed);
    let q = args.fdr;
    let outcomes = COMPARED
        .iter()
        .map(|&(_, procedure, weighted)| {
            select_in_scenario(&scenario, procedure, weighted, q, args.seed)
        })
        .collect::<Result<Vec<_>, _>>()?;
    let weighted = &outcomes[0];

    let actives_in_pool = scenario
        .pool
        .outcome
        .iter()
        .filter(|&&y| y > THRESHOLD)
        .count();
    let mut files = OutputSet::new();
    files.add("labeled.csv", scenario.labeled.to_csv(true));
    files.add("pool.csv", scenario.pool.to_csv(false));
    let mut truth = String::from("id,y\n");
    for (id, y) in scenario.pool.ids.iter().zip(&scenario.pool.outcome) {
        let _ = writeln!(truth, "{id},{y:.4}");
    }
    files.add("pool_truth.csv", truth.into_bytes());
    files.add(
        "candidates.csv",
        candidates_csv(&scenario.pool.ids, weighted),
    );
    let summary = select_summary(
        weighted,
        RunInputs {
            labeled_file: "labeled.csv (invented demo data)".to_string(),
            pool_file: "pool.csv (invented demo data)".to_string(),
            threshold: format!("value {THRESHOLD}"),
            weights: "given in column w (the exact density ratio of the simulation)".to_string(),
        },
    );
    let json = serde_json::to_vec_pretty(&summary)
        .map_err(|e| Failure::Internal(format!("cannot serialize the summary: {e}")))?;
    files.add("summary.json", json);
    commit_outputs(files, &args.out)?;

    let mut out = String::new();
    let _ = writeln!(
        out,
        "weighbridge demo: an invented compound library (simulated, seed {})\n",
        args.seed
    );
    let _ = writeln!(
        out,
        "The team assayed {} compounds, mostly from an older series; {} untested compounds \
         remain, many from newer chemistry.\nA compound is active when its measured activity \
         exceeds {THRESHOLD}. The model's predictions are good for the older series and \
         optimistic for the newer chemistry.\n\
         Goal: a shortlist in which at most {:.0}% are inactive on average (FDR {q}).\n",
        scenario.labeled.len(),
        scenario.pool.len(),
        100.0 * q
    );
    let _ = writeln!(
        out,
        "Shift: the labeled weights are worth {:.0} equally weighted compounds ({:.1}% of the \
         labeled set); pool compounds that can never be selected at this level: {}.\n",
        weighted.labeled_ess,
        100.0 * weighted.labeled_ess / weighted.n_labeled as f64,
        weighted.unreachable_count
    );
    let _ = writeln!(
        out,
        "{:<48} {:>9} {:>10} {:>8}",
        "procedure", "selected", "inactive", "FDP"
    );
    for ((name, _, _), o) in COMPARED.iter().zip(&outcomes) {
        let (false_hits, chosen) = false_discovery_proportion(&scenario.pool, &o.selected);
        let fdp = if chosen == 0 {
            0.0
        } else {
            false_hits as f64 / chosen as f64
        };
        let _ = writeln!(
            out,
            "{name:<48} {chosen:>9} {false_hits:>10} {:>7.1}%",
            100.0 * fdp
        );
    }
    let _ = writeln!(
        out,
        "\n(The pool holds {actives_in_pool} truly active compounds. The false discovery \
         proportion (FDP) of one screen scatters around its average; the guarantee is about \
         the average over repeated screens:)"
    );
    if args.screens > 0 {
        let repeated = repeated_screens(args.labeled, args.pool, q, args.seed, args.screens)?;
        let _ = writeln!(
            out,
            "\nAveraged over {} further invented screens (fresh data each time):",
            args.screens
        );
        let _ = writeln!(
            out,
            "{:<48} {:>9} {:>16} {:>7}",
            "procedure", "selected", "FDR +- 2 SE", "power"
        );
        for r in &repeated {
            let _ = writeln!(
                out,
                "{:<48} {:>9.0} {:>8.1}% +- {:>4.1} {:>6.1}%",
                r.label,
                r.mean_selected,
                100.0 * r.fdr,
                200.0 * r.fdr_se,
                100.0 * r.power
            );
        }
    }
    if !weighted.warnings.is_empty() {
        let _ = writeln!(out, "\nWarnings on the weighted selection:");
        for w in &weighted.warnings {
            let _ = writeln!(out, "  - {w}");
        }
    }
    let _ = writeln!(out, "\nCautions:");
    for c in CAUTIONS {
        let _ = writeln!(out, "  - {c}");
    }
    let _ = writeln!(
        out,
        "\nWrote labeled.csv, pool.csv, pool_truth.csv, candidates.csv and summary.json to {}",
        args.out.display()
    );
    print_stdout(&out);
    Ok(())
}
