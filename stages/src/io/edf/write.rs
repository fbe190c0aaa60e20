//! The EDF+C writer: 16-bit samples, one `EDF Annotations` signal, deterministic bytes.
//!
//! Each signal's physical range is chosen from its data: symmetric, ±m with m the smallest
//! number not below the largest |sample| that fits the 8-character header field together with
//! its minus sign. The digital range is the full 16-bit range −32768..32767 (Kemp et al. 1992).
//! Every annotation goes into the data record its onset falls in, after that record's
//! time-keeping TAL (Kemp & Olivan 2003); the annotation signal is as wide as the fullest
//! record needs. The file is written to a temporary name in the target's folder, synced and
//! renamed, so a reader never sees half a file.

use std::fs::File;
use std::io::{BufWriter, Write};
use std::path::{Path, PathBuf};

use super::tal::{event_tal, stamp_tal, TalError};
use super::BLOCK;
use crate::array::Event;
use crate::error::StageError;

const DIG_MIN: i32 = -32768;
const DIG_MAX: i32 = 32767;

/// Why an [`EdfWriteSpec`] cannot be written; [`write_edf_plus`] adds the file's path.
#[derive(Clone, Debug, PartialEq, thiserror::Error)]
pub enum EdfWriteError {
    /// The rate or the record duration is not a positive number.
    #[error(
        "sampling rate {rate} Hz and record duration {record_seconds} s must both be positive"
    )]
    RateOrDuration {
        /// Sampling rate in Hz.
        rate: f64,
        /// Record duration in s.
        record_seconds: f64,
    },
    /// A record would hold a fractional number of samples.
    #[error(
        "a record of {record_seconds} s at {rate} Hz holds {samples} samples; choose a record duration that holds a whole number"
    )]
    FractionalRecord {
        /// Sampling rate in Hz.
        rate: f64,
        /// Record duration in s.
        record_seconds: f64,
        /// rate × duration.
        samples: f64,
    },
    /// The spec has no signals.
    #[error("there are no signals to write")]
    NoSignals,
    /// Two signals differ in length.
    #[error(
        "signal {signal:?} has {samples} samples but signal {first:?} has {first_samples}; all signals share one rate and length"
    )]
    Lengths {
        /// The signal that differs.
        signal: String,
        /// Its number of samples.
        samples: usize,
        /// The first signal.
        first: String,
        /// Its number of samples.
        first_samples: usize,
    },
    /// A sample is NaN or infinite.
    #[error("signal {signal:?} holds the non-finite sample {value}")]
    NonFinite {
        /// The signal.
        signal: String,
        /// The sample.
        value: f64,
    },
    /// The length is not a positive whole number of records.
    #[error(
        "the signals have {samples} samples, which is not a positive whole number of records of {per_record} samples"
    )]
    NotWholeRecords {
        /// Samples of each signal.
        samples: usize,
        /// Samples per record.
        per_record: usize,
    },
    /// The peak does not fit the 8-character physical range field.
    #[error(
        "signal {signal:?} reaches {peak} {unit}, too large for the 8-character physical range field; use a larger unit"
    )]
    PhysicalRange {
        /// The signal.
        signal: String,
        /// Its largest |sample|.
        peak: f64,
        /// Its unit.
        unit: String,
    },
    /// An annotation that cannot be written as a TAL.
    #[error(transparent)]
    Annotation(#[from] TalError),
    /// A start date or time not of the form `dd.mm.yy` / `hh.mm.ss`.
    #[error(
        "the {field} is {found:?}; expected two digits, '{separator}', two digits, '{separator}', two digits"
    )]
    DateTime {
        /// `start date` or `start time`.
        field: &'static str,
        /// The text given.
        found: String,
        /// The separator expected.
        separator: char,
    },
    /// A header field with characters outside printable ASCII.
    #[error(
        "the {field} {text:?} holds characters outside printable ASCII, which EDF headers require (write µV as uV)"
    )]
    NotAscii {
        /// The field (`physical dimension of signal 1`).
        field: String,
        /// The text given.
        text: String,
    },
    /// A header field longer than its width.
    #[error("the {field} {text:?} is {length} characters long; the field holds {width}")]
    TooLong {
        /// The field (`label of signal 2`).
        field: String,
        /// The text given.
        text: String,
        /// Its length in bytes.
        length: usize,
        /// The field's width.
        width: usize,
    },
}

