//! `select --batch-design DIR`: the labeled rows are the assayed units of a calibration batch
//! made by `weighbridge batch`, the pool is the pool the batch was drawn from, and the weights
//! are the exact density ratios `(1 - pi) / pi` of the recorded inclusion probabilities
//! (`crate::workflows::batch`). No classifier is fit.
//!
//! Checks, each a located error: the pool is the one the design was made from (same ids in
//! the same order: the FNV-1a checksum in design.json, and the row count); every labeled id
//! is a unit the design drew; every drawn unit has an outcome (or `--allow-missing-batch`,
//! with the assumption it makes stated). Drawn units are removed from the pool by id.

use std::collections::HashMap;
use std::path::{Path, PathBuf};

use crate::io::{Role, UnitTable};
use crate::warning::{Level, Warning};
use crate::workflows::batch::exact_weight;
use crate::workflows::check::subset;

use super::batch::id_checksum;
use super::Failure;

/// The name the design's weights go by inside the run (they are attached to the tables,
/// not read from a column).
pub(crate) const WEIGHT_NAME: &str = "(1 - inclusion_probability) / inclusion_probability";

/// A design read back from a `batch` output folder.
#[derive(Debug)]
pub(crate) struct RecordedDesign {
    pub dir: PathBuf,
    /// id -> (inclusion probability, drawn), and the ids in file order.
    by_id: HashMap<String, (f64, bool)>,
    ids: Vec<String>,
    checksum: String,
}

fn bad(dir: &Path, what: String) -> Failure {
    Failure::Input(format!(
        "batch design {}: {what}. Hint: pass the folder written by `weighbridge batch` for \
         this pool.",
        dir.display()
    ))
}

/// Read design.csv and design.json from `dir`.
pub(crate) fn read_design(dir: &Path) -> Result<RecordedDesign, Failure> {
    let json_path = dir.join("design.json");
    let json: serde_json::Value = std::fs::read(&json_path)
        .map_err(|e| bad(dir, format!("cannot read {}: {e}", json_path.display())))
        .and_then(|bytes| {
            serde_json::from_slice(&bytes).map_err(|e| {
                bad(
                    dir,
                    format!("{} is not valid JSON: {e}", json_path.display()),
                )
            })
        })?;
    let checksum = json["pool_id_checksum"]
        .as_str()
        .ok_or_else(|| bad(dir, "design.json has no pool_id_checksum".to_string()))?
        .to_string();
    let csv_path = dir.join("design.csv");
    let mut reader = csv::Reader::from_path(&csv_path)
        .map_err(|e| bad(dir, format!("cannot read {}: {e}", csv_path.display())))?;
    let header = reader
        .headers()
        .map_err(|e| bad(dir, format!("{}: {e}", csv_path.display())))?
        .clone();
    if header.iter().collect::<Vec<_>>() != ["id", "inclusion_probability", "in_batch"] {
        return Err(bad(
            dir,
            format!(
                "{} line 1: expected the columns id, inclusion_probability, in_batch",
                csv_path.display()
            ),
        ));
    }
    let mut by_id = HashMap::new();
    let mut ids = Vec::new();
    for (row, record) in reader.records().enumerate() {
        let line = row + 2;
        let record =
            record.map_err(|e| bad(dir, format!("{} line {line}: {e}", csv_path.display())))?;
        let id = record.get(0).unwrap_or_default().to_string();
        let p: f64 = record
            .get(1)
            .and_then(|c| c.parse().ok())
            .filter(|p: &f64| *p > 0.0 && *p < 1.0)
            .ok_or_else(|| {
                bad(
                    dir,
                    format!(
                        "{} line {line}, column inclusion_probability: expected a number in \
                         (0, 1)",
                        csv_path.display()
                    ),
                )
            })?;
        let drawn = match record.get(2) {
            Some("true") => true,
            Some("false") => false,
            _ => {
                return Err(bad(
                    dir,
                    format!(
                        "{} line {line}, column in_batch: expected true or false",
                        csv_path.display()
                    ),
                ))
            }
        };
        if by_id.insert(id.clone(), (p, drawn)).is_some() {
            return Err(bad(
                dir,
                format!("{} line {line}: duplicate id {id}", csv_path.display()),
            ));
        }
        ids.push(id);
    }
    Ok(RecordedDesign {
        dir: dir.to_path_buf(),
        by_id,
        ids,
        checksum,
    })
}

