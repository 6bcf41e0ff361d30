//! Reference-sample tables (CSV).
//!
//! A reference sample is a portion of product measured by the sensor and by
//! the lab's reference method (oven-dry; wet basis unless the calibration
//! is fitted on a dry one). The table has a header
//! row; columns may come in any order and unknown columns are kept in the
//! file but ignored here:
//!
//! | column | unit | meaning |
//! | --- | --- | --- |
//! | `sample_id` | text | unique, non-empty |
//! | `moisture_pct` | % on the calibration's basis (wet unless `--basis dry`) | lab reference value (may be empty for `cal predict`) |
//! | `temperature_c` | C | product temperature at the sensor |
//! | `freq1_hz`, `freq2_hz` | Hz | the two excitation frequencies, the same on every row, `freq1_hz < freq2_hz` |
//! | `eps1_re`, `eps1_im`, `eps2_re`, `eps2_im` | - | permittivity eps* = eps' - j eps'' at each frequency, `eps*_im` = eps'' >= 0 |
//! | `bulk_density_kg_m3` (optional) | kg/m^3 | the bulk density at the sensor where the plant measures it (a weigh belt, a gauge), 10-5000; cells may be empty |
//! | `moisture_basis` (optional) | `wet` or `dry` (also `wb`, `db`, `wet basis`, `dry basis`, any case) | the basis the lab value was given on (`cal capture` writes it); a lab value on another basis than the command's is refused, naming it; cells may be empty |
//!
//! Every error names the file and, where it has one, the line (1-based,
//! counting the header as line 1), the column (1-based) and the field.

pub use fringe_calibration::moisture::Basis;
use std::fmt;
use std::path::{Path, PathBuf};

/// Column names, in the order [`write_samples`] writes them.
pub const COLUMNS: [&str; 9] = [
    "sample_id",
    "moisture_pct",
    "temperature_c",
    "freq1_hz",
    "eps1_re",
    "eps1_im",
    "freq2_hz",
    "eps2_re",
    "eps2_im",
];

/// The optional column of the bulk density at the sensor, kg/m^3.
pub const DENSITY_COLUMN: &str = "bulk_density_kg_m3";

/// The optional column of the basis a lab value was given on (`wet`,
/// `dry`).
pub const BASIS_COLUMN: &str = "moisture_basis";

/// One reference sample.
#[derive(Debug, Clone, PartialEq)]
pub struct RefSample {
    /// Sample id.
    pub sample_id: String,
    /// Lab moisture, % on the calibration's basis (`None` when the cell was empty).
    pub moisture_pct: Option<f64>,
    /// Product temperature, C.
    pub temperature_c: f64,
    /// Excitation frequencies, Hz, lower first.
    pub freqs_hz: [f64; 2],
    /// eps' at each frequency.
    pub eps_re: [f64; 2],
    /// eps'' (>= 0) at each frequency.
    pub eps_im: [f64; 2],
    /// Bulk density at the sensor, kg/m^3, where the table gives one.
    pub bulk_density_kg_m3: Option<f64>,
    /// The basis its lab value was given on, where the table says
    /// ([`BASIS_COLUMN`]).
    pub moisture_basis: Option<Basis>,
    /// Line in the file (header is line 1).
    pub line: u64,
}

/// A validated table.
#[derive(Debug, Clone, PartialEq)]
pub struct SampleSet {
    /// Where it came from.
    pub path: PathBuf,
    /// The samples, in file order.
    pub samples: Vec<RefSample>,
    /// The common excitation frequencies, Hz.
    pub freqs_hz: [f64; 2],
    /// Whether every sample has a lab moisture.
    pub all_have_moisture: bool,
}

/// Whether the lab moisture must be present on every row.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum MoistureColumn {
    /// Needed on every row (fitting).
    Required,
    /// The column may be missing or cells empty (prediction).
    Optional,
}

/// What is wrong with a reference-sample table.
#[derive(Debug, Clone, PartialEq)]
#[non_exhaustive]
pub enum SampleError {
    /// The file could not be read.
    Io {
        /// File.
        file: PathBuf,
        /// The system's reason.
        reason: String,
    },
    /// No header, or a header and no rows.
    Empty {
        /// File.
        file: PathBuf,
    },
    /// A required column is not in the header.
    MissingColumn {
        /// File.
        file: PathBuf,
        /// Column name.
        column: &'static str,
    },
    /// A column appears twice in the header.
    DuplicateColumn {
        /// File.
        file: PathBuf,
        /// Column name.
        column: String,
    },
    /// The CSV itself is malformed (e.g. a row with the wrong number of fields).
    Malformed {
        /// File.
        file: PathBuf,
        /// Line.
        line: u64,
        /// The parser's reason.
        reason: String,
    },
    /// The header is one field holding another separator (`;`, tab): a
    /// spreadsheet's export in a locale with a decimal comma, most often.
    Separator {
        /// File.
        file: PathBuf,
        /// The separator the header seems to use.
        found: char,
    },
    /// A row has fewer or more fields than the header.
    RowLength {
        /// File.
        file: PathBuf,
        /// Line.
        line: u64,
        /// Fields on the row.
        fields: usize,
        /// Fields of the header.
        header: usize,
        /// Name of the first column with no value on a short row (or of the
        /// last column, on a long one).
        column: String,
    },
    /// A field is not a number, not finite or outside its allowed range.
    BadValue {
        /// File.
        file: PathBuf,
        /// Line.
        line: u64,
        /// Column number, 1-based.
        column: usize,
        /// Column name.
        field: &'static str,
        /// The text found.
        value: String,
        /// What was expected.
        expected: &'static str,
    },
    /// A frequency differs from the first row's.
    MixedFrequency {
        /// File.
        file: PathBuf,
        /// Line.
        line: u64,
        /// Column number, 1-based.
        column: usize,
        /// Column name.
        field: &'static str,
        /// Value found, Hz.
        value_hz: f64,
        /// Value on the first row, Hz.
        first_hz: f64,
        /// Line of the first row.
        first_line: u64,
    },
    /// A sample id appears twice.
    DuplicateId {
        /// File.
        file: PathBuf,
        /// Line of the repeat.
        line: u64,
        /// Line of the first occurrence.
        first_line: u64,
        /// The id.
        id: String,
    },
    /// Fewer samples than the model needs.
    TooFew {
        /// File.
        file: PathBuf,
        /// Samples found.
        n: usize,
        /// Samples needed (model parameters + 3).
        needed: usize,
        /// Model name.
        model: String,
    },
}

