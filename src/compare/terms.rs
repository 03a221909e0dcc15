//! Covariate terms in the words of the study: labels and units from `[variables]`, a
//! level of a categorical or binary covariate against its reference, and the reference
//! values at which profiles are shown.

use crate::data::{Column, Dataset, Term};
use crate::spec::{ColumnWords, VariableType};
use serde::Serialize;
use std::collections::BTreeMap;

/// How a design term is shown.
#[derive(Debug, Clone, PartialEq, Serialize, schemars::JsonSchema)]
pub struct TermWords {
    /// The term in words: the covariate's label for a numeric one ("age"), the level
    /// against the reference for the others ("sex (male vs female)", "smoker (1 vs 0)").
    pub label: String,
    /// The unit of a numeric covariate, when `[variables]` gives one.
    pub unit: Option<String>,
    /// Whether the term is a number (continuous or count), whose effect is per units.
    pub numeric: bool,
}

impl TermWords {
    /// "age, per 10 years", "age (years), per unit", "age, per unit", "sex (male vs female)".
    pub fn with_per(&self, per: f64) -> String {
        if !self.numeric {
            return self.label.clone();
        }
        let amount = if per == per.trunc() {
            format!("{per:.0}")
        } else {
            format!("{per}")
        };
        match (&self.unit, per == 1.0) {
            (Some(u), true) => format!("{} ({u}), per unit", self.label),
            (Some(u), false) => format!("{}, per {amount} {u}", self.label),
            (None, true) => format!("{}, per unit", self.label),
            (None, false) => format!("{}, per {amount} units", self.label),
        }
    }
}

/// The label of a column: its `[variables]` label, else its name.
pub fn label(name: &str, words: &BTreeMap<String, ColumnWords>) -> String {
    words
        .get(name)
        .and_then(|w| w.label.clone())
        .unwrap_or_else(|| name.to_string())
}

/// A profile column in words: an indicator's label with its unit in brackets ("FEV1 (%
/// predicted)"), or an item level's ("chest tightness: often").
pub fn profile_label(column: &str, words: &BTreeMap<String, ColumnWords>) -> String {
    match column.split_once('=') {
        Some((item, level)) => format!("{}: {level}", label(item, words)),
        None => match column.strip_suffix(" (rate)") {
            Some(count) => format!("{} (rate)", label(count, words)),
            None => match words.get(column).and_then(|w| w.unit.as_deref()) {
                Some(unit) => format!("{} ({unit})", label(column, words)),
                None => label(column, words),
            },
        },
    }
}

/// A design term in words.
pub fn term_words(term: &Term, data: &Dataset, words: &BTreeMap<String, ColumnWords>) -> TermWords {
    let Some(covariate) = &term.covariate else {
        return TermWords {
            label: term.name.clone(),
            unit: None,
            numeric: false,
        };
    };
    let name = label(covariate, words);
    match data.columns.get(covariate) {
        Some(Column::Categorical { levels, reference, .. }) => {
            let level = term.name.strip_prefix(&format!("{covariate}=")).unwrap_or(&term.name);
            TermWords {
                label: format!("{name} ({level} vs {})", levels[*reference]),
                unit: None,
                numeric: false,
            }
        }
        Some(Column::Numeric {
            kind: VariableType::Binary,
            ..
        }) => TermWords {
            label: format!("{name} (1 vs 0)"),
            unit: None,
            numeric: false,
        },
        _ => TermWords {
            label: name,
            unit: words.get(covariate).and_then(|w| w.unit.clone()),
            numeric: true,
        },
    }
}

/// The reference covariate values of the profiles, in words: each covariate of the
/// placements (`names`, in order) at its sample mean (continuous and count), its reference
/// level (categorical) or 0 (binary).
pub fn reference_values(names: &[String], data: &Dataset, words: &BTreeMap<String, ColumnWords>) -> String {
    let each: Vec<String> = names
        .iter()
        .filter_map(|name| {
            let shown = label(name, words);
            Some(match data.columns.get(name)? {
                Column::Categorical { levels, reference, .. } => {
                    format!("{shown} {} (reference level)", levels[*reference])
                }
                Column::Numeric {
                    kind: VariableType::Binary,
                    ..
                } => format!("{shown} 0"),
                Column::Numeric { values, .. } => {
                    let mean = values.iter().sum::<f64>() / values.len().max(1) as f64;
                    let unit = words
                        .get(name)
                        .and_then(|w| w.unit.as_deref())
                        .map_or_else(String::new, |u| format!(" {u}"));
                    format!("{shown} {mean:.1}{unit} (sample mean)")
                }
            })
        })
        .collect();
    if each.is_empty() {
        "profiles of the fitted clusters (no covariates)".to_string()
    } else {
        format!("profiles at the reference covariate values: {}", each.join(", "))
    }
}
