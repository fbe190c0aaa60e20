//! Time-stamped annotation lists (TALs) of EDF+ annotation signals (Kemp & Olivan 2003, §2.2).
//!
//! A TAL is `+onset[\x15duration]\x14text\x14[text\x14]...\x00`: onset in seconds relative to
//! the file's start time with a mandatory sign, an optional unsigned duration, then one or more
//! texts each closed by 0x14, the whole list closed by 0x00. The bytes after the last TAL of a
//! record are 0x00. The first TAL of each record of the first annotation signal is the record's
//! time stamp, whose first text is empty.

use crate::array::Event;

/// Separates onset from duration.
const DURATION_MARK: u8 = 0x15;
/// Closes the onset/duration part and each text.
const TEXT_END: u8 = 0x14;
/// Closes a TAL.
const TAL_END: u8 = 0x00;

/// A TAL that cannot be read (the first four variants) or an annotation that cannot be written
/// as one (the last two). The reader adds the file and the data record; the writer the file.
#[derive(Clone, Debug, PartialEq, thiserror::Error)]
pub enum TalError {
    /// The onset is not `[+-]digits[.digits]` with its mandatory sign.
    #[error("an annotation has the onset {found:?}, expected e.g. +12.5")]
    Onset {
        /// The onset's text.
        found: String,
    },
    /// The duration is not `digits[.digits]`.
    #[error("the annotation at {onset} s has the duration {found:?}, expected e.g. 0.5")]
    Duration {
        /// The annotation's onset in seconds.
        onset: f64,
        /// The duration's text.
        found: String,
    },
    /// No 0x14 after the onset (and duration).
    #[error("the annotation at {onset} s is not closed by byte 0x14 after its onset")]
    Unclosed {
        /// The annotation's onset in seconds.
        onset: f64,
    },
    /// The first annotation signal's bytes of a record hold no TAL at all.
    #[error("a data record's annotations lack the time-stamp TAL that EDF+ requires")]
    NoTimeStamp,
    /// A label that is empty or holds a byte the TAL syntax reserves.
    #[error(
        "the annotation at {onset} s has the label {label:?}; labels must be non-empty and hold no bytes 0x00, 0x14 or 0x15"
    )]
    Label {
        /// The annotation's onset in seconds.
        onset: f64,
        /// The label.
        label: String,
    },
    /// A non-finite onset, or a duration that is negative or not finite.
    #[error(
        "the annotation {label:?} has onset {onset} and duration {duration}; expected a finite onset and a duration >= 0"
    )]
    Timing {
        /// The label.
        label: String,
        /// The onset in seconds.
        onset: f64,
        /// The duration in seconds.
        duration: f64,
    },
}

/// What the annotation bytes of one record hold.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct RecordTals {
    /// The record's time stamp (onset of its first TAL), when `has_stamp` was asked for.
    pub stamp: Option<f64>,
    /// Every non-empty text as an event; onsets are relative to the header's start time.
    pub annotations: Vec<Event>,
}

/// Parse the annotation bytes of one record. `has_stamp`: this is the first annotation signal,
/// whose first TAL is the record's time stamp.
pub fn parse_record_tals(bytes: &[u8], has_stamp: bool) -> Result<RecordTals, TalError> {
    let mut out = RecordTals::default();
    let tals = bytes.split(|&b| b == TAL_END).filter(|t| !t.is_empty());
    for (index, tal) in tals.enumerate() {
        let (onset, duration, texts) = parse_one(tal)?;
        let stamp_tal = has_stamp && index == 0;
        if stamp_tal {
            out.stamp = Some(onset);
        }
        // The time-keeping TAL's first text is empty by definition; any later texts in it are
        // ordinary annotations at the record's start.
        let texts = texts.into_iter().skip(usize::from(stamp_tal));
        for text in texts.filter(|t| !t.is_empty()) {
            out.annotations.push(Event {
                onset,
                duration,
                label: text,
            });
        }
    }
    if has_stamp && out.stamp.is_none() {
        return Err(TalError::NoTimeStamp);
    }
    Ok(out)
}

/// Split one TAL (without its closing 0x00) into onset, duration and texts.
fn parse_one(tal: &[u8]) -> Result<(f64, f64, Vec<String>), TalError> {
    let mut parts = tal.split(|&b| b == TEXT_END);
    let timing = parts.next().unwrap_or_default();
    let mut timing_parts = timing.splitn(2, |&b| b == DURATION_MARK);
    let onset_text = String::from_utf8_lossy(timing_parts.next().unwrap_or_default());
    let onset = parse_number(&onset_text, true).ok_or_else(|| TalError::Onset {
        found: onset_text.to_string(),
    })?;
    let duration = match timing_parts.next() {
        Some(d) => {
            let text = String::from_utf8_lossy(d);
            parse_number(&text, false).ok_or_else(|| TalError::Duration {
                onset,
                found: text.to_string(),
            })?
        }
        None => 0.0,
    };
    // A well-formed TAL ends with 0x14, so the last split part is empty.
    let mut texts: Vec<String> = parts
        .map(|t| String::from_utf8_lossy(t).trim().to_string())
        .collect();
    if tal.last() == Some(&TEXT_END) {
        texts.pop();
    }
    if !tal.contains(&TEXT_END) {
        return Err(TalError::Unclosed { onset });
    }
    Ok((onset, duration, texts))
}

