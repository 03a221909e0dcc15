//! `results.json`: the output types as they are, and the comparison's findings and
//! notes on standard errors in words (the same words as the report's).

use super::words;
use crate::compare::Comparison;
use crate::pipeline::output::Results;
use serde::Serialize;

/// What `results.json` holds: the results, and the comparison with its words.
#[derive(Serialize, schemars::JsonSchema)]
pub struct ResultsFile<'a> {
    /// The results.
    #[serde(flatten)]
    pub results: &'a Results,
    /// The comparison (written by `compare`, absent after `fit`).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub comparison: Option<ComparisonFile<'a>>,
}

/// The comparison as `results.json` writes it.
#[derive(Serialize, schemars::JsonSchema)]
pub struct ComparisonFile<'a> {
    /// The comparison's tables.
    #[serde(flatten)]
    pub comparison: &'a Comparison,
    /// How standard errors were computed, and per placement why they are missing.
    pub inference_notes: Vec<String>,
    /// The findings in words, each with the table row its numbers come from.
    pub sentences: Vec<words::Sentence>,
}

/// The file's values.
pub fn results_file(results: &Results) -> ResultsFile<'_> {
    ResultsFile {
        results,
        comparison: results.comparison.as_ref().map(|c| ComparisonFile {
            comparison: c,
            inference_notes: c.inference_notes.iter().map(words::inference_note).collect(),
            sentences: c
                .findings
                .iter()
                .map(|f| words::sentence(f, &c.cluster_names))
                .collect(),
        }),
    }
}

/// `results.json`, pretty-printed, with a final line break.
pub fn results_json(results: &Results) -> String {
    serde_json::to_string_pretty(&results_file(results)).expect("the results encode") + "\n"
}
