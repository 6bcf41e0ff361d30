//! `fringe demo`: the whole job on a simulated device of an invented plant.
//!
//! Harrowgate Mill (our own invention) dries wheat; the sensor HGM-L2-0007
//! sits at the line 2 dryer outlet. The demo calibrates the sensor cell on
//! the bench, captures reference samples of "HM wheat L2" with lab values,
//! fits every product model and compares them, pushes the chosen one with
//! an audit record, monitors a shift in which the salt content of the grain
//! varies and the window slowly fouls, checks the line with lab grab
//! samples, runs the drift monitors, exports and verifies an audit bundle
//! and writes the report. Everything runs in this process on a virtual
//! clock (see `fringe_sim::port`); the outputs are ordinary files that the
//! other commands read.

use std::io::IsTerminal as _;
use std::path::{Path, PathBuf};
use std::time::Instant;

use anyhow::{bail, Context as _};
use fringe_calibration::synth::{SynthProduct, SynthSample};
use fringe_firmware::sim::Material;
use fringe_firmware::{DeviceConfig, Scenario};
use fringe_protocol::{DeviceFrame, Request, Response};
use indicatif::{ProgressBar, ProgressStyle};
use rand::{rngs::StdRng, RngExt as _, SeedableRng};
use rand_distr::StandardNormal;

use crate::analysis;
use crate::audit;
pub use crate::cli::demo::DemoArgs;
use crate::cmd::cal::{FitArgs, FitModelArg};
use crate::link::{Link, LinkOptions};
use crate::product_file::ProductFile;
use crate::store::{DeviceInfo, NewLabSample, Source, Store};
use crate::timefmt::fmt_time;
use fringe_device::guide::{Cancelled, Guide};
use fringe_quality::cal;
use fringe_quality::views;
use fringe_sim::port::SimHandle;

/// Where the demo put its outputs.
#[derive(Debug, Clone)]
pub struct DemoOutputs {
    /// Output folder.
    pub dir: PathBuf,
    /// Database.
    pub db: PathBuf,
    /// Reference samples.
    pub samples: PathBuf,
    /// Product calibration.
    pub product: PathBuf,
    /// The bias-adjusted calibration (`cal adjust`), when one was written.
    pub adjusted: PathBuf,
    /// Fit plot.
    pub fit_plot: PathBuf,
    /// Audit bundle.
    pub bundle: PathBuf,
    /// Report page.
    pub report: PathBuf,
    /// Device key file.
    pub key: PathBuf,
    /// Drift alarms raised (episodes).
    pub alarms: usize,
    /// Whether the bundle verified.
    pub bundle_ok: bool,
}

/// Plant names (all invented).
pub const PLANT: &str = "Harrowgate Mill";
/// Line.
pub const LINE: &str = "line 2 dryer outlet";
/// Sensor serial.
pub const SERIAL: &str = "HGM-L2-0007";
/// Product.
pub const PRODUCT: &str = "HM wheat L2";
/// Demo device key (invented; a real device gets its own at commissioning).
pub const DEMO_KEY: [u8; 32] = [
    0x5e, 0x1f, 0x93, 0x0a, 0x27, 0xc4, 0x6b, 0xd8, 0x10, 0x4e, 0xa2, 0x77, 0x39, 0xf5, 0x08, 0xcc,
    0x61, 0x2d, 0x9a, 0xe3, 0x47, 0xb0, 0x15, 0x8f, 0xd2, 0x6e, 0x03, 0xa9, 0x5c, 0x71, 0xbe, 0x24,
];
/// Bench day, 2026-11-30T08:00:00Z.
const BENCH_MS: i64 = 1_796_025_600_000;
/// Shift start, 2026-12-01T06:00:00Z.
const SHIFT_MS: i64 = 1_796_104_800_000;

fn product_scenario(base: Scenario, s: SynthSample<f32>) -> Scenario {
    Scenario {
        material: Material::Product {
            product: SynthProduct::grain(),
            moisture_pct: s.moisture_pct,
            water_sigma25_s_m: s.water_sigma25_s_m,
        },
        product_present: true,
        temperature_c: s.temperature_c,
        ..base
    }
}

