//! Rendering: the output types of a run ([`crate::pipeline::output`]) in, bytes out. JSON
//! (`results.json`, [`json`]), CSV (`models.csv`, `memberships.csv`, [`csv`]), Markdown and
//! HTML (`summary.md`, `report.html`, [`document`], its charts as files in `figures/`,
//! [`figures`], with the tables of [`tables`], the
//! charts of [`svg`] and the findings in words of [`words`]), and the terminal's lines
//! ([`console`]). Nothing here computes a number that is not in the output types; every
//! number is formatted by the functions below, so it reads the same in every file.

pub mod console;
pub mod csv;
pub mod document;
pub mod figures;
pub mod json;
pub mod svg;
pub mod tables;
pub mod words;

/// `text` with every "cluster N" that `names` names written "cluster N (name)" (a number
/// is read whole, so "cluster 1" does not match "cluster 12").
pub fn name_clusters(text: &str, names: &std::collections::BTreeMap<usize, String>) -> String {
    if names.is_empty() {
        return text.to_string();
    }
    let mut out = String::with_capacity(text.len());
    let mut rest = text;
    while let Some(at) = rest.find("cluster ") {
        let after = &rest[at + "cluster ".len()..];
        let digits = after.bytes().take_while(u8::is_ascii_digit).count();
        out.push_str(&rest[..at + "cluster ".len() + digits]);
        if let Some(name) = after[..digits].parse::<usize>().ok().and_then(|k| names.get(&k)) {
            out.push_str(&format!(" ({name})"));
        }
        rest = &after[digits..];
    }
    out.push_str(rest);
    out
}

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

#[cfg(test)]
mod tests {
    use super::name_clusters;
    use std::collections::BTreeMap;

    #[test]
    fn named_clusters_are_written_after_their_whole_number() {
        let names = BTreeMap::from([(1, "preserved".to_string()), (2, "obstructive".to_string())]);
        assert_eq!(
            name_clusters("cluster 2 vs cluster 1; cluster 12 and cluster 3", &names),
            "cluster 2 (obstructive) vs cluster 1 (preserved); cluster 12 and cluster 3"
        );
        assert_eq!(name_clusters("cluster ", &names), "cluster ");
        assert_eq!(name_clusters("no clusters here", &BTreeMap::new()), "no clusters here");
    }
}
