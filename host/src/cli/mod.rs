//! Command-line definition (clap derive, no I/O).
//!
//! Every command's arguments are a struct; commands of other modules add a
//! variant to [`Command`] with their own argument struct.

pub mod cal;
pub mod calcmd;
pub mod demo;
pub mod gateway;
pub mod quality;

use std::path::PathBuf;

use clap::{Args, Parser, Subcommand};

/// fringe: host tool for the Fringe inline moisture sensor.
#[derive(Debug, Parser)]
#[command(
    name = "fringe",
    version,
    about,
    long_about = None,
    after_help = "Exit codes are listed in the README (0 success, 2 usage, 3 bad file, 10-16 port and device, 20-23 database)."
)]
pub struct Cli {
    /// Line configuration file (TOML: port, baud, db, key_file, alarm limits); flags override it.
    /// Every command reads the same file; the help shows the one set in FRINGE_CONFIG.
    #[arg(long, global = true, value_name = "FILE", env = "FRINGE_CONFIG")]
    pub config: Option<PathBuf>,

    /// Show times in UTC instead of local time with its offset.
    #[arg(long, global = true)]
    pub utc: bool,

    /// What to do.
    #[command(subcommand)]
    pub command: Command,
}

/// Commands.
#[derive(Debug, Subcommand)]
pub enum Command {
    /// Show the device's identity: serial, firmware, protocol, frequencies.
    #[command(
        after_help = "Example:\n  fringe identify --port /dev/ttyUSB0\n  fringe identify --port /dev/ttyUSB0 --json"
    )]
    Identify(IdentifyArgs),
    /// Show the device's status: time, counters, calibrations in force, flags.
    #[command(
        after_help = "Example:\n  fringe status --port /dev/ttyUSB0\n  fringe --config line2.toml status --json"
    )]
    Status(StatusArgs),
    /// Run a simulated device (firmware core, simulated front end) on a pseudo-terminal until stopped.
    #[command(
        after_help = "Example (from the repository's top folder):\n  fringe sim --scenario host/scenarios/harrowgate-line2-wheat.toml --link /tmp/fringe-line2\n  (then, in another terminal: fringe monitor --port /tmp/fringe-line2 --db line2.db)\nScenario files: README, \"Watching a line\"; the commented examples in host/scenarios/."
    )]
    Sim(SimArgs),
    /// Store what the device logged that the database lacks, then show the readings live and store every one.
    #[command(
        after_help = "Example:\n  fringe monitor --port /dev/ttyUSB0 --db line2.db --key-file hgm-l2-0007.key\n  fringe --config line2.toml monitor\nWith the device key it sets the device clock when it is unset or off by more than a second.\nCtrl-C stops and commits what arrived."
    )]
    Monitor(MonitorArgs),
    /// Store every reading and event the device still holds that the database lacks (idempotent).
    #[command(
        after_help = "Example:\n  fringe pull --port /dev/ttyUSB0 --db line2.db --key-file hgm-l2-0007.key\nReadings before, between and after those stored are fetched; none is stored twice.\nWith the device key it sets the device clock when it is unset or off by more than a second."
    )]
    Pull(PullArgs),
    /// The device itself: its clock, its settings (tag, interval, 4-20 mA span, failure level, stale timeout), the plant's bulk density, its self-test.
    Device(DeviceArgs),
    /// Product and cell calibration: fit, predict, cell, capture, push, list, select, history.
    Cal(calcmd::CalArgs),
    /// Lab grab samples.
    Lab(quality::LabArgs),
    /// Drift monitors (EWMA, CUSUM) over a database.
    Drift(quality::DriftArgs),
    /// Write an HTML report (trend, flags, drift charts, calibrations) that opens without a server.
    Report(quality::ReportArgs),
    /// Tamper-evident audit bundles: export and verify.
    Audit(quality::AuditArgs),
    /// Readings, events or lab samples of a time range as CSV or JSON Lines, for spreadsheets and data tools.
    #[command(
        after_help = "Examples:\n  fringe export --db line2.db --from 2026-12-01 --to 2026-12-02 --out readings.csv\n  fringe export --db line2.db --device FR-00412 --what events --format jsonl --out events.jsonl\n  fringe export --db postgres://fringe@historian/fringe --format jsonl | jq .moisture_pct"
    )]
    Export(quality::ExportArgs),
    /// Run the whole job on a simulated device of an invented plant (the main demonstration).
    Demo(demo::DemoArgs),
    /// Run every device of a site file into one store, serving the readings over Modbus TCP, MQTT and a live page.
    #[command(
        after_help = "Example:\n  fringe gateway --config host/sites/demo-site.toml\n  fringe gateway --config /etc/fringe/site.toml --json\nHere --config names the site file (devices, store, Modbus TCP, MQTT, live page; see docs/GATEWAY.md).\nCtrl-C or SIGTERM commits every device's readings and stops."
    )]
    Gateway(gateway::GatewayArgs),
}