/// A TAL number: `[+-]digits[.digits]`, the sign mandatory for onsets and absent in durations.
fn parse_number(text: &str, signed: bool) -> Option<f64> {
    let body = if signed {
        text.strip_prefix('+').or_else(|| text.strip_prefix('-'))?
    } else {
        text
    };
    let digits_ok = !body.is_empty()
        && body.chars().all(|c| c.is_ascii_digit() || c == '.')
        && body.chars().filter(|&c| c == '.').count() <= 1
        && body.chars().any(|c| c.is_ascii_digit());
    if !digits_ok {
        return None;
    }
    text.parse::<f64>().ok()
}

/// A TAL number as written: fixed point with at most 7 decimals (0.1 µs, far below any
/// sampling interval), trailing zeros dropped, so equal inputs give equal bytes.
pub fn format_number(value: f64, signed: bool) -> String {
    // Normalise -0 so that it is written as +0.
    let value = if value == 0.0 { 0.0 } else { value };
    let mut text = format!("{:.7}", value.abs());
    while text.ends_with('0') {
        text.pop();
    }
    if text.ends_with('.') {
        text.pop();
    }
    match (signed, value < 0.0) {
        (true, true) => format!("-{text}"),
        (true, false) => format!("+{text}"),
        (false, _) => text,
    }
}

/// The time-keeping TAL that opens a record starting at `stamp` seconds.
pub fn stamp_tal(stamp: f64) -> Vec<u8> {
    let mut out = format_number(stamp, true).into_bytes();
    out.extend_from_slice(&[TEXT_END, TEXT_END, TAL_END]);
    out
}

/// One annotation as a TAL; the duration is written only when positive.
pub fn event_tal(event: &Event) -> Result<Vec<u8>, TalError> {
    let label = event.label.as_bytes();
    if label.is_empty() || label.iter().any(|b| matches!(b, 0x00 | 0x14 | 0x15)) {
        return Err(TalError::Label {
            onset: event.onset,
            label: event.label.clone(),
        });
    }
    if !(event.onset.is_finite() && event.duration.is_finite() && event.duration >= 0.0) {
        return Err(TalError::Timing {
            label: event.label.clone(),
            onset: event.onset,
            duration: event.duration,
        });
    }
    let mut out = format_number(event.onset, true).into_bytes();
    if event.duration > 0.0 {
        out.push(DURATION_MARK);
        out.extend_from_slice(format_number(event.duration, false).as_bytes());
    }
    out.push(TEXT_END);
    out.extend_from_slice(label);
    out.extend_from_slice(&[TEXT_END, TAL_END]);
    Ok(out)
}

#[cfg(test)]
mod tests {
    use super::*;

    // The byte layout below is the example TAL form given in the EDF+ specification
    // (Kemp & Olivan 2003): "+180\x14Lights off\x14Close door\x14\x00" etc.
    #[test]
    fn parses_spec_style_tals() {
        let bytes = b"+0\x14\x14\x00+180\x14Lights off\x14Close door\x14\x00+1800.2\x1525.5\x14Apnea\x14\x00\x00\x00";
        let got = parse_record_tals(bytes, true).unwrap();
        assert_eq!(got.stamp, Some(0.0));
        let labels: Vec<_> = got.annotations.iter().map(|e| e.label.as_str()).collect();
        assert_eq!(labels, ["Lights off", "Close door", "Apnea"]);
        assert_eq!(got.annotations[0].onset, 180.0);
        assert_eq!(got.annotations[1].onset, 180.0);
        assert_eq!(got.annotations[2].onset, 1800.2);
        assert_eq!(got.annotations[2].duration, 25.5);
    }

    #[test]
    fn negative_onsets_and_missing_stamp() {
        let got = parse_record_tals(b"-0.065\x14\x14\x00", true).unwrap();
        assert_eq!(got.stamp, Some(-0.065));
        assert_eq!(
            parse_record_tals(b"\x00\x00", true),
            Err(TalError::NoTimeStamp)
        );
        assert!(parse_record_tals(b"\x00\x00", false)
            .unwrap()
            .annotations
            .is_empty());
    }

    #[test]
    fn rejects_malformed_onsets() {
        for bad in [
            &b"12\x14x\x14\x00"[..],
            b"+1e3\x14x\x14\x00",
            b"+\x14x\x14\x00",
            b"+1.2.3\x14x\x14\x00",
        ] {
            assert!(
                matches!(parse_record_tals(bad, false), Err(TalError::Onset { .. })),
                "{bad:?}"
            );
        }
        assert_eq!(
            parse_record_tals(b"+1\x15-2\x14x\x14\x00", false),
            Err(TalError::Duration {
                onset: 1.0,
                found: "-2".into()
            })
        );
        assert_eq!(
            parse_record_tals(b"+1", false),
            Err(TalError::Unclosed { onset: 1.0 })
        );
    }

    #[test]
    fn formats_and_parses_back() {
        assert_eq!(format_number(0.0, true), "+0");
        assert_eq!(format_number(-0.0, true), "+0");
        assert_eq!(format_number(12.5, true), "+12.5");
        assert_eq!(format_number(-0.25, true), "-0.25");
        assert_eq!(format_number(3.0, false), "3");
        let event = Event {
            onset: 2.125,
            duration: 0.5,
            label: "cue-a".into(),
        };
        let bytes = event_tal(&event).unwrap();
        assert_eq!(bytes, b"+2.125\x150.5\x14cue-a\x14\x00");
        let back = parse_record_tals(&bytes, false).unwrap();
        assert_eq!(back.annotations, vec![event]);
        let bad = Event {
            onset: 1.0,
            duration: 0.0,
            label: "a\x14b".into(),
        };
        assert!(matches!(event_tal(&bad), Err(TalError::Label { .. })));
        let negative = Event {
            duration: -1.0,
            label: "ab".into(),
            ..bad
        };
        assert!(matches!(event_tal(&negative), Err(TalError::Timing { .. })));
    }
}
