//! `PRODUCT.toml`: a product calibration as a file a person can read.
//!
//! The file is our own format. What the device evaluates is exactly the
//! wire form [`fringe_protocol::ProductCal`] built from it (name, model,
//! basis, the flat `params` layout documented in
//! `fringe_calibration::product`, valid ranges, SEC); `id` is that wire
//! form's content id, checked on loading. `[statistics]`, `[source]` and
//! `[prediction]` are kept for people, the quality gate of `cal push` and
//! the audit trail, and do not change the id; `digest` (SHA-256 of the
//! whole file's content, written by fringe since 2026-12-05) covers them
//! too, so a hand edit of anything in the file (a statistic the gate reads,
//! a removed `gate_overridden`) is refused on loading. A file fitted before
//! has no digest, and its statistics are taken as written; one fitted since
//! without a digest is refused. The digest is a plain SHA-256: it finds an
//! edit by hand, not a forger who computes it again (the audit record of
//! `cal push` and the device's own content id are what hold then).
//!
//! ```toml
//! format = "fringe-product/1"
//! name = "HM wheat L2"          # at most 16 bytes, as the plant calls it
//! model = "relaxation"          # or "single_frequency", "multivariate"
//! basis = "wet"                 # or "dry"
//! id = "1a2b3c4d"               # content id (first 4 bytes of SHA-256 of the wire form)
//! made_unix_s = 1796000000
//! sec_pct = 0.21
//! params = [1.0, 0.05, ...]     # flat f32 layout, see fringe_calibration::product
//! moisture_pct = [8.1, 21.7]    # valid ranges
//! temperature_c = [5.2, 39.8]
//!
//! [[inputs]]                    # valid range of each model input
//! name = "eps_hf"
//! min = 3.1
//! max = 9.4
//!
//! [statistics]                  # % moisture; cross-validated unless named sec
//! n = 40
//! ...
//!
//! [source]                      # where it came from
//! samples = "lab-2026-11.csv"
//! samples_sha256 = "..."
//! outliers = []
//! freqs_hz = [1000000.0, 20000000.0]   # it holds only at these
//! ```

use std::path::{Path, PathBuf};

use fringe_protocol::{
    short_string, Basis, CalId, ModelKind, ProductCal, Range, MAX_CAL_INPUTS, MAX_CAL_PARAMS,
};
use serde::{Deserialize, Serialize};

/// Format name.
pub const FORMAT: &str = "fringe-product/1";

/// Fitted from this time on (2026-12-05T00:00Z, Unix seconds), a file
/// carries a digest: one without is refused (its digest line removed). The
/// fit time is part of the content id, so it cannot be moved back unseen.
pub const DIGESTS_SINCE_UNIX_S: u64 = 1_796_428_800;

/// Statistics kept with a calibration (% moisture).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, Default)]
pub struct Statistics {
    /// Samples.
    pub n: usize,
    /// Standard error of calibration.
    pub sec: f64,
    /// Cross-validated standard error of prediction.
    pub sep: f64,
    /// Cross-validated bias (predicted - lab).
    pub bias: f64,
    /// Slope of lab on cross-validated predicted.
    pub slope: f64,
    /// Cross-validated R^2.
    pub r2: f64,
    /// SD(lab) / SEP.
    pub rpd: f64,
    /// Cross-validation split, in words.
    pub cross_validation: String,
    /// Parameters fitted (effective ones for ridge and PLS; constant
    /// included), for the quality gate. Absent in older files.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub n_params: Option<usize>,
    /// Quality-gate refusals overridden with `--force` (at fit or push), in
    /// words; empty when the calibration passed the gate.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub gate_overridden: Vec<String>,
}

/// Where the calibration came from.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, Default)]
pub struct Source {
    /// Reference-sample file.
    pub samples: String,
    /// Its SHA-256 (hex).
    pub samples_sha256: String,
    /// Sample ids flagged as outliers (kept in the fit, listed for review).
    pub outliers: Vec<String>,
    /// The two excitation frequencies of the reference samples, Hz, lower
    /// first: the calibration holds only at these (`cal push` and `cal
    /// predict` check them). Absent in files written before it was kept.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub freqs_hz: Option<[f64; 2]>,
    /// The calibration this one was derived from (`cal adjust`), 8 hex
    /// digits; `cal push` names it in the audit record.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub parent_id: Option<String>,
    /// How it was derived from its parent, in words.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub derivation: Option<String>,
}

