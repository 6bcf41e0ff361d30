//! Exit codes: one documented enum, and the mapping from an error chain.
//!
//! Scripts and plant supervisors branch on these numbers; they never change
//! meaning (codes are only added). The same table is in the README.

use std::io;

use crate::config::ConfigError;
use crate::link::LinkError;
use crate::store::StoreError;

/// Every exit status `fringe` returns.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
#[non_exhaustive]
pub enum ExitCode {
    /// 0: done (also: stopped with Ctrl-C, or output pipe closed by the reader).
    Success = 0,
    /// 1: an error not listed below (the message says what).
    Failure = 1,
    /// 2: bad command-line arguments (clap's usage error, or a value out of its range, named with its flag).
    Usage = 2,
    /// 3: a configuration, scenario, site, key, reference-sample, lab-pairs or product calibration file is missing or invalid (file, line, column and field named), or no port, database or device key is given.
    BadFile = 3,
    /// 4: the requested work finished but found problems (e.g. a broken audit chain).
    Problems = 4,
    /// 5: a product calibration failed the quality gate; nothing was written (`--force` overrides, recorded).
    GateRefused = 5,
    /// 10: the serial port does not exist (adapter unplugged, wrong name).
    PortMissing = 10,
    /// 11: the serial port is in use by another program.
    PortBusy = 11,
    /// 12: no permission to open the serial port (join the `dialout` group).
    PortPermission = 12,
    /// 13: the device did not answer (wrong port, device off, cable).
    NoAnswer = 13,
    /// 14: only garbled frames arrived (wrong baud rate, or line noise).
    Garbled = 14,
    /// 15: the device speaks an incompatible protocol major version.
    Incompatible = 15,
    /// 16: the device refused a request (its error code and reason are printed).
    DeviceRefused = 16,
    /// 20: the database is locked by another process.
    DbLocked = 20,
    /// 21: the database or its folder is read-only.
    DbReadOnly = 21,
    /// 22: the disk holding the database is full.
    DiskFull = 22,
    /// 23: the database cannot be used (cannot be created, not a fringe database, newer schema, damaged).
    DbUnusable = 23,
    /// 101: an internal error (a bug); the message asks for a report.
    Internal = 101,
}

/// A bad combination of arguments clap cannot check (exit status 2),
/// naming the flags.
#[derive(Debug)]
pub struct UsageError(pub String);

impl std::fmt::Display for UsageError {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(&self.0)
    }
}

impl std::error::Error for UsageError {}

impl ExitCode {
    /// The numeric status.
    pub const fn code(self) -> u8 {
        self as u8
    }