/// Which port, at which speed.
#[derive(Debug, Clone, Args)]
pub struct PortArgs {
    /// Serial port of the device (e.g. /dev/ttyUSB0, or the path `fringe sim` prints).
    #[arg(long, short = 'p', value_name = "PORT")]
    pub port: Option<String>,
    /// Baud rate [default: 115200, or `baud` in the line file].
    #[arg(long, short = 'b', value_name = "BAUD", value_parser = clap::value_parser!(u32).range(300..=4_000_000))]
    pub baud: Option<u32>,
    /// Wait for each answer, ms.
    #[arg(long, value_name = "MS", default_value_t = 400, value_parser = clap::value_parser!(u64).range(10..=60_000))]
    pub timeout_ms: u64,
}

/// `fringe identify`.
#[derive(Debug, Clone, Args)]
pub struct IdentifyArgs {
    /// The device.
    #[command(flatten)]
    pub port: PortArgs,
    /// Print JSON instead of text.
    #[arg(long)]
    pub json: bool,
}

/// `fringe status`.
#[derive(Debug, Clone, Args)]
pub struct StatusArgs {
    /// The device.
    #[command(flatten)]
    pub port: PortArgs,
    /// Print JSON instead of text.
    #[arg(long)]
    pub json: bool,
}

/// `fringe sim`.
#[derive(Debug, Clone, Args)]
pub struct SimArgs {
    /// Scenario file (TOML): what the simulated sensor sees over time,
    /// empty-line periods, line faults, the device's serial and key.
    #[arg(long, short = 's', value_name = "FILE")]
    pub scenario: PathBuf,
    /// Keep a symlink to the current pseudo-terminal here (it follows reconnects).
    #[arg(long, value_name = "PATH")]
    pub link: Option<PathBuf>,
    /// Append every reading the device sends (before line faults) to this JSON-lines file.
    #[arg(long, value_name = "FILE")]
    pub record: Option<PathBuf>,
    /// Stop after this many seconds (default: run until Ctrl-C).
    #[arg(long, value_name = "S")]
    pub duration_s: Option<f64>,
    /// Bench fixture file, for simulating bench work (`fringe cal cell`):
    /// while it exists, its first word says what is in front of the window,
    /// `air` or a reference liquid of the table (at the scenario's
    /// temperature, clean window); `line`, an empty file or no file means
    /// the scenario's line. Read about every 100 ms of wall time.
    #[arg(long, value_name = "FILE")]
    pub bench: Option<PathBuf>,
    /// Say where the device is (and, at the end, what it sent) as JSON
    /// lines on stdout (docs/JSON.md) instead of text.
    #[arg(long)]
    pub json: bool,
}

/// `fringe monitor`.
#[derive(Debug, Clone, Args)]
pub struct MonitorArgs {
    /// The device.
    #[command(flatten)]
    pub port: PortArgs,
    /// Database file (created if missing) [default: `db` in the line file].
    #[arg(long, short = 'd', value_name = "FILE")]
    pub db: Option<PathBuf>,
    /// No longer used: the device measures at its own interval (`fringe
    /// device config set --interval-ms`); accepted for old scripts, with a notice.
    #[arg(long, value_name = "MS", value_parser = clap::value_parser!(u32).range(1..=86_400_000))]
    pub period_ms: Option<u32>,
    /// Device key file (64 hex digits) [default: `key_file` in the line file]:
    /// lets the monitor set the device clock.
    #[arg(long, value_name = "FILE")]
    pub key_file: Option<PathBuf>,
    /// Stop after this many streamed readings.
    #[arg(long, value_name = "N")]
    pub count: Option<u64>,
    /// Stop after this many seconds.
    #[arg(long, value_name = "S")]
    pub duration_s: Option<f64>,
    /// No live view and no per-reading lines (errors and notices still go to stderr).
    #[arg(long, short = 'q')]
    pub quiet: bool,
    /// JSON lines on stdout: one per reading (not with --quiet), one per
    /// new drift alarm, and the end-of-run summary.
    #[arg(long)]
    pub json: bool,
    /// Re-run the drift monitors of `fringe drift` on the stored data every
    /// S seconds while streaming and announce each new alarm; 0 turns them off.
    #[arg(long, value_name = "S", default_value_t = 10.0, value_parser = seconds_0_to_day)]
    pub drift_every_s: f64,
}

