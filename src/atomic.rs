//! Atomic file output: write to a temporary file in the same folder, fsync, then rename over the target.
//!
//! A crash or interrupt never leaves a half-written file in place of a good one.

use std::io::Write;
use std::path::Path;

/// Writes `bytes` to `path` atomically.
pub fn write_file(path: &Path, bytes: &[u8]) -> std::io::Result<()> {
    let folder = match path.parent() {
        Some(p) if !p.as_os_str().is_empty() => p.to_path_buf(),
        _ => std::path::PathBuf::from("."),
    };
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
