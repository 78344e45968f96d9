//! The journal: one JSON line per finished sample, appended and flushed as each sample finishes, so an
//! interrupted or killed run can be resumed without redoing finished work.
//!
//! Layout: the first line is a header `{"journal": "ballast.journal/1", "fingerprint": {...}}` holding
//! everything that determines per-sample results (model and data digests, requirement, settings); every
//! further line is one [`SampleRecord`]. Each line is written with a single `write` call and flushed, so
//! a hard kill leaves at most one incomplete last line, which [`Journal::read`] drops. Resuming checks
//! the fingerprint and refuses a journal of another run; it never mixes results of different settings.
//! The fingerprint holds the tool's version: a journal written by another version of ballast (or by one
//! from before the version was recorded) is refused with a message saying so, because its results may
//! be stale (a fixed bug, a changed bound); the run must start over without `--resume`.

use std::io::Write;
use std::path::{Path, PathBuf};

use serde_json::Value;

use super::report::SampleRecord;
use super::CertifyError;

/// The journal format tag.
pub const JOURNAL_FORMAT: &str = "ballast.journal/1";

/// The journal file that belongs to a report: `R.json` → `R.journal.jsonl`.
pub fn journal_path(report: &Path) -> PathBuf {
    let stem = report
        .file_stem()
        .map(|s| s.to_string_lossy().into_owned())
        .unwrap_or_else(|| "report".into());
    report.with_file_name(format!("{stem}.journal.jsonl"))
}

/// An open journal, appending one line per sample.
#[derive(Debug)]
pub struct Journal {
    path: PathBuf,
    file: std::fs::File,
}

fn io_error(path: &Path, e: impl std::fmt::Display) -> CertifyError {
    CertifyError::Journal(format!("{}: {e}", path.display()))
}

impl Journal {
    /// Starts a new journal at `path` (replacing any old one) with `fingerprint` in its header, then the
    /// `records` already known (when resuming). The rewrite is atomic.
    pub fn create(
        path: &Path,
        fingerprint: &Value,
        records: &[SampleRecord],
    ) -> Result<Journal, CertifyError> {
        let mut text = header_line(fingerprint);
        for r in records {
            text.push_str(&serde_json::to_string(r).expect("a record always serialises"));
            text.push('\n');
        }
        crate::atomic::write_file(path, text.as_bytes()).map_err(|e| io_error(path, e))?;
        let file = std::fs::OpenOptions::new()
            .append(true)
            .open(path)
            .map_err(|e| io_error(path, e))?;
        Ok(Journal {
            path: path.to_path_buf(),
            file,
        })
    }

    /// Appends one finished sample and flushes it to the operating system.
    pub fn append(&mut self, record: &SampleRecord) -> std::io::Result<()> {
        let mut line = serde_json::to_string(record).expect("a record always serialises");
        line.push('\n');
        self.file.write_all(line.as_bytes())?;
        self.file.flush()
    }

    /// The journal's path.
    pub fn path(&self) -> &Path {
        &self.path
    }

    /// Reads a journal: checks its header against `fingerprint` and returns the finished records (a
    /// truncated last line is dropped; a broken line elsewhere is an error).
    pub fn read(path: &Path, fingerprint: &Value) -> Result<Vec<SampleRecord>, CertifyError> {
        let text = std::fs::read_to_string(path).map_err(|e| io_error(path, e))?;
        let mut lines = text.split_inclusive('\n').enumerate();
        let Some((_, header)) = lines.next() else {
            return Err(io_error(path, "empty journal (no header line)"));
        };
        let header: Value = serde_json::from_str(header.trim())
            .map_err(|e| io_error(path, format!("line 1: not a journal header ({e})")))?;
        if header.get("journal").and_then(Value::as_str) != Some(JOURNAL_FORMAT) {
            return Err(io_error(
                path,
                format!("line 1: not a {JOURNAL_FORMAT} header"),
            ));
        }
        let found = header.get("fingerprint").cloned().unwrap_or(Value::Null);
        check_version(path, fingerprint, &found)?;
        if let Some(difference) = first_difference(fingerprint, &found, "") {
            return Err(CertifyError::Mismatch(format!(
                "{}: the journal belongs to another run ({difference}); start without --resume to replace it",
                path.display()
            )));
        }
        let mut records: Vec<SampleRecord> = Vec::new();
        for (n, line) in lines {
            // The last line of a killed run may be cut short: drop it and redo that sample.
            if !line.ends_with('\n') {
                break;
            }
            let r: SampleRecord = serde_json::from_str(line.trim())
                .map_err(|e| io_error(path, format!("line {}: {e}", n + 1)))?;
            records.retain(|old| old.index != r.index);
            records.push(r);
        }
        records.sort_by_key(|r| r.index);
        Ok(records)
    }
}