/// Seconds from 0 to a day.
fn seconds_0_to_day(s: &str) -> Result<f64, String> {
    let v: f64 = s
        .trim()
        .parse()
        .map_err(|_| format!("`{s}` is not a number of seconds"))?;
    if v.is_finite() && (0.0..=86_400.0).contains(&v) {
        Ok(v)
    } else {
        Err(format!("{s} s is outside 0 (off) to 86400 s"))
    }
}

/// `fringe pull`.
#[derive(Debug, Clone, Args)]
pub struct PullArgs {
    /// The device.
    #[command(flatten)]
    pub port: PortArgs,
    /// Database file (created if missing) [default: `db` in the line file].
    #[arg(long, short = 'd', value_name = "FILE")]
    pub db: Option<PathBuf>,
    /// Device key file (64 hex digits) [default: `key_file` in the line file]:
    /// lets the pull set the device clock.
    #[arg(long, value_name = "FILE")]
    pub key_file: Option<PathBuf>,
    /// Print the summary as JSON.
    #[arg(long)]
    pub json: bool,
}

/// `fringe device`.
#[derive(Debug, Clone, Args)]
pub struct DeviceArgs {
    /// What to do.
    #[command(subcommand)]
    pub command: DeviceCommand,
}

/// `fringe device ...`.
#[derive(Debug, Clone, Subcommand)]
pub enum DeviceCommand {
    /// Show the device clock against this computer's; set it (with the device key).
    #[command(
        after_help = "Examples:\n  fringe device clock --port /dev/ttyUSB0\n  fringe device clock --port /dev/ttyUSB0 --key-file hgm-l2-0007.key --set\n  fringe device clock --port /dev/ttyUSB0 --key-file hgm-l2-0007.key --set-to \"2026-12-01 07:30\"\nTimes are shown in local time with the offset (--utc for UTC)."
    )]
    Clock(ClockArgs),
    /// Show or change the device settings.
    Config(ConfigArgs),
    /// Send the plant's bulk density for a calibration with a density input (authenticated).
    #[command(
        after_help = "Example (wet sand from the weigh belt ahead of the sensor, 1650 kg/m3, good for 60 s):\n  fringe device density --port /dev/ttyUSB0 --key-file hgm-l2-0007.key --kg-m3 1650 --hold-s 60\n\nA calibration fitted with --density-input uses the value for the readings of the next --hold-s seconds;\nafter that its readings are flagged density_missing and computed at the calibration's mean density with a\nwider uncertainty. The device holds it in RAM only (a restart forgets it); send it again, from a script or\nthe plant's system, well within the hold. A calibration without a density input ignores it.\nThe 4-20 mA output follows the new moisture at once: a wrong density moves the moisture a control loop may\nuse. Check the units (kg/m3, not g/cm3) and the source before feeding it on a running line."
    )]
    Density(DensityArgs),
    /// Run the device's self-test: its flash, front end, temperature sensor and internal reference.
    #[command(
        name = "self-test",
        after_help = "Example:\n  fringe device self-test --port /dev/ttyUSB0\n\nThe device takes one measurement and a reference check for it (needs no key; about a third of a second).\nThe measurement is an ordinary reading: logged, streamed to a subscriber, and the 4-20 mA output follows it.\nA measurement that fails (a faulty temperature sensor, say) sends the output to its failure level at once:\non a running line tell the control room first. Exit status 4 when a check fails, with what to do."
    )]
    SelfTest(SelfTestArgs),
}

/// `fringe device self-test`.
#[derive(Debug, Clone, Args)]
pub struct SelfTestArgs {
    /// The device.
    #[command(flatten)]
    pub port: PortArgs,
    /// Print JSON instead of text.
    #[arg(long)]
    pub json: bool,
}

