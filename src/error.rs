//! Errors: typed inside the library, rendered with file, line and column at the edge.
//!
//! Every error the user can cause (a bad spec, bad data, a bad command line) is an
//! [`Error::Input`] and maps to exit status 2; anything else (a write that failed, a fit
//! that could not run at all) is an [`Error::Run`] and maps to exit status 1. Both carry a
//! [`Diagnostic`]: what is wrong, where, and what would be right.

use std::fmt;
use std::ops::Range;
use std::path::{Path, PathBuf};

/// Result alias used across the crate.
pub type Result<T> = std::result::Result<T, Error>;

/// A place in a file, with the text of that line for the excerpt.
#[derive(Debug, Clone, PartialEq)]
pub struct Location {
    /// The file as the user named it (relative paths stay relative).
    pub file: PathBuf,
    /// 1-based line.
    pub line: usize,
    /// 1-based column, counted in characters.
    pub column: usize,
    /// The whole line, without its line break, when known.
    pub excerpt: Option<String>,
    /// How many characters to underline (at least 1).
    pub width: usize,
}

impl Location {
    /// A location given as a byte span inside `text`, the contents of `file`.
    pub fn from_span(file: &Path, text: &str, span: Range<usize>) -> Location {
        let start = span.start.min(text.len());
        let end = span.end.clamp(start, text.len());
        let line_start = text[..start].rfind('\n').map_or(0, |i| i + 1);
        let line_end = text[start..].find('\n').map_or(text.len(), |i| start + i);
        let line = text[..start].matches('\n').count() + 1;
        let column = text[line_start..start].chars().count() + 1;
        let excerpt = text[line_start..line_end].trim_end_matches('\r').to_string();
        let width = text[start..end.min(line_end)].chars().count().max(1);
        Location {
            file: file.to_path_buf(),
            line,
            column,
            excerpt: Some(excerpt),
            width,
        }
    }

    /// A location known only by line and column (1-based), with an optional excerpt.
    pub fn at(file: &Path, line: usize, column: usize, excerpt: Option<String>) -> Location {
        Location {
            file: file.to_path_buf(),
            line,
            column,
            excerpt,
            width: 1,
        }
    }
}

/// What went wrong, where, and what would fix it.
#[derive(Debug, Clone, PartialEq)]
pub struct Diagnostic {
    /// One sentence: what is wrong.
    pub message: String,
    /// Where, when the problem sits in a file.
    pub location: Option<Location>,
    /// Hints: what would be right, "did you mean", what the data has.
    pub help: Vec<String>,
}

impl Diagnostic {
    /// A diagnostic with a message only.
    pub fn new(message: impl Into<String>) -> Diagnostic {
        Diagnostic {
            message: message.into(),
            location: None,
            help: Vec::new(),
        }
    }

    /// Attach a location.
    pub fn at(mut self, location: Location) -> Diagnostic {
        self.location = Some(location);
        self
    }

    /// Add a hint line.
    pub fn help(mut self, hint: impl Into<String>) -> Diagnostic {
        self.help.push(hint.into());
        self
    }
}

impl fmt::Display for Diagnostic {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        writeln!(f, "error: {}", self.message)?;
        // Gutter as wide as the line number, as compilers print it.
        let pad = " ".repeat(self.location.as_ref().map_or(1, |l| l.line.to_string().len()));
        if let Some(loc) = &self.location {
            writeln!(f, "{pad}--> {}:{}:{}", loc.file.display(), loc.line, loc.column)?;
            if let Some(text) = &loc.excerpt {
                // Tabs would misplace the caret; show them as single spaces.
                let shown: String = text.chars().map(|c| if c == '\t' { ' ' } else { c }).collect();
                let shown = truncate_chars(&shown, 200);
                writeln!(f, "{pad} |")?;
                writeln!(f, "{} | {}", loc.line, shown)?;
                let caret_pad = " ".repeat(loc.column.saturating_sub(1).min(200));
                writeln!(f, "{pad} | {caret_pad}{}", "^".repeat(loc.width.min(80)))?;
            }
        }
        for h in &self.help {
            writeln!(f, "{pad} = help: {h}")?;
        }
        Ok(())
    }
}