    /// The exit code for an error: the first cause in the chain that has one.
    pub fn for_error(err: &anyhow::Error) -> ExitCode {
        for cause in err.chain() {
            if let Some(e) = cause.downcast_ref::<StoreError>() {
                return match e {
                    StoreError::Locked { .. } => ExitCode::DbLocked,
                    StoreError::ReadOnly { .. } => ExitCode::DbReadOnly,
                    StoreError::DiskFull { .. } => ExitCode::DiskFull,
                    StoreError::CannotOpen { .. }
                    | StoreError::NotADatabase { .. }
                    | StoreError::Corrupt { .. }
                    | StoreError::NewerSchema { .. }
                    | StoreError::Foreign { .. } => ExitCode::DbUnusable,
                    _ => ExitCode::Failure,
                };
            }
            if let Some(e) = cause.downcast_ref::<LinkError>() {
                return ExitCode::for_link(e);
            }
            if cause.downcast_ref::<ConfigError>().is_some()
                || cause
                    .downcast_ref::<fringe_sim::toml_file::FileError>()
                    .is_some()
                || cause
                    .downcast_ref::<crate::samples::SampleError>()
                    .is_some()
                || cause
                    .downcast_ref::<fringe_gateway::site::SiteError>()
                    .is_some()
                || cause
                    .downcast_ref::<crate::product_file::ProductFileError>()
                    .is_some_and(|e| {
                        !matches!(e, crate::product_file::ProductFileError::Write { .. })
                    })
                || cause
                    .downcast_ref::<fringe_device::key::KeyError>()
                    .is_some()
                || matches!(
                    cause.downcast_ref::<fringe_quality::cal::PredictError>(),
                    Some(fringe_quality::cal::PredictError::OtherFrequencies { .. })
                )
                || matches!(
                    cause.downcast_ref::<fringe_quality::cal::AdjustError>(),
                    Some(fringe_quality::cal::AdjustError::OtherCalibration { .. })
                )
                || matches!(
                    cause.downcast_ref::<fringe_quality::cal::FitError>(),
                    Some(
                        fringe_quality::cal::FitError::NoDensity { .. }
                            | fringe_quality::cal::FitError::BeyondReading { .. }
                    )
                )
            {
                return ExitCode::BadFile;
            }
            if cause.downcast_ref::<ProblemsFound>().is_some() {
                return ExitCode::Problems;
            }
            // A value out of its range, named with its flag, is a usage
            // error like clap's own (exit 2), wherever it is checked.
            if cause.downcast_ref::<UsageError>().is_some()
                || cause.downcast_ref::<crate::store::SqliteOnly>().is_some()
                || matches!(
                    cause.downcast_ref::<fringe_quality::views::ViewError>(),
                    Some(fringe_quality::views::ViewError::BadValue(_))
                )
                || matches!(
                    cause.downcast_ref::<fringe_device::settings::SettingsError>(),
                    Some(fringe_device::settings::SettingsError::Refused(_))
                )
                || matches!(
                    cause.downcast_ref::<fringe_device::cell::CellError>(),
                    Some(fringe_device::cell::CellError::UnknownLiquid { .. })
                )
                || matches!(
                    cause.downcast_ref::<fringe_quality::cal::FitError>(),
                    Some(
                        fringe_quality::cal::FitError::NoDensities
                            | fringe_quality::cal::FitError::BadName { .. }
                    )
                )
            {
                return ExitCode::Usage;
            }
            if let Some(crate::product_file::ProductFileError::Write { full: true, .. }) =
                cause.downcast_ref::<crate::product_file::ProductFileError>()
            {
                return ExitCode::DiskFull;
            }
            if cause
                .downcast_ref::<fringe_quality::cal::GateRefused>()
                .is_some()
            {
                return ExitCode::GateRefused;
            }
            if let Some(e) = cause.downcast_ref::<io::Error>() {
                if matches!(
                    e.kind(),
                    io::ErrorKind::StorageFull | io::ErrorKind::QuotaExceeded
                ) {
                    return ExitCode::DiskFull;
                }
            }
        }
        ExitCode::Failure
    }
}

impl ExitCode {
    /// The documented exit code of a link failure.
    pub fn for_link(e: &LinkError) -> ExitCode {
        match e {
            LinkError::PortMissing { .. } => ExitCode::PortMissing,
            LinkError::PortBusy { .. } => ExitCode::PortBusy,
            LinkError::PortPermission { .. } => ExitCode::PortPermission,
            LinkError::NoAnswer { .. } => ExitCode::NoAnswer,
            LinkError::Garbled { .. } => ExitCode::Garbled,
            LinkError::Incompatible { .. } => ExitCode::Incompatible,
            LinkError::Refused { .. } => ExitCode::DeviceRefused,
            LinkError::Stopped => ExitCode::Success,
            _ => ExitCode::Failure,
        }
    }
}

impl From<ExitCode> for std::process::ExitCode {
    fn from(c: ExitCode) -> Self {
        std::process::ExitCode::from(c.code())
    }
}