/// One signal to write.
#[derive(Clone, Debug)]
pub struct SignalSpec {
    /// The EDF label (e.g. `EEG Fz`, `EOG left`).
    pub label: String,
    /// Physical dimension as written in the header (`uV`, `V`).
    pub unit: String,
    /// Samples in that physical unit; their count must be a whole number of records.
    pub samples: Vec<f64>,
}

/// What [`write_edf_plus`] writes.
#[derive(Clone, Debug)]
pub struct EdfWriteSpec {
    /// Local patient identification field (EDF+ subfields, `X` for unknown).
    pub patient: String,
    /// Local recording identification field.
    pub recording: String,
    /// Start date `dd.mm.yy`.
    pub start_date: String,
    /// Start time `hh.mm.ss`.
    pub start_time: String,
    /// Duration of one data record in seconds.
    pub record_seconds: f64,
    /// Sampling rate in Hz shared by all signals.
    pub sampling_rate: f64,
    /// The signals.
    pub signals: Vec<SignalSpec>,
    /// Annotations, written to an `EDF Annotations` signal.
    pub annotations: Vec<Event>,
}

/// Write an EDF+C file with 16-bit samples; the same spec always gives the same bytes.
///
/// Samples are quantised to 65536 levels over ±(largest |sample|, rounded up to fit the
/// header), so pass them in a unit where that peak is at least about 0.01 (µV for EEG): the
/// physical-range field has at most 5 decimals.
pub fn write_edf_plus(path: &Path, spec: &EdfWriteSpec) -> Result<(), StageError> {
    let fail =
        |m: &dyn std::fmt::Display| StageError::input(format!("writing {}: {m}", path.display()));
    let plan = Plan::new(spec).map_err(|e| fail(&e))?;
    let header = plan.header(spec).map_err(|e| fail(&e))?;
    write_atomically(path, |out| {
        out.write_all(&header)?;
        let mut record = Vec::with_capacity(plan.record_bytes());
        for index in 0..plan.records {
            plan.encode_record(spec, index, &mut record);
            out.write_all(&record)?;
        }
        Ok(())
    })
    .map_err(|e| fail(&e))
}

/// Everything derived from the spec before writing: sizes, ranges, annotation bytes.
struct Plan {
    samples_per_record: usize,
    records: usize,
    /// Physical maximum per signal (the minimum is its negative) and its header text.
    ranges: Vec<(f64, String)>,
    /// The annotation signal's bytes of each record, zero-padded to `annotation_bytes`.
    annotations: Vec<Vec<u8>>,
    annotation_bytes: usize,
}

impl Plan {
    fn new(spec: &EdfWriteSpec) -> Result<Plan, EdfWriteError> {
        let samples_per_record = samples_per_record(spec)?;
        let records = record_count(spec, samples_per_record)?;
        let ranges = spec
            .signals
            .iter()
            .map(physical_range)
            .collect::<Result<Vec<_>, _>>()?;
        let mut annotations = annotation_records(spec, records)?;
        // Two bytes per annotation "sample"; pad every record to the widest one.
        let widest = annotations.iter().map(Vec::len).max().unwrap_or(0);
        let annotation_bytes = widest.div_ceil(2) * 2;
        for bytes in &mut annotations {
            bytes.resize(annotation_bytes, 0);
        }
        Ok(Plan {
            samples_per_record,
            records,
            ranges,
            annotations,
            annotation_bytes,
        })
    }

    fn record_bytes(&self) -> usize {
        self.ranges.len() * self.samples_per_record * 2 + self.annotation_bytes
    }

