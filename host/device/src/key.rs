//! Device key files: 64 hex digits (whitespace ignored), kept like a password.

use std::path::{Path, PathBuf};

use fringe_protocol::auth::Key;

/// A key file could not be used.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum KeyError {
    /// The file could not be read.
    #[error("reading key file {path}: {source}")]
    Read {
        /// File.
        path: PathBuf,
        /// What the system said.
        source: std::io::Error,
    },
    /// It is not 64 hex digits (the key itself is never shown).
    #[error("{path}: a device key is 64 hex digits, found {found}")]
    NotAKey {
        /// File.
        path: PathBuf,
        /// What was found instead, in words.
        found: String,
    },
}

/// Reads a key file.
///
/// # Errors
/// [`KeyError`].
pub fn load_key(path: &Path) -> Result<Key, KeyError> {
    let bytes = std::fs::read(path).map_err(|source| KeyError::Read {
        path: path.to_path_buf(),
        source,
    })?;
    parse_key(path, &bytes)
}

/// Parses the contents of a key file read from `path` (named in errors):
/// 64 hex digits, whitespace anywhere ignored.
///
/// # Errors
/// [`KeyError::NotAKey`], which never shows the key.
pub fn parse_key(path: &Path, bytes: &[u8]) -> Result<Key, KeyError> {
    let not_a_key = |found: String| KeyError::NotAKey {
        path: path.to_path_buf(),
        found,
    };
    let text = std::str::from_utf8(bytes).map_err(|e| {
        not_a_key(format!(
            "bytes that are not UTF-8 text (at byte {})",
            e.valid_up_to()
        ))
    })?;
    // A byte-order mark (Notepad's "UTF-8 with BOM") is no part of the key.
    let text = text.strip_prefix('\u{feff}').unwrap_or(text);
    let hex: String = text.split_whitespace().collect();
    let chars = hex.chars().count();
    if chars != 64 {
        return Err(not_a_key(format!("{chars} characters")));
    }
    let mut key = [0u8; 32];
    for (i, k) in key.iter_mut().enumerate() {
        // `from_str_radix` alone would also take a sign ("+e").
        *k = hex
            .get(2 * i..2 * i + 2)
            .filter(|d| d.bytes().all(|b| b.is_ascii_hexdigit()))
            .and_then(|d| u8::from_str_radix(d, 16).ok())
            .ok_or_else(|| not_a_key(format!("no hex digit at digit {}", 2 * i + 1)))?;
    }
    Ok(key)
}

/// Whether other users can read or write the key file: a warning naming
/// the file, its mode and the fix, or `None` (also where the system has no
/// Unix permissions). A key that others can read lets them make
/// authenticated writes to the device.
pub fn exposure(path: &Path) -> Option<String> {
    #[cfg(unix)]
    {
        use std::os::unix::fs::PermissionsExt as _;
        let mode = std::fs::metadata(path).ok()?.permissions().mode() & 0o777;
        (mode & 0o077 != 0).then(|| {
            format!(
                "key file {} can be read or written by other users (mode {mode:04o}); anyone who reads it can change the device: chmod 600 {}",
                path.display(),
                path.display()
            )
        })
    }
    #[cfg(not(unix))]
    {
        let _ = path;
        None
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[cfg(unix)]
    #[test]
    fn a_key_file_others_can_read_is_named_with_its_mode() {
        use std::os::unix::fs::PermissionsExt as _;
        let dir = tempfile::tempdir().unwrap();
        let p = dir.path().join("dev.key");
        std::fs::write(&p, "0a".repeat(32)).unwrap();
        std::fs::set_permissions(&p, std::fs::Permissions::from_mode(0o644)).unwrap();
        let w = exposure(&p).expect("a warning for mode 0644");
        assert!(w.contains("mode 0644") && w.contains("chmod 600"), "{w}");
        std::fs::set_permissions(&p, std::fs::Permissions::from_mode(0o600)).unwrap();
        assert_eq!(exposure(&p), None);
        std::fs::set_permissions(&p, std::fs::Permissions::from_mode(0o640)).unwrap();
        assert!(exposure(&p).is_some(), "group-readable");
    }

    /// Regression: a key file saved with a byte-order mark was refused as
    /// "found 67 characters" (the mark counted as three).
    #[test]
    fn a_byte_order_mark_is_no_part_of_the_key() {
        let dir = tempfile::tempdir().unwrap();
        let p = dir.path().join("k.key");
        std::fs::write(&p, format!("\u{feff}{}\r\n", "0a".repeat(32))).unwrap();
        assert_eq!(load_key(&p).unwrap(), [0x0a; 32]);
        std::fs::write(&p, format!("\u{feff}{}\u{e9}", "0a".repeat(31))).unwrap();
        let e = load_key(&p).unwrap_err().to_string();
        assert!(e.contains("found 63 characters"), "{e}");
    }

    #[test]
    fn a_plus_sign_is_not_a_hex_digit() {
        // Found by fuzzing (host/fuzz, target `key`): "+e" was read as the
        // byte 0x0e, so a file of 63 digits and a plus sign was a key.
        let text = format!("0d+e{}", "0f".repeat(30));
        let e = parse_key(Path::new("k.key"), text.as_bytes()).unwrap_err();
        assert!(e.to_string().contains("no hex digit at digit 3"), "{e}");
        assert!(parse_key(Path::new("k.key"), "+0".repeat(32).as_bytes()).is_err());
    }

    #[test]
    fn a_key_file_that_is_not_text_is_named() {
        let e = parse_key(Path::new("k.key"), b"0a\xff").unwrap_err();
        assert!(
            e.to_string().contains("k.key") && e.to_string().contains("not UTF-8 text (at byte 2)"),
            "{e}"
        );
    }

    #[test]
    fn key_files_are_64_hex_digits() {
        let dir = tempfile::tempdir().unwrap();
        let p = dir.path().join("k.key");
        std::fs::write(&p, format!("{}\n", "0a".repeat(32))).unwrap();
        assert_eq!(load_key(&p).unwrap(), [0x0a; 32]);
        std::fs::write(&p, "0a0b").unwrap();
        assert!(load_key(&p)
            .unwrap_err()
            .to_string()
            .contains("4 characters"));
        std::fs::write(&p, "zz".repeat(32)).unwrap();
        assert!(load_key(&p).unwrap_err().to_string().contains("digit 1"));
    }
}
