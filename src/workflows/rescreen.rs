//! Re-screening after the library grows: what changed against a previous run?
//!
//! Compares a new selection (on the expanded pool) with the per-candidate results of a
//! previous run, unit by unit (matched by id), and explains each change in plain words:
//!
//! * newly selected: a unit new to the pool, or one that was in the pool but not selected;
//! * dropped: selected before, not now, with the reasons that apply — its weight moved, its
//!   score moved (threshold or prediction changed), its p-value moved (the labeled set or
//!   the weights changed), or, with all of those unchanged, the pool grew so that the BH
//!   line `q k / m` got stricter for the same rank (design.md 2.3);
//! * new units the labeled set cannot vouch for: new pool units that are unreachable at
//!   level q (p-value floor `w_j / (W + w_j)` above q, design.md 2.2) or carry a weight above
//!   every labeled weight.
//!
//! Values are compared with a relative tolerance of [`MOVED`]: a change smaller than that
//! is rounding, not a move (common practice).

use std::collections::HashMap;

use serde::Serialize;

/// Relative change below which a score, weight or p-value counts as unchanged.
pub const MOVED: f64 = 1e-9;

/// What the previous run said about one unit (from its candidates.csv).
#[derive(Clone, Debug)]
pub struct PreviousUnit {
    pub id: String,
    pub score: f64,
    pub weight: f64,
    pub p_value: f64,
    pub selected: bool,
}

/// What the current run says about one unit.
#[derive(Clone, Copy, Debug)]
pub struct CurrentUnit<'a> {
    pub id: &'a str,
    pub score: f64,
    pub weight: f64,
    pub p_value: f64,
    pub selected: bool,
    pub unreachable: bool,
}

/// The change of one unit between the runs.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum Change {
    /// New to the pool and selected.
    NewSelected,
    /// New to the pool, not selected.
    NewNotSelected,
    /// In the pool before, not selected then, selected now.
    NewlySelected,
    /// Selected before, not now.
    Dropped,
    /// Selected in both runs.
    Kept,
    /// Selected in neither run.
    NotSelected,
    /// In the previous pool, missing from the current one.
    LeftPool,
}

impl Change {
    /// Machine-readable name (changes.csv `change_code`): `new_selected`,
    /// `new_not_selected`, `newly_selected`, `dropped`, `kept`, `not_selected`, `left_pool`.
    pub fn code(self) -> &'static str {
        match self {
            Change::NewSelected => "new_selected",
            Change::NewNotSelected => "new_not_selected",
            Change::NewlySelected => "newly_selected",
            Change::Dropped => "dropped",
            Change::Kept => "kept",
            Change::NotSelected => "not_selected",
            Change::LeftPool => "left_pool",
        }
    }

    /// Plain words for tables.
    pub fn words(self) -> &'static str {
        match self {
            Change::NewSelected => "new to the pool, selected",
            Change::NewNotSelected => "new to the pool, not selected",
            Change::NewlySelected => "newly selected",
            Change::Dropped => "dropped",
            Change::Kept => "kept",
            Change::NotSelected => "not selected",
            Change::LeftPool => "no longer in the pool",
        }
    }
}

/// One row of the comparison.
#[derive(Clone, Debug, Serialize)]
pub struct UnitChange {
    pub id: String,
    pub change: Change,
    /// Why, in plain words ("" when nothing needs explaining).
    pub why: String,
    pub previous_p_value: Option<f64>,
    pub p_value: Option<f64>,
    /// New unit where the labeled set gives little support.
    pub new_poorly_covered: bool,
}

/// Counts of the comparison.
#[derive(Clone, Debug, Default, Serialize)]
pub struct ChangeCounts {
    pub previous_pool: usize,
    pub current_pool: usize,
    pub new_units: usize,
    pub left_pool: usize,
    pub previously_selected: usize,
    pub selected: usize,
    /// In the previous pool and not selected then, selected now.
    pub newly_selected: usize,
    /// New to the pool and selected (canonical name).
    pub new_units_selected: usize,
    /// Deprecated alias of `new_units_selected` (same value), kept for readers of earlier
    /// changes.json files.
    pub new_selected: usize,
    pub dropped: usize,
    pub kept: usize,
    pub dropped_weight_moved: usize,
    pub dropped_score_moved: usize,
    pub dropped_p_value_moved: usize,
    pub dropped_pool_grew: usize,
    pub new_poorly_covered: usize,
}