/// `text` as it goes into a message: whole up to `max_chars` characters,
/// else its start and its length (a 1 MiB cell or value is not echoed
/// whole to a terminal or a log).
pub fn shorten(text: &str, max_chars: usize) -> std::borrow::Cow<'_, str> {
    match text.char_indices().nth(max_chars) {
        None => text.into(),
        Some(_) => {
            let keep = max_chars.saturating_sub(20).max(1);
            let end = text.char_indices().nth(keep).map_or(text.len(), |(i, _)| i);
            format!("{}... ({} bytes in all)", &text[..end], text.len()).into()
        }
    }
}

impl fmt::Display for SampleError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        use SampleError::*;
        match self {
            Io { file, reason } => write!(f, "{}: cannot read: {reason}", file.display()),
            Empty { file } => write!(f, "{}: no samples (the file needs a header row and at least one data row)", file.display()),
            MissingColumn { file, column } => write!(
                f,
                "{}: line 1: missing column `{column}` (needed: {})",
                file.display(),
                COLUMNS.join(", ")
            ),
            DuplicateColumn { file, column } => {
                write!(f, "{}: line 1: column `{}` appears twice", file.display(), shorten(column, 80))
            }
            Malformed { file, line, reason } => write!(f, "{}: line {line}: {reason}", file.display()),
            Separator { file, found } => write!(
                f,
                "{}: line 1: the columns look separated by `{}`, not `,`; save the table as CSV with `,` between columns and `.` as the decimal point (a spreadsheet's text export lets you choose both)",
                file.display(),
                if *found == '\t' { "tab".to_string() } else { found.to_string() }
            ),
            RowLength { file, line, fields, header, column } if fields < header => write!(
                f,
                "{}: line {line}: {fields} fields but the header has {header}: no value for column {} ({column}) onward; a missing value needs its comma (an empty cell)",
                file.display(),
                fields + 1
            ),
            RowLength { file, line, fields, header, column } => write!(
                f,
                "{}: line {line}: {fields} fields but the header has {header} (the last is `{column}`): a comma too many, or a decimal comma? Use `.` as the decimal point",
                file.display()
            ),
            BadValue { file, line, column, field, value, expected } if value.is_empty() => write!(
                f,
                "{}: line {line}, column {column} ({field}): empty; expected {expected}",
                file.display()
            ),
            BadValue { file, line, column, field, value, expected } => write!(
                f,
                "{}: line {line}, column {column} ({field}): `{}` is not {expected}",
                file.display(),
                shorten(value, 80)
            ),
            MixedFrequency { file, line, column, field, value_hz, first_hz, first_line } => write!(
                f,
                "{}: line {line}, column {column} ({field}): {value_hz} Hz differs from {first_hz} Hz on line {first_line}; all samples must be measured at the same two frequencies",
                file.display()
            ),
            DuplicateId { file, line, first_line, id } => write!(
                f,
                "{}: line {line}, column sample_id: sample id `{}` already used on line {first_line}",
                file.display(),
                shorten(id, 80)
            ),
            TooFew { file, n, needed, model } => write!(
                f,
                "{}: {n} samples, but the {model} model needs at least {needed} (its parameters + 3)",
                file.display()
            ),
        }
    }
}

impl std::error::Error for SampleError {}

struct Cols {
    idx: [Option<usize>; 9],
}

/// Reads and validates a reference-sample table.
///
/// # Errors
/// Any [`SampleError`] except `TooFew` (see [`SampleSet::require`]): the
/// first problem found, in file order.
///
/// `basis`: the basis of the lab moisture values, the calibration's: below
/// 100 % on a wet basis, below [`MAX_DRY_BASIS_PCT`] on a dry one (wood,
/// biomass exceed 100 % on a dry basis).
pub fn read_samples(
    path: &Path,
    moisture: MoistureColumn,
    basis: Basis,
) -> Result<SampleSet, SampleError> {
    let file = path.to_path_buf();
    let text = std::fs::read(path).map_err(|e| SampleError::Io {
        file: file.clone(),
        reason: e.to_string(),
    })?;
    parse_samples(&file, &text, moisture, basis)
}

pub use fringe_calibration::moisture::MAX_DRY_BASIS_PCT;

/// The basis a command line or a record names: `"dry"`, else wet.
pub fn basis_named(name: &str) -> Basis {
    if name == "dry" {
        Basis::Dry
    } else {
        Basis::Wet
    }
}

