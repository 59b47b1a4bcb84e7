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
            Role::Labeled => optional_column(self, options.outcome.as_ref(), ColumnKind::Outcome)?,
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
        Ok(ChosenColumns {
            id,
            prediction,
            outcome,
            threshold,
            weight,
            feature_names,
            features,
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

fn expand_range(
    selector: &str,
    from: &str,
    to: &str,
    header: &[String],
) -> Result<Vec<String>, String> {
    let (prefix, start) = numeric_suffix(from)
        .ok_or_else(|| format!("range `{selector}`: `{from}` does not end in a number"))?;
    let (end_prefix, end) = numeric_suffix(to)
        .ok_or_else(|| format!("range `{selector}`: `{to}` does not end in a number"))?;
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
/// A selector is a column name, or a range `f1..f5` meaning every header name with the same
/// prefix and numeric suffix 1, 2, ..., 5 (compared as numbers, so `f01` counts as 1), each
/// of which must exist. A selector that is itself a header name is taken as a name even if
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
    fn feature_ranges_that_fail() {
        let header = names(&["id", "f1", "f3", "f4", "g2", "h1", "h01"]);
        let fails = |selectors: &[&str], needle: &str| {
            let message = resolve_features(&names(selectors), &header).unwrap_err();
            assert!(message.contains(needle), "{selectors:?}: {message}");
        };
        fails(&["f1..f3"], "`f2`");
        fails(&["f1..g2"], "prefix");
        fails(&["f4..f1"], "backwards");
        fails(&["f..f3"], "does not end in a number");
        fails(&["h1..h1"], "several columns");
        fails(&["f1", "f1"], "selected twice");
        fails(&["f3..f4", "f4"], "`f4` is selected twice");
        fails(&["f1", ""], "empty feature name");
        fails(&["f1..f99999999999999"], "covers");
    }
}
