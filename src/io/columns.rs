//! Column selection: finding the requested columns in a header (located errors for missing
//! or doubled names), feature selectors with ranges such as `f1..f32`, and the check that
//! the labeled and pool tables chose the same features.

use std::collections::hash_map::Entry;
use std::collections::HashMap;
use std::path::Path;

use super::errors::{name_list, InputError};
use super::read::{ColumnKind, ReadOptions, Role, UnitTable};

/// A column chosen from the header.
#[derive(Clone, Debug)]
pub(super) struct Column {
    pub(super) index: usize,
    pub(super) name: String,
    pub(super) kind: ColumnKind,
}

/// Header facts every column lookup needs.
pub(super) struct Header<'a> {
    pub(super) path: &'a Path,
    pub(super) role: Role,
    pub(super) line: u64,
    pub(super) names: Vec<String>,
}

/// The columns one [`read_units`](super::read_units) call takes from the header.
pub(super) struct ChosenColumns {
    pub(super) id: Column,
    pub(super) prediction: Column,
    /// Read for the labeled file only.
    pub(super) outcome: Option<Column>,
    pub(super) threshold: Option<Column>,
    pub(super) weight: Option<Column>,
    pub(super) feature_names: Vec<String>,
    pub(super) features: Vec<Column>,
    /// `--keep-columns`, in the order given (a labeled file: those it has).
    pub(super) kept: Vec<Column>,
}

impl Header<'_> {
    fn column(&self, name: &str, kind: ColumnKind) -> Result<Column, InputError> {
        let mut matches = self
            .names
            .iter()
            .enumerate()
            .filter(|(_, header_name)| header_name.as_str() == name)
            .map(|(index, _)| index);
        let Some(index) = matches.next() else {
            return Err(InputError::MissingColumn {
                path: self.path.to_path_buf(),
                role: self.role,
                header_line: self.line,
                kind,
                column: name.to_string(),
                available: self.names.clone(),
            });
        };
        if let Some(second) = matches.next() {
            return Err(InputError::DuplicateColumn {
                path: self.path.to_path_buf(),
                header_line: self.line,
                column: name.to_string(),
                first_field: index + 1,
                second_field: second + 1,
            });
        }
        Ok(Column {
            index,
            name: name.to_string(),
            kind,
        })
    }

    /// Look up every column `options` asks for, in a fixed order (id, prediction, outcome,
    /// threshold, weight, features) so that the first problem is the one reported.
    pub(super) fn choose_columns(
        &self,
        options: &ReadOptions,
    ) -> Result<ChosenColumns, InputError> {
        let id = self.column(&options.id, ColumnKind::Id)?;
        let prediction = self.column(&options.prediction, ColumnKind::Prediction)?;
        let outcome = match self.role {
            Role::Labeled | Role::Table => {
                optional_column(self, options.outcome.as_ref(), ColumnKind::Outcome)?
            }
            Role::Pool | Role::Shortlist => None,
        };
        let threshold = optional_column(
            self,
            options.threshold_column.as_ref(),
            ColumnKind::Threshold,
        )?;
        let weight = optional_column(self, options.weight_column.as_ref(), ColumnKind::Weight)?;
        let feature_names =
            resolve_features(&options.features, &self.names).map_err(|message| {
                InputError::FeatureSelection {
                    path: self.path.to_path_buf(),
                    header_line: self.line,
                    message,
                }
            })?;
        let features = feature_names
            .iter()
            .map(|name| self.column(name, ColumnKind::Feature))
            .collect::<Result<Vec<_>, _>>()?;
        let kept = options
            .keep_columns
            .iter()
            .filter(|name| self.role != Role::Labeled || self.names.contains(name))
            .map(|name| self.column(name, ColumnKind::Kept))
            .collect::<Result<Vec<_>, _>>()?;
        Ok(ChosenColumns {
            id,
            prediction,
            outcome,
            threshold,
            weight,
            feature_names,
            features,
            kept,
        })
    }
}

fn optional_column(
    header: &Header<'_>,
    name: Option<&String>,
    kind: ColumnKind,
) -> Result<Option<Column>, InputError> {
    name.map(|name| header.column(name, kind)).transpose()
}

/// Split "f12" into ("f", 12). `None` without a numeric suffix or on overflow.
fn numeric_suffix(name: &str) -> Option<(&str, u64)> {
    let prefix = name.trim_end_matches(|c: char| c.is_ascii_digit());
    let digits = &name[prefix.len()..];
    if digits.is_empty() {
        return None;
    }
    digits.parse().ok().map(|number| (prefix, number))
}