/// `fringe device density`.
#[derive(Debug, Clone, Args)]
pub struct DensityArgs {
    /// The device.
    #[command(flatten)]
    pub port: PortArgs,
    /// Bulk density of the product at the sensor, kg/m^3 (10 to 5000).
    #[arg(long, value_name = "KG_M3")]
    pub kg_m3: f64,
    /// How long the value holds on the device, s (1 to 3600).
    #[arg(long, value_name = "S", default_value_t = 60)]
    pub hold_s: u32,
    /// Device key file (64 hex digits) [default: `key_file` in the line file].
    #[arg(long, value_name = "FILE")]
    pub key_file: Option<PathBuf>,
    /// Print JSON instead of text.
    #[arg(long)]
    pub json: bool,
}

/// `fringe device clock`.
#[derive(Debug, Clone, Args)]
pub struct ClockArgs {
    /// The device.
    #[command(flatten)]
    pub port: PortArgs,
    /// Set the device clock to this computer's time.
    #[arg(long, conflicts_with = "set_to")]
    pub set: bool,
    /// Set the device clock to this time: RFC 3339 with an offset
    /// (2026-12-01T07:29:00+01:00, ...Z); without an offset (2026-12-01
    /// 07:29) it is local time.
    #[arg(long, value_name = "TIME", value_parser = crate::timefmt::parse_time)]
    pub set_to: Option<i64>,
    /// Device key file (64 hex digits), needed to set [default: `key_file` in the line file].
    #[arg(long, value_name = "FILE")]
    pub key_file: Option<PathBuf>,
    /// Print JSON instead of text.
    #[arg(long)]
    pub json: bool,
}

/// `fringe device config`.
#[derive(Debug, Clone, Args)]
pub struct ConfigArgs {
    /// What to do.
    #[command(subcommand)]
    pub command: ConfigCommand,
}

/// `fringe device config ...`.
#[derive(Debug, Clone, Subcommand)]
pub enum ConfigCommand {
    /// Show the settings the device holds.
    #[command(
        after_help = "Example:\n  fringe device config show --port /dev/ttyUSB0\n  fringe device config show --port /dev/ttyUSB0 --json"
    )]
    Show(ConfigShowArgs),
    /// Change settings (authenticated with the device key, read back, recorded in the database with who and why).
    #[command(
        after_help = "Example:\n  fringe device config set --port /dev/ttyUSB0 --key-file hgm-l2-0007.key --db line2.db \\\n      --span-low-pct 8 --span-high-pct 22 --fail high --operator \"R. Okafor\" --reason \"dryer PLC rescaled\"\n  fringe device config set --port /dev/ttyUSB0 --key-file hgm-l2-0007.key --db line2.db \\\n      --modbus-unit 12 --modbus-baud 38400 --modbus-parity even --operator \"R. Okafor\" --reason \"second dryer on the segment\"\nSettings not given keep their value. The 4-20 mA output changes at once: tell the control room first\nand put dependent loops in manual. New Modbus settings cut off the PLC polling the old ones until it is changed too."
    )]
    Set(ConfigSetArgs),
}

/// `fringe device config show`.
#[derive(Debug, Clone, Args)]
pub struct ConfigShowArgs {
    /// The device.
    #[command(flatten)]
    pub port: PortArgs,
    /// Print JSON instead of text.
    #[arg(long)]
    pub json: bool,
}

/// Which NAMUR NE 43 failure level the loop signals.
#[derive(Debug, Clone, Copy, PartialEq, Eq, clap::ValueEnum)]
pub enum FailLevel {
    /// 3.5 mA (NE 43: at most 3.6 mA).
    Low,
    /// 21.5 mA (NE 43: at least 21 mA).
    High,
}

/// Parity of the Modbus RTU line.
#[derive(Debug, Clone, Copy, PartialEq, Eq, clap::ValueEnum)]
pub enum ModbusParityArg {
    /// Even parity, one stop bit (8E1, the default).
    Even,
    /// Odd parity, one stop bit (8O1).
    Odd,
    /// No parity, two stop bits (8N2).
    None,
}

impl From<ModbusParityArg> for fringe_protocol::ModbusParity {
    fn from(p: ModbusParityArg) -> Self {
        match p {
            ModbusParityArg::Even => Self::Even,
            ModbusParityArg::Odd => Self::Odd,
            ModbusParityArg::None => Self::None,
        }
    }
}

/// A Modbus RTU baud rate the device accepts.
fn parse_modbus_baud(s: &str) -> Result<u32, String> {
    let rates = fringe_firmware::modbus::BAUD_RATES;
    let list = || rates.map(|r| r.to_string()).join(", ");
    match s.trim().parse::<u32>() {
        Ok(b) if rates.contains(&b) => Ok(b),
        _ => Err(format!("must be one of {}", list())),
    }
}

