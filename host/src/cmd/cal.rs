//! `fringe cal fit`, `cal predict`, `cal adjust`: the command lines, and
//! the files and output around `fringe_quality::cal`.

pub use crate::cli::cal::{AdjustArgs, AdjustCorrectionArg, FitArgs, FitModelArg, PredictArgs};
use std::io::Write as _;
use std::path::Path;

use anyhow::Context as _;
use fringe_quality::cal::{self, AdjustCorrection, AdjustOptions, FitModel, FitOptions};
use fringe_quality::files;

impl From<FitModelArg> for FitModel {
    fn from(m: FitModelArg) -> Self {
        match m {
            FitModelArg::Single => FitModel::Single,
            FitModelArg::Relaxation => FitModel::Relaxation,
            FitModelArg::Multivariate => FitModel::Multivariate,
            FitModelArg::Pls => FitModel::Pls,
            FitModelArg::Compare => FitModel::Compare,
        }
    }
}

impl FitArgs {
    /// The library's options.
    pub fn options(&self) -> FitOptions {
        FitOptions {
            samples: self.samples.clone(),
            model: self.model.into(),
            out: self.out.clone(),
            name: self.name.clone(),
            bulk_density_kg_m3: self.bulk_density_kg_m3,
            particle_density_kg_m3: self.particle_density_kg_m3,
            density_input: self.density_input,
            degree: self.degree,
            folds: self.folds,
            eps_sd: self.eps_sd,
            basis: self.basis.clone(),
            force: self.force,
        }
    }
}

/// `out` (given to `flag`) is none of `inputs` (the files the command
/// reads or writes besides, with their flags).
///
/// # Errors
/// [`crate::exit::UsageError`]: nothing is written.
fn not_one_of(out: &Path, flag: &str, inputs: &[(&Path, &str)]) -> anyhow::Result<()> {
    let same = |a: &Path, b: &Path| match (a.canonicalize(), b.canonicalize()) {
        (Ok(x), Ok(y)) => x == y,
        _ => a == b,
    };
    match inputs.iter().find(|(input, _)| same(out, input)) {
        Some((_, input_flag)) => Err(crate::exit::UsageError(format!(
            "{flag} {} is also the file of {input_flag}: one would replace the other; nothing written (choose another name)",
            out.display()
        ))
        .into()),
        None => Ok(()),
    }
}

/// A product calibration file may be written to `out` (`flag` names it in
/// the refusal): it does not exist, or it is a product calibration file
/// fringe wrote (its first line), never a table, a report or a file of the
/// plant's; and it is none of `inputs`.
///
/// # Errors
/// [`crate::exit::UsageError`]: nothing is written.
fn may_write_product(out: &Path, flag: &str, inputs: &[(&Path, &str)]) -> anyhow::Result<()> {
    not_one_of(out, flag, inputs)?;
    let Ok(meta) = std::fs::symlink_metadata(out) else {
        return Ok(());
    };
    if meta.file_type().is_symlink() {
        return Err(crate::exit::UsageError(format!(
            "{flag} {}: is a symbolic link; nothing written (give the file it points to, or another name)",
            out.display()
        ))
        .into());
    }
    let ours = meta.is_file()
        && std::fs::read(out).is_ok_and(|b| b.starts_with(b"# Fringe product calibration ("));
    if ours {
        Ok(())
    } else {
        Err(crate::exit::UsageError(format!(
            "{flag} {}: exists and is not a product calibration file fringe wrote; nothing written (choose another name, or move that file)",
            out.display()
        ))
        .into())
    }
}

/// `cal predict --out`: a file there is replaced only where it is one
/// `cal predict` wrote (its CSV header, or its JSON); any other is left as
/// it is (found by review: a lab's reference table given as --out was
/// replaced without a word).
fn may_replace_predictions(out: &Path) -> anyhow::Result<()> {
    let Ok(meta) = std::fs::symlink_metadata(out) else {
        return Ok(());
    };
    let ours = meta.is_file()
        && std::fs::read(out).is_ok_and(|b| {
            // (Also the header before `cal_id` was added, last.)
            let header = cal::PREDICT_COLUMNS.join(",");
            let before = cal::PREDICT_COLUMNS[..cal::PREDICT_COLUMNS.len() - 1].join(",");
            let first = b.split(|c| *c == b'\n').next().unwrap_or(&[]);
            let first = first.strip_suffix(b"\r").unwrap_or(first);
            first == header.as_bytes()
                || first == before.as_bytes()
                || serde_json::from_slice::<serde_json::Value>(&b)
                    .is_ok_and(|v| v.get("rows").is_some() && v.get("confidence").is_some())
        });
    if ours {
        Ok(())
    } else {
        Err(crate::exit::UsageError(format!(
            "--out {}: exists and is not a table of predictions fringe wrote; nothing written (choose another name, or move that file)",
            out.display()
        ))
        .into())
    }
}

fn now_s() -> u64 {
    (fringe_store::now_unix_ms() / 1000).max(0) as u64
}