/// Whether two frequency pairs agree to 0.5 % (the device's own tolerance
/// for a cell calibration's frequencies).
pub fn same_freqs(a: [f64; 2], b: [f64; 2]) -> bool {
    a.iter()
        .zip(b.iter())
        .all(|(x, y)| (x / y - 1.0).abs() <= 0.005)
}

/// A frequency for people: `500 kHz`, `1 MHz`, `2.45 GHz`, `150 Hz`.
pub fn hz_label(f: f64) -> String {
    let (v, unit) = if f >= 1e9 {
        (f / 1e9, "GHz")
    } else if f >= 1e6 {
        (f / 1e6, "MHz")
    } else if f >= 1e3 {
        (f / 1e3, "kHz")
    } else {
        (f, "Hz")
    };
    // At most four significant digits, no trailing zeros.
    let s = format!("{v:.3}");
    let s = s.trim_end_matches('0').trim_end_matches('.');
    format!("{s} {unit}")
}

/// A pair of frequencies for people: `1 MHz and 20 MHz`.
pub fn freq_pair_label(f: [f64; 2]) -> String {
    format!("{} and {}", hz_label(f[0]), hz_label(f[1]))
}

/// What `cal predict` needs for a reading's prediction interval and
/// leverage (`fringe_calibration::fit::product::IntervalModel`); not part of
/// the device's calibration nor of its id.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Prediction {
    /// Feature columns of the leverage.
    pub columns: Vec<usize>,
    /// Leverage matrix over them, row-major.
    pub leverage_matrix: Vec<f64>,
    /// Residual SD of the fit, %.
    pub residual_sd: f64,
    /// SD of a new reading's error at average leverage (cross-validated RMSEP), %.
    pub interval_sd: f64,
    /// Mean leverage of the calibration samples.
    pub mean_leverage: f64,
    /// Largest leverage of the calibration samples.
    pub max_leverage: f64,
    /// Degrees of freedom of the t quantile.
    pub dof: usize,
    /// Noise SD of eps' and eps'' assumed by the fit.
    pub eps_sd: f64,
}

/// One input range.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct InputRange {
    /// Input name (with unit) as `fringe_calibration` names it.
    pub name: String,
    /// Lower bound.
    pub min: f32,
    /// Upper bound.
    pub max: f32,
}

/// The file.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ProductFile {
    /// [`FORMAT`].
    pub format: String,
    /// Product name (at most 16 bytes).
    pub name: String,
    /// `single_frequency`, `relaxation` or `multivariate`.
    pub model: String,
    /// `wet` or `dry`.
    pub basis: String,
    /// Content id of the wire form, 8 hex digits.
    pub id: String,
    /// When it was fitted, Unix seconds.
    pub made_unix_s: u64,
    /// Standard error of calibration, %.
    pub sec_pct: f32,
    /// Degrees of freedom of `sec_pct` where they are not the fit's (the
    /// statistics' samples less parameters): an adjusted calibration whose
    /// uncertainty is a line's error after the correction carries the lab
    /// pairs' (absent otherwise, and in files written before 2026-12-06).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub sec_dof: Option<usize>,
    /// Flat parameters.
    pub params: Vec<f32>,
    /// Valid moisture range, %.
    pub moisture_pct: [f32; 2],
    /// Valid temperature range, C.
    pub temperature_c: [f32; 2],
    /// Valid input ranges.
    pub inputs: Vec<InputRange>,
    /// Fit statistics.
    pub statistics: Statistics,
    /// Provenance.
    pub source: Source,
    /// Prediction intervals and leverage for `cal predict` (absent in files
    /// written before it was kept).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub prediction: Option<Prediction>,
    /// SHA-256 (hex) of everything else in the file ([`ProductFile::digest_of`]),
    /// written by [`ProductFile::to_text`]; absent in files written before
    /// 2026-12-05.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub digest: Option<String>,
}