fn truncate_chars(s: &str, max: usize) -> String {
    if s.chars().count() <= max {
        s.to_string()
    } else {
        let mut t: String = s.chars().take(max).collect();
        t.push_str(" …");
        t
    }
}

/// The crate's error type.
#[derive(Debug, thiserror::Error)]
pub enum Error {
    /// The user's input is wrong: spec, data or command line. Exit status 2.
    #[error("{0}")]
    Input(Box<Diagnostic>),
    /// Something else failed (writing outputs, an impossible fit). Exit status 1.
    #[error("{0}")]
    Run(Box<Diagnostic>),
}

impl Error {
    /// An input error from a diagnostic.
    pub fn input(d: Diagnostic) -> Error {
        Error::Input(Box::new(d))
    }

    /// A run error from a diagnostic.
    pub fn run(d: Diagnostic) -> Error {
        Error::Run(Box::new(d))
    }

    /// The same error with one more help line.
    pub fn with_help(self, hint: impl Into<String>) -> Error {
        match self {
            Error::Input(d) => Error::Input(Box::new(d.help(hint))),
            Error::Run(d) => Error::Run(Box::new(d.help(hint))),
        }
    }

    /// The process exit status this error maps to.
    pub fn exit_code(&self) -> i32 {
        match self {
            Error::Input(_) => 2,
            Error::Run(_) => 1,
        }
    }

    /// The diagnostic inside.
    pub fn diagnostic(&self) -> &Diagnostic {
        match self {
            Error::Input(d) | Error::Run(d) => d,
        }
    }
}

/// The closest candidate to `word`, if it is close enough to be a likely misspelling.
pub fn did_you_mean<'a, I>(word: &str, candidates: I) -> Option<String>
where
    I: IntoIterator<Item = &'a str>,
{
    let lower = word.to_lowercase();
    let mut best: Option<(usize, &str)> = None;
    for c in candidates {
        let d = strsim::levenshtein(&lower, &c.to_lowercase());
        if best.is_none_or(|(bd, _)| d < bd) {
            best = Some((d, c));
        }
    }
    let (d, c) = best?;
    let limit = (word.chars().count() / 3).max(1) + usize::from(word.chars().count() > 6);
    (d <= limit).then(|| c.to_string())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn span_to_line_and_column() {
        let text = "a = 1\nbb = \"x\"\n";
        let loc = Location::from_span(Path::new("s.toml"), text, 11..14);
        assert_eq!((loc.line, loc.column, loc.width), (2, 6, 3));
        assert_eq!(loc.excerpt.as_deref(), Some("bb = \"x\""));
    }

    #[test]
    fn suggestions_only_for_near_misses() {
        let cols = ["age", "sex", "exposure_years"];
        assert_eq!(did_you_mean("sexx", cols).as_deref(), Some("sex"));
        assert_eq!(did_you_mean("exposure_yrs", cols).as_deref(), Some("exposure_years"));
        assert_eq!(did_you_mean("height", cols), None);
    }

    #[test]
    fn rendering_shows_caret_under_the_span() {
        let text = "x = 1\ncolumns = [\"fev\"]\n";
        let d = Diagnostic::new("unknown column 'fev'")
            .at(Location::from_span(Path::new("s.toml"), text, 17..22))
            .help("did you mean 'fev1'?");
        let shown = d.to_string();
        assert!(shown.contains("\n --> s.toml:2:12"), "{shown}");
        assert!(shown.contains("2 | columns = [\"fev\"]"), "{shown}");
        assert!(shown.contains("  |            ^^^^^"), "{shown}");
    }
}
