//! `inspect` summaries of each stage and the HTML report.

pub mod inspect;

pub use inspect::{InspectError, inspect};

use std::path::Path;

/// Writes the HTML report of `run` to `out` (placeholder until the report lands).
pub fn write_report(_run: &Path, _out: &Path) -> Result<(), InspectError> {
    Err(InspectError::NotBuilt("report"))
}