/// `fringe cal fit`: fit, then write the file (and plot) only when all went well.
///
/// # Errors
/// As `fringe_quality::cal::fit`, or a failed write.
pub fn run_fit(args: &FitArgs) -> anyhow::Result<()> {
    if let (Some(b), Some(p)) = (args.bulk_density_kg_m3, args.particle_density_kg_m3) {
        if b >= p {
            return Err(crate::exit::UsageError(format!(
                "--bulk-density-kg-m3 {b} must be below --particle-density-kg-m3 {p}: the bulk holds air between the particles (a wet sand, say, about 1650 in bulk, 2650 the quartz grains)"
            ))
            .into());
        }
    }
    may_write_product(&args.out, "--out", &[(&args.samples, "--samples")])?;
    if let Some(p) = &args.plot {
        fringe_quality::views::may_replace(p, "--plot")?;
        not_one_of(
            p,
            "--plot",
            &[(&args.samples, "--samples"), (&args.out, "--out")],
        )?;
    }
    let o = cal::fit(&args.options(), now_s())?;
    let plot = match &args.plot {
        Some(_) => Some(cal::fit_plot(&o, &args.samples)?),
        None => None,
    };
    // The plot beside its final name first, so that a failed write leaves
    // neither file.
    let plot_part = match (&args.plot, plot) {
        (Some(p), Some(svg)) => Some((
            files::stage(p, (svg + fringe_quality::views::SVG_MARK).as_bytes())
                .with_context(|| format!("writing {}", p.display()))?,
            p,
        )),
        _ => None,
    };
    // (A failed save drops the staged plot, which removes it.)
    o.file.save(&args.out)?;
    if let Some((staged, p)) = plot_part {
        staged
            .commit()
            .with_context(|| format!("writing {}", p.display()))?;
    }
    if args.json {
        crate::out::json(&cal::outcome_json(&o, &args.out))?;
        return Ok(());
    }
    let mut w = std::io::stdout().lock();
    cal::write_fit_summary(&o, &args.out, args.plot.as_deref(), &mut w)?;
    Ok(())
}

/// `fringe cal predict`.
///
/// # Errors
/// As `fringe_quality::cal::predict`, or a failed write.
pub fn run_predict(args: &PredictArgs) -> anyhow::Result<()> {
    if let Some(out) = &args.out {
        not_one_of(
            out,
            "--out",
            &[(&args.input, "--input"), (&args.cal, "--cal")],
        )?;
        may_replace_predictions(out)?;
    }
    let rows = cal::predict(&args.cal, &args.input, args.eps_sd, args.confidence)?;
    if args.json {
        let v = cal::predictions_json(&rows, args.confidence);
        match &args.out {
            Some(p) => files::replace_with(p, |f| writeln!(f, "{v}"))
                .with_context(|| format!("writing {}", p.display()))?,
            None => crate::out::json(&v)?,
        }
        return Ok(());
    }
    match &args.out {
        Some(p) => files::replace_with(p, |f| {
            cal::write_predictions(f, &rows).map_err(std::io::Error::other)
        })
        .with_context(|| format!("writing {}", p.display()))?,
        None => cal::write_predictions(std::io::stdout().lock(), &rows)?,
    }
    match cal::against_lab(&rows) {
        Some(Ok(s)) => eprintln!(
            "against moisture_pct of {} samples: SEP {:.3} %, bias {:+.3} % (predicted - lab)",
            s.n, s.sep, s.bias
        ),
        Some(Err(e)) => eprintln!("against moisture_pct: no statistics ({e})"),
        None => {}
    }
    let failed = rows.iter().filter(|r| r.moisture_pct.is_none()).count();
    if failed > 0 {
        eprintln!("{failed} sample(s) gave no moisture (see their flags)");
    }
    Ok(())
}

impl From<AdjustCorrectionArg> for AdjustCorrection {
    fn from(c: AdjustCorrectionArg) -> Self {
        match c {
            AdjustCorrectionArg::Auto => AdjustCorrection::Auto,
            AdjustCorrectionArg::Bias => AdjustCorrection::Bias,
            AdjustCorrectionArg::BiasSlope => AdjustCorrection::BiasSlope,
        }
    }
}

impl AdjustArgs {
    /// The library's options.
    pub fn options(&self) -> AdjustOptions {
        AdjustOptions {
            cal: self.cal.clone(),
            out: self.out.clone(),
            correct: self.correct.into(),
            alpha: self.alpha,
        }
    }
}

/// `fringe cal adjust`: tests, prints, and writes the corrected calibration
/// when a correction applies.
///
/// # Errors
/// Bad files, too few pairs, a database failure, or a write failure.
pub fn run_adjust(args: &AdjustArgs) -> anyhow::Result<()> {
    let mut inputs = vec![(args.cal.as_path(), "--cal")];
    if let Some(p) = &args.pairs {
        inputs.push((p.as_path(), "--pairs"));
    }
    may_write_product(&args.out, "--out", &inputs)?;
    let opts = args.options();
    let (file, _) = fringe_quality::product_file::ProductFile::load(&args.cal)?;
    let pairs = match (&args.pairs, &args.db) {
        (Some(p), _) => cal::pairs_from_csv(p, &args.cal)?,
        (None, Some(db)) => {
            let store = crate::store::AnyStore::open_read_only(db)?;
            let data = fringe_quality::analysis::load(store.get(), args.serial.as_deref())?;
            cal::pairs_from_line(&data, &file.id, store.get().path())
        }
        (None, None) => anyhow::bail!("give the lab pairs with --pairs FILE.csv or --db FILE"),
    };
    let o = cal::adjust(&opts, pairs, now_s())?;
    cal::write_adjust(&opts, &o, args.json, &mut std::io::stdout().lock())?;
    Ok(())
}