/// A range whose ends are both header names: every column from `from` to `to` in header
/// order (first occurrences).
fn positional_range(
    selector: &str,
    from: &str,
    to: &str,
    header: &[String],
) -> Option<Result<Vec<String>, String>> {
    let start = header.iter().position(|name| name == from)?;
    let end = header.iter().position(|name| name == to)?;
    if start > end {
        return Some(Err(format!(
            "range `{selector}` runs backwards: `{to}` is column {} and `{from}` column {} of the \
             header; write `{to}..{from}`",
            end + 1,
            start + 1
        )));
    }
    Some(Ok(header[start..=end].to_vec()))
}

/// Why a range cannot be read either way: names its first end that is not a column name
/// (with a suggestion).
fn range_end_error(selector: &str, from: &str, to: &str, header: &[String]) -> String {
    let end = if header.iter().any(|name| name == from) {
        to
    } else {
        from
    };
    format!(
        "range `{selector}`: `{end}` is not a column name{}{}. A range is two column names \
         (`MolWt..TPSA`: every column from MolWt to TPSA in the header) or two names with a \
         numeric suffix (`f1..f32`)",
        super::errors::did_you_mean(end, header),
        if numeric_suffix(end).is_none() {
            " and does not end in a number"
        } else {
            ""
        }
    )
}

fn expand_range(
    selector: &str,
    from: &str,
    to: &str,
    header: &[String],
) -> Result<Vec<String>, String> {
    // Two numbered ends with one prefix keep their numeric meaning (every f2, ..., f31
    // must exist, in number order), whatever the header order; other ranges of two
    // column names go by position.
    let numbered = matches!(
        (numeric_suffix(from), numeric_suffix(to)),
        (Some((a, _)), Some((b, _))) if a == b
    );
    if !numbered {
        if let Some(range) = positional_range(selector, from, to, header) {
            return range;
        }
    }
    let (Some((prefix, start)), Some((end_prefix, end))) =
        (numeric_suffix(from), numeric_suffix(to))
    else {
        return Err(range_end_error(selector, from, to, header));
    };
    if prefix != end_prefix {
        return Err(format!(
            "range `{selector}`: both ends must share one prefix, got `{prefix}` and `{end_prefix}`"
        ));
    }
    if start > end {
        return Err(format!(
            "range `{selector}` runs backwards; write `{to}..{from}`"
        ));
    }
    let count = end - start + 1;
    if count > header.len() as u64 {
        return Err(format!(
            "range `{selector}` covers {count} columns but the header has only {}",
            header.len()
        ));
    }
    let mut by_number: HashMap<u64, Vec<&str>> = HashMap::new();
    for name in header {
        if let Some((name_prefix, number)) = numeric_suffix(name) {
            if name_prefix == prefix && (start..=end).contains(&number) {
                by_number.entry(number).or_default().push(name);
            }
        }
    }
    let mut names = Vec::with_capacity(count as usize);
    let mut missing = Vec::new();
    for number in start..=end {
        match by_number.get(&number).map(Vec::as_slice) {
            None | Some([]) => missing.push(format!("{prefix}{number}")),
            Some([name]) => names.push(name.to_string()),
            Some(several) => {
                return Err(format!(
                    "range `{selector}`: number {number} matches several columns: {}",
                    several.join(", ")
                ))
            }
        }
    }
    if !missing.is_empty() {
        return Err(format!(
            "range `{selector}`: the header lacks {}",
            name_list(&missing)
        ));
    }
    Ok(names)
}
/// Expand feature selectors against a header.
///
/// A selector is a column name, or a range `A..B`. Two ends with one prefix and a numeric
/// suffix (`f1..f5`) mean every header name with that prefix and suffix 1, 2, ..., 5
/// (compared as numbers, so `f01` counts as 1), each of which must exist, in number order.
/// Otherwise, when both `A` and `B` are header names, the range is every column from `A`
/// to `B` in header order (`MolWt..TPSA`). A selector that is itself a header name is taken as a name even if
/// it contains `..`. Selectors are trimmed; the result keeps the order given. Plain names are
/// not checked against the header here ([`read_units`](super::read_units) reports them as missing columns).
///
/// # Errors
/// An empty selector, a range that does not resolve (missing member, different prefixes,
/// no numeric suffix, backwards, ambiguous), or a feature selected twice.
pub fn resolve_features(selectors: &[String], header: &[String]) -> Result<Vec<String>, String> {
    let mut chosen: Vec<String> = Vec::new();
    let mut selected_by: HashMap<String, String> = HashMap::new();
    for raw in selectors {
        let selector = raw.trim();
        if selector.is_empty() {
            return Err(
                "empty feature name in the feature list (a doubled or trailing comma?)".to_string(),
            );
        }
        let names = match selector.split_once("..") {
            Some((from, to)) if !header.iter().any(|name| name == selector) => {
                expand_range(selector, from.trim(), to.trim(), header)?
            }
            _ => vec![selector.to_string()],
        };
        for name in names {
            match selected_by.entry(name.clone()) {
                Entry::Occupied(earlier) => {
                    return Err(format!(
                        "feature `{name}` is selected twice (by `{}` and by `{selector}`)",
                        earlier.get()
                    ))
                }
                Entry::Vacant(slot) => {
                    slot.insert(selector.to_string());
                }
            }
            chosen.push(name);
        }
    }
    Ok(chosen)
}

