//! Resource limits on what ballast reads, checked before anything is allocated from a size in a file.
//!
//! Every limit can be lifted with `--allow-large`; the defaults keep a hostile or mistaken file from
//! exhausting memory or time.

use std::io::Read;
use std::path::Path;

/// Largest model file read without `--allow-large` (bytes).
pub const MAX_MODEL_FILE_BYTES: u64 = 512 * 1024 * 1024;
/// Largest data file read without `--allow-large` (bytes).
pub const MAX_DATA_FILE_BYTES: u64 = 1024 * 1024 * 1024;
/// Largest requirement or budget file (bytes).
pub const MAX_SMALL_FILE_BYTES: u64 = 16 * 1024 * 1024;
/// Largest parameter count (weights and biases) accepted without `--allow-large`.
pub const MAX_PARAMETERS: usize = 20_000_000;

/// Reads a whole UTF-8 text file, refusing files above `max_bytes` and invalid UTF-8 with a clear error.
pub fn read_text_file(path: &Path, max_bytes: u64) -> std::io::Result<String> {
    let file = std::fs::File::open(path)?;
    let size = file.metadata()?.len();
    if size > max_bytes {
        return Err(std::io::Error::new(
            std::io::ErrorKind::InvalidData,
            format!("file is {size} bytes, above the limit of {max_bytes} bytes (use --allow-large to lift it)"),
        ));
    }
    let mut bytes = Vec::with_capacity(size as usize);
    // `saturating_add`: `--allow-large` passes `u64::MAX`, and special files report a size of 0.
    file.take(max_bytes.saturating_add(1))
        .read_to_end(&mut bytes)?;
    if bytes.len() as u64 > max_bytes {
        return Err(std::io::Error::new(
            std::io::ErrorKind::InvalidData,
            format!("file grew above the limit of {max_bytes} bytes while reading"),
        ));
    }
    let text = String::from_utf8(bytes).map_err(|e| {
        std::io::Error::new(
            std::io::ErrorKind::InvalidData,
            format!(
                "not valid UTF-8 text (first bad byte at offset {})",
                e.utf8_error().valid_up_to()
            ),
        )
    })?;
    Ok(text
        .strip_prefix('\u{feff}')
        .map(str::to_owned)
        .unwrap_or(text))
}