fn moved(a: f64, b: f64) -> bool {
    let scale = a.abs().max(b.abs());
    if a.is_infinite() || b.is_infinite() {
        return a != b;
    }
    (a - b).abs() > MOVED * scale.max(f64::MIN_POSITIVE)
}

/// Compare the current run (in current pool order) with the previous one.
///
/// `largest_labeled_weight` decides "a weight above every labeled weight" for new units.
pub fn compare(
    previous: &[PreviousUnit],
    current: &[CurrentUnit<'_>],
    largest_labeled_weight: f64,
    fdr: f64,
) -> (Vec<UnitChange>, ChangeCounts) {
    let before: HashMap<&str, &PreviousUnit> =
        previous.iter().map(|u| (u.id.as_str(), u)).collect();
    let now_ids: HashMap<&str, ()> = current.iter().map(|u| (u.id, ())).collect();
    let mut counts = ChangeCounts {
        previous_pool: previous.len(),
        current_pool: current.len(),
        previously_selected: previous.iter().filter(|u| u.selected).count(),
        selected: current.iter().filter(|u| u.selected).count(),
        ..ChangeCounts::default()
    };
    let grew = current.len() > previous.len();
    let mut rows = Vec::with_capacity(current.len());
    for unit in current {
        let poorly = unit.unreachable || unit.weight > largest_labeled_weight;
        let row = match before.get(unit.id) {
            None => new_unit_change(unit, poorly, fdr, &mut counts),
            Some(old) => known_unit_change(
                old,
                unit,
                grew,
                (previous.len(), current.len()),
                &mut counts,
            ),
        };
        rows.push(row);
    }
    for old in previous {
        if !now_ids.contains_key(old.id.as_str()) {
            counts.left_pool += 1;
            rows.push(UnitChange {
                id: old.id.clone(),
                change: Change::LeftPool,
                why: if old.selected {
                    "was selected; no longer in the pool file".to_string()
                } else {
                    String::new()
                },
                previous_p_value: Some(old.p_value),
                p_value: None,
                new_poorly_covered: false,
            });
        }
    }
    (rows, counts)
}

/// The row of a unit new to the pool (`poorly`: the labeled set gives it little support).
fn new_unit_change(
    unit: &CurrentUnit<'_>,
    poorly: bool,
    fdr: f64,
    counts: &mut ChangeCounts,
) -> UnitChange {
    counts.new_units += 1;
    let change = if unit.selected {
        counts.new_selected += 1;
        counts.new_units_selected += 1;
        Change::NewSelected
    } else {
        Change::NewNotSelected
    };
    if poorly {
        counts.new_poorly_covered += 1;
    }
    let why = if poorly {
        if unit.unreachable {
            format!(
                "new unit the labeled set cannot vouch for: its p-value floor \
                 w/(W+w) is above {fdr}"
            )
        } else {
            "new unit the labeled set cannot vouch for: its weight exceeds every \
             labeled weight"
                .to_string()
        }
    } else {
        String::new()
    };
    UnitChange {
        id: unit.id.to_string(),
        change,
        why,
        previous_p_value: None,
        p_value: Some(unit.p_value),
        new_poorly_covered: poorly,
    }
}

/// The row of a unit in both pools, with the reasons a changed decision gets;
/// `pool_sizes` is (previous, current).
fn known_unit_change(
    old: &PreviousUnit,
    unit: &CurrentUnit<'_>,
    grew: bool,
    pool_sizes: (usize, usize),
    counts: &mut ChangeCounts,
) -> UnitChange {
    let change = match (old.selected, unit.selected) {
        (true, true) => Change::Kept,
        (false, true) => Change::NewlySelected,
        (true, false) => Change::Dropped,
        (false, false) => Change::NotSelected,
    };
    let mut reasons = Vec::new();
    if matches!(change, Change::Dropped | Change::NewlySelected) {
        let weight_moved = moved(old.weight, unit.weight);
        let score_moved = moved(old.score, unit.score);
        let p_moved = moved(old.p_value, unit.p_value);
        if weight_moved {
            reasons.push(format!(
                "its weight moved from {:.4} to {:.4}",
                old.weight, unit.weight
            ));
        }
        if score_moved {
            reasons.push(format!(
                "its score moved from {:.4} to {:.4} (threshold or prediction \
                 changed)",
                old.score, unit.score
            ));
        }
        if p_moved {
            reasons.push(format!(
                "its p-value moved from {:.4} to {:.4}",
                old.p_value, unit.p_value
            ));
        }
        if change == Change::Dropped {
            counts.dropped += 1;
            counts.dropped_weight_moved += usize::from(weight_moved);
            counts.dropped_score_moved += usize::from(score_moved);
            counts.dropped_p_value_moved += usize::from(p_moved);
            if !weight_moved && !score_moved && !p_moved {
                if grew {
                    counts.dropped_pool_grew += 1;
                    reasons.push(format!(
                        "its p-value did not move, but the pool grew from {} to {} \
                         units, so the BH line q k / m is stricter at every rank",
                        pool_sizes.0, pool_sizes.1
                    ));
                } else {
                    reasons.push(
                        "its p-value did not move; the other units' p-values \
                         changed the selection's cut-off"
                            .to_string(),
                    );
                }
            }
        } else {
            counts.newly_selected += 1;
        }
    } else if change == Change::Kept {
        counts.kept += 1;
    }
    UnitChange {
        id: unit.id.to_string(),
        change,
        why: reasons.join("; "),
        previous_p_value: Some(old.p_value),
        p_value: Some(unit.p_value),
        new_poorly_covered: false,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn old(id: &str, score: f64, weight: f64, p: f64, selected: bool) -> PreviousUnit {
        PreviousUnit {
            id: id.to_string(),
            score,
            weight,
            p_value: p,
            selected,
        }
    }

    fn now(id: &str, score: f64, weight: f64, p: f64, selected: bool) -> CurrentUnit<'_> {
        CurrentUnit {
            id,
            score,
            weight,
            p_value: p,
            selected,
            unreachable: false,
        }
    }

    #[test]
    fn every_kind_of_change_is_named() {
        let previous = vec![
            old("a", 0.1, 1.0, 0.01, true),  // kept
            old("b", 0.2, 1.0, 0.02, true),  // dropped, nothing moved: pool grew
            old("c", 0.3, 1.0, 0.03, true),  // dropped, weight moved
            old("d", 0.4, 1.0, 0.30, false), // newly selected, p moved
            old("e", 0.5, 1.0, 0.50, true),  // left the pool
        ];
        let current = vec![
            now("a", 0.1, 1.0, 0.01, true),
            now("b", 0.2, 1.0, 0.02, false),
            now("c", 0.3, 2.0, 0.05, false),
            now("d", 0.4, 1.0, 0.01, true),
            now("f", 0.0, 1.0, 0.001, true),
            CurrentUnit {
                unreachable: true,
                ..now("g", 0.9, 50.0, 0.9, false)
            },
        ];
        let (rows, counts) = compare(&previous, &current, 10.0, 0.1);
        let change = |id: &str| rows.iter().find(|r| r.id == id).unwrap();
        assert_eq!(change("a").change, Change::Kept);
        assert_eq!(change("b").change, Change::Dropped);
        assert!(change("b").why.contains("pool grew from 5 to 6"));
        assert!(change("c").why.contains("weight moved"));
        assert_eq!(change("d").change, Change::NewlySelected);
        assert!(change("d").why.contains("p-value moved"));
        assert_eq!(change("e").change, Change::LeftPool);
        assert_eq!(change("f").change, Change::NewSelected);
        assert!(change("g").new_poorly_covered);
        assert_eq!(counts.dropped, 2);
        assert_eq!(counts.dropped_pool_grew, 1);
        assert_eq!(counts.dropped_weight_moved, 1);
        assert_eq!(counts.new_units, 2);
        assert_eq!(counts.new_poorly_covered, 1);
        assert_eq!(counts.left_pool, 1);
        assert_eq!(counts.kept, 1);
    }

    #[test]
    fn rounding_is_not_a_move() {
        assert!(!moved(0.1, 0.1 + 1e-17));
        assert!(moved(0.1, 0.1001));
        assert!(!moved(f64::INFINITY, f64::INFINITY));
    }
}