    /// The header: fixed part, then each per-signal field for all signals in turn.
    fn header(&self, spec: &EdfWriteSpec) -> Result<Vec<u8>, EdfWriteError> {
        let ns = spec.signals.len() + 1;
        let mut out = Vec::with_capacity(BLOCK * (ns + 1));
        check_date_time(&spec.start_date, "start date", '.')?;
        check_date_time(&spec.start_time, "start time", '.')?;
        let patient = or_default(&spec.patient, "X X X X");
        let recording = or_default(&spec.recording, "Startdate X X X X");
        put(&mut out, "0", 8, "version")?;
        put(&mut out, patient, 80, "patient identification")?;
        put(&mut out, recording, 80, "recording identification")?;
        put(&mut out, &spec.start_date, 8, "start date")?;
        put(&mut out, &spec.start_time, 8, "start time")?;
        put(&mut out, &(BLOCK * (ns + 1)).to_string(), 8, "header size")?;
        put(&mut out, "EDF+C", 44, "reserved")?;
        put(&mut out, &self.records.to_string(), 8, "number of records")?;
        put(
            &mut out,
            &format!("{}", spec.record_seconds),
            8,
            "record duration",
        )?;
        put(&mut out, &ns.to_string(), 4, "number of signals")?;
        self.signal_fields(spec, &mut out)?;
        Ok(out)
    }

    fn signal_fields(&self, spec: &EdfWriteSpec, out: &mut Vec<u8>) -> Result<(), EdfWriteError> {
        let spr = self.samples_per_record.to_string();
        let ann_spr = (self.annotation_bytes / 2).to_string();
        // (field name, width, value of each data signal, value of the annotation signal)
        let mut columns: Vec<(&str, usize, Vec<String>, String)> = vec![
            (
                "label",
                16,
                spec.signals.iter().map(|s| s.label.clone()).collect(),
                "EDF Annotations".into(),
            ),
            (
                "transducer type",
                80,
                vec![String::new(); spec.signals.len()],
                String::new(),
            ),
            (
                "physical dimension",
                8,
                spec.signals.iter().map(|s| s.unit.clone()).collect(),
                String::new(),
            ),
            (
                "physical minimum",
                8,
                self.ranges.iter().map(|r| format!("-{}", r.1)).collect(),
                "-1".into(),
            ),
            (
                "physical maximum",
                8,
                self.ranges.iter().map(|r| r.1.clone()).collect(),
                "1".into(),
            ),
            (
                "digital minimum",
                8,
                vec![DIG_MIN.to_string(); spec.signals.len()],
                DIG_MIN.to_string(),
            ),
            (
                "digital maximum",
                8,
                vec![DIG_MAX.to_string(); spec.signals.len()],
                DIG_MAX.to_string(),
            ),
            (
                "prefiltering",
                80,
                vec![String::new(); spec.signals.len()],
                String::new(),
            ),
            (
                "samples per data record",
                8,
                vec![spr; spec.signals.len()],
                ann_spr,
            ),
            (
                "reserved field",
                32,
                vec![String::new(); spec.signals.len()],
                String::new(),
            ),
        ];
        for (name, width, values, annotation) in columns.iter_mut() {
            values.push(std::mem::take(annotation));
            for (index, value) in values.iter().enumerate() {
                let field = HeaderField::Signal {
                    name,
                    number: index + 1,
                };
                put_field(out, value, *width, field)?;
            }
        }
        Ok(())
    }

    /// The bytes of data record `index` into `out` (cleared first).
    fn encode_record(&self, spec: &EdfWriteSpec, index: usize, out: &mut Vec<u8>) {
        out.clear();
        let start = index * self.samples_per_record;
        for (signal, (pmax, _)) in spec.signals.iter().zip(&self.ranges) {
            let span = 2.0 * pmax;
            let scale = f64::from(DIG_MAX - DIG_MIN) / span;
            let samples = signal.samples.get(start..start + self.samples_per_record);
            for &x in samples.unwrap_or_default() {
                // dig = (phys − pmin)·(dmax − dmin)/(pmax − pmin) + dmin, inverted EDF scaling.
                let digital = ((x + pmax) * scale + f64::from(DIG_MIN)).round();
                let digital = digital.clamp(f64::from(DIG_MIN), f64::from(DIG_MAX)) as i16;
                out.extend_from_slice(&digital.to_le_bytes());
            }
        }
        if let Some(bytes) = self.annotations.get(index) {
            out.extend_from_slice(bytes);
        }
    }
}

