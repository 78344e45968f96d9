//! The release sheet: Markdown and self-contained HTML rendered from a report.
