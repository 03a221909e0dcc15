//! Rendering: the output types of a run ([`crate::pipeline::output`]) in, bytes out. JSON
//! (`results.json`, [`json`]), CSV (`models.csv`, `memberships.csv`, [`csv`]), Markdown and
//! HTML (`summary.md`, `report.html`, [`document`], with the tables of [`tables`], the
//! charts of [`svg`] and the findings in words of [`words`]), and the terminal's lines
//! ([`console`]). Nothing here computes a number that is not in the output types; every
//! number is formatted by the functions below, so it reads the same in every file.

pub mod console;
pub mod csv;
pub mod document;
pub mod json;
pub mod svg;
pub mod tables;
pub mod words;

/// A share as a percentage with one decimal, the way every table prints it.
pub fn pct(x: f64) -> String {
    format!("{:.1}%", 100.0 * x)
}

/// An indicator value the way every table prints it.
pub fn val(x: f64) -> String {
    format!("{x:.2}")
}

/// A p-value the way every table prints it: three decimals, or "<0.001".
pub fn p_value(p: f64) -> String {
    if p < 0.001 {
        "<0.001".to_string()
    } else {
        format!("{p:.3}")
    }
}

/// A relative risk ratio the way every table prints it.
pub fn ratio(x: f64) -> String {
    format!("{x:.3}")
}

/// The amount of a numeric term an effect is per, in words: "10 years of age", "unit of
/// age (years)", "10 units of age".
pub fn per_phrase(per: f64, words: &crate::compare::terms::TermWords) -> String {
    let label = &words.label;
    let amount = if per == per.trunc() {
        format!("{per:.0}")
    } else {
        format!("{per}")
    };
    match (&words.unit, per == 1.0) {
        (Some(u), true) => format!("unit of {label} ({u})"),
        (Some(u), false) => format!("{amount} {u} of {label}"),
        (None, true) => format!("unit of {label}"),
        (None, false) => format!("{amount} units of {label}"),
    }
}