/// At most this many names are suggested for a mistyped column.
const SUGGESTED: usize = 3;

/// Header names close to `wanted`, best first (at most three): names equal to it ignoring
/// case; else equal ignoring case and punctuation (`pred_pIC50` for `predpic50`); else the
/// names nearest in edit distance (Levenshtein, ignoring case) if within a third of the
/// name's length (at least 1); else names that contain it or that it contains (3 or more
/// characters). Empty when nothing is close.
pub fn suggest(wanted: &str, header: &[String]) -> Vec<String> {
    let wanted = wanted.trim();
    let lower = wanted.to_lowercase();
    let pick = |keep: &dyn Fn(&str) -> bool| -> Vec<String> {
        header
            .iter()
            .filter(|name| name.as_str() != wanted && keep(name))
            .take(SUGGESTED)
            .cloned()
            .collect()
    };
    let same_case = pick(&|name| name.to_lowercase() == lower);
    if !same_case.is_empty() {
        return same_case;
    }
    let squashed = |text: &str| -> String {
        text.chars()
            .filter(|c| c.is_alphanumeric())
            .flat_map(char::to_lowercase)
            .collect()
    };
    let target = squashed(wanted);
    if !target.is_empty() {
        let same_letters = pick(&|name| squashed(name) == target);
        if !same_letters.is_empty() {
            return same_letters;
        }
    }
    let limit = (lower.chars().count() / 3).max(1);
    let distances: Vec<(usize, &String)> = header
        .iter()
        .filter(|name| name.as_str() != wanted)
        .map(|name| (edit_distance(&lower, &name.to_lowercase()), name))
        .collect();
    if let Some(best) = distances.iter().map(|(d, _)| *d).min() {
        if best <= limit {
            return distances
                .iter()
                .filter(|(d, _)| *d == best)
                .take(SUGGESTED)
                .map(|(_, name)| (*name).clone())
                .collect();
        }
    }
    if lower.chars().count() >= 3 {
        return pick(&|name| {
            let name = name.to_lowercase();
            name.chars().count() >= 3 && (name.contains(&lower) || lower.contains(&name))
        });
    }
    Vec::new()
}

/// Levenshtein distance between two strings, by characters (insertions, deletions and
/// substitutions each cost 1; the textbook two-row dynamic programme).
fn edit_distance(a: &str, b: &str) -> usize {
    let b: Vec<char> = b.chars().collect();
    let mut previous: Vec<usize> = (0..=b.len()).collect();
    let mut current = vec![0; b.len() + 1];
    for (i, ca) in a.chars().enumerate() {
        current[0] = i + 1;
        for (j, &cb) in b.iter().enumerate() {
            let substitution = previous[j] + usize::from(ca != cb);
            current[j + 1] = substitution.min(previous[j + 1] + 1).min(current[j] + 1);
        }
        std::mem::swap(&mut previous, &mut current);
    }
    previous[b.len()]
}