/// The inputs of a batch-design selection: the assayed units with their exact weights, the
/// pool without the drawn units with theirs, the weights' description, and warnings.
pub(crate) struct DesignInputs {
    pub labeled: UnitTable,
    pub pool: UnitTable,
    pub description: String,
    pub warnings: Vec<Warning>,
}

/// Check the tables against the design and attach the exact weights.
pub(crate) fn apply_design(
    design: &RecordedDesign,
    labeled: &UnitTable,
    pool: &UnitTable,
    allow_missing: bool,
) -> Result<DesignInputs, Failure> {
    let dir = &design.dir;
    if pool.ids.len() != design.ids.len() || id_checksum(&pool.ids) != design.checksum {
        return Err(bad(
            dir,
            format!(
                "the pool file {} ({} units) is not the pool the design was made from ({} \
                 units; the ids or their order differ)",
                pool.path.display(),
                pool.len(),
                design.ids.len()
            ),
        ));
    }
    let mut assayed = HashMap::new();
    for (row, id) in labeled.ids.iter().enumerate() {
        match design.by_id.get(id) {
            None => {
                return Err(Failure::Input(format!(
                    "labeled file {} data row {}: id {id} is not a unit of the batch design \
                     {} (not in its pool). Hint: the labeled file of a batch-design selection \
                     holds the assayed batch units only.",
                    labeled.path.display(),
                    row + 1,
                    dir.display()
                )))
            }
            Some((_, false)) => {
                return Err(Failure::Input(format!(
                    "labeled file {} data row {}: id {id} was not drawn into the batch of {} \
                     (in_batch false): units assayed outside the design have no known \
                     inclusion probability. Hint: remove it from the labeled file.",
                    labeled.path.display(),
                    row + 1,
                    dir.display()
                )))
            }
            Some(_) => {
                assayed.insert(id.as_str(), row);
            }
        }
    }
    let drawn: Vec<&String> = design.ids.iter().filter(|id| design.by_id[*id].1).collect();
    let missing: Vec<&String> = drawn
        .iter()
        .copied()
        .filter(|id| !assayed.contains_key(id.as_str()))
        .collect();
    let mut warnings = Vec::new();
    if !missing.is_empty() {
        let first: Vec<&str> = missing.iter().take(10).map(|s| s.as_str()).collect();
        let text = format!(
            "{} of the {} units drawn into the batch have no outcome in {} (first: {})",
            missing.len(),
            drawn.len(),
            labeled.path.display(),
            first.join(", ")
        );
        if !allow_missing {
            return Err(Failure::Input(format!(
                "{text}. The weights are exact only if every drawn unit is assayed. Hint: add \
                 their outcomes, or pass --allow-missing-batch to treat them as never drawn, \
                 which assumes they are missing at random given their features."
            )));
        }
        warnings.push(
            Warning::new(
                "missing_batch_outcomes",
                Level::High,
                "missing_batch_count",
                format!(
                    "{text}; they were left out as if never drawn (--allow-missing-batch). The \
                     weights are exact only if these units are missing at random given their \
                     features; otherwise the FDR guarantee does not hold."
                ),
            )
            .measured(missing.len() as f64, 0.0)
            .titled("missing batch outcomes"),
        );
    }
    let weight_of = |id: &String| exact_weight(design.by_id[id].0);
    let mut labeled_out = subset(
        labeled,
        &(0..labeled.len()).collect::<Vec<_>>(),
        Role::Labeled,
    );
    labeled_out.weight = Some(labeled.ids.iter().map(weight_of).collect());
    let keep: Vec<usize> = (0..pool.len())
        .filter(|&j| !design.by_id[&pool.ids[j]].1)
        .collect();
    let mut pool_out = subset(pool, &keep, Role::Pool);
    pool_out.weight = Some(pool_out.ids.iter().map(weight_of).collect());
    let description = format!(
        "exact by design: (1 - pi) / pi from the inclusion probabilities in {} ({} assayed \
         batch units; {} drawn units removed from the pool)",
        dir.join("design.csv").display(),
        labeled.len(),
        drawn.len()
    );
    warnings.push(
        Warning::new(
            "batch_not_for_training",
            Level::Low,
            "batch_design",
            "the batch's outcomes must not be used to retrain the model whose predictions this \
             selection calibrates; that voids the exactness of the weights."
                .to_string(),
        )
        .titled("calibration batch"),
    );
    Ok(DesignInputs {
        labeled: labeled_out,
        pool: pool_out,
        description,
        warnings,
    })
}
