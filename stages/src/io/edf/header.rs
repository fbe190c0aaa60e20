//! The EDF/BDF header: parsing its fixed-width ASCII fields and checking them against each
//! other and against the file size.
//!
//! Layout (Kemp et al. 1992): version (8), patient (80), recording (80), start date (8), start
//! time (8), header bytes (8), reserved (44; `EDF+C`/`EDF+D` in EDF+, Kemp & Olivan 2003),
//! number of data records (8), record duration in s (8), number of signals (4); then per signal,
//! field by field over all signals: label (16), transducer (80), physical dimension (8),
//! physical min (8), physical max (8), digital min (8), digital max (8), prefiltering (80),
//! samples per record (8), reserved (32). BDF (BioSemi) has 0xFF + `BIOSEMI` as its version and
//! 3-byte samples.

use super::BLOCK;

/// Which variant of the format a file is.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum FileKind {
    /// EDF or EDF+: 16-bit samples.
    Edf,
    /// BDF or BDF+: 24-bit samples.
    Bdf,
}

/// One signal's header block.
#[derive(Clone, Debug, PartialEq)]
pub struct SignalHeader {
    /// The label, trimmed.
    pub label: String,
    /// Transducer type, trimmed.
    pub transducer: String,
    /// Physical dimension (unit), trimmed.
    pub unit: String,
    /// Physical value of `dig_min`.
    pub phys_min: f64,
    /// Physical value of `dig_max`.
    pub phys_max: f64,
    /// Smallest digital value.
    pub dig_min: i64,
    /// Largest digital value.
    pub dig_max: i64,
    /// Prefiltering, trimmed.
    pub prefilter: String,
    /// Samples of this signal in each data record.
    pub samples_per_record: usize,
    /// True for an `EDF Annotations` / `BDF Annotations` signal.
    pub annotation: bool,
}

/// A parsed and checked header.
#[derive(Clone, Debug, PartialEq)]
pub struct Header {
    /// EDF or BDF.
    pub kind: FileKind,
    /// `Some(true)` for EDF+C/BDF+C, `Some(false)` for EDF+D/BDF+D, `None` for plain EDF/BDF.
    pub plus_continuous: Option<bool>,
    /// Local patient identification.
    pub patient: String,
    /// Local recording identification.
    pub recording: String,
    /// Start date `dd.mm.yy`.
    pub start_date: String,
    /// Start time `hh.mm.ss`.
    pub start_time: String,
    /// Bytes in the header, `256 · (signals + 1)`.
    pub header_bytes: usize,
    /// Number of data records.
    pub records: usize,
    /// Duration of one data record in seconds.
    pub record_seconds: f64,
    /// The signals, annotation signals included.
    pub signals: Vec<SignalHeader>,
}

/// Field widths of the per-signal block, in the order they appear.
const SIGNAL_FIELDS: [usize; 10] = [16, 80, 8, 8, 8, 8, 8, 80, 8, 32];

impl Header {
    /// The number of signals declared in the fixed header, which says how many bytes the full
    /// header has. `fixed` must hold the first 256 bytes.
    pub fn signal_count(fixed: &[u8]) -> Result<usize, String> {
        let text = field_text(fixed, 252, 4);
        let count: i64 = text.parse().map_err(|_| {
            format!("the header's number of signals is {text:?}, expected an integer")
        })?;
        if count <= 0 {
            return Err(format!(
                "the header declares {count} signals; a recording needs at least one"
            ));
        }
        usize::try_from(count).map_err(|_| format!("the header declares {count} signals"))
    }

    /// Parse the full header (`256 · (signals + 1)` bytes) and check its fields.
    pub fn parse(bytes: &[u8]) -> Result<Header, String> {
        let kind = match bytes.first() {
            Some(0xFF) if field_text(bytes, 1, 7) == "BIOSEMI" => FileKind::Bdf,
            _ if field_text(bytes, 0, 8) == "0" => FileKind::Edf,
            _ => {
                return Err(format!(
                    "the version field is {:?}; an EDF file starts with \"0\" and a BDF file with 0xFF BIOSEMI",
                    field_text(bytes, 0, 8)
                ))
            }
        };
        let ns = Header::signal_count(bytes)?;
        let reserved = field_text(bytes, 192, 44);
        let header = Header {
            kind,
            plus_continuous: plus_variant(&reserved),
            patient: field_text(bytes, 8, 80),
            recording: field_text(bytes, 88, 80),
            start_date: field_text(bytes, 168, 8),
            start_time: field_text(bytes, 176, 8),
            header_bytes: int_field(bytes, 184, 8, "number of bytes in the header")?,
            records: record_count(bytes)?,
            record_seconds: float_field(bytes, 244, 8, "duration of a data record")?,
            signals: parse_signals(bytes, ns)?,
        };
        header.check(ns)?;
        Ok(header)
    }

    /// Bytes per sample: 2 for EDF, 3 for BDF.
    pub fn sample_bytes(&self) -> usize {
        match self.kind {
            FileKind::Edf => 2,
            FileKind::Bdf => 3,
        }
    }

    /// Bytes in one data record.
    pub fn record_bytes(&self) -> usize {
        self.signals
            .iter()
            .map(|s| s.samples_per_record * self.sample_bytes())
            .sum()
    }

    /// Byte offset of signal `index` inside a data record.
    pub fn signal_offset(&self, index: usize) -> usize {
        self.signals
            .iter()
            .take(index)
            .map(|s| s.samples_per_record * self.sample_bytes())
            .sum()
    }

    /// The sampling rate of a signal in Hz.
    pub fn rate(&self, signal: &SignalHeader) -> f64 {
        signal.samples_per_record as f64 / self.record_seconds
    }

