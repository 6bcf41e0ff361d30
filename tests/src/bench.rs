//! Bench helpers shared by the end-to-end tests: a key file, the bench
//! calibration commands driven through their prompts, a calibration with a
//! density input, the device status.

use std::path::{Path, PathBuf};
use std::time::Duration;

use crate::{fringe, run, Interactive, Outcome, Sim, TEST_KEY_HEX};

/// A limit for a whole command.
pub const LIMIT: Duration = Duration::from_secs(120);
/// A limit for one prompt.
pub const PROMPT: Duration = Duration::from_secs(30);
/// The prompt of a step done at the bench.
pub const ENTER: &str = "press Enter when done";

/// The simulated device's key (the test key) in a file beside it.
pub fn key_file(sim: &Sim) -> PathBuf {
    let p = sim.path("device.key");
    std::fs::write(&p, format!("{TEST_KEY_HEX}\n")).expect("key file");
    p
}

/// `fringe cal <what> --port P --key-file K --db D <extra>`: a calibration
/// command that writes to the simulated device and records in `db`.
pub fn cal_write(
    sim: &Sim,
    key: &Path,
    db: &Path,
    what: &str,
    extra: &[&str],
) -> std::process::Command {
    let mut args = vec![
        "cal",
        what,
        "--port",
        sim.port_str(),
        "--key-file",
        key.to_str().unwrap(),
        "--db",
        db.to_str().unwrap(),
        "--operator",
        "T. Bench (test)",
    ];
    args.extend_from_slice(extra);
    fringe(&args)
}

/// `fringe cal cell` through its four steps; `materials` are what is put
/// in front of the window at each (air, liquid, verification liquid, air).
pub fn cell_calibration(sim: &Sim, db: &Path, key: &Path, materials: [&str; 4]) -> Outcome {
    sim.set_bench(materials[0]);
    let mut c = Interactive::spawn(&mut cal_write(
        sim,
        key,
        db,
        "cell",
        &[
            "--liquid",
            "methanol",
            "--verify-liquid",
            "ethanol",
            "--readings",
            "4",
            "--yes",
        ],
    ));
    for (i, m) in materials.iter().enumerate() {
        c.expect(ENTER, i + 1, PROMPT);
        sim.set_bench(m);
        c.send("");
        // A failed verification ends the procedure before the last step.
        if i == 2 && materials[2] != "ethanol" {
            break;
        }
    }
    c.finish(LIMIT)
}

/// `fringe status --json` of the simulated device.
pub fn status_json(sim: &Sim) -> serde_json::Value {
    let o = run(
        &mut fringe(&["status", "--port", sim.port_str(), "--json"]),
        LIMIT,
    );
    assert_eq!(o.code, 0, "{}", o.stderr);
    serde_json::from_str(&o.stdout).expect("status json")
}

/// A reference table whose eps' grows with the bulk density (values made
/// up for the test).
pub fn write_density_table(path: &Path) {
    let mut t = String::from(
        "sample_id,moisture_pct,temperature_c,freq1_hz,eps1_re,eps1_im,freq2_hz,eps2_re,eps2_im,bulk_density_kg_m3\n",
    );
    for i in 0..40 {
        let m = 10.0 + 0.3 * f64::from(i);
        let rho = 700.0 + 10.0 * f64::from(i % 7);
        t.push_str(&format!(
            "D{i},{m},{},1000000,{},{},20000000,{},{},{rho}\n",
            18.0 + f64::from(i % 5),
            2.0 + 0.25 * m + 0.002 * rho + 0.01 * f64::from(i % 3),
            0.5 + 0.02 * f64::from(i),
            1.8 + 0.2 * m + 0.001 * rho,
            0.3 + 0.01 * f64::from(i % 4)
        ));
    }
    std::fs::write(path, t).unwrap();
}

/// `fringe cal fit --density-input` of that table into `out`.
pub fn fit_density_calibration(table: &Path, out: &Path) {
    let o = run(
        &mut fringe(&[
            "cal",
            "fit",
            "--samples",
            table.to_str().unwrap(),
            "--model",
            "multivariate",
            "--density-input",
            "--force",
            "--name",
            "HM chips L2",
            "--out",
            out.to_str().unwrap(),
        ]),
        LIMIT,
    );
    assert_eq!(o.code, 0, "{}", o.stderr);
}

/// Polls `fringe status` until the last reading's flags do (`want`) or do
/// not carry `density_missing`; the flags seen, for the message.
pub fn wait_density_flag(sim: &Sim, want: bool) -> Result<(), String> {
    let mut seen = String::new();
    for _ in 0..40 {
        let s = status_json(sim);
        let flags = s["last_flags"].to_string();
        if flags.contains("\"density_missing\"") == want {
            return Ok(());
        }
        seen = flags;
        std::thread::sleep(Duration::from_millis(50));
    }
    Err(seen)
}

/// Commissions the simulated device with a calibration that takes the
/// plant's bulk density: a cell calibration at the bench, then the fit of
/// [`write_density_table`] pushed and made active; its readings then flag
/// `density_missing` until a density comes. `db` records the writes.
///
/// # Panics
/// When a step fails (its stderr in the message).
pub fn commission_with_density(sim: &Sim, key: &Path, db: &Path) {
    let o = cell_calibration(sim, db, key, ["air", "methanol", "ethanol", "air"]);
    assert_eq!(o.code, 0, "{}", o.stderr);
    sim.set_bench("line");
    let table = sim.path("dense.csv");
    write_density_table(&table);
    let cal = sim.path("dense.toml");
    fit_density_calibration(&table, &cal);
    let o = run(
        &mut cal_write(
            sim,
            key,
            db,
            "push",
            &[
                "--cal",
                cal.to_str().unwrap(),
                "--reason",
                "density test",
                "--activate",
                "true",
                "--yes",
                "--force",
            ],
        ),
        LIMIT,
    );
    assert_eq!(o.code, 0, "{}", o.stderr);
}
