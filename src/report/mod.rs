//! `inspect` summaries of each stage and the HTML report.
//!
//! Both are built from one [`figures::RunFigures`] value gathered by
//! [`collect::gather`], so `inspect --json` and the report always agree:
//! the report even carries that value (as inert JSON data, not script) in
//! `<script type="application/json" id="actuary-figures">`.

pub mod collect;
pub mod figures;
pub mod fitlog;
pub mod html;
pub mod html_stages;
pub mod inspect;
pub mod picture;
pub mod shards;
pub mod svg;

pub use inspect::{InspectError, inspect};

use std::path::Path;

/// Renders the HTML report of `run` as a string (shards are re-hashed).
pub fn render_report(run: &Path) -> Result<String, InspectError> {
    if !run.is_dir() {
        return Err(InspectError::NoRun {
            run: run.to_path_buf(),
        });
    }
    let gathered = collect::gather(run, true);
    Ok(html::page(&gathered))
}

/// Writes the HTML report of `run` to `out` atomically.
pub fn write_report(run: &Path, out: &Path) -> Result<(), InspectError> {
    let page = render_report(run)?;
    crate::store::write_atomic(out, page.as_bytes()).map_err(|source| InspectError::Write {
        path: out.to_path_buf(),
        source,
    })
}
