//! One shape for every warning a run reports (selection, shift, audit, rescreen, batch
//! design), and one ordered scale of how much it matters.
//!
//! A [`Warning`] carries a stable machine-readable `code`, the diagnostic it is about with
//! its value and threshold where there is one, the level on the scale, and the sentence for
//! people in `message`. Outputs write these objects under `warning_details`
//! (docs/outputs.md); the earlier one-line strings stay under `warnings` (see
//! [`Warning::line`]).
//!
//! The scale ([`Level`]) has three words whose names say their order — `low` < `medium` <
//! `high` — and a numeric `level_rank` (1, 2, 3). The words earlier outputs used stay in
//! `severity` for compatibility: `note` (low), `caution` (medium), `severe` (high).

use std::fmt;

use serde::Serialize;

/// How much a warning matters, lowest first (so `Ord` sorts by concern).
#[derive(Clone, Copy, Debug, PartialEq, Eq, PartialOrd, Ord, Hash, Serialize)]
#[serde(rename_all = "lowercase")]
pub enum Level {
    /// Worth knowing; the shortlist is usable as it is.
    Low,
    /// Worth a look before using the shortlist; it may still be usable.
    Medium,
    /// Read before using the shortlist: the FDR guarantee, or the shortlist itself, may not
    /// hold as stated.
    High,
}

impl Level {
    /// `low`, `medium` or `high`: the words printed and written as `level`.
    pub fn word(self) -> &'static str {
        match self {
            Level::Low => "low",
            Level::Medium => "medium",
            Level::High => "high",
        }
    }

    /// 1 (low), 2 (medium), 3 (high): `level_rank`, larger is worse.
    pub fn rank(self) -> u8 {
        match self {
            Level::Low => 1,
            Level::Medium => 2,
            Level::High => 3,
        }
    }

    /// The word earlier outputs used for this level (`severity`): `note`, `caution`,
    /// `severe`.
    pub fn legacy_severity(self) -> &'static str {
        match self {
            Level::Low => "note",
            Level::Medium => "caution",
            Level::High => "severe",
        }
    }
}

/// One warning, as written under `warning_details` in every JSON output.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct Warning {
    /// Stable machine-readable name of the warning (e.g. `khat`, `unreachable_units`).
    pub code: String,
    /// The earlier severity word (`severe`, `caution`, `note`), kept for compatibility.
    pub severity: &'static str,
    /// `low`, `medium` or `high` (ordered).
    pub level: Level,
    /// 1, 2 or 3: the level as a number, larger is worse.
    pub level_rank: u8,
    /// The diagnostic or count the warning is about (a summary.json/shift.json key where
    /// one exists, e.g. `khat`, `unreachable_count`).
    pub diagnostic: String,
    /// The diagnostic's value, when it has one.
    pub value: Option<f64>,
    /// The threshold it crossed, when there is one.
    pub threshold: Option<f64>,
    /// What it means for the shortlist, in plain words (one or more sentences).
    pub message: String,
    /// Short heading for the printed line ("unreachable units"); empty when none.
    #[serde(skip)]
    pub title: String,
}

impl Warning {
    /// A warning at `level` with no value or threshold.
    pub fn new(code: &str, level: Level, diagnostic: &str, message: String) -> Self {
        Warning {
            code: code.to_string(),
            severity: level.legacy_severity(),
            level,
            level_rank: level.rank(),
            diagnostic: diagnostic.to_string(),
            value: None,
            threshold: None,
            message,
            title: String::new(),
        }
    }

    /// The same warning with its diagnostic's value and threshold.
    pub fn measured(mut self, value: f64, threshold: f64) -> Self {
        self.value = Some(value);
        self.threshold = Some(threshold);
        self
    }

    /// The same warning with a heading for the printed line.
    pub fn titled(mut self, title: &str) -> Self {
        self.title = title.to_string();
        self
    }

    /// The one-line form written under `warnings` and printed: `title (concern: LEVEL):
    /// message`, or `message (concern: LEVEL)` without a title.
    pub fn line(&self) -> String {
        if self.title.is_empty() {
            format!("{} (concern: {})", self.message, self.level.word())
        } else {
            format!(
                "{} (concern: {}): {}",
                self.title,
                self.level.word(),
                self.message
            )
        }
    }
}