/// A product file could not be used.
#[derive(Debug, Clone, PartialEq)]
#[non_exhaustive]
pub enum ProductFileError {
    /// Cannot read or write.
    Io {
        /// File.
        path: PathBuf,
        /// Reason.
        reason: String,
    },
    /// Not valid TOML for this format (line and column from the parser).
    Parse {
        /// File.
        path: PathBuf,
        /// Line, 1-based.
        line: usize,
        /// Column, 1-based.
        column: usize,
        /// Reason.
        reason: String,
    },
    /// Cannot be written (an output file, not an input: exit 1, or 22
    /// where the disk is full).
    Write {
        /// File.
        path: PathBuf,
        /// Reason.
        reason: String,
        /// The disk (or quota) is full.
        full: bool,
    },
    /// A field has a value this format does not allow.
    Invalid {
        /// File.
        path: PathBuf,
        /// Field.
        field: &'static str,
        /// What is wrong.
        reason: String,
    },
}

impl std::fmt::Display for ProductFileError {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self {
            ProductFileError::Io { path, reason } => write!(f, "{}: {reason}", path.display()),
            ProductFileError::Write { path, reason, .. } => {
                write!(f, "writing {}: {reason}", path.display())
            }
            ProductFileError::Parse {
                path,
                line,
                column,
                reason,
            } => {
                write!(f, "{}:{line}:{column}: {reason}", path.display())
            }
            ProductFileError::Invalid {
                path,
                field,
                reason,
            } => {
                write!(f, "{}: field `{field}`: {reason}", path.display())
            }
        }
    }
}

impl std::error::Error for ProductFileError {}

fn model_name(m: ModelKind) -> &'static str {
    match m {
        ModelKind::SingleFrequency => "single_frequency",
        ModelKind::Relaxation => "relaxation",
        ModelKind::Multivariate => "multivariate",
    }
}

impl ProductFile {
    /// The file for a wire calibration plus its statistics and source.
    pub fn from_wire(
        cal: &ProductCal,
        input_names: &[&str],
        statistics: Statistics,
        source: Source,
    ) -> Self {
        ProductFile {
            format: FORMAT.into(),
            name: cal.name.to_string(),
            model: model_name(cal.model).into(),
            basis: match cal.basis {
                Basis::Wet => "wet".into(),
                Basis::Dry => "dry".into(),
            },
            id: cal.content_id().to_string(),
            made_unix_s: cal.made_s,
            sec_pct: cal.sec_pct,
            sec_dof: None,
            params: cal.params.to_vec(),
            moisture_pct: [cal.moisture_pct.min, cal.moisture_pct.max],
            temperature_c: [cal.temperature_c.min, cal.temperature_c.max],
            inputs: cal
                .inputs
                .iter()
                .enumerate()
                .map(|(i, r)| InputRange {
                    name: input_names
                        .get(i)
                        .map_or(format!("input{i}"), |s| s.to_string()),
                    min: r.min,
                    max: r.max,
                })
                .collect(),
            statistics,
            source,
            prediction: None,
            digest: None,
        }
    }

    /// The digest of the file's content: SHA-256 of its JSON form without
    /// the digest (every field, in the struct's order; numbers in their
    /// shortest round-trip form, which the TOML text keeps).
    pub fn digest_of(&self) -> String {
        use sha2::{Digest, Sha256};
        let bare = ProductFile {
            digest: None,
            ..self.clone()
        };
        let json = serde_json::to_vec(&bare).unwrap_or_default();
        Sha256::digest(&json)
            .iter()
            .fold(String::with_capacity(64), |mut s, b| {
                use std::fmt::Write as _;
                let _ = write!(s, "{b:02x}");
                s
            })
    }

