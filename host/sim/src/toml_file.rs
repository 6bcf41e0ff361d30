//! TOML files with errors that name the file, line, column and key:
//! scenario files here, and the binary's line files.

use std::path::{Path, PathBuf};

use serde::de::DeserializeOwned;

/// A TOML file could not be used.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum FileError {
    /// The file could not be read.
    #[error("cannot read {path}: {source}")]
    Read {
        /// File.
        path: PathBuf,
        /// What the system said.
        source: std::io::Error,
    },
    /// The file is not valid TOML for its schema.
    #[error("{path}:{line}:{column}: {}", shorten(.message, 300))]
    Parse {
        /// File.
        path: PathBuf,
        /// 1-based line.
        line: usize,
        /// 1-based column.
        column: usize,
        /// What is wrong (names the key).
        message: String,
    },
    /// A value is out of its allowed range.
    #[error("{path}: {field} = {}: {rule}", shorten(.value, 80))]
    Invalid {
        /// File.
        path: PathBuf,
        /// Key, dotted (`link.drop_per_byte`).
        field: String,
        /// The value given.
        value: String,
        /// What is allowed.
        rule: String,
    },
}

/// `text` as it goes into a message: whole up to `max_chars` characters,
/// else its start and its length (a 1 MiB value pasted into a file is not
/// echoed whole to a terminal or a log).
pub fn shorten(text: &str, max_chars: usize) -> std::borrow::Cow<'_, str> {
    match text.char_indices().nth(max_chars) {
        None => text.into(),
        Some(_) => {
            let keep = max_chars.saturating_sub(20).max(1);
            let end = text.char_indices().nth(keep).map_or(text.len(), |(i, _)| i);
            format!("{}... ({} bytes in all)", &text[..end], text.len()).into()
        }
    }
}

/// 1-based line and column of byte offset `at` in `text`.
pub fn line_column(text: &str, at: usize) -> (usize, usize) {
    let before = text.get(..at.min(text.len())).unwrap_or(text);
    let line = before.matches('\n').count() + 1;
    let column = before.rsplit('\n').next().map_or(0, |l| l.chars().count()) + 1;
    (line, column)
}

/// Reads a text file: a file saved as Latin-1 or UTF-16 is refused with
/// the place of its first byte that is not UTF-8.
///
/// # Errors
/// [`FileError::Read`] or [`FileError::Parse`].
pub fn read_text(path: &Path) -> Result<String, FileError> {
    let bytes = std::fs::read(path).map_err(|source| FileError::Read {
        path: path.to_path_buf(),
        source,
    })?;
    String::from_utf8(bytes).map_err(|e| {
        let at = e.utf8_error().valid_up_to();
        let bytes = e.into_bytes();
        let (line, column) = line_column(&String::from_utf8_lossy(&bytes[..at]), at);
        FileError::Parse {
            path: path.to_path_buf(),
            line,
            column,
            message: format!(
                "byte 0x{:02X} is not UTF-8 text: save the file as UTF-8",
                bytes[at]
            ),
        }
    })
}

/// Reads and parses a TOML file into `T`.
///
/// # Errors
/// [`FileError::Read`] or [`FileError::Parse`].
pub fn load_toml<T: DeserializeOwned>(path: &Path) -> Result<T, FileError> {
    parse_toml(path, &read_text(path)?)
}

/// Parses TOML `text` (read from `path`) into `T`.
///
/// # Errors
/// [`FileError::Parse`].
pub fn parse_toml<T: DeserializeOwned>(path: &Path, text: &str) -> Result<T, FileError> {
    toml::from_str(text).map_err(|e| {
        let (line, column) = e.span().map_or((1, 1), |s| line_column(text, s.start));
        FileError::Parse {
            path: path.to_path_buf(),
            line,
            column,
            message: e.message().trim().to_string(),
        }
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Regression: a scenario or line file saved as Latin-1 or UTF-16 was
    /// refused as "stream did not contain valid UTF-8", without saying where.
    #[test]
    fn a_file_that_is_not_utf8_is_named_with_line_and_column() {
        #[derive(Debug, serde::Deserialize)]
        struct T {
            #[allow(dead_code)]
            name: String,
        }
        let dir = tempfile::tempdir().expect("dir");
        let p = dir.path().join("s.toml");
        std::fs::write(&p, b"# M\xfchle\nname = \"x\"\n").expect("write");
        let e = load_toml::<T>(&p).expect_err("Latin-1").to_string();
        assert!(e.contains("s.toml:1:4") && e.contains("0xFC"), "{e}");
    }

    /// Regression: a 1 MiB value pasted into a scenario or line file was
    /// echoed whole in the message.
    #[test]
    fn a_huge_value_is_not_echoed_whole() {
        assert_eq!(shorten("14.5", 80), "14.5");
        let long = "W".repeat(1 << 20);
        let e = FileError::Invalid {
            path: "s.toml".into(),
            field: "device.serial".into(),
            value: long.clone(),
            rule: "1..=16 ASCII characters".into(),
        }
        .to_string();
        assert!(e.len() < 200 && e.contains("1048576 bytes in all"), "{e}");
        let e = FileError::Parse {
            path: "s.toml".into(),
            line: 3,
            column: 1,
            message: format!("unknown field `{long}`"),
        }
        .to_string();
        assert!(
            e.len() < 400 && e.starts_with("s.toml:3:1: unknown field `WW"),
            "{e}"
        );
    }

    #[test]
    fn line_column_counts_from_one() {
        assert_eq!(line_column("ab\ncd", 0), (1, 1));
        assert_eq!(line_column("ab\ncd", 4), (2, 2));
    }
}
