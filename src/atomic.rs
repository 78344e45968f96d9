//! Atomic file output: write to a temporary file in the same folder, fsync, then rename over the target.
//!
//! A crash or interrupt never leaves a half-written file in place of a good one. [`check_writable`]
//! answers, before any work, whether a later [`write_file`] to a path can succeed.

use std::io::Write;
use std::path::Path;

fn folder_of(path: &Path) -> std::path::PathBuf {
    match path.parent() {
        Some(p) if !p.as_os_str().is_empty() => p.to_path_buf(),
        _ => std::path::PathBuf::from("."),
    }
}

/// Checks that a file can be written at `path` later: it is not a folder, its folder exists, and a
/// file can be created in that folder (one is created and removed again). The message says which of
/// these fails.
pub fn check_writable(path: &Path) -> Result<(), String> {
    if path.is_dir() {
        return Err("is a folder, expected a file name".into());
    }
    let folder = folder_of(path);
    if !folder.is_dir() {
        return Err(format!("the folder {} does not exist", folder.display()));
    }
    let probe = folder.join(format!(".ballast-write-check-{}", std::process::id()));
    match std::fs::File::create(&probe) {
        Ok(_) => {
            let _ = std::fs::remove_file(&probe);
            Ok(())
        }
        Err(e) => Err(format!(
            "cannot write in the folder {}: {e}",
            folder.display()
        )),
    }
}

/// Writes `bytes` to `path` atomically.
pub fn write_file(path: &Path, bytes: &[u8]) -> std::io::Result<()> {
    let folder = folder_of(path);
    let name = path
        .file_name()
        .map(|n| n.to_string_lossy().into_owned())
        .unwrap_or_else(|| "output".into());
    let temporary = folder.join(format!(".{name}.tmp-{}", std::process::id()));
    {
        let mut file = std::fs::File::create(&temporary)?;
        file.write_all(bytes)?;
        file.sync_all()?;
    }
    if let Err(e) = std::fs::rename(&temporary, path) {
        let _ = std::fs::remove_file(&temporary);
        return Err(e);
    }
    if let Ok(dir) = std::fs::File::open(&folder) {
        let _ = dir.sync_all();
    }
    Ok(())
}