    /// The wire form the device stores and evaluates.
    ///
    /// # Errors
    /// [`ProductFileError::Invalid`] naming the field (name too long, unknown
    /// model or basis, too many params or inputs, id not matching).
    pub fn to_wire(&self, path: &Path) -> Result<ProductCal, ProductFileError> {
        let bad = |field: &'static str, reason: String| ProductFileError::Invalid {
            path: path.to_path_buf(),
            field,
            reason,
        };
        if self.format != FORMAT {
            return Err(bad(
                "format",
                format!("`{}` is not `{FORMAT}`", self.format),
            ));
        }
        if self.name.is_empty() || self.name.len() > fringe_protocol::NAME_LEN {
            return Err(bad(
                "name",
                format!("must be 1 to {} bytes", fringe_protocol::NAME_LEN),
            ));
        }
        let model = match self.model.as_str() {
            "single_frequency" => ModelKind::SingleFrequency,
            "relaxation" => ModelKind::Relaxation,
            "multivariate" => ModelKind::Multivariate,
            m => {
                return Err(bad(
                    "model",
                    format!("`{m}` is not single_frequency, relaxation or multivariate"),
                ))
            }
        };
        let basis = match self.basis.as_str() {
            "wet" => Basis::Wet,
            "dry" => Basis::Dry,
            b => return Err(bad("basis", format!("`{b}` is not wet or dry"))),
        };
        self.check_numbers(path)?;
        let params = heapless::Vec::<f32, MAX_CAL_PARAMS>::from_slice(&self.params)
            .map_err(|_| bad("params", format!("at most {MAX_CAL_PARAMS} values")))?;
        let ranges: Vec<Range> = self
            .inputs
            .iter()
            .map(|r| Range {
                min: r.min,
                max: r.max,
            })
            .collect();
        let inputs = heapless::Vec::<Range, MAX_CAL_INPUTS>::from_slice(&ranges)
            .map_err(|_| bad("inputs", format!("at most {MAX_CAL_INPUTS} ranges")))?;
        let cal = ProductCal {
            name: short_string(&self.name),
            model,
            basis,
            params,
            moisture_pct: Range {
                min: self.moisture_pct[0],
                max: self.moisture_pct[1],
            },
            temperature_c: Range {
                min: self.temperature_c[0],
                max: self.temperature_c[1],
            },
            inputs,
            sec_pct: self.sec_pct,
            made_s: self.made_unix_s,
        };
        let id = cal.content_id().to_string();
        if id != self.id {
            return Err(bad(
                "id",
                format!(
                    "the file says {} but its calibration does not give that id: it was edited by hand; fit it again (`fringe cal fit`)",
                    self.id
                ),
            ));
        }
        if self.digest.is_none() && self.made_unix_s >= DIGESTS_SINCE_UNIX_S {
            return Err(bad(
                "digest",
                "missing from a calibration fitted after fringe began writing one (2026-12-05): it was removed by hand; fit it again (`fringe cal fit`)".into(),
            ));
        }
        if let Some(d) = &self.digest {
            if *d != self.digest_of() {
                return Err(bad(
                    "digest",
                    "the file's content (its statistics, gate record, source or calibration) was changed after fringe wrote it; fit it again (`fringe cal fit`, with --force where the gate refuses it)".into(),
                ));
            }
        }
        Ok(cal)
    }

    /// Every number the device evaluates is finite, each range runs from
    /// its lower bound up, and the temperature range lies within the
    /// -40..150 C a reference sample may have: a hand edit (NaN, a huge
    /// value that overflows f32, kelvin for Celsius) is named by its field
    /// before the content id is compared, which would only say "edited".
    fn check_numbers(&self, path: &Path) -> Result<(), ProductFileError> {
        let bad = |field: &'static str, reason: String| ProductFileError::Invalid {
            path: path.to_path_buf(),
            field,
            reason,
        };
        if !self.sec_pct.is_finite() || self.sec_pct < 0.0 {
            return Err(bad(
                "sec_pct",
                format!("{} is not a finite number >= 0", self.sec_pct),
            ));
        }
        if let Some((i, v)) = self.params.iter().enumerate().find(|(_, v)| !v.is_finite()) {
            return Err(bad(
                "params",
                format!("value {} of the list is {v}, not a finite number", i + 1),
            ));
        }
        let range = |field: &'static str, [lo, hi]: [f32; 2]| {
            if lo.is_finite() && hi.is_finite() && lo <= hi {
                Ok(())
            } else {
                Err(bad(
                    field,
                    format!("[{lo}, {hi}] is not a range of finite numbers, lower first"),
                ))
            }
        };
        range("moisture_pct", self.moisture_pct)?;
        range("temperature_c", self.temperature_c)?;
        if self
            .temperature_c
            .iter()
            .any(|t| !(-40.0..=150.0).contains(t))
        {
            return Err(bad(
                "temperature_c",
                format!(
                    "[{}, {}] is not within -40..150 C (kelvin given for Celsius?)",
                    self.temperature_c[0], self.temperature_c[1]
                ),
            ));
        }
        // The device excites between about 100 kHz and 50 MHz; a pair
        // outside 1 kHz..1 GHz is a unit slip (MHz written for Hz), caught
        // here rather than as a mismatch with every reading at `cal predict`.
        if let Some(f) = self.source.freqs_hz {
            if !f.iter().all(|v| (1e3..=1e9).contains(v)) || f[0] >= f[1] {
                return Err(bad(
                    "source.freqs_hz",
                    format!(
                        "[{}, {}] is not two frequencies in Hz between 1 kHz and 1 GHz, lower first (MHz given for Hz?)",
                        f[0], f[1]
                    ),
                ));
            }
        }
        for r in &self.inputs {
            range("inputs", [r.min, r.max]).map_err(|_| {
                bad(
                    "inputs",
                    format!(
                        "input `{}`: [{}, {}] is not a range of finite numbers, lower first",
                        r.name, r.min, r.max
                    ),
                )
            })?;
        }
        Ok(())
    }

    /// The calibration's content id.
    pub fn cal_id(&self) -> String {
        self.id.clone()
    }

    /// Reads and checks a file (the wire form must build and its id match).
    ///
    /// # Errors
    /// [`ProductFileError`].
    pub fn load(path: &Path) -> Result<(ProductFile, ProductCal), ProductFileError> {
        let bytes = std::fs::read(path).map_err(|e| ProductFileError::Io {
            path: path.to_path_buf(),
            reason: e.to_string(),
        })?;
        let text = utf8_text(bytes).map_err(|(line, column, reason)| ProductFileError::Parse {
            path: path.to_path_buf(),
            line,
            column,
            reason,
        })?;
        Self::parse(path, &text)
    }

    /// Parses and checks the text of a file read from `path` (named in
    /// errors), as [`ProductFile::load`] does.
    ///
    /// # Errors
    /// [`ProductFileError::Parse`] or [`ProductFileError::Invalid`].
    pub fn parse(path: &Path, text: &str) -> Result<(ProductFile, ProductCal), ProductFileError> {
        let f: ProductFile = toml::from_str(text).map_err(|e| {
            let (line, column) = e.span().map_or((1, 1), |s| line_col(text, s.start));
            ProductFileError::Parse {
                path: path.to_path_buf(),
                line,
                column,
                reason: e.message().to_string(),
            }
        })?;
        let wire = f.to_wire(path)?;
        Ok((f, wire))
    }

    /// The text [`ProductFile::save`] writes.
    ///
    /// # Errors
    /// The TOML writer's, should a value have no TOML form.
    pub fn to_text(&self) -> Result<String, toml::ser::Error> {
        let sealed = ProductFile {
            digest: Some(self.digest_of()),
            ..self.clone()
        };
        let body = toml::to_string(&sealed)?;
        Ok(format!(
            "# Fringe product calibration ({FORMAT}). The device evaluates exactly the fields above\n\
             # [statistics]; `id` is their content id, `digest` covers the whole file (an edit is refused).\n\
             # Parameter layout: fringe_calibration::product.\n{body}"
        ))
    }

    /// Writes the file (to a temporary name first, then renamed, so a failed
    /// write leaves no half file).
    ///
    /// # Errors
    /// [`ProductFileError::Write`].
    pub fn save(&self, path: &Path) -> Result<(), ProductFileError> {
        let io = |e: std::io::Error| ProductFileError::Write {
            path: path.to_path_buf(),
            reason: e.to_string(),
            full: matches!(
                e.kind(),
                std::io::ErrorKind::StorageFull | std::io::ErrorKind::QuotaExceeded
            ),
        };
        let text = self.to_text().map_err(|e| ProductFileError::Io {
            path: path.to_path_buf(),
            reason: e.to_string(),
        })?;
        crate::files::replace(path, text.as_bytes()).map_err(io)
    }
}

