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

/// A header that cannot be read, found while parsing or checking it. It names the field (and
/// for a per-signal field the signal's number and label), the value found and what was
/// expected; the reader adds the file's path.
#[derive(Clone, Debug, PartialEq, thiserror::Error)]
pub enum EdfHeaderError {
    /// The version field is neither EDF's `0` nor BDF's 0xFF `BIOSEMI`.
    #[error(
        "the version field is {found:?}; an EDF file starts with \"0\" and a BDF file with 0xFF BIOSEMI"
    )]
    Version {
        /// The field's text.
        found: String,
    },
    /// A field that must hold a number does not.
    #[error("the {field} is {found:?} (header byte {offset}), expected {expected}")]
    NotANumber {
        /// Which field.
        field: FieldName,
        /// Its byte offset in the header.
        offset: usize,
        /// Its text, trimmed.
        found: String,
        /// What it must hold.
        expected: Expected,
    },
    /// The number of signals is 0 or negative.
    #[error("the header declares {count} signals; a recording needs at least one")]
    NoSignals {
        /// The declared count.
        count: i64,
    },
    /// The number of data records is negative (-1: unknown).
    #[error(
        "the header says there are {count} data records; -1 means the recorder never closed the file, any negative count is invalid"
    )]
    NegativeRecords {
        /// The declared count.
        count: i64,
    },
    /// A signal's samples per data record is negative.
    #[error("the samples per data record of {signal} is {found}; it must not be negative")]
    NegativeSamples {
        /// Which signal.
        signal: SignalRef,
        /// The declared number.
        found: i64,
    },
    /// The header-size field disagrees with the number of signals.
    #[error(
        "the header says it is {declared} bytes long, but with {signals} signals it must be {expected}"
    )]
    HeaderBytes {
        /// The header-size field.
        declared: usize,
        /// The number of signals.
        signals: usize,
        /// `256 · (signals + 1)`.
        expected: usize,
    },
    /// Every signal is an annotation signal.
    #[error("the file holds no data signals, only annotations")]
    OnlyAnnotations,
    /// The record duration is not positive.
    #[error("the duration of a data record is {seconds} s; it must be positive")]
    RecordDuration {
        /// The declared duration.
        seconds: f64,
    },
    /// A signal has 0 samples per data record.
    #[error("{signal} has 0 samples per data record, so its sampling rate is not positive")]
    NoSamples {
        /// Which signal.
        signal: SignalRef,
    },
    /// A data signal's digital range is empty, inverted or beyond the sample width.
    #[error(
        "{signal} has the digital range {min}..{max}; expected minimum < maximum within {lowest}..{highest}"
    )]
    DigitalRange {
        /// Which signal.
        signal: SignalRef,
        /// Digital minimum.
        min: i64,
        /// Digital maximum.
        max: i64,
        /// Smallest value a sample of this format holds.
        lowest: i64,
        /// Largest value a sample of this format holds.
        highest: i64,
    },
    /// A data signal's physical range is empty (or not finite).
    #[error(
        "{signal} has physical minimum {min} and maximum {max}; they must be finite and differ"
    )]
    PhysicalRange {
        /// Which signal.
        signal: SignalRef,
        /// Physical minimum.
        min: f64,
        /// Physical maximum.
        max: f64,
    },
}

/// A signal of the header, as messages name it: `signal 2 ("EEG Cz")` (1-based, as a user
/// counts).
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct SignalRef {
    /// 1-based number of the signal in the header.
    pub number: usize,
    /// Its label, trimmed.
    pub label: String,
}

impl SignalRef {
    fn new(index: usize, label: &str) -> SignalRef {
        SignalRef {
            number: index + 1,
            label: label.to_string(),
        }
    }
}

impl std::fmt::Display for SignalRef {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write!(f, "signal {} ({:?})", self.number, self.label)
    }
}

/// A header field by its name in the specification, and the signal for a per-signal field.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct FieldName {
    /// The field (`number of data records`, `digital maximum`).
    pub what: &'static str,
    /// The signal, for a field of a signal's block.
    pub signal: Option<SignalRef>,
}

impl FieldName {
    fn fixed(what: &'static str) -> FieldName {
        FieldName { what, signal: None }
    }
}

impl std::fmt::Display for FieldName {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match &self.signal {
            Some(signal) => write!(f, "{} of {signal}", self.what),
            None => f.write_str(self.what),
        }
    }
}

/// What a numeric field must hold.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Expected {
    /// A finite decimal number.
    Number,
    /// A whole number.
    Integer,
}

impl std::fmt::Display for Expected {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(match self {
            Expected::Number => "a number",
            Expected::Integer => "an integer",
        })
    }
}

/// Field widths of the per-signal block, in the order they appear.
const SIGNAL_FIELDS: [usize; 10] = [16, 80, 8, 8, 8, 8, 8, 80, 8, 32];

