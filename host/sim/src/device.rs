//! The seam between the simulator and the device it runs: the firmware core
//! ([`crate::firmware::FirmwareSim`]) or a test's stand-in.

use crate::scenario::Conditions;

/// The device the simulator runs (the firmware core behind a small seam).
pub trait SimDevice {
    /// One step of the device: received bytes in, frames out through `tx`.
    fn poll(&mut self, now_ms: u64, rx: &[u8], tx: &mut dyn FnMut(&[u8]));
    /// What the sensor sees now.
    fn set_conditions(&mut self, c: &Conditions);
    /// Reboots the device (same flash) if it asked for it.
    fn reboot_if_requested(&mut self, now_ms: u64);
    /// Puts a bench material in front of the window instead of the line
    /// (`None`: the line again). Applied with the next conditions.
    fn set_bench(&mut self, bench: Option<Bench>);
    /// In the middle of a measurement job: the device time at which the
    /// front end has finished the steps run so far (its settling and
    /// records), when the simulator polls again rather than waiting for
    /// the host's bytes; `None` while no job runs.
    fn busy_until_ms(&self) -> Option<u64> {
        None
    }
    /// One line on what the device is doing (readings, loop current), for
    /// the simulator's periodic report; `None` if it has nothing to say.
    fn report(&self) -> Option<String> {
        None
    }
}

/// What is in front of the window at the bench.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Bench {
    /// Dry air.
    Air,
    /// A reference liquid of the calibration crate's table.
    Liquid(&'static fringe_calibration::water::ReferenceLiquid),
}

impl Bench {
    /// Parses a bench fixture file's text: its first word, `None` for
    /// `line` or nothing.
    ///
    /// # Errors
    /// A word that names neither air, a table liquid nor the line.
    pub fn parse(text: &str) -> Result<Option<Bench>, String> {
        match text.split_whitespace().next() {
            None | Some("line") => Ok(None),
            Some("air") => Ok(Some(Bench::Air)),
            Some(w) => fringe_calibration::water::ReferenceLiquid::by_name(w)
                .map(|l| Some(Bench::Liquid(l)))
                .ok_or_else(|| {
                    format!(
                        "bench fixture `{w}`: not `line`, `air` or a table liquid ({})",
                        fringe_calibration::water::REFERENCE_LIQUIDS
                            .iter()
                            .map(|l| l.name)
                            .collect::<Vec<_>>()
                            .join(", ")
                    )
                }),
        }
    }
}
