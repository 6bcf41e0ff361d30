//! `fringe pull`: `fringe_line::pull` (every reading the device log still
//! holds that the database lacks, and the events after the last stored
//! one; idempotent) with a progress bar. With the device key it first sets
//! the device clock when it is unset or off by more than a second.

use std::time::Instant;

use indicatif::{ProgressBar, ProgressStyle};

use crate::cli::PullArgs;
use crate::config::LineConfig;
use crate::out;
use crate::store::Store;

/// `fringe pull`.
///
/// # Errors
/// Port, link, database and output errors, each with its exit code.
pub fn pull(args: &PullArgs, cfg: &LineConfig) -> anyhow::Result<()> {
    // Inputs first, then the device, then the database (nothing is
    // created or changed before the device has answered).
    let db = super::db_path(args.db.as_deref(), cfg)?;
    let key = super::optional_key(args.key_file.as_deref(), cfg)?;
    let mut link = super::connect(&args.port, cfg)?;
    super::with_db(&db, |store| run(args, &mut link, store, key.as_ref()))
}

fn run(
    args: &PullArgs,
    link: &mut fringe_link::Link,
    store: &mut Store,
    key: Option<&fringe_protocol::auth::Key>,
) -> anyhow::Result<()> {
    let bar = if args.json {
        ProgressBar::hidden()
    } else {
        ProgressBar::new(0)
    };
    bar.set_style(
        ProgressStyle::with_template(
            "{prefix} [{bar:40}] {pos}/{len} readings {per_sec} eta {eta}",
        )
        .unwrap_or_else(|_| ProgressStyle::default_bar())
        .progress_chars("=> "),
    );
    bar.set_prefix(format!("pulling {}", link.serial_number()));
    let stop = std::sync::atomic::AtomicBool::new(false);
    let wall = crate::store::now_unix_ms;
    let now = Instant::now;
    let mut tell = |n: fringe_line::Note<'_>| super::say_note("pull", n);
    let mut ctx = fringe_line::Ctx {
        stop: &stop,
        wall_ms: &wall,
        now: &now,
        tell: &mut tell,
    };
    let json = args.json;
    let mut last_line: Option<Instant> = None;
    let summary = fringe_line::pull(link, store, key, &mut ctx, &mut |n, expected| {
        // The device goes on measuring meanwhile: the bar grows if it must.
        let len = expected.max(n);
        // With --json: a progress line at most every half second.
        if json && last_line.is_none_or(|t| t.elapsed().as_millis() >= 500) {
            last_line = Some(Instant::now());
            let _ =
                out::json(&serde_json::json!({"type": "progress", "received": n, "expected": len}));
        }
        if len > bar.length().unwrap_or(0) {
            bar.set_length(len);
        }
        bar.set_position(n);
    });
    bar.finish_and_clear();
    let summary = summary?;
    if args.json {
        out::json(&out::typed("summary", serde_json::to_value(&summary)?))?;
    } else {
        out::line(&format!(
            "{}: device log {} readings from {}; {} received, {} stored, {} already stored, {} lost; {} events stored ({})",
            summary.serial,
            summary.log_len,
            summary.log_first,
            summary.received,
            summary.stored,
            summary.duplicates,
            summary.lost,
            summary.events_stored,
            out::duration_ms(summary.elapsed_ms)
        ))?;
    }
    Ok(())
}
