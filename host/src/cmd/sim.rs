//! `fringe sim`: a simulated device (`fringe-sim`) on a pseudo-terminal,
//! saying where it is and what it does.

use std::io::Write;
use std::sync::atomic::AtomicBool;

use fringe_sim::firmware::FirmwareSim;
use fringe_sim::pty::{SimNote, SimOptions};
use fringe_sim::scenario::Scenario;

use crate::cli::SimArgs;

/// `fringe sim`.
///
/// # Errors
/// A bad scenario file, boot failure, or pty failure.
pub fn sim(args: &SimArgs, stop: &AtomicBool) -> anyhow::Result<()> {
    let scenario = Scenario::load(&args.scenario)?;
    let mut dev = FirmwareSim::new(&scenario, crate::store::now_unix_ms().max(0) as u64)?;
    let opts = SimOptions {
        link: args.link.clone(),
        record: args.record.clone(),
        duration: args.duration_s.map(std::time::Duration::from_secs_f64),
        bench: args.bench.clone(),
    };
    let serial = scenario.device.serial.clone();
    let title = scenario.name.clone();
    let stats = fringe_sim::pty::run(&mut dev, &scenario, &opts, stop, &mut |note| match note {
        SimNote::Port(path) if args.json => crate::out::json(&serde_json::json!({
            "type": "port",
            "serial": serial,
            "scenario": title,
            "port": path.to_string(),
            "link": opts.link.as_ref().map(|l| l.display().to_string()),
        })),
        SimNote::Port(path) => {
            let mut o = std::io::stdout().lock();
            match &opts.link {
                Some(l) => writeln!(
                    o,
                    "fringe sim: {serial} ({title}) on {path} (link {})",
                    l.display()
                )?,
                None => writeln!(o, "fringe sim: {serial} ({title}) on {path}")?,
            }
            o.flush()
        }
        SimNote::Bench(what) => {
            eprintln!("fringe sim: bench fixture: {what}");
            Ok(())
        }
        SimNote::BadBench(why) | SimNote::Device(why) => {
            eprintln!("fringe sim: {why}");
            Ok(())
        }
        _ => Ok(()),
    })?;
    if args.json {
        crate::out::json(&serde_json::json!({
            "type": "stopped",
            "serial": serial,
            "rx_bytes": stats.rx_bytes,
            "tx_bytes": stats.tx_bytes,
            "tx_lost_bytes": stats.tx_lost,
            "disconnects": stats.disconnects,
            "dropped_bytes": stats.dropped,
            "flipped_bytes": stats.flipped,
            "garbage_bytes": stats.inserted,
        }))?;
        return Ok(());
    }
    eprintln!(
        "fringe sim: stopped; {} bytes in, {} bytes out, {} lost while no host read, {} disconnects; line faults: {} bytes dropped, {} with a bit flipped, {} garbage bytes inserted",
        stats.rx_bytes,
        stats.tx_bytes,
        stats.tx_lost,
        stats.disconnects,
        stats.dropped,
        stats.flipped,
        stats.inserted
    );
    Ok(())
}
