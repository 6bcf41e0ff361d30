//! The line configuration file (TOML) and TOML loading with located errors.
//!
//! A line file saves repeating flags; every key is optional and a flag given
//! on the command line wins:
//!
//! ```toml
//! # Harrowgate Mill, line 2 dryer outlet
//! port = "/dev/ttyUSB0"   # serial port of the sensor
//! baud = 115200           # baud rate
//! db = "line2.db"         # database file (relative to this file's folder)
//! key_file = "hgm-l2-0007.key"  # device key, 64 hex digits (relative to this file's
//!                               # folder): lets monitor and pull set the device clock
//!
//! [alarm]                 # limits shown in `fringe monitor`
//! moisture_low_pct = 12.0
//! moisture_high_pct = 15.5
//! uncertainty_max_pct = 1.0
//! ```

use std::path::{Path, PathBuf};

use serde::Deserialize;

/// Default baud rate.
pub const DEFAULT_BAUD: u32 = fringe_sim::scenario::DEFAULT_BAUD;

pub use fringe_sim::toml_file::{line_column, load_toml, parse_toml, read_text, FileError};

/// A line file could not be used, or a value is given nowhere.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum ConfigError {
    /// The file cannot be read, or a value in it is wrong (named).
    #[error("{0}")]
    File(#[from] FileError),
    /// A required value is given neither by flag nor by the line file.
    #[error("no {what} given: pass {flag} or set `{key}` in a line file given with --config")]
    Missing {
        /// What is missing.
        what: &'static str,
        /// The flag.
        flag: &'static str,
        /// The line-file key.
        key: &'static str,
    },
}

/// Alarm limits shown by `fringe monitor` (a reading outside is marked).
pub use fringe_quality::limits::AlarmLimits;

/// The line configuration file.
#[derive(Debug, Clone, PartialEq, Default, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct LineConfig {
    /// Serial port.
    pub port: Option<String>,
    /// Baud rate.
    pub baud: Option<u32>,
    /// Database file; relative paths are taken from the file's folder.
    pub db: Option<PathBuf>,
    /// Device key file (64 hex digits); relative paths are taken from the
    /// file's folder.
    pub key_file: Option<PathBuf>,
    /// Alarm limits.
    #[serde(default)]
    pub alarm: AlarmLimits,
}

impl LineConfig {
    /// Loads and checks a line file.
    ///
    /// # Errors
    /// [`ConfigError`] naming the file, position or field.
    pub fn load(path: &Path) -> Result<Self, ConfigError> {
        let text = read_text(path)?;
        Self::parse(path, &text)
    }

    /// Parses and checks the text of a line file read from `path` (named
    /// in errors; relative paths in it are taken from its folder).
    ///
    /// # Errors
    /// As [`LineConfig::load`].
    pub fn parse(path: &Path, text: &str) -> Result<Self, ConfigError> {
        let mut c: LineConfig = parse_toml(path, text)?;
        let invalid = |field: &str, value: String, rule: &str| {
            ConfigError::File(FileError::Invalid {
                path: path.to_path_buf(),
                field: field.into(),
                value,
                rule: rule.into(),
            })
        };
        if let Some(b) = c.baud {
            if !(300..=4_000_000).contains(&b) {
                return Err(invalid("baud", b.to_string(), "must be 300..=4000000"));
            }
        }
        if let Err(b) = c.alarm.validate() {
            let rule = b
                .rule
                .replace("moisture_high_pct", "alarm.moisture_high_pct");
            return Err(invalid(&format!("alarm.{}", b.key), b.value, &rule));
        }
        let dir = path.parent();
        for p in [&mut c.db, &mut c.key_file] {
            if let (Some(f), Some(dir)) = (p.as_ref(), dir) {
                if f.is_relative() {
                    *p = Some(dir.join(f));
                }
            }
        }
        Ok(c)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn line_file_errors_name_the_place() {
        let dir = tempfile::tempdir().unwrap();
        let p = dir.path().join("line2.toml");
        std::fs::write(&p, "port = \"/dev/ttyUSB0\"\nbaud = 9600\nbad_key = 1\n").unwrap();
        let e = LineConfig::load(&p).unwrap_err().to_string();
        assert!(e.contains("line2.toml:3:1") && e.contains("bad_key"), "{e}");
        std::fs::write(&p, "baud = 12\n").unwrap();
        let e = LineConfig::load(&p).unwrap_err().to_string();
        assert!(e.contains("baud = 12"), "{e}");
        std::fs::write(
            &p,
            "db = \"l2.db\"\n[alarm]\nmoisture_low_pct = 12.0\nmoisture_high_pct = 15.5\n",
        )
        .unwrap();
        let c = LineConfig::load(&p).unwrap();
        assert_eq!(c.db, Some(dir.path().join("l2.db")));
        assert_eq!(c.alarm.check(Some(16.0), 0.5), vec!["HIGH"]);
        assert!(c.alarm.check(Some(13.0), 0.5).is_empty());
    }
}