/// Whether the error is a closed output pipe (`fringe status | head -1`),
/// which counts as success.
pub fn is_broken_pipe(err: &anyhow::Error) -> bool {
    err.chain().any(|c| {
        c.downcast_ref::<io::Error>()
            .is_some_and(|e| e.kind() == io::ErrorKind::BrokenPipe)
    })
}

/// A finished command that found problems (exit status 4, "problems").
#[derive(Debug)]
pub struct ProblemsFound(pub String);

impl std::fmt::Display for ProblemsFound {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(&self.0)
    }
}

impl std::error::Error for ProblemsFound {}

#[cfg(test)]
mod tests {
    use super::*;
    use std::path::PathBuf;

    #[test]
    fn codes_are_distinct() {
        let all = [
            ExitCode::Success,
            ExitCode::Failure,
            ExitCode::Usage,
            ExitCode::BadFile,
            ExitCode::Problems,
            ExitCode::GateRefused,
            ExitCode::PortMissing,
            ExitCode::PortBusy,
            ExitCode::PortPermission,
            ExitCode::NoAnswer,
            ExitCode::Garbled,
            ExitCode::Incompatible,
            ExitCode::DeviceRefused,
            ExitCode::DbLocked,
            ExitCode::DbReadOnly,
            ExitCode::DiskFull,
            ExitCode::DbUnusable,
            ExitCode::Internal,
        ];
        let mut codes: Vec<u8> = all.iter().map(|c| c.code()).collect();
        codes.sort_unstable();
        codes.dedup();
        assert_eq!(codes.len(), all.len());
    }

    #[test]
    fn link_failures_have_their_codes() {
        let port = || "/dev/ttyUSB0".to_string();
        for (e, code) in [
            (
                LinkError::PortMissing {
                    port: port(),
                    available: vec![],
                },
                ExitCode::PortMissing,
            ),
            (LinkError::PortBusy { port: port() }, ExitCode::PortBusy),
            (
                LinkError::PortPermission {
                    port: port(),
                    group: Some("dialout".into()),
                },
                ExitCode::PortPermission,
            ),
            (
                LinkError::Garbled {
                    port: port(),
                    baud: 9600,
                    errors: 3,
                },
                ExitCode::Garbled,
            ),
            (
                LinkError::Incompatible {
                    port: port(),
                    ours: fringe_protocol::PROTOCOL_VERSION,
                    theirs: fringe_protocol::Version { major: 9, minor: 0 },
                },
                ExitCode::Incompatible,
            ),
            (LinkError::Stopped, ExitCode::Success),
        ] {
            assert_eq!(ExitCode::for_link(&e), code, "{e}");
            assert_eq!(ExitCode::for_error(&anyhow::Error::new(e)), code);
        }
    }

    /// Regression: an unreadable key file, or one that is not 64 hex
    /// digits, exited with status 1 ("another error") where every other
    /// bad input file exits with 3.
    #[test]
    fn a_bad_key_file_is_a_bad_file() {
        let dir = tempfile::tempdir().expect("dir");
        let p = dir.path().join("dev.key");
        std::fs::write(&p, "0a0b").expect("write");
        for e in [
            fringe_device::key::load_key(&p).expect_err("short"),
            fringe_device::key::load_key(dir.path()).expect_err("a folder"),
        ] {
            let e = anyhow::Error::new(e).context("unit 1");
            assert_eq!(ExitCode::for_error(&e), ExitCode::BadFile, "{e:#}");
        }
    }

    #[test]
    fn mapping_looks_through_context() {
        let e = anyhow::Error::new(StoreError::DiskFull {
            path: PathBuf::from("x.db"),
        })
        .context("storing readings");
        assert_eq!(ExitCode::for_error(&e), ExitCode::DiskFull);
        let e = anyhow::Error::new(io::Error::from(io::ErrorKind::BrokenPipe)).context("writing");
        assert!(is_broken_pipe(&e));
        assert_eq!(
            ExitCode::for_error(&anyhow::anyhow!("x")),
            ExitCode::Failure
        );
    }
}
