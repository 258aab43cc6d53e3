//! Spec errors: every problem names the spec file, the key, the line and
//! column, and what is allowed.

use std::fmt;
use std::ops::Range;
use std::path::{Path, PathBuf};

/// One problem found in a spec file.
#[derive(Debug, Clone, PartialEq)]
pub struct SpecProblem {
    /// Dotted key, e.g. `decode.fps`.
    pub key: String,
    /// 1-based line, 0 when unknown.
    pub line: usize,
    /// 1-based column, 0 when unknown.
    pub column: usize,
    /// What is wrong and what is allowed.
    pub message: String,
}

impl fmt::Display for SpecProblem {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        if self.line > 0 {
            write!(f, "line {}, column {}: ", self.line, self.column)?;
        }
        if self.key.is_empty() {
            write!(f, "{}", self.message)
        } else {
            write!(f, "`{}`: {}", self.key, self.message)
        }
    }
}

/// Errors loading a spec.
#[derive(Debug, thiserror::Error)]
pub enum SpecError {
    /// The file could not be read.
    #[error("cannot read spec {path}: {source}")]
    Read {
        /// The spec file.
        path: PathBuf,
        /// The cause.
        #[source]
        source: std::io::Error,
    },
    /// TOML syntax, unknown key or wrong type (toml's message has line, column and caret).
    #[error("spec {path}: {source}")]
    Parse {
        /// The spec file.
        path: PathBuf,
        /// The parser's error.
        #[source]
        source: Box<toml::de::Error>,
    },
    /// Values that parse but are not allowed.
    #[error("spec {path}: {} problem(s):\n{}", problems.len(), render(problems))]
    Invalid {
        /// The spec file.
        path: PathBuf,
        /// Every problem found.
        problems: Vec<SpecProblem>,
    },
}

fn render(problems: &[SpecProblem]) -> String {
    problems
        .iter()
        .map(|p| format!("  - {p}"))
        .collect::<Vec<_>>()
        .join("\n")
}

/// Collects problems while resolving, turning byte spans into lines and columns.
pub struct Problems<'a> {
    text: &'a str,
    /// Problems found so far.
    pub list: Vec<SpecProblem>,
}

impl<'a> Problems<'a> {
    /// A collector over the spec's text.
    pub fn new(text: &'a str) -> Self {
        Self {
            text,
            list: Vec::new(),
        }
    }

    /// Records a problem at `span` (a byte range of the spec text).
    pub fn at(&mut self, key: &str, span: Range<usize>, message: impl Into<String>) {
        let (line, column) = line_col(self.text, span.start);
        self.list.push(SpecProblem {
            key: key.to_string(),
            line,
            column,
            message: message.into(),
        });
    }

    /// Records a problem with no position (a missing key).
    pub fn missing(&mut self, key: &str, message: impl Into<String>) {
        self.list.push(SpecProblem {
            key: key.to_string(),
            line: 0,
            column: 0,
            message: message.into(),
        });
    }

    /// Turns the collected problems into an error when there are any.
    pub fn finish(mut self, path: &Path) -> Result<(), SpecError> {
        self.list.sort_by_key(|p| (p.line == 0, p.line, p.column));
        if self.list.is_empty() {
            Ok(())
        } else {
            Err(SpecError::Invalid {
                path: path.to_path_buf(),
                problems: self.list,
            })
        }
    }
}

/// 1-based line and column of byte offset `pos` in `text`.
pub fn line_col(text: &str, pos: usize) -> (usize, usize) {
    let pos = pos.min(text.len());
    let before = &text[..pos];
    let line = before.matches('\n').count() + 1;
    let column = before.rsplit('\n').next().map_or(0, |l| l.chars().count()) + 1;
    (line, column)
}