/// Samples per record: rate × record duration, which must be a positive whole number.
fn samples_per_record(spec: &EdfWriteSpec) -> Result<usize, EdfWriteError> {
    let (fs, rs) = (spec.sampling_rate, spec.record_seconds);
    if !(fs.is_finite() && fs > 0.0 && rs.is_finite() && rs > 0.0) {
        return Err(EdfWriteError::RateOrDuration {
            rate: fs,
            record_seconds: rs,
        });
    }
    let product = fs * rs;
    let rounded = product.round();
    if (product - rounded).abs() > 1e-9 * product.max(1.0) || rounded < 1.0 {
        return Err(EdfWriteError::FractionalRecord {
            rate: fs,
            record_seconds: rs,
            samples: product,
        });
    }
    Ok(rounded as usize)
}

/// Number of records: every signal must have the same whole number of records.
fn record_count(spec: &EdfWriteSpec, spr: usize) -> Result<usize, EdfWriteError> {
    let Some(first) = spec.signals.first() else {
        return Err(EdfWriteError::NoSignals);
    };
    let len = first.samples.len();
    for s in &spec.signals {
        if s.samples.len() != len {
            return Err(EdfWriteError::Lengths {
                signal: s.label.clone(),
                samples: s.samples.len(),
                first: first.label.clone(),
                first_samples: len,
            });
        }
        if let Some(bad) = s.samples.iter().find(|x| !x.is_finite()) {
            return Err(EdfWriteError::NonFinite {
                signal: s.label.clone(),
                value: *bad,
            });
        }
    }
    if len == 0 || len % spr != 0 {
        return Err(EdfWriteError::NotWholeRecords {
            samples: len,
            per_record: spr,
        });
    }
    Ok(len / spr)
}

/// The symmetric physical range ±m of a signal and m's header text (at most 7 characters, so
/// that `-m` fits the 8-character field), with m ≥ the largest |sample|.
fn physical_range(signal: &SignalSpec) -> Result<(f64, String), EdfWriteError> {
    let peak = signal.samples.iter().fold(0.0f64, |m, x| m.max(x.abs()));
    // An all-zero signal still needs pmax ≠ pmin.
    let peak = if peak > 0.0 { peak } else { 1.0 };
    for decimals in (0..=5).rev() {
        let scale = 10f64.powi(decimals);
        let mut units = (peak * scale).ceil();
        let mut text = format!("{:.*}", decimals as usize, units / scale);
        // Guard against the decimal text landing just below the peak after rounding.
        if text.parse::<f64>().map_or(true, |v| v < peak) {
            units += 1.0;
            text = format!("{:.*}", decimals as usize, units / scale);
        }
        // `text` is the decimal form of a finite number, so it parses.
        match text.parse::<f64>() {
            Ok(value) if text.len() <= 7 => return Ok((value, text)),
            _ => {}
        }
    }
    Err(EdfWriteError::PhysicalRange {
        signal: signal.label.clone(),
        peak,
        unit: signal.unit.clone(),
    })
}

/// Each record's annotation bytes: its time stamp, then the annotations whose onsets fall in it
/// (those before the start go to the first record, those after the end to the last).
fn annotation_records(spec: &EdfWriteSpec, records: usize) -> Result<Vec<Vec<u8>>, EdfWriteError> {
    let mut out: Vec<Vec<u8>> = (0..records)
        .map(|k| stamp_tal(k as f64 * spec.record_seconds))
        .collect();
    for event in &spec.annotations {
        let tal = event_tal(event)?;
        let index = (event.onset / spec.record_seconds).floor();
        let index = index.clamp(0.0, (records - 1) as f64) as usize;
        if let Some(bytes) = out.get_mut(index) {
            bytes.extend_from_slice(&tal);
        }
    }
    Ok(out)
}

/// `dd.mm.yy` / `hh.mm.ss`: three two-digit numbers separated by `sep`.
fn check_date_time(text: &str, what: &'static str, sep: char) -> Result<(), EdfWriteError> {
    let parts: Vec<&str> = text.split(sep).collect();
    let ok = parts.len() == 3
        && parts
            .iter()
            .all(|p| p.len() == 2 && p.chars().all(|c| c.is_ascii_digit()));
    if ok {
        Ok(())
    } else {
        Err(EdfWriteError::DateTime {
            field: what,
            found: text.to_string(),
            separator: sep,
        })
    }
}

