//! Reference samples captured from a connected device (`fringe cal
//! capture`): each sample's permittivities at both frequencies and its
//! temperature, with the id and lab moisture the person types.

use std::path::{Path, PathBuf};

use fringe_link::{Link, LinkError};
use fringe_quality::samples::{
    merge_samples, parse_samples, write_samples, Basis, MoistureColumn, RefSample, SampleError,
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
    /// A sample was measured but the table could not take it (changed
    /// meanwhile so that it no longer reads, say, or the disk full): the
    /// sample is kept in a file of its own beside it, or where that failed
    /// too, its values are in the message.
    #[error("sample {id} was measured, but {} could not take it: {source}; {kept}", table.display())]
    Unsaved {
        /// The sample's id.
        id: String,
        /// The table.
        table: PathBuf,
        /// Where the sample is kept instead, in words.
        kept: String,
        /// Why the table could not take it.
        #[source]
        source: Box<CaptureError>,
    },
    /// A reading of the sample carried a flag that questions it (or no
    /// temperature): nothing saved.
    #[error("sample {id}: not saved: the device flags its readings {flags}; check the sample is in place against the window (and the sensor), then capture it again")]
    Questioned {
        /// The sample id.
        id: String,
        /// The flags, in words.
        flags: String,
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

/// Flags that keep a reading out of a reference sample.
pub const CAPTURE_UNUSABLE: fringe_protocol::Flags = fringe_protocol::Flags::NO_PRODUCT
    .union(fringe_protocol::Flags::SATURATED)
    .union(fringe_protocol::Flags::ELECTRODE_FAULT)
    .union(fringe_protocol::Flags::TEMP_SENSOR_FAULT)
    .union(fringe_protocol::Flags::LOW_SNR)
    .union(fringe_protocol::Flags::REFERENCE_DRIFT);

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
    let (_, eps, t, flags) = averaged_reading(link, n)?;
    if eps.iter().any(|e| !e.re.is_finite() || !e.im.is_finite()) {
        return Err(CaptureError::NoPermittivity);
    }
    // A reading of the window with no sample in front of it, or one the
    // device itself questions, is not a reference sample (found by review:
    // Enter pressed before the cup was in place saved the air against the
    // lab value typed; a failed temperature sensor wrote an empty cell the
    // next capture refused its own table for).
    let questioned = flags & CAPTURE_UNUSABLE;
    if !questioned.is_empty() || !t.is_finite() {
        return Err(CaptureError::Questioned {
            id: id.to_string(),
            flags: if questioned.is_empty() {
                "temperature not a number".into()
            } else {
                questioned.names().collect::<Vec<_>>().join(", ")
            },
        });
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
    // in it is asked again, as one captured in this run is (its row and
    // lab value are not written over).
    ids_in(out, basis).map_err(|source| CaptureError::Existing { source })?;
    let mut rows: Vec<RefSample> = Vec::new();
    while let Some(id) = guide.ask("sample id (empty to finish):")? {
        if rows.iter().any(|r| r.sample_id == id) {
            guide.show(&format!("sample id {id} already captured; use another"));
            continue;
        }
        // Read again before each sample: the table may have had rows
        // added by hand since (nothing in it is written over).
        if ids_in(out, basis)?.contains(&id) {
            guide.show(&format!(
                "sample id {id} is already in {}; use another (the table keeps one row per sample, and its row and lab value stay as they are)",
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
        let captured = match capture_sample(link, &id, m, readings) {
            // Said, and the sample asked for again (nothing saved).
            Err(e @ CaptureError::Questioned { .. }) => {
                guide.show(&e.to_string());
                continue;
            }
            other => other?,
        };
        let s = RefSample {
            // Written beside the value, so that a fit on another basis is
            // refused rather than taking it as on its own.
            moisture_basis: Some(basis),
            ..captured
        };
        guide.show(&format!(
            "  {id}: {:.1} C, eps1 {:.3} - j{:.3}, eps2 {:.3} - j{:.3}",
            s.temperature_c, s.eps_re[0], s.eps_im[0], s.eps_re[1], s.eps_im[1]
        ));
        if let Err(e) = save_rows(out, std::slice::from_ref(&s), basis) {
            return Err(keep_aside(out, &s, basis, e));
        }
        rows.push(s);
    }
    Ok(rows.len())
}

/// A sample measured that the table `out` could not take (`why`), kept in
/// `<out>.unsaved.csv` beside it (added to what that holds), so that the
/// measurement is not lost with the table's fault.
fn keep_aside(out: &Path, s: &RefSample, basis: Basis, why: CaptureError) -> CaptureError {
    // `lab.csv` -> `lab.unsaved.csv`; any other name gets the suffix whole
    // (`lab.tsv.unsaved.csv`), so two tables never share one.
    let name = out
        .file_name()
        .map_or_else(String::new, |n| n.to_string_lossy().into_owned());
    let stem = name.strip_suffix(".csv").unwrap_or(&name);
    let aside = out.with_file_name(format!("{stem}.unsaved.csv"));
    let kept = match save_rows(&aside, std::slice::from_ref(s), basis) {
        Ok(()) => format!(
            "it is kept in {}: copy its row into the table once the table can take it",
            aside.display()
        ),
        Err(e) => format!(
            "nor could {} ({e}); note its values: lab moisture {}, {:.2} C, {:.0} Hz eps {} - j{}, {:.0} Hz eps {} - j{}",
            aside.display(),
            s.moisture_pct.map_or("none".into(), |m| format!(
                "{m} % {} basis",
                match basis {
                    Basis::Wet => "wet",
                    Basis::Dry => "dry",
                }
            )),
            s.temperature_c,
            s.freqs_hz[0],
            s.eps_re[0],
            s.eps_im[0],
            s.freqs_hz[1],
            s.eps_re[1],
            s.eps_im[1]
        ),
    };
    CaptureError::Unsaved {
        id: s.sample_id.clone(),
        table: out.to_path_buf(),
        kept,
        source: Box::new(why),
    }
}

/// The text of the table at `path`, or `None` where there is none yet
/// (no file, or one with nothing but white space in it).
fn table_text(path: &Path) -> Result<Option<Vec<u8>>, SampleError> {
    if !path.exists() {
        return Ok(None);
    }
    let text = std::fs::read(path).map_err(|e| SampleError::Io {
        file: path.to_path_buf(),
        reason: e.to_string(),
    })?;
    Ok((!text.iter().all(u8::is_ascii_whitespace)).then_some(text))
}

/// The sample ids of the table at `path` a capture adds to, read on the
/// capture's basis (a table whose rows say another one, or hold wet-basis
/// values of 100 % and more, is refused, not mixed). None for a table not
/// there yet, or a header alone (a template with the plant's own columns).
fn ids_in(path: &Path, basis: Basis) -> Result<Vec<String>, SampleError> {
    let Some(text) = table_text(path)? else {
        return Ok(Vec::new());
    };
    match parse_samples(path, &text, MoistureColumn::Optional, basis) {
        Ok(set) => Ok(set.samples.into_iter().map(|s| s.sample_id).collect()),
        // The header is complete (a column missing is said before this).
        Err(SampleError::Empty { .. }) => Ok(Vec::new()),
        Err(e) => Err(e),
    }
}

/// Adds the captured rows to the table at `path` (a new one where there is
/// none): at its end, the rows it has kept as they were written, with the
/// columns of the plant's own (`samples::merge_samples`); a row whose
/// sample id the table has is refused, nothing written over. The file is
/// written whole through a temporary file, on the disk before it takes the
/// table's name, so an interruption loses nothing.
///
/// # Errors
/// [`CaptureError`]: a failed write, an existing file that is not a sample
/// table (or not on `basis`), a sample id already in it.
pub fn save_rows(path: &Path, rows: &[RefSample], basis: Basis) -> Result<(), CaptureError> {
    let text = match table_text(path)? {
        Some(old) => {
            ids_in(path, basis)?;
            let merged = merge_samples(path, &old, rows)?;
            // What is written reads back whole, the new rows with it.
            parse_samples(path, &merged, MoistureColumn::Optional, basis)?;
            merged
        }
        None => {
            let mut new = Vec::new();
            write_samples(&mut new, rows).map_err(|source| CaptureError::Write {
                path: path.to_path_buf(),
                source,
            })?;
            new
        }
    };
    // On the disk before it takes the table's name.
    fringe_quality::files::replace_with(path, |f| f.write_all(&text)).map_err(|source| {
        CaptureError::Write {
            path: path.to_path_buf(),
            source,
        }
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    fn sample(id: &str) -> RefSample {
        RefSample {
            sample_id: id.into(),
            moisture_pct: Some(13.5),
            temperature_c: 21.0,
            freqs_hz: [1e6, 2e7],
            eps_re: [6.5, 5.0],
            eps_im: [12.0, 0.9],
            bulk_density_kg_m3: None,
            moisture_basis: Some(Basis::Wet),
            line: 0,
        }
    }

    /// A template of the plant's own (its header alone, with a column of
    /// its own) takes the first sample; a second keeps the first as it
    /// was; a sample id already in the table is refused, the table as it
    /// was; a table on the other basis is refused before anything is
    /// written.
    #[test]
    fn samples_go_into_a_template_and_nothing_is_written_over() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("lab.csv");
        let header = "sample_id,operator,moisture_pct,temperature_c,freq1_hz,eps1_re,eps1_im,freq2_hz,eps2_re,eps2_im\n";
        std::fs::write(&path, header).unwrap();
        assert_eq!(ids_in(&path, Basis::Wet).unwrap(), Vec::<String>::new());
        save_rows(&path, &[sample("A1")], Basis::Wet).unwrap();
        let one = std::fs::read_to_string(&path).unwrap();
        assert!(
            one.starts_with(&header.replace('\n', ",moisture_basis\n")),
            "{one}"
        );
        let typed = one.replacen(",,13.5,", ",J. Hale,13.5012,", 1);
        assert_ne!(typed, one, "{one}");
        std::fs::write(&path, &typed).unwrap();
        save_rows(&path, &[sample("A2")], Basis::Wet).unwrap();
        let two = std::fs::read_to_string(&path).unwrap();
        assert!(two.starts_with(&typed), "{typed}\n---\n{two}");
        assert_eq!(ids_in(&path, Basis::Wet).unwrap(), ["A1", "A2"]);
        let e = save_rows(&path, &[sample("A1")], Basis::Wet).unwrap_err();
        assert!(e.to_string().contains("sample id `A1` already used"), "{e}");
        assert_eq!(std::fs::read_to_string(&path).unwrap(), two);
        let e = save_rows(&path, &[sample("A3")], Basis::Dry).unwrap_err();
        assert!(e.to_string().contains("moisture_basis"), "{e}");
        assert_eq!(std::fs::read_to_string(&path).unwrap(), two);
    }

    /// A sample measured when the table no longer reads (saved again by a
    /// spreadsheet with semicolons while the capture ran) is kept in a file
    /// of its own beside it, and the error says where; the table is left
    /// as it is.
    #[test]
    fn a_sample_the_table_cannot_take_is_kept_beside_it() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("lab.csv");
        let broken = "sample_id;moisture_pct\nA1;13.5\n";
        std::fs::write(&path, broken).unwrap();
        let s = sample("A2");
        let why = save_rows(&path, std::slice::from_ref(&s), Basis::Wet).unwrap_err();
        let e = keep_aside(&path, &s, Basis::Wet, why).to_string();
        let aside = dir.path().join("lab.unsaved.csv");
        assert!(
            e.starts_with("sample A2 was measured, but ")
                && e.contains(&format!("it is kept in {}", aside.display())),
            "{e}"
        );
        assert_eq!(std::fs::read_to_string(&path).unwrap(), broken);
        let kept = std::fs::read_to_string(&aside).unwrap();
        assert!(
            kept.lines()
                .nth(1)
                .is_some_and(|l| l.starts_with("A2,13.5,")),
            "{kept}"
        );
    }
}
