//! The release sheet: a Markdown file and one self-contained HTML file rendered from a report.
//!
//! [`content`] decides what the sheet says (verdict first, the requirement in words, the figures with
//! their meaning, tables, plot data, digests, the command line, the cautions); [`markdown`] and
//! [`html`] render it, [`svg`] draws the plots, [`escape`] makes every string from a model or data file
//! inert. The sheet only restates the report: it never recomputes or rounds a verdict.

pub mod axis;
pub mod bars;
pub mod budget;
pub mod compare_sheet;
pub mod content;
pub mod escape;
pub mod finished;
pub mod fragility;
pub mod histogram;
pub mod html;
pub mod lineage;
pub mod markdown;
pub mod range_policy;
pub mod requirement_facts;
pub mod requirement_lines;
pub mod retrain_plots;
pub mod svg;

use std::path::{Path, PathBuf};

use crate::certify::Report;

/// Why a sheet could not be written.
#[derive(Debug, thiserror::Error)]
pub enum SheetError {
    /// The output folder or a file in it could not be written.
    #[error("{path}: {message}")]
    Output {
        /// The path.
        path: String,
        /// What the system said.
        message: String,
    },
}

/// The file names of a sheet inside its folder.
pub const MARKDOWN_FILE: &str = "sheet.md";
/// The HTML file name.
pub const HTML_FILE: &str = "sheet.html";

/// Renders `report` into `folder` (created if missing) as `sheet.md` and `sheet.html`, each written
/// atomically; returns the two paths.
pub fn write_sheet(report: &Report, folder: &Path) -> Result<(PathBuf, PathBuf), SheetError> {
    let output = |path: &Path, e: std::io::Error| SheetError::Output {
        path: path.display().to_string(),
        message: e.to_string(),
    };
    std::fs::create_dir_all(folder).map_err(|e| output(folder, e))?;
    let content = content::build(report);
    let md = folder.join(MARKDOWN_FILE);
    let page = folder.join(HTML_FILE);
    crate::atomic::write_file(&md, markdown::render(&content).as_bytes())
        .map_err(|e| output(&md, e))?;
    crate::atomic::write_file(&page, html::render(&content).as_bytes())
        .map_err(|e| output(&page, e))?;
    Ok((md, page))
}