fn or_default<'a>(value: &'a str, default: &'a str) -> &'a str {
    if value.trim().is_empty() {
        default
    } else {
        value
    }
}

/// Append `text` as a fixed-width, space-padded ASCII field of the fixed header.
fn put(
    out: &mut Vec<u8>,
    text: &str,
    width: usize,
    what: &'static str,
) -> Result<(), EdfWriteError> {
    put_field(out, text, width, HeaderField::Fixed(what))
}

/// Append `text` as the fixed-width, space-padded ASCII header field `field`.
fn put_field(
    out: &mut Vec<u8>,
    text: &str,
    width: usize,
    field: HeaderField<'_>,
) -> Result<(), EdfWriteError> {
    if !text.bytes().all(|b| (32..=126).contains(&b)) {
        return Err(EdfWriteError::NotAscii {
            field: field.to_string(),
            text: text.to_string(),
        });
    }
    if text.len() > width {
        return Err(EdfWriteError::TooLong {
            field: field.to_string(),
            text: text.to_string(),
            length: text.len(),
            width,
        });
    }
    out.extend_from_slice(text.as_bytes());
    out.resize(out.len() + width - text.len(), b' ');
    Ok(())
}

/// A header field as messages name it.
enum HeaderField<'a> {
    /// A field of the fixed header.
    Fixed(&'static str),
    /// A field of a signal's block; `number` counts from 1.
    Signal { name: &'a str, number: usize },
}

impl std::fmt::Display for HeaderField<'_> {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self {
            HeaderField::Fixed(what) => f.write_str(what),
            HeaderField::Signal { name, number } => write!(f, "{name} of signal {number}"),
        }
    }
}

/// Write through a temporary file in the same folder, sync it, then rename it into place.
fn write_atomically(
    path: &Path,
    body: impl FnOnce(&mut BufWriter<File>) -> std::io::Result<()>,
) -> std::io::Result<()> {
    let temp = temp_path(path);
    let result = (|| {
        let mut out = BufWriter::new(File::create(&temp)?);
        body(&mut out)?;
        let file = out.into_inner().map_err(|e| e.into_error())?;
        file.sync_all()?;
        std::fs::rename(&temp, path)
    })();
    if result.is_err() {
        // Best effort: the temporary file is useless after a failure.
        let _ = std::fs::remove_file(&temp);
    }
    result
}