/// The bytes of a text file as a string, or the line and column (1-based)
/// of the first byte that is not UTF-8 and a reason in words (a file saved
/// as Latin-1 or UTF-16 by an editor).
///
/// # Errors
/// `(line, column, reason)`.
pub fn utf8_text(bytes: Vec<u8>) -> Result<String, (usize, usize, String)> {
    String::from_utf8(bytes).map_err(|e| {
        let at = e.utf8_error().valid_up_to();
        let bytes = e.into_bytes();
        let text = String::from_utf8_lossy(&bytes[..at]);
        let (line, column) = line_col(&text, at);
        (
            line,
            column,
            format!(
                "byte 0x{:02X} is not UTF-8 text: save the file as UTF-8",
                bytes[at]
            ),
        )
    })
}

fn line_col(text: &str, at: usize) -> (usize, usize) {
    let before = text.get(..at.min(text.len())).unwrap_or(text);
    (
        before.matches('\n').count() + 1,
        before.rsplit('\n').next().map_or(0, |l| l.chars().count()) + 1,
    )
}

/// Parses an 8-hex-digit calibration id.
pub fn parse_cal_id(s: &str) -> Option<CalId> {
    u32::from_str_radix(s, 16)
        .ok()
        .filter(|_| s.len() == 8 && s.bytes().all(|b| b.is_ascii_hexdigit()))
        .map(|v| CalId(v.to_be_bytes()))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn frequencies_read_as_people_write_them() {
        assert_eq!(hz_label(1e6), "1 MHz");
        assert_eq!(hz_label(20e6), "20 MHz");
        assert_eq!(hz_label(100e3), "100 kHz");
        assert_eq!(hz_label(2.45e9), "2.45 GHz");
        assert_eq!(hz_label(433.92e6), "433.92 MHz");
        assert_eq!(hz_label(50.0), "50 Hz");
        assert_eq!(freq_pair_label([5e5, 1e7]), "500 kHz and 10 MHz");
    }

    fn wire() -> ProductCal {
        ProductCal {
            name: short_string("HM wheat L2"),
            model: ModelKind::SingleFrequency,
            basis: Basis::Wet,
            params: heapless::Vec::from_slice(&[1.0, 1.0, 20.0, 1.5, 2.0, 0.01, 0.0, -0.05])
                .expect("fits"),
            moisture_pct: Range {
                min: 8.0,
                max: 22.0,
            },
            temperature_c: Range {
                min: 5.0,
                max: 40.0,
            },
            inputs: heapless::Vec::from_slice(&[Range { min: 2.0, max: 9.0 }]).expect("fits"),
            sec_pct: 0.3,
            made_s: 1_796_000_000,
        }
    }

    #[test]
    fn round_trip_keeps_the_id() {
        let dir = std::env::temp_dir().join(format!("fringe-pf-{}", std::process::id()));
        std::fs::create_dir_all(&dir).expect("dir");
        let p = dir.join("p.toml");
        let f = ProductFile::from_wire(
            &wire(),
            &["eps_re"],
            Statistics {
                n: 12,
                ..Default::default()
            },
            Source::default(),
        );
        f.save(&p).expect("save");
        let (g, w) = ProductFile::load(&p).expect("load");
        assert_eq!(w, wire());
        assert_eq!(g.id, wire().content_id().to_string());
        // A hand edit of a parameter is caught by the id.
        let text = std::fs::read_to_string(&p)
            .expect("read")
            .replace("sec_pct = 0.3", "sec_pct = 0.2");
        std::fs::write(&p, text).expect("write");
        let e = ProductFile::load(&p).expect_err("edited").to_string();
        assert!(
            e.contains("field `id`") && e.contains("edited by hand"),
            "{e}"
        );
        std::fs::write(&p, "format = 1\n").expect("write");
        let e = ProductFile::load(&p).expect_err("bad").to_string();
        assert!(e.contains("p.toml:1:"), "{e}");
        let _ = std::fs::remove_dir_all(&dir);
    }

    /// The digest covers what the content id does not: a statistic the
    /// quality gate reads, the record of an overridden gate, the source.
    /// Each hand edit is refused by the field `digest`; a file written
    /// before digests (none in it) loads, its statistics as written.
    #[test]
    fn a_hand_edit_of_the_statistics_or_the_gate_record_is_refused() {
        let stats = Statistics {
            n: 40,
            rpd: 1.7,
            r2: 0.71,
            gate_overridden: vec!["cross-validated RPD 1.70 is below 2".into()],
            ..Default::default()
        };
        let dir = std::env::temp_dir().join(format!("fringe-pf-dg-{}", std::process::id()));
        std::fs::create_dir_all(&dir).expect("dir");
        let p = dir.join("p.toml");
        let f = ProductFile::from_wire(&wire(), &["eps_re"], stats, Source::default());
        f.save(&p).expect("save");
        let (g, _) = ProductFile::load(&p).expect("load");
        assert_eq!(g.digest.as_deref(), Some(f.digest_of().as_str()));
        let text = std::fs::read_to_string(&p).expect("read");
        let gate_line = text
            .lines()
            .find(|l| l.starts_with("gate_overridden"))
            .expect("the gate record is in the file")
            .to_string();
        for (from, to) in [
            ("rpd = 1.7", "rpd = 2.7"),
            ("r2 = 0.71", "r2 = 0.91"),
            ("n = 40", "n = 400"),
            (gate_line.as_str(), ""),
        ] {
            assert!(text.contains(from), "{from}: {text}");
            std::fs::write(&p, text.replacen(from, to, 1)).expect("write");
            let e = ProductFile::load(&p).expect_err(from).to_string();
            assert!(
                e.contains("field `digest`") && e.contains("changed after fringe wrote it"),
                "{from}: {e}"
            );
        }
        // Written before digests: no digest line, loads as written.
        let old: String = text
            .lines()
            .filter(|l| !l.starts_with("digest"))
            .map(|l| format!("{l}\n"))
            .collect();
        assert_ne!(old, text);
        std::fs::write(&p, &old).expect("write");
        let (g, _) = ProductFile::load(&p).expect("an older file");
        assert_eq!(g.digest, None);
        assert_eq!(g.statistics.rpd, 1.7);
        // Fitted since digests began, its digest line removed: refused.
        let mut late = wire();
        late.made_s = DIGESTS_SINCE_UNIX_S + 60;
        let f =
            ProductFile::from_wire(&late, &["eps_re"], Statistics::default(), Source::default());
        f.save(&p).expect("save");
        let text = std::fs::read_to_string(&p).expect("read");
        let stripped: String = text
            .lines()
            .filter(|l| !l.starts_with("digest"))
            .map(|l| format!("{l}\n"))
            .collect();
        std::fs::write(&p, stripped).expect("write");
        let e = ProductFile::load(&p).expect_err("no digest").to_string();
        assert!(
            e.contains("field `digest`") && e.contains("removed by hand"),
            "{e}"
        );
        let _ = std::fs::remove_dir_all(&dir);
    }

    /// A product file from [`wire`] with `source`, saved as `p.toml` in a
    /// fresh folder named after `tag`: (folder, file, the file's contents).
    fn saved(tag: &str, source: Source) -> (PathBuf, PathBuf, ProductFile) {
        let dir = std::env::temp_dir().join(format!("fringe-pf-{tag}-{}", std::process::id()));
        std::fs::create_dir_all(&dir).expect("dir");
        let p = dir.join("p.toml");
        let good = ProductFile::from_wire(&wire(), &["eps_re"], Statistics::default(), source);
        good.save(&p).expect("save");
        (dir, p, good)
    }

    /// Regression: a file with NaN, an f32 overflow (1e39, read as inf) or
    /// kelvin in a number the device evaluates was refused only for its
    /// content id ("edited by hand"), or accepted with a matching id; each
    /// is now named by its field.
    #[test]
    fn non_finite_and_kelvin_values_are_named_by_field() {
        let (dir, p, good) = saved("nan", Source::default());
        let text = std::fs::read_to_string(&p).expect("read");
        for (from, to, field) in [
            ("sec_pct = 0.3", "sec_pct = nan", "`sec_pct`"),
            ("sec_pct = 0.3", "sec_pct = 1e39", "`sec_pct`"),
            ("params = [1.0, 1.0", "params = [1.0, inf", "`params`"),
            (
                "temperature_c = [5.0, 40.0]",
                "temperature_c = [278.15, 313.15]",
                "`temperature_c`",
            ),
            (
                "moisture_pct = [8.0, 22.0]",
                "moisture_pct = [22.0, 8.0]",
                "`moisture_pct`",
            ),
            ("min = 2.0", "min = -inf", "`inputs`"),
        ] {
            assert!(text.contains(from), "{from} not in\n{text}");
            std::fs::write(&p, text.replace(from, to)).expect("write");
            let e = ProductFile::load(&p).expect_err(to).to_string();
            assert!(e.contains(field) && e.contains("p.toml"), "{to}: {e}");
        }
        // `to_wire` (what `cal push` builds the device's form with)
        // refuses it too.
        let mut f = good.clone();
        f.sec_pct = f32::NAN;
        assert!(f
            .to_wire(&p)
            .expect_err("nan")
            .to_string()
            .contains("`sec_pct`"));
        let _ = std::fs::remove_dir_all(&dir);
    }

    /// Regression (found by the bad-file tests): a file whose frequency
    /// pair was written in MHz loaded, and `cal predict` then refused every
    /// reading as taken at other frequencies, exit 1; the pair is now
    /// checked on load and named by its field.
    #[test]
    fn frequencies_written_in_mhz_are_named_on_load() {
        let (dir, p, _) = saved(
            "mhz",
            Source {
                freqs_hz: Some([1e6, 2e7]),
                ..Source::default()
            },
        );
        ProductFile::load(&p).expect("Hz load");
        let text = std::fs::read_to_string(&p).expect("read");
        let from = "freqs_hz = [1000000.0, 20000000.0]";
        assert!(text.contains(from), "{text}");
        for to in [
            "freqs_hz = [1.0, 20.0]",
            "freqs_hz = [20000000.0, 1000000.0]",
            "freqs_hz = [1000000.0, nan]",
        ] {
            std::fs::write(&p, text.replace(from, to)).expect("write");
            let e = ProductFile::load(&p).expect_err(to).to_string();
            assert!(
                e.contains("`source.freqs_hz`") && e.contains("p.toml"),
                "{to}: {e}"
            );
        }
        let _ = std::fs::remove_dir_all(&dir);
    }

    /// Regression: a file saved as Latin-1 or UTF-16 was refused as
    /// "stream did not contain valid UTF-8", without saying where.
    #[test]
    fn a_file_that_is_not_utf8_is_named_with_line_and_column() {
        assert_eq!(utf8_text(b"a = 1\n".to_vec()).as_deref(), Ok("a = 1\n"));
        let (line, column, reason) =
            utf8_text(b"format = \"x\"\nname = \"Gr\xfcn\"\n".to_vec()).expect_err("Latin-1");
        assert_eq!((line, column), (2, 11), "{reason}");
        assert!(
            reason.contains("0xFC") && reason.contains("UTF-8"),
            "{reason}"
        );
        let (line, column, _) = utf8_text(vec![0xFF, 0xFE, b'a', 0]).expect_err("UTF-16");
        assert_eq!((line, column), (1, 1));
    }

    #[test]
    fn cal_id_parsing() {
        assert_eq!(parse_cal_id("0000002a"), Some(CalId([0, 0, 0, 42])));
        assert_eq!(parse_cal_id("2a"), None);
        // No sign (the defect fuzzing found in the key file reader).
        assert_eq!(parse_cal_id("+000002a"), None);
    }
}