    /// The file size this header implies.
    pub fn expected_file_size(&self) -> Option<u64> {
        (self.records as u64)
            .checked_mul(self.record_bytes() as u64)?
            .checked_add(self.header_bytes as u64)
    }

    /// Check the fields against each other.
    fn check(&self, ns: usize) -> Result<(), String> {
        if self.header_bytes != BLOCK * (ns + 1) {
            return Err(format!(
                "the header says it is {} bytes long, but with {ns} signals it must be {}",
                self.header_bytes,
                BLOCK * (ns + 1)
            ));
        }
        if !self.signals.iter().any(|s| !s.annotation) {
            return Err("the file holds no data signals, only annotations".into());
        }
        if !(self.record_seconds.is_finite() && self.record_seconds > 0.0) {
            return Err(format!(
                "the duration of a data record is {} s; it must be positive",
                self.record_seconds
            ));
        }
        self.signals.iter().try_for_each(|s| self.check_signal(s))
    }

    /// Ranges of one data signal (annotation signals carry no physical values).
    fn check_signal(&self, s: &SignalHeader) -> Result<(), String> {
        if s.samples_per_record == 0 {
            return Err(format!(
                "signal {:?} has 0 samples per data record, so its sampling rate is not positive",
                s.label
            ));
        }
        if s.annotation {
            return Ok(());
        }
        let (lo, hi) = match self.kind {
            FileKind::Edf => (-32768, 32767),
            FileKind::Bdf => (-8_388_608, 8_388_607),
        };
        if s.dig_max <= s.dig_min || s.dig_min < lo || s.dig_max > hi {
            return Err(format!(
                "signal {:?} has the digital range {}..{}; expected minimum < maximum within {lo}..{hi}",
                s.label, s.dig_min, s.dig_max
            ));
        }
        if s.phys_max == s.phys_min || !s.phys_min.is_finite() || !s.phys_max.is_finite() {
            return Err(format!(
                "signal {:?} has physical minimum {} and maximum {}; they must be finite and differ",
                s.label, s.phys_min, s.phys_max
            ));
        }
        Ok(())
    }
}

/// `Some(continuous)` when the reserved field marks EDF+/BDF+.
fn plus_variant(reserved: &str) -> Option<bool> {
    match reserved.get(..5) {
        Some("EDF+C") | Some("BDF+C") => Some(true),
        Some("EDF+D") | Some("BDF+D") => Some(false),
        _ => None,
    }
}

/// The number of data records, which must be known (not -1) and not negative.
fn record_count(bytes: &[u8]) -> Result<usize, String> {
    let count: i64 = int_field(bytes, 236, 8, "number of data records")?;
    usize::try_from(count).map_err(|_| {
        format!(
            "the header says there are {count} data records; -1 means the recorder never closed the file, any negative count is invalid"
        )
    })
}

/// All signal blocks: the fields are stored field by field across signals.
fn parse_signals(bytes: &[u8], ns: usize) -> Result<Vec<SignalHeader>, String> {
    let mut starts = [0usize; 10];
    let mut at = BLOCK;
    for (start, width) in starts.iter_mut().zip(SIGNAL_FIELDS) {
        *start = at;
        at += width * ns;
    }
    (0..ns)
        .map(|i| {
            let text =
                |f: usize| field_text(bytes, starts[f] + i * SIGNAL_FIELDS[f], SIGNAL_FIELDS[f]);
            let label = text(0);
            let named = |what: &str| format!("{what} of signal {} ({label:?})", i + 1);
            let number = |f: usize, what: &str| {
                float_field(
                    bytes,
                    starts[f] + i * SIGNAL_FIELDS[f],
                    SIGNAL_FIELDS[f],
                    &named(what),
                )
            };
            let int = |f: usize, what: &str| {
                int_field::<i64>(
                    bytes,
                    starts[f] + i * SIGNAL_FIELDS[f],
                    SIGNAL_FIELDS[f],
                    &named(what),
                )
            };
            let spr = int(8, "samples per data record")?;
            Ok(SignalHeader {
                annotation: label == "EDF Annotations" || label == "BDF Annotations",
                transducer: text(1),
                unit: text(2),
                phys_min: number(3, "physical minimum")?,
                phys_max: number(4, "physical maximum")?,
                dig_min: int(5, "digital minimum")?,
                dig_max: int(6, "digital maximum")?,
                prefilter: text(7),
                samples_per_record: usize::try_from(spr).map_err(|_| {
                    format!(
                        "{} is {spr}; it must not be negative",
                        named("samples per data record")
                    )
                })?,
                label,
            })
        })
        .collect()
}

/// A header field as text, trimmed. Bytes are read as Latin-1, so a stray 0xB5 reads as `µ`.
fn field_text(bytes: &[u8], start: usize, width: usize) -> String {
    bytes
        .get(start..start + width)
        .unwrap_or_default()
        .iter()
        .map(|&b| char::from(b))
        .collect::<String>()
        .trim()
        .to_string()
}

/// A numeric header field.
fn float_field(bytes: &[u8], start: usize, width: usize, what: &str) -> Result<f64, String> {
    let text = field_text(bytes, start, width);
    match text.parse::<f64>() {
        Ok(v) if v.is_finite() => Ok(v),
        _ => Err(format!("the {what} is {text:?}, expected a number")),
    }
}

/// An integer header field.
fn int_field<T: std::str::FromStr>(
    bytes: &[u8],
    start: usize,
    width: usize,
    what: &str,
) -> Result<T, String> {
    let text = field_text(bytes, start, width);
    text.parse::<T>()
        .map_err(|_| format!("the {what} is {text:?}, expected an integer"))
}
