//! Reference samples captured from a connected device (`fringe cal
//! capture`): each sample's permittivities at both frequencies and its
//! temperature, with the id and lab moisture the person types.

use std::path::{Path, PathBuf};

use fringe_link::{Link, LinkError};
use fringe_quality::samples::{
    merge_samples, parse_samples, read_samples, write_samples, Basis, MoistureColumn, RefSample,
    SampleError,
};
use std::io::Write as _;

use crate::guide::{Cancelled, Guide};
use crate::measure::averaged_reading;

/// Why a capture stopped (the samples captured before are in the file).
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum CaptureError {
    /// The link failed.
    #[error("{0}")]
    Link(#[from] LinkError),
    /// The person stopped.
    #[error("{0}")]
    Cancelled(#[from] Cancelled),
    /// The device reports no permittivity (its cell is not calibrated).
    #[error("the device reports no permittivity: calibrate the cell first (fringe cal cell)")]
    NoPermittivity,
    /// The existing table is not a sample table.
    #[error("{0}")]
    Samples(#[from] SampleError),
    /// The table to add to holds rows on another basis (or that are no
    /// sample table): said before anything is measured.
    #[error("{source}; nothing was captured: capture into another --out (or, for rows on another basis, on that table's basis with --basis)")]
    Existing {
        /// Why the table cannot take this capture's rows.
        #[source]
        source: SampleError,
    },
    /// The table could not be written.
    #[error("writing {path}: {source}")]
    Write {
        /// File.
        path: PathBuf,
        /// What the system said.
        source: std::io::Error,
    },
}

/// One captured sample: `n` averaged readings' permittivities and temperature.
///
/// # Errors
/// [`CaptureError`]: link errors, or an uncalibrated cell (NaN permittivity).
pub fn capture_sample(
    link: &mut Link,
    id: &str,
    moisture_pct: Option<f64>,
    n: u32,
) -> Result<RefSample, CaptureError> {
    let ident = link.identity().cloned().ok_or(LinkError::Unexpected {
        request: "Identify",
        got: "no identity".into(),
    })?;
    let (_, eps, t, _) = averaged_reading(link, n)?;
    if eps.iter().any(|e| !e.re.is_finite() || !e.im.is_finite()) {
        return Err(CaptureError::NoPermittivity);
    }
    Ok(RefSample {
        sample_id: id.to_string(),
        moisture_pct,
        temperature_c: t,
        freqs_hz: [f64::from(ident.freqs_hz[0]), f64::from(ident.freqs_hz[1])],
        eps_re: [eps[0].re, eps[1].re],
        eps_im: [eps[0].im.max(0.0), eps[1].im.max(0.0)],
        bulk_density_kg_m3: None,
        moisture_basis: None,
        line: 0,
    })
}

/// Asks for each sample's id and lab moisture (on `basis`) and captures
/// it, until an empty id; every sample is saved to `out` as it is taken.
///
/// # Errors
/// [`CaptureError`].
pub fn capture(
    link: &mut Link,
    out: &Path,
    readings: u32,
    basis: Basis,
    guide: &mut dyn Guide,
) -> Result<usize, CaptureError> {
    let (words, max) = match basis {
        Basis::Wet => ("wet", 100.0),
        Basis::Dry => ("dry", fringe_quality::samples::MAX_DRY_BASIS_PCT),
    };
    // The table added to is read on this capture's basis now, not after
    // the first sample: one it cannot take (rows on the other basis, a
    // wet-basis value of 100 % or more) is refused before anything is
    // measured, so no measured sample is lost to it. A sample id already
    // in it is asked again, as one captured in this run is: a new capture
    // would replace the row, and its lab value with it.
    let mut existing: Vec<String> = Vec::new();
    if out.exists() {
        existing = read_samples(out, MoistureColumn::Optional, basis)
            .map_err(|source| CaptureError::Existing { source })?
            .samples
            .into_iter()
            .map(|s| s.sample_id)
            .collect();
    }
    let mut rows: Vec<RefSample> = Vec::new();
    while let Some(id) = guide.ask("sample id (empty to finish):")? {
        if rows.iter().any(|r| r.sample_id == id) {
            guide.show(&format!("sample id {id} already captured; use another"));
            continue;
        }
        if existing.contains(&id) {
            guide.show(&format!(
                "sample id {id} is already in {}; use another (capturing it again would replace its row and lab value)",
                out.display()
            ));
            continue;
        }
        let m = guide.ask(&format!(
            "lab moisture, % {words} basis (empty to fill in later):"
        ))?;
        let m = match m.map(|s| s.parse::<f64>()) {
            Some(Ok(v)) if (0.0..max).contains(&v) => Some(v),
            Some(_) => {
                guide.show(&format!(
                    "not a moisture in % {words} basis (0 to below {max}); left empty, fill it in the CSV later"
                ));
                None
            }
            None => None,
        };
        guide.step(&format!("place sample {id} in front of the window (fill the sample cup level, same packing as on the line)"))?;
        let s = RefSample {
            // Written beside the value, so that a fit on another basis is
            // refused rather than taking it as on its own.
            moisture_basis: Some(basis),
            ..capture_sample(link, &id, m, readings)?
        };
        guide.show(&format!(
            "  {id}: {:.1} C, eps1 {:.3} - j{:.3}, eps2 {:.3} - j{:.3}",
            s.temperature_c, s.eps_re[0], s.eps_im[0], s.eps_re[1], s.eps_im[1]
        ));
        rows.push(s);
        save_rows(out, &rows, basis)?;
    }
    Ok(rows.len())
}

/// Writes the captured rows into the table at `path` (a new one where
/// there is none): after the rows it has, which are kept as they were
/// written, with the columns of the plant's own (samples::merge_samples; a
/// row of the same sample id is replaced). The file is written whole
/// through a temporary file, so an interruption loses nothing.
///
/// # Errors
/// [`CaptureError`]: a failed write, or an existing file that is not a
/// sample table.
pub fn save_rows(path: &Path, rows: &[RefSample], basis: Basis) -> Result<(), CaptureError> {
    let text = if path.exists() {
        let old = std::fs::read(path).map_err(|e| SampleError::Io {
            file: path.to_path_buf(),
            reason: e.to_string(),
        })?;
        // On the capture's basis: a table whose rows say another one (or
        // hold wet-basis values of 100 % and more) is refused, not mixed.
        parse_samples(path, &old, MoistureColumn::Optional, basis)?;
        merge_samples(path, &old, rows)?
    } else {
        let mut new = Vec::new();
        write_samples(&mut new, rows).map_err(|source| CaptureError::Write {
            path: path.to_path_buf(),
            source,
        })?;
        new
    };
    let tmp = path.with_extension("csv.part");
    let mut f = std::fs::File::create(&tmp).map_err(|source| CaptureError::Write {
        path: tmp.clone(),
        source,
    })?;
    // On the disk before it takes the table's name.
    if let Err(source) = f.write_all(&text).and_then(|()| f.sync_all()) {
        let _ = std::fs::remove_file(&tmp);
        return Err(CaptureError::Write { path: tmp, source });
    }
    std::fs::rename(&tmp, path).map_err(|source| {
        let _ = std::fs::remove_file(&tmp);
        CaptureError::Write {
            path: path.to_path_buf(),
            source,
        }
    })
}