impl Header {
    /// The number of signals declared in the fixed header, which says how many bytes the full
    /// header has. `fixed` must hold the first 256 bytes.
    pub fn signal_count(fixed: &[u8]) -> Result<usize, EdfHeaderError> {
        let count: i64 = int_field(fixed, 252, 4, FieldName::fixed("number of signals"))?;
        usize::try_from(count)
            .ok()
            .filter(|&n| n > 0)
            .ok_or(EdfHeaderError::NoSignals { count })
    }

    /// Parse the full header (`256 · (signals + 1)` bytes) and check its fields.
    pub fn parse(bytes: &[u8]) -> Result<Header, EdfHeaderError> {
        let kind = match bytes.first() {
            Some(0xFF) if field_text(bytes, 1, 7) == "BIOSEMI" => FileKind::Bdf,
            _ if field_text(bytes, 0, 8) == "0" => FileKind::Edf,
            _ => {
                return Err(EdfHeaderError::Version {
                    found: field_text(bytes, 0, 8),
                })
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
            header_bytes: int_field(
                bytes,
                184,
                8,
                FieldName::fixed("number of bytes in the header"),
            )?,
            records: record_count(bytes)?,
            record_seconds: float_field(
                bytes,
                244,
                8,
                FieldName::fixed("duration of a data record"),
            )?,
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
    fn check(&self, ns: usize) -> Result<(), EdfHeaderError> {
        if self.header_bytes != BLOCK * (ns + 1) {
            return Err(EdfHeaderError::HeaderBytes {
                declared: self.header_bytes,
                signals: ns,
                expected: BLOCK * (ns + 1),
            });
        }
        if !self.signals.iter().any(|s| !s.annotation) {
            return Err(EdfHeaderError::OnlyAnnotations);
        }
        if !(self.record_seconds.is_finite() && self.record_seconds > 0.0) {
            return Err(EdfHeaderError::RecordDuration {
                seconds: self.record_seconds,
            });
        }
        (self.signals.iter().enumerate()).try_for_each(|(i, s)| self.check_signal(i, s))
    }

    /// Ranges of one data signal (annotation signals carry no physical values); `index` is its
    /// 0-based position in the header.
    fn check_signal(&self, index: usize, s: &SignalHeader) -> Result<(), EdfHeaderError> {
        let signal = || SignalRef::new(index, &s.label);
        if s.samples_per_record == 0 {
            return Err(EdfHeaderError::NoSamples { signal: signal() });
        }
        if s.annotation {
            return Ok(());
        }
        let (lo, hi) = match self.kind {
            FileKind::Edf => (-32768, 32767),
            FileKind::Bdf => (-8_388_608, 8_388_607),
        };
        if s.dig_max <= s.dig_min || s.dig_min < lo || s.dig_max > hi {
            return Err(EdfHeaderError::DigitalRange {
                signal: signal(),
                min: s.dig_min,
                max: s.dig_max,
                lowest: lo,
                highest: hi,
            });
        }
        if s.phys_max == s.phys_min || !s.phys_min.is_finite() || !s.phys_max.is_finite() {
            return Err(EdfHeaderError::PhysicalRange {
                signal: signal(),
                min: s.phys_min,
                max: s.phys_max,
            });
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
fn record_count(bytes: &[u8]) -> Result<usize, EdfHeaderError> {
    let count: i64 = int_field(bytes, 236, 8, FieldName::fixed("number of data records"))?;
    usize::try_from(count).map_err(|_| EdfHeaderError::NegativeRecords { count })
}

/// All signal blocks: the fields are stored field by field across signals.
fn parse_signals(bytes: &[u8], ns: usize) -> Result<Vec<SignalHeader>, EdfHeaderError> {
    let mut starts = [0usize; 10];
    let mut at = BLOCK;
    for (start, width) in starts.iter_mut().zip(SIGNAL_FIELDS) {
        *start = at;
        at += width * ns;
    }
    (0..ns)
        .map(|i| {
            let place = |f: usize| (starts[f] + i * SIGNAL_FIELDS[f], SIGNAL_FIELDS[f]);
            let text = |f: usize| {
                let (start, width) = place(f);
                field_text(bytes, start, width)
            };
            let label = text(0);
            let named = |what: &'static str| FieldName {
                what,
                signal: Some(SignalRef::new(i, &label)),
            };
            let number = |f: usize, what: &'static str| {
                let (start, width) = place(f);
                float_field(bytes, start, width, named(what))
            };
            let int = |f: usize, what: &'static str| {
                let (start, width) = place(f);
                int_field::<i64>(bytes, start, width, named(what))
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
                    EdfHeaderError::NegativeSamples {
                        signal: SignalRef::new(i, &label),
                        found: spr,
                    }
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
fn float_field(
    bytes: &[u8],
    start: usize,
    width: usize,
    field: FieldName,
) -> Result<f64, EdfHeaderError> {
    let text = field_text(bytes, start, width);
    match text.parse::<f64>() {
        Ok(v) if v.is_finite() => Ok(v),
        _ => Err(EdfHeaderError::NotANumber {
            field,
            offset: start,
            found: text,
            expected: Expected::Number,
        }),
    }
}

/// An integer header field.
fn int_field<T: std::str::FromStr>(
    bytes: &[u8],
    start: usize,
    width: usize,
    field: FieldName,
) -> Result<T, EdfHeaderError> {
    let text = field_text(bytes, start, width);
    text.parse::<T>().map_err(|_| EdfHeaderError::NotANumber {
        field,
        offset: start,
        found: text,
        expected: Expected::Integer,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A one-signal EDF header laid out field by field as Kemp et al. 1992 specify (fixed
    /// fields at 0, 8, 88, 168, 176, 184, 192, 236, 244, 252; one signal's fields from 256),
    /// with `edit` applied to the field texts first.
    fn header_bytes(edit: impl FnOnce(&mut Vec<(usize, &'static str)>)) -> Vec<u8> {
        let mut fields: Vec<(usize, &'static str)> = vec![
            (8, "0"),
            (80, "X X X X"),
            (80, "Startdate X X X X"),
            (8, "01.01.20"),
            (8, "10.00.00"),
            (8, "512"),
            (44, ""),
            (8, "1"),
            (8, "1"),
            (4, "1"),
            (16, "EEG Fz"),
            (80, ""),
            (8, "uV"),
            (8, "-100"),
            (8, "100"),
            (8, "-32768"),
            (8, "32767"),
            (80, ""),
            (8, "10"),
            (32, ""),
        ];
        edit(&mut fields);
        let mut out = Vec::new();
        for (width, text) in fields {
            out.extend_from_slice(text.as_bytes());
            out.resize(out.len() + width - text.len(), b' ');
        }
        assert_eq!(out.len(), 512);
        out
    }

    fn parse_with(index: usize, text: &'static str) -> Result<Header, EdfHeaderError> {
        Header::parse(&header_bytes(|f| f[index].1 = text))
    }

    #[test]
    fn a_well_formed_header_parses() {
        let header = Header::parse(&header_bytes(|_| {})).unwrap();
        assert_eq!(header.kind, FileKind::Edf);
        assert_eq!((header.records, header.header_bytes), (1, 512));
        assert_eq!(header.signals[0].label, "EEG Fz");
        assert_eq!(header.signals[0].samples_per_record, 10);
    }

    // Each error names the field, where it is (byte offset of the field, or the signal's
    // number and label) and what was found.
    #[test]
    fn errors_carry_the_field_place_and_value() {
        let fz = || SignalRef {
            number: 1,
            label: "EEG Fz".into(),
        };
        let err = parse_with(7, "many").unwrap_err();
        assert_eq!(
            err,
            EdfHeaderError::NotANumber {
                field: FieldName::fixed("number of data records"),
                offset: 236,
                found: "many".into(),
                expected: Expected::Integer,
            }
        );
        assert_eq!(
            err.to_string(),
            "the number of data records is \"many\" (header byte 236), expected an integer"
        );
        // The digital maximum of signal 1 is at 256 + (16 + 80 + 8·4) = 384.
        let err = parse_with(16, "abc").unwrap_err();
        assert!(
            matches!(&err, EdfHeaderError::NotANumber { field, offset: 384, .. }
                if field.signal == Some(fz()) && field.what == "digital maximum"),
            "{err:?}"
        );
        assert_eq!(
            parse_with(9, "0").unwrap_err(),
            EdfHeaderError::NoSignals { count: 0 }
        );
        assert_eq!(
            parse_with(7, "-1").unwrap_err(),
            EdfHeaderError::NegativeRecords { count: -1 }
        );
        assert_eq!(
            parse_with(0, "1.0").unwrap_err(),
            EdfHeaderError::Version {
                found: "1.0".into()
            }
        );
        assert_eq!(
            parse_with(5, "768").unwrap_err(),
            EdfHeaderError::HeaderBytes {
                declared: 768,
                signals: 1,
                expected: 512
            }
        );
        assert!(matches!(
            parse_with(8, "0").unwrap_err(),
            EdfHeaderError::RecordDuration { seconds } if seconds == 0.0
        ));
        assert_eq!(
            parse_with(18, "0").unwrap_err(),
            EdfHeaderError::NoSamples { signal: fz() }
        );
        assert_eq!(
            parse_with(18, "-5").unwrap_err(),
            EdfHeaderError::NegativeSamples {
                signal: fz(),
                found: -5
            }
        );
        // EDF samples are 16-bit two's complement: −32768..32767 (Kemp et al. 1992).
        assert_eq!(
            parse_with(15, "32767").unwrap_err(),
            EdfHeaderError::DigitalRange {
                signal: fz(),
                min: 32767,
                max: 32767,
                lowest: -32768,
                highest: 32767
            }
        );
        assert!(matches!(
            parse_with(13, "100").unwrap_err(),
            EdfHeaderError::PhysicalRange { signal, .. } if signal == fz()
        ));
        assert_eq!(
            parse_with(10, "EDF Annotations").unwrap_err(),
            EdfHeaderError::OnlyAnnotations
        );
    }
}