/// Refuses a journal written by another version of the tool, naming both versions.
fn check_version(path: &Path, expected: &Value, found: &Value) -> Result<(), CertifyError> {
    let version = |v: &Value| {
        v.get("tool_version")
            .and_then(Value::as_str)
            .map(str::to_string)
    };
    let this = version(expected);
    let that = version(found);
    if this == that {
        return Ok(());
    }
    let written_by = match &that {
        Some(v) => format!("ballast {v}"),
        None => "a version of ballast that did not record its version".to_string(),
    };
    Err(CertifyError::Mismatch(format!(
        "{}: the journal was written by {written_by}, this is ballast {}; results of another version are not reused, run again without --resume to start over",
        path.display(),
        this.as_deref().unwrap_or("(unknown)")
    )))
}

fn header_line(fingerprint: &Value) -> String {
    let header = serde_json::json!({ "journal": JOURNAL_FORMAT, "fingerprint": fingerprint });
    let mut line = serde_json::to_string(&header).expect("a header always serialises");
    line.push('\n');
    line
}

/// The first place where two JSON values differ, as `path: expected X, found Y` (`None` if equal).
pub fn first_difference(expected: &Value, found: &Value, path: &str) -> Option<String> {
    match (expected, found) {
        (Value::Object(a), Value::Object(b)) => {
            for (key, value) in a {
                let here = if path.is_empty() {
                    key.clone()
                } else {
                    format!("{path}.{key}")
                };
                let other = b.get(key).unwrap_or(&Value::Null);
                if let Some(d) = first_difference(value, other, &here) {
                    return Some(d);
                }
            }
            b.keys()
                .find(|k| !a.contains_key(*k))
                .map(|k| format!("{path}.{k}: unexpected key"))
        }
        (a, b) if a == b => None,
        (a, b) => Some(format!(
            "{}: expected {a}, found {b}",
            if path.is_empty() { "(top)" } else { path }
        )),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn fingerprint(version: &str) -> Value {
        serde_json::json!({ "tool_version": version, "model_sha256": "ab", "settings": { "seed": 0 } })
    }

    #[test]
    fn a_journal_of_another_version_is_refused_naming_both() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("r.journal.jsonl");
        Journal::create(&path, &fingerprint("0.0.9"), &[]).unwrap();
        let e = Journal::read(&path, &fingerprint("0.1.0"))
            .unwrap_err()
            .to_string();
        assert!(
            e.contains("written by ballast 0.0.9")
                && e.contains("this is ballast 0.1.0")
                && e.contains("without --resume"),
            "{e}"
        );
        assert!(Journal::read(&path, &fingerprint("0.0.9"))
            .unwrap()
            .is_empty());
    }

    #[test]
    fn a_journal_without_a_version_is_refused() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("r.journal.jsonl");
        let mut old = fingerprint("0.1.0");
        old.as_object_mut().unwrap().remove("tool_version");
        Journal::create(&path, &old, &[]).unwrap();
        let e = Journal::read(&path, &fingerprint("0.1.0"))
            .unwrap_err()
            .to_string();
        assert!(e.contains("did not record its version"), "{e}");
    }
}