/// Check that the labeled and pool tables chose the same feature columns (same order).
///
/// # Errors
/// [`InputError::FeatureMismatch`] listing both choices.
pub fn check_same_features(labeled: &UnitTable, pool: &UnitTable) -> Result<(), InputError> {
    if labeled.feature_names == pool.feature_names {
        return Ok(());
    }
    Err(InputError::FeatureMismatch {
        labeled_path: labeled.path.clone(),
        pool_path: pool.path.clone(),
        labeled: labeled.feature_names.clone(),
        pool: pool.feature_names.clone(),
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    fn names(list: &[&str]) -> Vec<String> {
        list.iter().map(|s| s.to_string()).collect()
    }

    #[test]
    fn feature_ranges_expand_by_numeric_suffix() {
        let header = names(&["id", "pred", "f1", "f2", "f3", "f10", "g1", "x..y"]);
        let resolve = |selectors: &[&str]| resolve_features(&names(selectors), &header);
        assert_eq!(resolve(&["f1..f3"]).unwrap(), ["f1", "f2", "f3"]);
        assert_eq!(resolve(&["f3", " f1..f2 "]).unwrap(), ["f3", "f1", "f2"]);
        assert_eq!(resolve(&["f2..f2", "g1"]).unwrap(), ["f2", "g1"]);
        assert_eq!(resolve(&["x..y"]).unwrap(), ["x..y"]);
        assert_eq!(resolve(&[]).unwrap(), Vec::<String>::new());
        // Plain names pass through; read_units reports the missing ones.
        assert_eq!(resolve(&["not_there"]).unwrap(), ["not_there"]);
        // Zero-padded names match by number.
        let padded = names(&["f01", "f02", "f03"]);
        assert_eq!(
            resolve_features(&names(&["f1..f3"]), &padded).unwrap(),
            ["f01", "f02", "f03"]
        );
        assert_eq!(
            resolve_features(&names(&["f02..f03"]), &padded).unwrap(),
            ["f02", "f03"]
        );
    }

    #[test]
    fn ranges_of_column_names_go_by_position() {
        let header = names(&[
            "compound_id",
            "pIC50",
            "MolWt",
            "LogP",
            "HBD",
            "TPSA",
            "series",
            "f1",
            "f2",
        ]);
        let resolve = |selectors: &[&str]| resolve_features(&names(selectors), &header);
        assert_eq!(
            resolve(&["MolWt..TPSA"]).unwrap(),
            ["MolWt", "LogP", "HBD", "TPSA"]
        );
        assert_eq!(resolve(&["LogP..LogP"]).unwrap(), ["LogP"]);
        // Ends with different prefixes: by position, even for numbered names.
        assert_eq!(resolve(&["TPSA..f1"]).unwrap(), ["TPSA", "series", "f1"]);
        assert_eq!(resolve(&["f1..f2"]).unwrap(), ["f1", "f2"]);
        // One prefix, numbered: by number, not position.
        let shuffled = names(&["id", "f2", "x", "f1", "f3"]);
        assert_eq!(
            resolve_features(&names(&["f1..f3"]), &shuffled).unwrap(),
            ["f1", "f2", "f3"]
        );
        let message = resolve(&["TPSA..MolWt"]).unwrap_err();
        assert!(
            message.contains("backwards") && message.contains("MolWt..TPSA"),
            "{message}"
        );
        let message = resolve(&["MolWt..tpsa"]).unwrap_err();
        assert!(message.contains("did you mean `TPSA`?"), "{message}");
        let message = resolve(&["MolWt..TPSA", "LogP"]).unwrap_err();
        assert!(message.contains("selected twice"), "{message}");
    }

    #[test]
    fn suggestions_prefer_case_then_punctuation_then_edit_distance() {
        // Expected names chosen by hand from the rules in `suggest`'s documentation.
        let header = names(&[
            "compound_id",
            "pIC50",
            "predicted_pIC50",
            "MolWt",
            "TPSA",
            "series",
        ]);
        assert_eq!(suggest("pic50", &header), ["pIC50"]);
        assert_eq!(suggest("PREDICTED_PIC50", &header), ["predicted_pIC50"]);
        assert_eq!(suggest("predictedpic50", &header), ["predicted_pIC50"]);
        assert_eq!(suggest("Molwt", &header), ["MolWt"]);
        assert_eq!(suggest("MolWeight", &header), Vec::<String>::new());
        assert_eq!(suggest("seires", &header), ["series"]);
        assert_eq!(suggest("TPS", &header), ["TPSA"]);
        assert_eq!(suggest("compound", &header), ["compound_id"]);
        assert_eq!(suggest("zzz", &header), Vec::<String>::new());
        assert_eq!(edit_distance("kitten", "sitting"), 3);
        assert_eq!(edit_distance("", "abc"), 3);
        assert_eq!(edit_distance("flaw", "lawn"), 2);
    }

    #[test]
    fn feature_ranges_that_fail() {
        let header = names(&["id", "f1", "f3", "f4", "g2", "h1", "h01"]);
        let fails = |selectors: &[&str], needle: &str| {
            let message = resolve_features(&names(selectors), &header).unwrap_err();
            assert!(message.contains(needle), "{selectors:?}: {message}");
        };
        fails(&["f1..f3"], "`f2`");
        fails(&["f1..g9"], "prefix");
        // Both ends are names with different prefixes: by position.
        assert_eq!(
            resolve_features(&names(&["f1..g2"]), &header).unwrap(),
            ["f1", "f3", "f4", "g2"]
        );
        fails(&["f4..f1"], "backwards");
        fails(&["f..f3"], "does not end in a number");
        fails(&["id..g"], "`g` is not a column name; did you mean `g2`?");
        fails(&["h1..h1"], "several columns");
        fails(&["f1", "f1"], "selected twice");
        fails(&["f3..f4", "f4"], "`f4` is selected twice");
        fails(&["f1", ""], "empty feature name");
        fails(&["f1..f99999999999999"], "covers");
    }
}