struct DemoGuide {
    sim: SimHandle,
    plan: Vec<Scenario>,
    /// Cautions already printed: the demo shows each once.
    cautioned: Vec<String>,
}

impl Guide for DemoGuide {
    fn step(&mut self, instruction: &str) -> Result<(), Cancelled> {
        println!("    > {instruction}");
        if !self.plan.is_empty() {
            let s = self.plan.remove(0);
            self.sim.lock().set_scenario(s);
        }
        Ok(())
    }
    fn ask(&mut self, _question: &str) -> Result<Option<String>, Cancelled> {
        Ok(None)
    }
    fn confirm(&mut self, question: &str) -> Result<bool, Cancelled> {
        println!("    > {question} yes (the demo confirms by itself; a person types y)");
        Ok(true)
    }
    fn show(&mut self, text: &str) {
        for line in text.lines() {
            println!("    {line}");
        }
    }
    fn caution(&mut self, text: &str) {
        if self.cautioned.iter().any(|c| c == text) {
            eprintln!("    (the CAUTION above applies here too)");
        } else {
            eprintln!("{text}");
            self.cautioned.push(text.to_string());
        }
    }
}

fn stage(n: usize, total: usize, what: &str) {
    println!("\n[{n}/{total}] {what}");
}

fn set_clock(link: &mut Link, unix_ms: i64) -> anyhow::Result<()> {
    link.request_signed(
        Request::SetClock {
            unix_ms: unix_ms as u64,
        },
        &DEMO_KEY,
    )?;
    Ok(())
}

/// Runs the demo.
///
/// # Errors
/// Any failure of a stage (the message names it).
pub fn run(a: &DemoArgs) -> anyhow::Result<DemoOutputs> {
    crate::demo_folder::prepare(&a.out).map_err(|e| crate::exit::UsageError(e.to_string()))?;
    let result = run_in(a);
    crate::demo_folder::finish(&a.out)?;
    result
}