fn temp_path(path: &Path) -> PathBuf {
    let name = path
        .file_name()
        .map(|n| n.to_string_lossy().into_owned())
        .unwrap_or_default();
    path.with_file_name(format!(".{name}.{}.tmp", std::process::id()))
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A header field as text, at a byte offset given by the EDF specification (Kemp et al.
    /// 1992): fixed header fields at 0, 8, 88, 168, 176, 184, 192, 236, 244, 252.
    fn field(bytes: &[u8], start: usize, width: usize) -> String {
        String::from_utf8(bytes[start..start + width].to_vec()).unwrap()
    }

    fn spec() -> EdfWriteSpec {
        let n = 3 * 200;
        let wave = |a: f64, f: f64| -> Vec<f64> {
            (0..n)
                .map(|k| a * (2.0 * std::f64::consts::PI * f * k as f64 / 200.0).sin())
                .collect()
        };
        EdfWriteSpec {
            patient: "X X X X".into(),
            recording: "Startdate 01-JAN-2020 X X X".into(),
            start_date: "01.01.20".into(),
            start_time: "10.00.00".into(),
            record_seconds: 1.0,
            sampling_rate: 200.0,
            signals: vec![
                SignalSpec {
                    label: "EEG Fz".into(),
                    unit: "uV".into(),
                    samples: wave(45.3, 7.0),
                },
                SignalSpec {
                    label: "EOG left".into(),
                    unit: "uV".into(),
                    samples: wave(812.25, 1.5),
                },
            ],
            annotations: vec![
                Event {
                    onset: 0.5,
                    duration: 0.0,
                    label: "cue-a".into(),
                },
                Event {
                    onset: 2.25,
                    duration: 0.1,
                    label: "cue-b".into(),
                },
            ],
        }
    }

    fn write(spec: &EdfWriteSpec) -> Vec<u8> {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("x.edf");
        write_edf_plus(&path, spec).unwrap();
        std::fs::read(path).unwrap()
    }

    #[test]
    fn header_fields_follow_the_specification() {
        let bytes = write(&spec());
        // Kemp et al. 1992 fixed header; Kemp & Olivan 2003: EDF+C in the reserved field.
        assert_eq!(field(&bytes, 0, 8), "0       ");
        assert_eq!(field(&bytes, 8, 80).trim_end(), "X X X X");
        assert_eq!(field(&bytes, 168, 8), "01.01.20");
        assert_eq!(field(&bytes, 176, 8), "10.00.00");
        assert_eq!(field(&bytes, 184, 8).trim_end(), (256 * 4).to_string());
        assert!(field(&bytes, 192, 44).starts_with("EDF+C "));
        assert_eq!(field(&bytes, 236, 8).trim_end(), "3");
        assert_eq!(field(&bytes, 244, 8).trim_end(), "1");
        assert_eq!(field(&bytes, 252, 4).trim_end(), "3");
        // Per-signal fields, ns = 3, stored field by field: labels at 256, transducer at
        // 256 + 16·3, dimension at 256 + 96·3, pmin +104·3, pmax +112·3, dmin +120·3,
        // dmax +128·3, prefilter +136·3, samples per record +216·3.
        let sig = |offset: usize, width: usize, i: usize| {
            field(&bytes, 256 + offset * 3 + width * i, width)
                .trim_end()
                .to_string()
        };
        assert_eq!(sig(0, 16, 0), "EEG Fz");
        assert_eq!(sig(0, 16, 2), "EDF Annotations");
        assert_eq!(sig(96, 8, 1), "uV");
        assert_eq!(sig(104, 8, 0), "-45.3000");
        assert_eq!(sig(112, 8, 0), "45.3000");
        assert_eq!(sig(112, 8, 1), "812.250");
        assert_eq!(sig(120, 8, 1), "-32768");
        assert_eq!(sig(128, 8, 1), "32767");
        assert_eq!(sig(216, 8, 0), "200");
        let ann_spr: usize = sig(216, 8, 2).parse().unwrap();
        // File size = header + records × record size (16-bit samples).
        assert_eq!(bytes.len(), 256 * 4 + 3 * (2 * 200 * 2 + 2 * ann_spr));
    }

    #[test]
    fn samples_decode_within_half_a_step() {
        let spec = spec();
        let bytes = write(&spec);
        let ann_spr = 2 * field(&bytes, 256 + 216 * 3 + 16, 8)
            .trim()
            .parse::<usize>()
            .unwrap();
        let record = 2 * 200 * 2 + ann_spr;
        for (i, s) in spec.signals.iter().enumerate() {
            let pmax: f64 = field(&bytes, 256 + 112 * 3 + 8 * i, 8)
                .trim()
                .parse()
                .unwrap();
            // phys = (dig − dmin)·(pmax − pmin)/(dmax − dmin) + pmin, Kemp et al. 1992.
            let step = 2.0 * pmax / 65535.0;
            for (k, &x) in s.samples.iter().enumerate() {
                let at = 256 * 4 + (k / 200) * record + i * 400 + (k % 200) * 2;
                let dig = f64::from(i16::from_le_bytes([bytes[at], bytes[at + 1]]));
                let phys = (dig + 32768.0) * (2.0 * pmax) / 65535.0 - pmax;
                assert!(
                    (phys - x).abs() <= 0.5 * step + 1e-12,
                    "signal {i} sample {k}"
                );
            }
        }
    }

    #[test]
    fn records_start_with_their_time_stamp_and_hold_their_annotations() {
        let bytes = write(&spec());
        let ann_bytes = 2 * field(&bytes, 256 + 216 * 3 + 16, 8)
            .trim()
            .parse::<usize>()
            .unwrap();
        let record = 800 + ann_bytes;
        let ann = |r: usize| &bytes[256 * 4 + r * record + 800..256 * 4 + (r + 1) * record];
        // Kemp & Olivan 2003: the first TAL of each record is "+<start>\x14\x14\x00".
        assert!(ann(0).starts_with(b"+0\x14\x14\x00+0.5\x14cue-a\x14\x00"));
        assert!(ann(1).starts_with(b"+1\x14\x14\x00\x00"));
        assert!(ann(2).starts_with(b"+2\x14\x14\x00+2.25\x150.1\x14cue-b\x14\x00"));
    }

    #[test]
    fn same_spec_same_bytes_and_no_temporary_left() {
        let dir = tempfile::tempdir().unwrap();
        let (a, b) = (dir.path().join("a.edf"), dir.path().join("b.edf"));
        write_edf_plus(&a, &spec()).unwrap();
        write_edf_plus(&b, &spec()).unwrap();
        assert_eq!(std::fs::read(&a).unwrap(), std::fs::read(&b).unwrap());
        assert_eq!(std::fs::read_dir(dir.path()).unwrap().count(), 2);
    }

    #[test]
    fn physical_ranges_fit_and_cover_the_peak() {
        let range = |peak: f64| {
            physical_range(&SignalSpec {
                label: "x".into(),
                unit: "uV".into(),
                samples: vec![-peak],
            })
        };
        for peak in [1e-4, 0.3, 45.3, 99.99999, 123456.7, 3.0, 9999998.5] {
            let (value, text) = range(peak).unwrap();
            assert!(value >= peak && text.len() <= 7, "{peak}: {text}");
            assert!(value <= peak * 1.001 + 1e-5, "{peak}: {text} is not tight");
        }
        assert_eq!(range(0.0).unwrap().1, "1.00000");
        assert!(range(9999999.5).is_err());
    }

    #[test]
    fn bad_specs_are_reported() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("bad.edf");
        type Edit = fn(&mut EdfWriteSpec);
        let cases: Vec<(Edit, &str)> = vec![
            (|s| s.signals[0].unit = "µV".into(), "printable ASCII"),
            (
                |s| s.signals[0].samples.pop().map(drop).unwrap_or(()),
                "samples",
            ),
            (|s| s.signals[1].samples[3] = f64::NAN, "non-finite"),
            (|s| s.record_seconds = 0.3333, "whole number"),
            (|s| s.signals.clear(), "no signals"),
            (|s| s.start_date = "2020-01-01".into(), "start date"),
            (|s| s.signals[0].label = "a label far too long".into(), "16"),
            (|s| s.annotations[0].label = String::new(), "non-empty"),
        ];
        for (edit, needle) in cases {
            let mut s = spec();
            edit(&mut s);
            let err = write_edf_plus(&path, &s).unwrap_err().to_string();
            assert!(err.contains(needle) && err.contains("bad.edf"), "{err}");
            assert_eq!(err.matches("bad.edf").count(), 1, "{err}");
            assert!(!path.exists());
        }
    }

    #[test]
    fn spec_errors_name_the_field_and_value() {
        let mut s = spec();
        s.signals[1].label = "a label far too long".into();
        let plan = Plan::new(&s).unwrap();
        assert_eq!(
            plan.header(&s).err(),
            Some(EdfWriteError::TooLong {
                field: "label of signal 2".into(),
                text: "a label far too long".into(),
                length: 20,
                width: 16,
            })
        );
        let mut s = spec();
        s.start_time = "10:00:00".into();
        assert!(matches!(
            Plan::new(&s).unwrap().header(&s),
            Err(EdfWriteError::DateTime {
                field: "start time",
                separator: '.',
                ..
            })
        ));
        let mut s = spec();
        s.signals.clear();
        assert_eq!(Plan::new(&s).err(), Some(EdfWriteError::NoSignals));
        let mut s = spec();
        s.annotations[1].label = String::new();
        assert!(matches!(
            Plan::new(&s).err(),
            Some(EdfWriteError::Annotation(TalError::Label { onset, .. })) if onset == 2.25
        ));
        let mut s = spec();
        s.record_seconds = 0.3333;
        assert!(matches!(
            Plan::new(&s).err(),
            Some(EdfWriteError::FractionalRecord { .. })
        ));
    }
}