/// Parses a table already in memory (`file` names it in errors).
///
/// # Errors
/// As [`read_samples`].
pub fn parse_samples(
    file: &Path,
    text: &[u8],
    moisture: MoistureColumn,
    basis: Basis,
) -> Result<SampleSet, SampleError> {
    let file = file.to_path_buf();
    // A table saved as UTF-16 ("Unicode text") or Latin-1 is named at its
    // first byte that is not UTF-8, with what to do, rather than by the
    // CSV reader's words.
    if std::str::from_utf8(text).is_err() {
        if let Err((line, column, reason)) = crate::product_file::utf8_text(text.to_vec()) {
            return Err(SampleError::Malformed {
                file,
                line: line as u64,
                reason: format!("column {column}: {reason} (in a spreadsheet: save as CSV UTF-8)"),
            });
        }
    }
    let mut rdr = csv::ReaderBuilder::new()
        .trim(csv::Trim::All)
        // Rows of another length are refused below, naming the column.
        .flexible(true)
        .from_reader(text);
    let malformed = |e: csv::Error, file: &PathBuf| {
        let line = e.position().map(|p| p.line()).unwrap_or(1);
        SampleError::Malformed {
            file: file.clone(),
            line,
            reason: e.to_string(),
        }
    };
    let header = rdr.headers().map_err(|e| malformed(e, &file))?.clone();
    if header.is_empty() || header.iter().all(|h| h.is_empty()) {
        return Err(SampleError::Empty { file });
    }
    if header.len() == 1 {
        let h = &header[0];
        if let Some(found) = [';', '\t', '|'].into_iter().find(|c| h.contains(*c)) {
            return Err(SampleError::Separator { file, found });
        }
    }
    let mut cols = Cols { idx: [None; 9] };
    let density_col = header
        .iter()
        .position(|h| h.eq_ignore_ascii_case(DENSITY_COLUMN));
    let basis_col = header
        .iter()
        .position(|h| h.eq_ignore_ascii_case(BASIS_COLUMN));
    for (i, h) in header.iter().enumerate() {
        // A column of this module's named twice, also in letters of
        // another case (`sample_id` and `Sample_ID`: which one holds the
        // ids?), is refused like any column named twice.
        let known = COLUMNS
            .iter()
            .chain(&[DENSITY_COLUMN, BASIS_COLUMN])
            .any(|c| c.eq_ignore_ascii_case(h));
        let same = |p: &str| p == h || (known && p.eq_ignore_ascii_case(h));
        if header.iter().take(i).any(same) && !h.is_empty() {
            return Err(SampleError::DuplicateColumn {
                file,
                column: h.to_string(),
            });
        }
        if let Some(c) = COLUMNS.iter().position(|c| c.eq_ignore_ascii_case(h)) {
            cols.idx[c] = Some(i);
        }
    }
    for (c, name) in COLUMNS.iter().enumerate() {
        if cols.idx[c].is_none() && !(c == 1 && moisture == MoistureColumn::Optional) {
            return Err(SampleError::MissingColumn { file, column: name });
        }
    }
    let mut samples: Vec<RefSample> = Vec::new();
    let mut first_freq: Option<([f64; 2], u64)> = None;
    for rec in rdr.records() {
        let rec = rec.map_err(|e| malformed(e, &file))?;
        let line = rec.position().map(|p| p.line()).unwrap_or(0);
        if rec.iter().all(|f| f.is_empty()) {
            continue; // a blank line
        }
        if rec.len() != header.len() {
            let i = rec.len().min(header.len() - 1);
            return Err(SampleError::RowLength {
                file,
                line,
                fields: rec.len(),
                header: header.len(),
                column: header.get(i).unwrap_or("").to_string(),
            });
        }
        let field = |c: usize| -> (usize, &str) {
            // Columns 0 and 2.. are present (checked above); 1 may be absent.
            cols.idx[c].map_or((0, ""), |i| (i + 1, rec.get(i).unwrap_or("")))
        };
        let bad = |c: usize, value: &str, expected: &'static str| SampleError::BadValue {
            file: file.clone(),
            line,
            column: field(c).0,
            field: COLUMNS[c],
            value: value.to_string(),
            expected,
        };
        let num = |c: usize| -> Result<f64, SampleError> {
            let (_, s) = field(c);
            let v: f64 = s.parse().map_err(|_| bad(c, s, "a number"))?;
            if !v.is_finite() {
                return Err(bad(c, s, "a finite number"));
            }
            Ok(v)
        };
        let (_, id) = field(0);
        if id.is_empty() {
            return Err(bad(0, id, "a sample id (empty)"));
        }
        if let Some(prev) = samples.iter().find(|s| s.sample_id == id) {
            return Err(SampleError::DuplicateId {
                file,
                line,
                first_line: prev.line,
                id: id.to_string(),
            });
        }
        // The basis the row's lab value was given on, where the table says:
        // a value on another basis than the command's would be fitted or
        // compared as if on it (a dry-basis 16 % taken for 16 % wet).
        let moisture_basis = match basis_col.map(|i| (i, rec.get(i).unwrap_or(""))) {
            None | Some((_, "")) => None,
            Some((i, text)) => {
                let word = text.to_ascii_lowercase();
                let bad_basis = |expected: &'static str| SampleError::BadValue {
                    file: file.clone(),
                    line,
                    column: i + 1,
                    field: BASIS_COLUMN,
                    value: text.to_string(),
                    expected,
                };
                let said = if ["wet", "wb", "w.b.", "wet basis"].contains(&word.as_str()) {
                    Basis::Wet
                } else if ["dry", "db", "d.b.", "dry basis"].contains(&word.as_str()) {
                    Basis::Dry
                } else {
                    return Err(bad_basis("wet or dry (or an empty cell)"));
                };
                // Only a lab value has a basis to disagree with (a row
                // captured before the lab was done has none yet).
                if said != basis && !field(1).1.is_empty() {
                    return Err(bad_basis(match basis {
                            Basis::Wet => "wet: the lab values are read on a wet basis here (cal fit and cal capture without --basis dry; cal predict and cal adjust with a wet-basis calibration). For a table on a dry basis give cal fit or cal capture --basis dry, or compare it with a dry-basis calibration; or convert its values, M_wb = 100 M_db / (100 + M_db), and set moisture_basis to wet",
                            Basis::Dry => "dry: the lab values are read on a dry basis here (cal fit and cal capture with --basis dry; cal predict and cal adjust with a dry-basis calibration). For a table on a wet basis leave out --basis dry, or compare it with a wet-basis calibration; or convert its values, M_db = 100 M_wb / (100 - M_wb), and set moisture_basis to dry",
                    }));
                }
                Some(said)
            }
        };
        let moisture_pct = match (field(1).1, moisture) {
            ("", MoistureColumn::Optional) => None,
            ("", MoistureColumn::Required) => {
                return Err(bad(
                    1,
                    "",
                    "the lab moisture, % on the calibration's basis, to fit with (fill in the lab's value, or leave the row out until the lab is done)",
                ));
            }
            (s, _) => {
                let v = num(1)?;
                match basis {
                    Basis::Wet if !(0.0..100.0).contains(&v) => {
                        return Err(bad(1, s, "a moisture in % wet basis, 0 <= m < 100 (lab values on a dry basis need a calibration fitted with --basis dry)"));
                    }
                    Basis::Dry if !(0.0..MAX_DRY_BASIS_PCT).contains(&v) => {
                        return Err(bad(1, s, "a moisture in % dry basis, 0 <= m < 1000"));
                    }
                    _ => {}
                }
                Some(v)
            }
        };
        let temperature_c = num(2)?;
        // Physical limits of a product at a sensor (issue 11): an input
        // error, not a sample to fit.
        if !(-40.0..=150.0).contains(&temperature_c) {
            return Err(bad(2, field(2).1, "a temperature in C between -40 and 150"));
        }
        let mut freqs_hz = [0.0; 2];
        let mut eps_re = [0.0; 2];
        let mut eps_im = [0.0; 2];
        for k in 0..2 {
            let (cf, cr, ci) = (3 + 3 * k, 4 + 3 * k, 5 + 3 * k);
            freqs_hz[k] = num(cf)?;
            // The limits a product calibration file holds its pair to
            // (`product_file`): a table in MHz is named here, at its cell,
            // not after a fit as a file `cal push` refuses.
            if !(1e3..=1e9).contains(&freqs_hz[k]) {
                return Err(bad(
                    cf,
                    field(cf).1,
                    "a frequency in Hz between 1 kHz and 1 GHz (MHz given for Hz?)",
                ));
            }
            eps_re[k] = num(cr)?;
            if eps_re[k] < 1.0 {
                return Err(bad(cr, field(cr).1, "a real permittivity >= 1"));
            }
            eps_im[k] = num(ci)?;
            if eps_im[k] < 0.0 {
                return Err(bad(
                    ci,
                    field(ci).1,
                    "a loss factor eps'' >= 0 (sign convention eps* = eps' - j eps'')",
                ));
            }
        }
        if freqs_hz[0] >= freqs_hz[1] {
            return Err(bad(6, field(6).1, "a frequency above freq1_hz"));
        }
        let bulk_density_kg_m3 =
            match density_col.map(|i| (i, rec.get(i).unwrap_or(""))) {
                None | Some((_, "")) => None,
                Some((i, text)) => {
                    let (lo, hi) = fringe_calibration::product::DENSITY_LIMITS_KG_M3;
                    match text.parse::<f64>() {
                        Ok(v) if (lo..=hi).contains(&v) => Some(v),
                        _ => return Err(SampleError::BadValue {
                            file: file.clone(),
                            line,
                            column: i + 1,
                            field: DENSITY_COLUMN,
                            value: text.to_string(),
                            expected:
                                "a bulk density in kg/m^3 between 10 and 5000 (or an empty cell)",
                        }),
                    }
                }
            };
        match first_freq {
            None => first_freq = Some((freqs_hz, line)),
            Some((f0, first_line)) => {
                for k in 0..2 {
                    if (freqs_hz[k] - f0[k]).abs() > 1e-6 * f0[k] {
                        let c = 3 + 3 * k;
                        return Err(SampleError::MixedFrequency {
                            file,
                            line,
                            column: field(c).0,
                            field: COLUMNS[c],
                            value_hz: freqs_hz[k],
                            first_hz: f0[k],
                            first_line,
                        });
                    }
                }
            }
        }
        samples.push(RefSample {
            sample_id: id.to_string(),
            moisture_pct,
            temperature_c,
            freqs_hz,
            eps_re,
            eps_im,
            bulk_density_kg_m3,
            moisture_basis,
            line,
        });
    }
    let Some((freqs_hz, _)) = first_freq else {
        return Err(SampleError::Empty { file });
    };
    let all_have_moisture = samples.iter().all(|s| s.moisture_pct.is_some());
    Ok(SampleSet {
        path: file,
        samples,
        freqs_hz,
        all_have_moisture,
    })
}