fn run_in(a: &DemoArgs) -> anyhow::Result<DemoOutputs> {
    let started = Instant::now();
    let total = 9;
    let dir = a.out.clone();
    let outs = DemoOutputs {
        db: dir.join("line2.db"),
        samples: dir.join("reference-samples.csv"),
        product: dir.join("hm-wheat-l2.toml"),
        adjusted: dir.join("hm-wheat-l2-adjusted.toml"),
        fit_plot: dir.join("fit.svg"),
        bundle: dir.join("audit-2026-12-01"),
        report: dir.join("report").join("index.html"),
        key: dir.join(format!("{SERIAL}.key")),
        dir: dir.clone(),
        alarms: 0,
        bundle_ok: false,
    };
    println!(
        "{PLANT}, {LINE}: sensor {SERIAL} (simulated), product {PRODUCT}. Outputs in {}.",
        dir.display()
    );
    println!("All names, data and the plant are invented for this demo.");
    // Readable by its owner alone, as a real key file should be.
    {
        use std::io::Write as _;
        let mut o = std::fs::OpenOptions::new();
        o.write(true).create(true).truncate(true);
        #[cfg(unix)]
        std::os::unix::fs::OpenOptionsExt::mode(&mut o, 0o600);
        let mut f = o.open(&outs.key)?;
        f.write_all(
            (DEMO_KEY
                .iter()
                .map(|b| format!("{b:02x}"))
                .collect::<String>()
                + "\n")
                .as_bytes(),
        )?;
    }

    let mut rng = StdRng::seed_from_u64(a.seed);
    let grain = SynthProduct::<f32>::grain();
    let air_bench = Scenario {
        material: Material::Air,
        product_present: true,
        temperature_c: 21.0,
        ..Scenario::default()
    };
    let mut cfg = DeviceConfig::new(SERIAL, DEMO_KEY);
    cfg.simulated = true;
    // One reading a minute (the device measures on its own schedule; the
    // shift below subscribes to it).
    cfg.settings.interval_ms = 60_000;
    cfg.settings.stale_timeout_ms = 300_000;
    let sim = SimHandle::boot(a.seed, air_bench, cfg).map_err(anyhow::Error::msg)?;
    let opts = LinkOptions {
        timeout: std::time::Duration::from_millis(2000),
        ..LinkOptions::default()
    };
    let mut link = Link::connect(sim.opener("sim:HGM-L2-0007"), opts)
        .context("connecting to the simulated device")?;
    let mut store = Store::open(&outs.db)?;
    let ident = link
        .identity()
        .cloned()
        .ok_or_else(|| anyhow::anyhow!("no identity"))?;
    store.ensure_device(&DeviceInfo {
        serial: SERIAL.into(),
        firmware: Some(format!(
            "{}.{}.{}",
            ident.firmware[0], ident.firmware[1], ident.firmware[2]
        )),
        protocol: Some(format!("{}.{}", ident.protocol.major, ident.protocol.minor)),
        freqs_hz: Some(ident.freqs_hz),
    })?;
    set_clock(&mut link, BENCH_MS)?;

    // 1. Bench cell calibration.
    stage(1, total, "bench cell calibration: air, methanol, verified with ethanol (reference-liquid table, temperature-corrected)");
    let methanol = fringe_calibration::water::ReferenceLiquid::by_name("methanol")
        .context("methanol in the table")?;
    let ethanol = fringe_calibration::water::ReferenceLiquid::by_name("ethanol")
        .context("ethanol in the table")?;
    let t_bench = 21.0f32;
    let liquid = |eps: f64| Scenario {
        material: Material::Liquid {
            eps_re: eps as f32,
            eps_im: 0.0,
        },
        ..air_bench
    };
    let mut guide = DemoGuide {
        sim: sim.clone(),
        plan: vec![
            air_bench,
            liquid(methanol.permittivity(f64::from(t_bench))),
            liquid(ethanol.permittivity(f64::from(t_bench))),
            air_bench,
        ],
        cautioned: Vec::new(),
    };
    let cell_opts = fringe_device::cell::CellOptions {
        liquid: "methanol".into(),
        verify_liquid: "ethanol".into(),
        temperature_c: None,
        verify_temperature_c: None,
        readings: 6,
        operator: "R. Okafor (QC)".into(),
        yes: true,
        made_s: (BENCH_MS / 1000) as u64,
    };
    // Records carry the demo's own time (the bench day, the shift), not
    // the wall clock of the machine running it.
    store.set_record_clock(Some(BENCH_MS + 20 * 60_000));
    let cell = fringe_device::cell::cell_calibration(
        &mut link, &DEMO_KEY, &mut store, &mut guide, &cell_opts,
    )?;
    println!(
        "    written to the device (authenticated), read back: cell calibration {} (was {})",
        cell.cal.content_id(),
        cell.old
    );

    // 2. Reference samples.
    // Five samples per parameter of the relaxation model (the quality gate:
    // five regression coefficients and the mixing parameter, so 30; its two
    // static terms are tried from 40 samples on).
    let n_samples = if a.short { 30 } else { 36 };
    stage(2, total, &format!("capturing {n_samples} reference samples of {PRODUCT} (lab: oven 130 C, ground; invented values)"));
    let mut rows = Vec::new();
    for i in 0..n_samples {
        let s = SynthSample {
            moisture_pct: rng.random_range(10.0f32..20.0),
            temperature_c: rng.random_range(8.0f32..36.0),
            water_sigma25_s_m: (rng.random_range(0.02f32.ln()..0.3f32.ln())).exp(),
        };
        {
            // Let the sample and the temperature sensor settle (5 min).
            let mut st = sim.lock();
            st.set_scenario(product_scenario(air_bench, s));
            st.run_for(300_000);
        }
        // The lab's oven method repeats to about 0.1 % moisture (invented for the demo).
        let lab = f64::from(s.moisture_pct) + 0.1 * rng.sample::<f64, _>(StandardNormal);
        let id = format!("HGM-{:03}", i + 1);
        rows.push(fringe_quality::samples::RefSample {
            moisture_basis: Some(fringe_quality::samples::Basis::Wet),
            ..fringe_device::capture::capture_sample(
                &mut link,
                &id,
                Some((lab * 100.0).round() / 100.0),
                3,
            )?
        });
    }
    fringe_device::capture::save_rows(&outs.samples, &rows, fringe_quality::samples::Basis::Wet)?;
    println!("    wrote {}", outs.samples.display());

    // 3. Fit both models.
    stage(
        3,
        total,
        "fitting every product model on the same samples (leave-one-out cross-validation)",
    );
    let fit_args = FitArgs {
        samples: outs.samples.clone(),
        model: FitModelArg::Compare,
        out: outs.product.clone(),
        name: Some(PRODUCT.into()),
        bulk_density_kg_m3: Some(f64::from(grain.mixture.bulk_density_kg_m3)),
        particle_density_kg_m3: Some(f64::from(grain.mixture.particle_density_kg_m3)),
        degree: 2,
        folds: 0,
        eps_sd: 0.02,
        basis: "wet".into(),
        json: false,
        plot: Some(outs.fit_plot.clone()),
        force: false,
        density_input: false,
    };
    crate::cmd::cal::run_fit(&fit_args)?;

    // 4. Push.
    stage(
        4,
        total,
        "pushing the calibration to the device with an audit record",
    );
    let (file, wire) = ProductFile::load(&outs.product)?;
    store.set_record_clock(Some(BENCH_MS + 4 * 3_600_000));
    let pushed = fringe_device::product::push(
        &mut link,
        &DEMO_KEY,
        &mut store,
        &mut guide,
        &fringe_device::product::Push {
            file: &file,
            wire: &wire,
            slot: None,
            activate: true,
            operator: "R. Okafor (QC)",
            reason: "new wheat crop 2026: calibration from reference samples",
            yes: false,
        },
    )?;
    println!(
        "    slot {}: {} -> {} (read back and verified; audit record at chain position {})",
        pushed.slot, pushed.old, pushed.new, pushed.position
    );

    // 5. A shift of monitoring.
    let hours = if a.short { 2 } else { 8 };
    stage(
        5,
        total,
        &format!(
            "monitoring a shift of {hours} h from {} (salt varies, the window slowly fouls)",
            fmt_time(SHIFT_MS)
        ),
    );
    println!("    CAUTION (real lines): mount or clean the sensor only with the line stopped and locked out; grain dust is explosive.");
    set_clock(&mut link, SHIFT_MS)?;
    let line = Scenario {
        noise_codes: 2.0,
        ..air_bench
    };
    let minutes = hours * 60;
    let buildup_mm: f32 = std::env::var("FRINGE_DEMO_BUILDUP_MM")
        .ok()
        .and_then(|v| v.parse().ok())
        .unwrap_or(0.12);
    let state_at = |min: usize| -> (bool, SynthSample<f32>, f32) {
        let t = min as f32 / 60.0;
        let m = 14.3 + 0.9 * (std::f32::consts::TAU * t / 3.0).sin();
        let salt = 0.04 + 0.10 * (0.5 + 0.5 * (std::f32::consts::TAU * t / 5.0 + 1.0).sin());
        let temp = 24.0 + 4.0 * (std::f32::consts::TAU * t / 8.0).sin();
        // Dried residue builds up on the window over the shift (invented
        // amount; a thin layer in series with the lossy product matters).
        let buildup = buildup_mm * min as f32 / minutes as f32;
        let empty = min % 60 >= 55;
        (
            empty,
            SynthSample {
                moisture_pct: m,
                temperature_c: temp,
                water_sigma25_s_m: salt,
            },
            buildup,
        )
    };
    let apply = |sim: &SimHandle, min: usize| {
        let (empty, s, buildup) = state_at(min);
        let mut sc = product_scenario(line, s);
        sc.product_present = !empty;
        sc.buildup_mm = buildup;
        sim.lock().set_scenario(sc);
    };
    apply(&sim, 0);
    link.request(Request::StartStream { period_ms: 60_000 })?;
    let bar = if std::io::stderr().is_terminal() {
        ProgressBar::new(minutes as u64).with_style(
            ProgressStyle::with_template("    {bar:40} {pos}/{len} readings {msg}")
                .unwrap_or_else(|_| ProgressStyle::default_bar()),
        )
    } else {
        ProgressBar::hidden()
    };
    let mut got = 0usize;
    let mut lab_count = 0usize;
    let lab_every = if a.short { 20 } else { 60 };
    let mut batch = Vec::new();
    while got < minutes {
        let Some(frame) = link.next_frame(std::time::Duration::from_secs(10))? else {
            bail!("the simulated device stopped streaming after {got} readings");
        };
        let DeviceFrame::Reading(r) = frame else {
            continue;
        };
        got += 1;
        batch.push(r);
        if batch.len() >= 30 {
            store.insert_readings(SERIAL, &batch, Source::Stream)?;
            batch.clear();
        }
        bar.inc(1);
        if got.is_multiple_of(30) {
            if let Response::RefCheck(rc) = link.request(Request::ReferenceCheck)? {
                store.insert_reference_check(SERIAL, r.time_ms as i64, &rc)?;
            }
        }
        if got % lab_every == lab_every / 2 {
            let (_, s, _) = state_at(got - 1);
            let lab = f64::from(s.moisture_pct) + 0.1 * rng.sample::<f64, _>(StandardNormal);
            store.insert_readings(SERIAL, &batch, Source::Stream)?;
            batch.clear();
            lab_count += 1;
            // The lab's result is entered 40 min after the grab.
            store.set_record_clock(Some(r.time_ms as i64 + 40 * 60_000));
            store.insert_lab_sample(
                SERIAL,
                &NewLabSample {
                    sample_id: format!("G-{:04}", 410 + lab_count),
                    taken_unix_ms: r.time_ms as i64,
                    product: Some(PRODUCT.into()),
                    lab_moisture_pct: (lab * 100.0).round() / 100.0,
                    basis: "wet".into(),
                    method: Some("oven 130 C 2 h, ground".into()),
                    reading: Some(r.seq),
                    note: Some("operator: J. Lindqvist (shift)".into()),
                    supersedes: None,
                },
            )?;
            bar.set_message(format!(
                "lab grab sample {lab_count}: {lab:.2} % vs inline {:.2} %",
                r.moisture_pct.unwrap_or(f32::NAN)
            ));
        }
        apply(&sim, got);
    }
    store.insert_readings(SERIAL, &batch, Source::Stream)?;
    link.request(Request::StopStream)?;
    bar.finish_and_clear();
    println!(
        "    {got} readings stored, {} reference checks, {lab_count} lab grab samples",
        got / 30
    );

    // 6. Drift.
    stage(6, total, "drift monitors (EWMA and CUSUM) on the reference check, lab residuals, empty-line baseline, temperature");
    let data = analysis::load(&store, Some(SERIAL))?;
    let traces = data.traces();
    let mut out = std::io::stdout().lock();
    let alarms = views::write_drift(&data, &traces, &mut out)?;
    drop(out);
    std::fs::write(
        dir.join("drift.svg"),
        views::drift_svg(&traces)? + views::SVG_MARK,
    )?;
    // The lab residual alarm asks for a bias adjustment: the bias and slope
    // tests on the shift's grab samples, and the corrected calibration
    // (written beside the first, not pushed: the engineer decides).
    println!("  bias and slope of {PRODUCT} against the shift's lab grab samples (`fringe cal adjust --db`):");
    let adj = cal::AdjustOptions {
        cal: outs.product.clone(),
        out: outs.adjusted.clone(),
        correct: cal::AdjustCorrection::Auto,
        alpha: 0.05,
    };
    let (pfile, _) = ProductFile::load(&outs.product)?;
    let pairs = cal::pairs_from_line(&data, &pfile.id, &outs.db);
    match cal::adjust(&adj, pairs, (SHIFT_MS / 1000) as u64 + hours as u64 * 3600) {
        Ok(o) => cal::write_adjust(&adj, &o, false, &mut std::io::stdout().lock())?,
        Err(e) => println!("  no bias check: {e:#}"),
    }

    // 7. Audit bundle.
    stage(
        7,
        total,
        "exporting the shift as an audit bundle and verifying it against the database",
    );
    drop(store);
    let ro = Store::open_read_only(&outs.db)?;
    let end = SHIFT_MS + hours as i64 * 3_600_000 + 120_000;
    let s = audit::export(
        &ro,
        &outs.db.display().to_string(),
        Some(SHIFT_MS),
        end,
        &outs.bundle,
    )?;
    views::write_export(&s, &mut std::io::stdout().lock())?;
    let rep = audit::verify(Some(&outs.bundle), Some(&ro))?;
    views::write_verify(
        &rep,
        Some(&outs.bundle),
        Some(&outs.db),
        &mut std::io::stdout().lock(),
    )?;

    // 8. Report.
    stage(8, total, "writing the report");
    let page = views::write_report(
        &ro,
        Some(SERIAL),
        Some(&format!("{PLANT}, {LINE}: {SERIAL}")),
        &dir.join("report"),
    )?;
    println!("    {}", page.display());

    stage(
        9,
        total,
        &format!("done in {:.1} s", started.elapsed().as_secs_f64()),
    );
    print_outputs(&outs);
    Ok(DemoOutputs {
        alarms,
        bundle_ok: rep.ok(),
        ..outs
    })
}

