//! `figures/`: every chart of `report.html` as its own SVG file, for presentations and papers.
//!
//! The files are cut from the finished page, so a figure is the report's chart byte for
//! byte (its numbers are the report's), with what the page gave it from outside added:
//! a `<title>` (the chart's label), the page's text styles, and a white background.

use super::document::CHART_TEXT_CSS;

/// Where the figures go inside a run folder.
pub const FOLDER: &str = "figures";

/// The charts of `html` (each `<svg>` that opens with the SVG namespace; the small legend
/// swatches have none), in page order: (file name inside [`FOLDER`], file contents). A
/// file is named by its place on the page and its label, e.g. `03-cluster-shares-per-placement.svg`.
pub fn from_report(html: &str) -> Vec<(String, String)> {
    const OPEN: &str = "<svg xmlns=\"http://www.w3.org/2000/svg\"";
    let mut out = Vec::new();
    let mut rest = html;
    while let Some(at) = rest.find(OPEN) {
        let chart = &rest[at..];
        let Some(end) = chart.find("</svg>") else { break };
        let chart = &chart[..end + "</svg>".len()];
        rest = &rest[at + chart.len()..];
        let Some(tag_end) = chart.find('>') else { continue };
        let label = attribute(&chart[..tag_end], "aria-label").unwrap_or_default();
        let name = format!("{:02}-{}.svg", out.len() + 1, slug(label));
        let file = format!(
            "<?xml version=\"1.0\" encoding=\"UTF-8\"?>\n{}<title>{label}</title><style>{CHART_TEXT_CSS}</style><rect width=\"100%\" height=\"100%\" fill=\"#fff\"/>{}\n",
            &chart[..=tag_end],
            &chart[tag_end + 1..]
        );
        out.push((name, file));
    }
    out
}

/// The value of attribute `name` in an opening tag (as written, still escaped).
fn attribute<'a>(tag: &'a str, name: &str) -> Option<&'a str> {
    let key = format!(" {name}=\"");
    let start = tag.find(&key)? + key.len();
    let len = tag[start..].find('"')?;
    Some(&tag[start..start + len])
}

/// A file-name part from a label: ASCII letters and digits lowercased, every other run of
/// characters one hyphen, at most 48 characters, "chart" when nothing is left.
fn slug(label: &str) -> String {
    // Escaped characters (&amp; &#39; …) are separators, not words.
    let mut plain = String::with_capacity(label.len());
    let mut in_entity = false;
    for c in label.chars() {
        match c {
            '&' => in_entity = true,
            ';' if in_entity => {
                in_entity = false;
                plain.push(' ');
            }
            _ if in_entity => {}
            _ => plain.push(c),
        }
    }
    let mut out = String::new();
    for c in plain.chars() {
        if c.is_ascii_alphanumeric() {
            out.push(c.to_ascii_lowercase());
        } else if !out.is_empty() && !out.ends_with('-') {
            out.push('-');
        }
    }
    let mut out: String = out.chars().take(48).collect();
    while out.ends_with('-') {
        out.pop();
    }
    if out.is_empty() {
        "chart".to_string()
    } else {
        out
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn every_namespaced_chart_becomes_a_file_and_swatches_do_not() {
        let page = concat!(
            "<p>x</p><svg width=\"14\" viewBox=\"0 0 14 14\"><circle/></svg>",
            "<svg xmlns=\"http://www.w3.org/2000/svg\" viewBox=\"0 0 10 10\" aria-label=\"&#39;unadjusted&#39; × &#39;age, sex&#39;\" class=\"grid\"><text class=\"tk\">a</text></svg>",
            "<svg xmlns=\"http://www.w3.org/2000/svg\" viewBox=\"0 0 10 10\" aria-label=\"\" class=\"chart\"></svg>",
        );
        let files = from_report(page);
        assert_eq!(files.len(), 2);
        assert_eq!(files[0].0, "01-unadjusted-age-sex.svg");
        assert_eq!(files[1].0, "02-chart.svg");
        let body = &files[0].1;
        assert!(body.contains("<title>&#39;unadjusted&#39; × &#39;age, sex&#39;</title>"));
        assert!(body.contains("<text class=\"tk\">a</text></svg>\n"));
        assert!(body.contains(CHART_TEXT_CSS));
        assert!(!body.contains("circle"));
    }

    #[test]
    fn slugs_are_short_plain_and_never_empty() {
        assert_eq!(
            slug("How sure BIC is of the number of clusters, per placement"),
            "how-sure-bic-is-of-the-number-of-clusters-per-pl"
        );
        assert_eq!(slug("ü → ß"), "chart");
        assert_eq!(slug("FEV1 (% predicted)"), "fev1-predicted");
    }
}