impl SampleSet {
    /// Refuses fewer than `n_params + 3` samples for `model`.
    ///
    /// # Errors
    /// [`SampleError::TooFew`].
    pub fn require(&self, n_params: usize, model: &str) -> Result<(), SampleError> {
        let needed = n_params + 3;
        if self.samples.len() < needed {
            return Err(SampleError::TooFew {
                file: self.path.clone(),
                n: self.samples.len(),
                needed,
                model: model.to_string(),
            });
        }
        Ok(())
    }
}

/// A sample's cells by column: [`COLUMNS`] (an empty `moisture_pct` where
/// unknown; numbers by [`crate::numbers`]' column rules), then
/// [`DENSITY_COLUMN`] and [`BASIS_COLUMN`] where the sample has them.
fn sample_cells(s: &RefSample) -> Vec<(&'static str, String)> {
    let values = [
        s.moisture_pct,
        Some(s.temperature_c),
        Some(s.freqs_hz[0]),
        Some(s.eps_re[0]),
        Some(s.eps_im[0]),
        Some(s.freqs_hz[1]),
        Some(s.eps_re[1]),
        Some(s.eps_im[1]),
    ];
    let mut cells = vec![(COLUMNS[0], s.sample_id.clone())];
    cells.extend(
        COLUMNS[1..]
            .iter()
            .zip(values)
            // The lab value as the lab gave it (`lab_moisture_pct`'s rule),
            // not rounded as a device reading is.
            .map(|(c, v)| {
                let rule = if *c == COLUMNS[1] {
                    "lab_moisture_pct"
                } else {
                    c
                };
                (*c, crate::numbers::cell(rule, v))
            }),
    );
    if let Some(v) = s.bulk_density_kg_m3 {
        cells.push((DENSITY_COLUMN, v.to_string()));
    }
    if let Some(b) = s.moisture_basis {
        cells.push((
            BASIS_COLUMN,
            crate::limits::LimitBasis::from(b).word().to_string(),
        ));
    }
    cells
}