fn print_outputs(o: &DemoOutputs) {
    let drift = o.dir.join("drift.svg");
    let rows: [(&str, &Path); 8] = [
        ("database (hash-chained)", &o.db),
        ("reference samples", &o.samples),
        ("product calibration", &o.product),
        ("fit plots", &o.fit_plot),
        ("audit bundle", &o.bundle),
        ("report (open in a browser)", &o.report),
        ("drift charts", &drift),
        ("device key (demo only)", &o.key),
    ];
    println!("outputs:");
    for (what, p) in rows {
        println!("  {what:<28} {}", p.display());
    }
    println!(
        "next: fringe drift --db {} ; fringe audit verify {} --db {}",
        o.db.display(),
        o.bundle.display(),
        o.db.display()
    );
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn short_demo_runs_end_to_end_and_its_bundle_verifies() {
        let dir = tempfile::tempdir().expect("dir");
        let out = dir.path().join("demo");
        let o = run(&DemoArgs {
            out: out.clone(),
            short: true,
            seed: 2026,
        })
        .expect("demo runs");
        assert!(o.bundle_ok, "the demo's own check passed");
        for p in [
            &o.db,
            &o.samples,
            &o.product,
            &o.fit_plot,
            &o.report,
            &o.key,
        ] {
            assert!(p.exists(), "{} written", p.display());
        }
        // Checked again here with the same verifier the demo uses (a
        // consistency check of what the demo printed; the independent reader
        // of the bundle is `demo_bundle_verifies_with_an_independent_reader`
        // in tests/tests/outside.rs).
        let store = Store::open_read_only(&o.db).expect("db");
        let r = audit::verify(Some(&o.bundle), Some(&store)).expect("verify");
        assert!(r.ok(), "{:?}", r.problems);
        assert!(r.records_checked > 100, "{}", r.records_checked);
        // The fouling window is flagged by at least one monitor.
        assert!(o.alarms >= 1, "drift flagged");
        let html = std::fs::read_to_string(&o.report).expect("report");
        assert!(html.contains("<svg") && html.contains("Calibrations in force"));
        // The calibration in the file is what the device holds.
        let (f, wire) = ProductFile::load(&o.product).expect("product file");
        assert_eq!(f.id, wire.content_id().to_string());
    }
}