/// `fringe device config set`.
#[derive(Debug, Clone, Args)]
pub struct ConfigSetArgs {
    /// The device.
    #[command(flatten)]
    pub port: PortArgs,
    /// Device key file (64 hex digits) [default: `key_file` in the line file].
    #[arg(long, value_name = "FILE")]
    pub key_file: Option<PathBuf>,
    /// Database that records the change [default: `db` in the line file].
    #[arg(long, short = 'd', value_name = "FILE")]
    pub db: Option<PathBuf>,
    /// Measuring-point tag (up to 24 bytes, no control characters; "" clears it).
    #[arg(long, value_name = "TAG")]
    pub tag: Option<String>,
    /// Measurement interval, ms (100 to 3600000).
    #[arg(long, value_name = "MS")]
    pub interval_ms: Option<u32>,
    /// Moisture at 4 mA, %.
    #[arg(long, value_name = "PCT")]
    pub span_low_pct: Option<f32>,
    /// Moisture at 20 mA, %.
    #[arg(long, value_name = "PCT")]
    pub span_high_pct: Option<f32>,
    /// Failure level of the loop (NAMUR NE 43).
    #[arg(long, value_enum, value_name = "LEVEL")]
    pub fail: Option<FailLevel>,
    /// With no valid reading for this long the loop goes to its failure level, ms
    /// (at least twice the interval, at most a day).
    #[arg(long, value_name = "MS")]
    pub stale_timeout_ms: Option<u32>,
    /// Modbus RTU unit id (slave address) the device answers on RS-485, 1 to 247
    /// (protocol 1.2 devices).
    #[arg(long, value_name = "ID", value_parser = clap::value_parser!(u8).range(1..=247))]
    pub modbus_unit: Option<u8>,
    /// Modbus RTU baud rate: 1200, 2400, 4800, 9600, 19200, 38400, 57600 or 115200.
    #[arg(long, value_name = "BAUD", value_parser = parse_modbus_baud)]
    pub modbus_baud: Option<u32>,
    /// Modbus RTU parity: even or odd (one stop bit), or none (two stop bits).
    #[arg(long, value_enum, value_name = "PARITY")]
    pub modbus_parity: Option<ModbusParityArg>,
    /// Who makes the change.
    #[arg(long)]
    pub operator: String,
    /// Why.
    #[arg(long)]
    pub reason: String,
    /// Do not ask before writing.
    #[arg(long)]
    pub yes: bool,
    /// Print the result as JSON.
    #[arg(long)]
    pub json: bool,
}

#[cfg(test)]
mod tests {
    use super::*;
    use clap::CommandFactory;

    #[test]
    fn verify_cli() {
        Cli::command().debug_assert();
    }

    #[test]
    fn modbus_values_are_checked_by_flag() {
        let base = [
            "fringe",
            "device",
            "config",
            "set",
            "--port",
            "p",
            "--operator",
            "o",
            "--reason",
            "r",
        ];
        let parse = |extra: &[&str]| {
            let mut a = base.to_vec();
            a.extend_from_slice(extra);
            Cli::try_parse_from(a)
        };
        for bad in [
            &["--modbus-unit", "0"][..],
            &["--modbus-unit", "248"],
            &["--modbus-baud", "14400"],
            &["--modbus-parity", "mark"],
        ] {
            let e = parse(bad).unwrap_err();
            // Both kinds are usage errors (exit status 2).
            assert!(
                matches!(
                    e.kind(),
                    clap::error::ErrorKind::ValueValidation | clap::error::ErrorKind::InvalidValue
                ),
                "{bad:?}: {:?}",
                e.kind()
            );
            assert_eq!(e.exit_code(), 2, "{bad:?}");
            let text = e.to_string();
            assert!(text.contains(bad[0]), "{bad:?}: {text}");
        }
        assert!(parse(&["--modbus-unit", "247", "--modbus-baud", "115200"]).is_ok());
        assert!(parse(&["--modbus-baud", "9600", "--modbus-parity", "none"]).is_ok());
    }

    #[test]
    fn bad_baud_is_a_usage_error() {
        let e = Cli::try_parse_from(["fringe", "status", "--baud", "12"]).unwrap_err();
        assert_eq!(e.kind(), clap::error::ErrorKind::ValueValidation);
    }
}