/// Writes samples as CSV with the columns in [`COLUMNS`] order (an empty
/// `moisture_pct` where unknown; numbers by [`crate::numbers`]' column
/// rules), then [`DENSITY_COLUMN`] when any sample has a density and
/// [`BASIS_COLUMN`] when any says its basis.
///
/// # Errors
/// I/O errors from `out`.
pub fn write_samples<W: std::io::Write>(out: W, samples: &[RefSample]) -> std::io::Result<()> {
    let mut w = csv::Writer::from_writer(out);
    let density = samples.iter().any(|s| s.bulk_density_kg_m3.is_some());
    let basis = samples.iter().any(|s| s.moisture_basis.is_some());
    let mut header = COLUMNS.to_vec();
    if density {
        header.push(DENSITY_COLUMN);
    }
    if basis {
        header.push(BASIS_COLUMN);
    }
    w.write_record(&header)?;
    for s in samples {
        let cells = sample_cells(s);
        let row: Vec<&str> = header
            .iter()
            .map(|h| {
                cells
                    .iter()
                    .find(|(c, _)| c == h)
                    .map_or("", |(_, v)| v.as_str())
            })
            .collect();
        w.write_record(row)?;
    }
    w.flush()
}

/// The table `text` with `rows` added at its end, everything it had kept
/// as it was written: its columns in their order, columns of the plant's
/// own (notes), every field as typed (a value typed with more digits than
/// [`write_samples`] writes is not rounded), a byte order mark and CRLF
/// line ends. A sample column the rows fill and the table lacks
/// (`moisture_pct` of a table read without lab values, the density, the
/// basis) is added, empty in the rows it had. Blank lines are left out and
/// fields are quoted only where CSV needs it.
///
/// `text` is a table [`parse_samples`] reads, or its header alone (the
/// caller checks it first; a row of another length is written as it is).
///
/// # Errors
/// `text` is not CSV ([`SampleError::Malformed`], with `file` and the
/// line); a row's sample id is already in the table
/// ([`SampleError::DuplicateId`]: nothing in a table is written over).
pub fn merge_samples(file: &Path, text: &[u8], rows: &[RefSample]) -> Result<Vec<u8>, SampleError> {
    let malformed = |e: csv::Error| SampleError::Malformed {
        file: file.to_path_buf(),
        line: e.position().map(|p| p.line()).unwrap_or(1),
        reason: e.to_string(),
    };
    const BOM: &[u8] = b"\xEF\xBB\xBF";
    let crlf = text
        .iter()
        .position(|b| *b == b'\n')
        .is_some_and(|i| i > 0 && text[i - 1] == b'\r');
    let mut rdr = csv::ReaderBuilder::new().flexible(true).from_reader(text);
    let mut header = rdr.headers().map_err(malformed)?.clone();
    let col = |header: &csv::StringRecord, name: &str| {
        header
            .iter()
            .position(|h| h.trim().eq_ignore_ascii_case(name))
    };
    let cells: Vec<Vec<(&'static str, String)>> = rows.iter().map(sample_cells).collect();
    let had = header.len();
    for name in COLUMNS.iter().chain(&[DENSITY_COLUMN, BASIS_COLUMN]) {
        let used = cells
            .iter()
            .any(|c| c.iter().any(|(n, v)| n == name && !v.is_empty()));
        if used && col(&header, name).is_none() {
            header.push_field(name);
        }
    }
    let id_col = col(&header, COLUMNS[0]);
    let mut w = csv::WriterBuilder::new()
        .flexible(true)
        .terminator(if crlf {
            csv::Terminator::CRLF
        } else {
            csv::Terminator::Any(b'\n')
        })
        .from_writer(Vec::new());
    let io = |e: csv::Error| SampleError::Io {
        file: file.to_path_buf(),
        reason: format!("writing the table in memory: {e}"),
    };
    w.write_record(&header).map_err(io)?;
    for rec in rdr.records() {
        let mut rec = rec.map_err(malformed)?;
        if rec.iter().all(|f| f.trim().is_empty()) {
            continue; // a blank line, as the reader takes it
        }
        let line = rec.position().map_or(0, |p| p.line());
        let id = id_col.and_then(|i| rec.get(i)).map(str::trim);
        if let Some(r) = rows.iter().find(|r| Some(r.sample_id.as_str()) == id) {
            return Err(SampleError::DuplicateId {
                file: file.to_path_buf(),
                line,
                first_line: line,
                id: r.sample_id.clone(),
            });
        }
        if rec.len() == had {
            for _ in had..header.len() {
                rec.push_field("");
            }
        }
        w.write_record(&rec).map_err(io)?;
    }
    for c in &cells {
        let row: Vec<&str> = header
            .iter()
            .map(|h| {
                c.iter()
                    .find(|(n, _)| h.trim().eq_ignore_ascii_case(n))
                    .map_or("", |(_, v)| v.as_str())
            })
            .collect();
        w.write_record(row).map_err(io)?;
    }
    let body = w.into_inner().map_err(|e| SampleError::Io {
        file: file.to_path_buf(),
        reason: format!("writing the table in memory: {e}"),
    })?;
    Ok(if text.starts_with(BOM) {
        [BOM, &body].concat()
    } else {
        body
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    const GOOD: &str = "\
note,eps2_im,sample_id,freq1_hz,eps1_re,eps1_im,freq2_hz,eps2_re,temperature_c,moisture_pct
first,0.8,S1,1000000,6.1,12.5,20000000,4.9,21.5,12.3
,0.9,S2,1e6,6.4,13.0,2e7,5.0,22.0,13.1
";

    /// `text` read on a dry basis, every lab value required.
    fn parse_dry(text: &str) -> Result<SampleSet, SampleError> {
        parse_samples(
            Path::new("lab.csv"),
            text.as_bytes(),
            MoistureColumn::Required,
            Basis::Dry,
        )
    }

    /// `s` written by [`write_samples`] and read back (on a wet basis).
    fn written_back(s: &SampleSet) -> SampleSet {
        let mut buf = Vec::new();
        write_samples(&mut buf, &s.samples).expect("write");
        parse(std::str::from_utf8(&buf).unwrap()).unwrap()
    }

    fn parse(text: &str) -> Result<SampleSet, SampleError> {
        parse_samples(
            Path::new("lab.csv"),
            text.as_bytes(),
            MoistureColumn::Required,
            Basis::Wet,
        )
    }

    #[test]
    fn columns_in_any_order_and_unknown_ones_ignored() {
        let s = parse(GOOD).expect("valid table");
        assert_eq!(s.samples.len(), 2);
        assert_eq!(s.freqs_hz, [1e6, 2e7]);
        let a = &s.samples[0];
        assert_eq!(a.sample_id, "S1");
        assert_eq!(a.moisture_pct, Some(12.3));
        assert_eq!((a.eps_re, a.eps_im), ([6.1, 4.9], [12.5, 0.8]));
        assert_eq!(a.line, 2);
        assert_eq!(s.samples[1].line, 3);
    }

    #[test]
    fn round_trip_through_writer() {
        let s = parse(GOOD).expect("valid table");
        let mut buf = Vec::new();
        write_samples(&mut buf, &s.samples).expect("write");
        let back = parse_samples(
            Path::new("lab.csv"),
            &buf,
            MoistureColumn::Required,
            Basis::Wet,
        )
        .expect("reparse");
        for (a, b) in s.samples.iter().zip(&back.samples) {
            assert_eq!(
                (a.sample_id.as_str(), a.eps_re, a.eps_im),
                (b.sample_id.as_str(), b.eps_re, b.eps_im)
            );
        }
    }

    /// A table with a column of the plant's own and a value typed with
    /// more digits than the writer gives keeps both when a row is merged
    /// in (a rewrite from the samples dropped the one and rounded the
    /// other), takes the new row at the end, and gains the basis column it
    /// fills, empty in the rows it had. A row of a sample id the table has
    /// is refused: nothing in the table is written over.
    #[test]
    fn merged_rows_keep_the_table_as_typed() {
        // A blank line (a tab) between the rows is left out, as the reader
        // takes it (found by fuzzing: written back, a row of one field).
        let typed = GOOD.replace(",12.3\n", ",12.34567\n\t\n");
        let s = parse(&typed).expect("valid table");
        let s3 = RefSample {
            sample_id: "S3".into(),
            moisture_pct: Some(14.0),
            moisture_basis: Some(Basis::Wet),
            ..s.samples[1].clone()
        };
        let merge = |text: &str, r: &RefSample| {
            merge_samples(
                Path::new("lab.csv"),
                text.as_bytes(),
                std::slice::from_ref(r),
            )
            .map(|b| String::from_utf8(b).unwrap())
        };
        let out = merge(&typed, &s3).expect("merge");
        assert_eq!(
            out,
            "\
note,eps2_im,sample_id,freq1_hz,eps1_re,eps1_im,freq2_hz,eps2_re,temperature_c,moisture_pct,moisture_basis
first,0.8,S1,1000000,6.1,12.5,20000000,4.9,21.5,12.34567,
,0.9,S2,1e6,6.4,13.0,2e7,5.0,22.0,13.1,
,0.9000,S3,1000000,6.400,13.00,20000000,5.000,22.00,14,wet
"
        );
        let back = parse(&out).expect("merged table reads");
        assert_eq!(back.samples[0].moisture_pct, Some(12.34567));
        assert_eq!(back.samples.len(), 3);
        let again = RefSample {
            sample_id: "S2".into(),
            ..s3.clone()
        };
        assert_eq!(
            merge(&typed, &again).unwrap_err().to_string(),
            "lab.csv: line 4, column sample_id: sample id `S2` already used on line 4"
        );
        // A table read without lab values gains the column its new row
        // fills (the value typed at the capture is not lost); a byte order
        // mark and CRLF line ends (a spreadsheet's CSV) stay.
        let bare = "\u{feff}sample_id,temperature_c,freq1_hz,eps1_re,eps1_im,freq2_hz,eps2_re,eps2_im\r\nS1,21.5,1e6,6.1,12.5,2e7,4.9,0.8\r\n";
        let out = merge(bare, &s3).expect("merge");
        assert_eq!(
            out,
            "\u{feff}sample_id,temperature_c,freq1_hz,eps1_re,eps1_im,freq2_hz,eps2_re,eps2_im,moisture_pct,moisture_basis\r\n\
             S1,21.5,1e6,6.1,12.5,2e7,4.9,0.8,,\r\n\
             S3,22.00,1000000,6.400,13.00,20000000,5.000,0.9000,14,wet\r\n"
        );
    }

    /// A column named twice in letters of another case is refused: the
    /// reader took the ids from one, a writer could match the other.
    #[test]
    fn a_column_named_twice_in_another_case_is_refused() {
        let e = err(&GOOD.replacen("note,", "Sample_ID,", 1));
        assert_eq!(e, "lab.csv: line 1: column `sample_id` appears twice");
    }

    fn err(text: &str) -> String {
        parse(text).expect_err("must be refused").to_string()
    }

    /// A lab moisture of 100 % or more is possible only on a dry basis
    /// (water / dry mass: green wood chips at 60 % wet basis are 150 % dry
    /// basis, common practice, no source).
    #[test]
    fn a_dry_basis_takes_moisture_above_100() {
        let text = GOOD.replace(",12.3\n", ",150.0\n");
        let dry = parse_dry(&text).expect("dry basis");
        assert_eq!(dry.samples[0].moisture_pct, Some(150.0));
        let e = err(&text);
        assert_eq!(
            e,
            "lab.csv: line 2, column 10 (moisture_pct): `150.0` is not a moisture in % wet basis, 0 <= m < 100 (lab values on a dry basis need a calibration fitted with --basis dry)"
        );
        let e = parse_samples(
            Path::new("lab.csv"),
            GOOD.replace(",12.3\n", ",1000\n").as_bytes(),
            MoistureColumn::Required,
            Basis::Dry,
        )
        .expect_err("too wet")
        .to_string();
        assert!(e.contains("0 <= m < 1000"), "{e}");
    }

    #[test]
    fn missing_column_is_named() {
        let e = err("sample_id,moisture_pct,temperature_c,freq1_hz,eps1_re,eps1_im,freq2_hz,eps2_re\nS1,1,2,3,4,5,6,7\n");
        assert_eq!(
            e,
            format!(
                "lab.csv: line 1: missing column `eps2_im` (needed: {})",
                COLUMNS.join(", ")
            )
        );
    }

    #[test]
    fn bad_number_names_line_column_and_field() {
        let e = err(&GOOD.replace("6.4,13.0", "6.4,13,0x"));
        // Row now has 11 fields: malformed.
        assert!(e.starts_with("lab.csv: line 3"), "{e}");
        assert!(e.contains("11 fields but the header has 10"), "{e}");
        let e = err(&GOOD.replace("6.4,13.0", "6.4,thirteen"));
        assert_eq!(
            e,
            "lab.csv: line 3, column 6 (eps1_im): `thirteen` is not a number"
        );
    }

    #[test]
    fn short_row_names_the_column() {
        let e = err(&GOOD.replace(",0.9,S2,1e6,6.4,13.0,2e7,5.0,22.0,13.1", ",0.9,S2,1e6,6.4"));
        assert_eq!(
            e,
            "lab.csv: line 3: 5 fields but the header has 10: no value for column 6 (eps1_im) onward; a missing value needs its comma (an empty cell)"
        );
    }

    #[test]
    fn semicolon_separated_csv_says_so() {
        let t = GOOD.replace(',', ";");
        let e = err(&t);
        assert!(
            e.starts_with("lab.csv: line 1: the columns look separated by `;`, not `,`"),
            "{e}"
        );
        let e = err(&GOOD.replace(',', "\t"));
        assert!(e.contains("separated by `tab`"), "{e}");
    }

    #[test]
    fn nan_and_negative_loss_are_refused() {
        let e = err(&GOOD.replace("0.9,S2", "NaN,S2"));
        assert_eq!(
            e,
            "lab.csv: line 3, column 2 (eps2_im): `NaN` is not a finite number"
        );
        let e = err(&GOOD.replace("0.9,S2", "-0.2,S2"));
        assert!(
            e.starts_with(
                "lab.csv: line 3, column 2 (eps2_im): `-0.2` is not a loss factor eps'' >= 0"
            ),
            "{e}"
        );
    }

    #[test]
    fn mixed_frequencies_are_refused() {
        let e = err(&GOOD.replace("1e6,6.4", "1.1e6,6.4"));
        assert_eq!(e, "lab.csv: line 3, column 4 (freq1_hz): 1100000 Hz differs from 1000000 Hz on line 2; all samples must be measured at the same two frequencies");
    }

    #[test]
    fn duplicate_ids_are_refused() {
        let e = err(&GOOD.replace(",S2,", ",S1,"));
        assert_eq!(
            e,
            "lab.csv: line 3, column sample_id: sample id `S1` already used on line 2"
        );
    }

    #[test]
    fn empty_files_are_refused() {
        assert_eq!(
            err(""),
            "lab.csv: no samples (the file needs a header row and at least one data row)"
        );
        assert_eq!(
            err(GOOD.lines().next().expect("header")),
            "lab.csv: no samples (the file needs a header row and at least one data row)"
        );
    }

    #[test]
    fn moisture_optional_for_prediction_but_not_for_fitting() {
        let t = GOOD.replace(",12.3\n", ",\n");
        assert!(
            err(&t).contains("line 2, column 10 (moisture_pct): empty; expected the lab moisture"),
            "{}",
            err(&t)
        );
        let s = parse_samples(
            Path::new("in.csv"),
            t.as_bytes(),
            MoistureColumn::Optional,
            Basis::Wet,
        )
        .expect("ok");
        assert!(!s.all_have_moisture);
        assert_eq!(s.samples[0].moisture_pct, None);
    }

    #[test]
    fn too_few_samples_for_the_model() {
        let s = parse(GOOD).expect("valid");
        let e = s
            .require(3, "single-frequency")
            .expect_err("2 < 6")
            .to_string();
        assert_eq!(e, "lab.csv: 2 samples, but the single-frequency model needs at least 6 (its parameters + 3)");
        assert!(s.require(0, "x").is_err(), "2 samples < 0 + 3");
    }

    #[test]
    fn unreadable_file_is_named() {
        let e = read_samples(
            Path::new("/nonexistent/lab.csv"),
            MoistureColumn::Required,
            Basis::Wet,
        )
        .expect_err("missing");
        assert!(
            e.to_string()
                .starts_with("/nonexistent/lab.csv: cannot read"),
            "{e}"
        );
    }

    /// Regression: a 1 MiB cell was echoed whole in the message.
    #[test]
    fn a_huge_cell_is_not_echoed_whole() {
        let text = format!(
            "sample_id,moisture_pct,temperature_c,freq1_hz,eps1_re,eps1_im,freq2_hz,eps2_re,eps2_im\nS1,12.0,20.0,1000000,{},3.0,20000000,4.0,1.0\n",
            "x".repeat(1 << 20)
        );
        let e = parse_samples(
            Path::new("s.csv"),
            text.as_bytes(),
            MoistureColumn::Required,
            Basis::Wet,
        )
        .expect_err("not a number")
        .to_string();
        assert!(
            e.len() < 300
                && e.contains("line 2, column 5 (eps1_re)")
                && e.contains("1048576 bytes in all"),
            "{e}"
        );
    }

    /// The optional density column: read where given, empty cells are no
    /// density, a value outside 10-5000 kg/m^3 or not a number is refused
    /// naming line, column and field, and the writer keeps it.
    #[test]
    fn the_optional_density_column() {
        let head = "sample_id,moisture_pct,temperature_c,freq1_hz,eps1_re,eps1_im,freq2_hz,eps2_re,eps2_im,bulk_density_kg_m3";
        let row = "1000000,6.1,12.5,20000000,4.9,0.8";
        let s = parse(&format!(
            "{head}\nS1,12.3,21.5,{row},742.5\nS2,13.1,22.0,{row},\n"
        ))
        .expect("valid table");
        assert_eq!(s.samples[0].bulk_density_kg_m3, Some(742.5));
        assert_eq!(s.samples[1].bulk_density_kg_m3, None);
        assert_eq!(parse(GOOD).unwrap().samples[0].bulk_density_kg_m3, None);
        let back = written_back(&s);
        assert_eq!(
            back.samples
                .iter()
                .map(|s| s.bulk_density_kg_m3)
                .collect::<Vec<_>>(),
            [Some(742.5), None]
        );
        for bad in ["5", "6000", "abc", "NaN", "inf", "-700"] {
            let e = parse(&format!("{head}\nS1,12.3,21.5,{row},{bad}\n"))
                .expect_err(bad)
                .to_string();
            assert!(
                e.contains("line 2, column 10 (bulk_density_kg_m3)") && e.contains("10 and 5000"),
                "{bad}: {e}"
            );
        }
    }

    /// The optional basis column: read where given (any case; empty cells
    /// say nothing), a row on another basis than the command's refused
    /// naming line, column and what to do (a dry-basis table is not fitted
    /// as a wet one), a word other than wet or dry refused, and the
    /// writer keeps it.
    #[test]
    fn the_optional_basis_column() {
        let head = "sample_id,moisture_pct,temperature_c,freq1_hz,eps1_re,eps1_im,freq2_hz,eps2_re,eps2_im,moisture_basis";
        let row = "1000000,6.1,12.5,20000000,4.9,0.8";
        let wet = format!("{head}\nS1,12.3,21.5,{row},wet\nS2,13.1,22.0,{row},\n");
        let s = parse(&wet).expect("valid table");
        assert_eq!(s.samples[0].moisture_basis, Some(Basis::Wet));
        assert_eq!(s.samples[1].moisture_basis, None);
        let back = written_back(&s);
        assert_eq!(
            back.samples
                .iter()
                .map(|s| s.moisture_basis)
                .collect::<Vec<_>>(),
            [Some(Basis::Wet), None]
        );
        // 16.2 % dry basis taken for a wet-basis value would be 2.2 % off.
        let dry = format!("{head}\nS1,12.3,21.5,{row},\nS2,16.2,22.0,{row},DRY\n");
        let e = parse(&dry)
            .expect_err("a dry row under a wet command")
            .to_string();
        assert!(
            e.contains("line 3, column 10 (moisture_basis)")
                && e.contains("give cal fit or cal capture --basis dry"),
            "{e}"
        );
        let on_dry = parse_dry(&dry).expect("on a dry basis");
        assert_eq!(on_dry.samples[1].moisture_basis, Some(Basis::Dry));
        let e = parse_dry(&wet)
            .expect_err("a wet row under a dry command")
            .to_string();
        assert!(
            e.contains("line 2, column 10 (moisture_basis)") && e.contains("leave out --basis dry"),
            "{e}"
        );
        let e = parse(&format!("{head}\nS1,12.3,21.5,{row},moist\n"))
            .expect_err("not a basis")
            .to_string();
        assert!(e.contains("wet or dry"), "{e}");
        // The trade's short forms, any case.
        let words = format!("{head}\nS1,12.3,21.5,{row},WB\nS2,13.1,22.0,{row},Wet Basis\n");
        assert!(parse(&words)
            .unwrap()
            .samples
            .iter()
            .all(|s| s.moisture_basis == Some(Basis::Wet)));
        // A row without a lab value yet (captured before the lab was done)
        // has nothing on another basis: `cal predict` takes it.
        let spectra = format!("{head}\nS1,,21.5,{row},dry\n");
        assert!(parse_samples(
            Path::new("lab.csv"),
            spectra.as_bytes(),
            MoistureColumn::Optional,
            Basis::Wet,
        )
        .is_ok());
    }

    /// Regression: a repeated sample id or column name of 10,000
    /// characters was printed whole.
    #[test]
    fn a_long_repeated_id_or_column_is_not_echoed_whole() {
        let long = "y".repeat(10_000);
        let head = "sample_id,moisture_pct,temperature_c,freq1_hz,eps1_re,eps1_im,freq2_hz,eps2_re,eps2_im";
        let row = |id: &str| format!("{id},12.0,20.0,1000000,5.0,3.0,20000000,4.0,1.0");
        let e = parse(&format!("{head}\n{}\n{}\n", row(&long), row(&long)))
            .expect_err("repeated id")
            .to_string();
        assert!(
            e.len() < 300
                && e.contains("already used on line 2")
                && e.contains("10000 bytes in all"),
            "{e}"
        );
        let e = parse(&format!("{head},{long},{long}\n{},a,b\n", row("S1")))
            .expect_err("repeated column")
            .to_string();
        assert!(
            e.len() < 300 && e.contains("appears twice") && e.contains("10000 bytes in all"),
            "{e}"
        );
    }
}
