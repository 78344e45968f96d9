//! Resource limits on what ballast reads, checked before anything is allocated from a size in a file.
//!
//! File sizes are checked from the file's metadata before reading, and reading stops one byte past the
//! limit in case the file grows meanwhile. The parameter limit is checked by the command line
//! (`cli::common::load_model`) against the larger of a model's layout parameter count and the size of its
//! folded network (`Model::network_parameter_count`), which is computed from the shapes before anything is
//! built. `--allow-large` lifts the data-size and parameter limits (and the ONNX file size); the JSON model
//! file size and the small-file limit always apply. docs/hardening.md lists them all. Nothing here parses.

use std::io::Read;
use std::path::Path;

/// Largest JSON model file read (bytes).
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

#[cfg(test)]
mod tests {
    use super::*;

    fn file_with(bytes: &[u8]) -> tempfile::NamedTempFile {
        let file = tempfile::NamedTempFile::new().expect("temporary file");
        std::fs::write(file.path(), bytes).expect("write");
        file
    }

    #[test]
    fn refuses_files_above_the_limit_before_reading() {
        let file = file_with(b"0123456789");
        let error = read_text_file(file.path(), 9).expect_err("10 bytes > 9");
        assert!(
            error.to_string().contains("above the limit of 9 bytes"),
            "{error}"
        );
        assert_eq!(
            read_text_file(file.path(), 10).expect("at the limit"),
            "0123456789"
        );
    }

    #[test]
    fn the_unlimited_setting_does_not_overflow() {
        let file = file_with(b"label\n1\n");
        assert_eq!(
            read_text_file(file.path(), u64::MAX).expect("no limit"),
            "label\n1\n"
        );
    }

    #[test]
    fn names_the_offset_of_invalid_utf8_and_skips_a_bom() {
        let file = file_with(b"abc\xffdef");
        let error = read_text_file(file.path(), 100).expect_err("invalid UTF-8");
        assert!(error.to_string().contains("offset 3"), "{error}");
        let file = file_with(b"\xef\xbb\xbflabel");
        assert_eq!(read_text_file(file.path(), 100).expect("BOM"), "label");
    }
}