impl fmt::Display for Warning {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(&self.line())
    }
}

/// A number in a sentence, at a precision people read: three significant digits with
/// trailing zeros dropped (33.302 -> "33.3", 0.012345 -> "0.0123", 1234.6 -> "1235"),
/// scientific with three significant digits from 10^6 up and below 10^-3 ("1.23e6",
/// "4.5e-5"), `inf`/`NaN` as such.
pub fn prose_number(v: f64) -> String {
    if !v.is_finite() {
        return v.to_string();
    }
    if v == 0.0 {
        return "0".to_string();
    }
    let magnitude = v.abs().log10().floor() as i32;
    if !(-3..6).contains(&magnitude) {
        let text = format!("{v:.2e}");
        let (mantissa, exponent) = text.split_once('e').expect("scientific form");
        let mantissa = if mantissa.contains('.') {
            mantissa.trim_end_matches('0').trim_end_matches('.')
        } else {
            mantissa
        };
        return format!("{mantissa}e{exponent}");
    }
    let decimals = (2 - magnitude).max(0) as usize;
    let text = format!("{v:.decimals$}");
    if text.contains('.') {
        text.trim_end_matches('0').trim_end_matches('.').to_string()
    } else {
        text
    }
}

/// Worst first, keeping the given order among warnings of the same level.
pub fn worst_first(warnings: &mut [Warning]) {
    warnings.sort_by_key(|w| std::cmp::Reverse(w.level));
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn levels_order_by_their_names_and_ranks() {
        assert!(Level::Low < Level::Medium && Level::Medium < Level::High);
        let ranks: Vec<u8> = [Level::Low, Level::Medium, Level::High]
            .map(Level::rank)
            .to_vec();
        assert_eq!(ranks, [1, 2, 3]);
        // The earlier words map onto the scale one to one.
        assert_eq!(Level::High.legacy_severity(), "severe");
        assert_eq!(Level::Medium.legacy_severity(), "caution");
        assert_eq!(Level::Low.legacy_severity(), "note");
    }

    #[test]
    fn serialized_form_has_every_documented_field() {
        let w = Warning::new("khat", Level::High, "khat", "a few rows decide".to_string())
            .measured(0.9, 0.7)
            .titled("Pareto k-hat");
        let json = serde_json::to_value(&w).unwrap();
        let mut keys: Vec<&str> = json
            .as_object()
            .unwrap()
            .keys()
            .map(String::as_str)
            .collect();
        keys.sort_unstable();
        assert_eq!(
            keys,
            [
                "code",
                "diagnostic",
                "level",
                "level_rank",
                "message",
                "severity",
                "threshold",
                "value"
            ]
        );
        assert_eq!(json["level"], "high");
        assert_eq!(json["level_rank"], 3);
        assert_eq!(json["severity"], "severe");
        assert_eq!(w.line(), "Pareto k-hat (concern: high): a few rows decide");
    }

    #[test]
    fn numbers_in_prose_have_three_significant_digits() {
        // Expected strings: rounding to three significant digits by hand.
        assert_eq!(prose_number(33.302), "33.3");
        assert_eq!(prose_number(0.012345), "0.0123");
        assert_eq!(prose_number(1234.6), "1235");
        assert_eq!(prose_number(0.5), "0.5");
        assert_eq!(prose_number(2.0), "2");
        assert_eq!(prose_number(-7.25), "-7.25");
        assert_eq!(prose_number(4.5e-5), "4.5e-5");
        assert_eq!(prose_number(1.2345e7), "1.23e7");
        assert_eq!(prose_number(0.0), "0");
        assert_eq!(prose_number(f64::INFINITY), "inf");
    }

    #[test]
    fn worst_first_is_stable_within_a_level() {
        let mut list = vec![
            Warning::new("a", Level::Low, "a", String::new()),
            Warning::new("b", Level::High, "b", String::new()),
            Warning::new("c", Level::Low, "c", String::new()),
            Warning::new("d", Level::High, "d", String::new()),
        ];
        worst_first(&mut list);
        let codes: Vec<&str> = list.iter().map(|w| w.code.as_str()).collect();
        assert_eq!(codes, ["b", "d", "a", "c"]);
    }
}
