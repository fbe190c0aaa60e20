//! From EDF signal headers to the channels of a recording: names and types, the unit factor to
//! volts, and which channels share the one sampling rate the array can have.
//!
//! Types come from the BIDS channels sidecar when it names the channel, else from an EDF+ label
//! prefix (`EEG Fz` → type `EEG`, name `Fz`), else `EEG`. The recording's rate is the rate most
//! EEG-type channels have (ties: the one that comes first in the file; when there is no EEG
//! channel, all channels vote). Every other channel is dropped with a warning naming it.

use super::edf::{FileKind, Header};
use super::tsv::ChannelRow;
use super::Choice;

/// EDF+ signal-type prefixes (Kemp & Olivan 2003, "standard texts"; list recalled from memory,
/// so only prefixes that are unambiguous signal types are split off).
const EDF_PLUS_TYPES: [&str; 14] = [
    "EEG", "ECG", "EOG", "ERG", "EMG", "MEG", "MCG", "EP", "Temp", "Resp", "SaO2", "Light",
    "Sound", "Event",
];

/// Why the channels of a recording cannot be chosen (the same for every format); the reader
/// adds the file's path.
#[derive(Clone, Debug, PartialEq, thiserror::Error)]
pub enum ChannelError {
    /// `data.channels` names a channel twice.
    #[error("data.channels: {name:?} is listed twice")]
    ListedTwice {
        /// The name.
        name: String,
    },
    /// `data.channels` names a channel the recording does not have.
    #[error(
        "data.channels: the recording has no channel named {name:?}; its channels are {}",
        channels.join(", ")
    )]
    NoSuchChannel {
        /// The name asked for.
        name: String,
        /// The names the recording has.
        channels: Vec<String>,
    },
    /// No sampling rate is shared by more EEG channels than any other.
    #[error(
        "the EEG channels share no sampling rate that most of them have ({}); phasewise analyses the EEG channels at one rate: set `data.rate` to resample every channel as it is read, or choose channels of one rate with `data.channels`",
        rates.iter().map(|(name, hz)| format!("{name} {hz} Hz")).collect::<Vec<_>>().join(", ")
    )]
    NoMajorityRate {
        /// Each voting channel's name and rate in Hz.
        rates: Vec<(String, f64)>,
    },
    /// Two channels end up with the same name.
    #[error("two channels are named {name:?}; channel names must be unique")]
    SameName {
        /// The name.
        name: String,
    },
}

/// One data signal that becomes a channel.
#[derive(Clone, Debug, PartialEq)]
pub struct Channel {
    /// Index of the signal in the header.
    pub signal: usize,
    /// Channel name (label with any EDF+ type prefix split off).
    pub name: String,
    /// Channel type, upper case (`EEG`, `EOG`, ...).
    pub kind: String,
    /// Factor from the file's physical unit to volts (1 when the unit is not a voltage).
    pub to_volts: f64,
}

/// The channels to read, the shared sampling rate and their samples per record.
#[derive(Clone, Debug, PartialEq)]
pub struct Selection {
    /// Kept channels in file order.
    pub channels: Vec<Channel>,
    /// Sampling rate in Hz (of the output: `data.rate` when every channel is resampled).
    pub rate: f64,
    /// Samples per data record of every kept channel (when not resampled).
    pub samples_per_record: usize,
    /// `Some` when every channel is resampled to `rate` as it is read (`data.rate`): each kept
    /// channel's own samples per data record, in channel order.
    pub resampled_from: Option<Vec<usize>>,
}

/// Name, type and unit factor of every data signal, then keep those at the recording's rate.
/// Warnings (dropped channels, units that are not voltages, channels the sidecar misses) are
/// appended to `warnings`.
///
/// `choice` narrows this: only the channels `data.channels` names are kept (an unknown name is an
/// error), and with `data.rate` every kept channel is kept whatever its rate, to be resampled.
pub fn select(
    header: &Header,
    sidecar: Option<&[ChannelRow]>,
    choice: &Choice,
    warnings: &mut Vec<String>,
) -> Result<Selection, ChannelError> {
    // Each channel's own warnings are kept apart so that a dropped channel reports only its drop.
    let all: Vec<(Channel, usize, Vec<String>)> = header
        .signals
        .iter()
        .enumerate()
        .filter(|(_, s)| !s.annotation)
        .map(|(i, s)| {
            let mut own = Vec::new();
            let channel = describe(header, i, sidecar, &mut own);
            (channel, s.samples_per_record, own)
        })
        .collect();
    let all = keep_chosen(all, choice.channels.as_deref(), |c| {
        (c.0.name.clone(), header.signals[c.0.signal].label.clone())
    })?;
    if let Some(rate) = choice.rate {
        let per_record = all.iter().map(|c| c.1).collect();
        let channels: Vec<Channel> = all
            .into_iter()
            .map(|(channel, _, own)| {
                warnings.extend(own);
                channel
            })
            .collect();
        check_unique(&channels)?;
        return Ok(Selection {
            channels,
            rate,
            samples_per_record: 0,
            resampled_from: Some(per_record),
        });
    }
    let spr = majority_samples_per_record(&all, header.record_seconds)?;
    let mut channels = Vec::with_capacity(all.len());
    for (channel, n, own) in all {
        if n == spr {
            warnings.extend(own);
            channels.push(channel);
        } else {
            warnings.push(format!(
                "channel {} ({}) is sampled at {} Hz, not at the recording's {} Hz; it was dropped (`data.rate` would resample it)",
                channel.name,
                channel.kind,
                n as f64 / header.record_seconds,
                spr as f64 / header.record_seconds
            ));
        }
    }
    check_unique(&channels)?;
    Ok(Selection {
        channels,
        rate: spr as f64 / header.record_seconds,
        samples_per_record: spr,
        resampled_from: None,
    })
}

/// The items whose channel `data.channels` names (matched by name or by the full label that
/// `name_label` gives), in file order; all of them when `wanted` is `None`. A name that no
/// channel has, or one given twice, is an error naming the field and the channels there are.
pub fn keep_chosen<T>(
    items: Vec<T>,
    wanted: Option<&[String]>,
    name_label: impl Fn(&T) -> (String, String),
) -> Result<Vec<T>, ChannelError> {
    let Some(wanted) = wanted else {
        return Ok(items);
    };
    for (i, w) in wanted.iter().enumerate() {
        if wanted[..i].contains(w) {
            return Err(ChannelError::ListedTwice { name: w.clone() });
        }
        if !items.iter().any(|t| {
            let (name, label) = name_label(t);
            &name == w || label.trim() == w
        }) {
            return Err(ChannelError::NoSuchChannel {
                name: w.clone(),
                channels: items.iter().map(|t| name_label(t).0).collect(),
            });
        }
    }
    Ok(items
        .into_iter()
        .filter(|t| {
            let (name, label) = name_label(t);
            wanted.iter().any(|w| *w == name || w == label.trim())
        })
        .collect())
}

/// Name, type and unit factor of signal `index`.
fn describe(
    header: &Header,
    index: usize,
    sidecar: Option<&[ChannelRow]>,
    warnings: &mut Vec<String>,
) -> Channel {
    let signal = &header.signals[index];
    let bdf_status = header.kind == FileKind::Bdf && split_label(&signal.label).0 == "Status";
    // BioSemi's trigger channel.
    let default_type = if bdf_status { "TRIG" } else { "EEG" };
    describe_label(
        index,
        &signal.label,
        &signal.unit,
        default_type,
        sidecar,
        warnings,
    )
}

/// Name, type and unit factor of the channel labelled `label` whose header gives the unit
/// `header_unit`: the type from the sidecar row that names it, else from an EDF+ type prefix of
/// the label, else `default_type`; the unit from the header, else from the sidecar.
pub fn describe_label(
    index: usize,
    label: &str,
    header_unit: &str,
    default_type: &str,
    sidecar: Option<&[ChannelRow]>,
    warnings: &mut Vec<String>,
) -> Channel {
    let (name, prefix_type) = split_label(label);
    let row = sidecar.and_then(|rows| rows.iter().find(|r| r.name == label || r.name == name));
    if sidecar.is_some() && row.is_none() {
        warnings.push(format!(
            "channel {name} is not listed in the channels sidecar; its type is taken from its label"
        ));
    }
    let kind = row
        .and_then(|r| r.kind.clone())
        .or(prefix_type)
        .unwrap_or_else(|| default_type.to_string());
    let unit_from_sidecar = row.and_then(|r| r.units.as_deref());
    let to_volts = unit_factor(&name, header_unit, unit_from_sidecar, warnings);
    Channel {
        signal: index,
        name,
        kind,
        to_volts,
    }
}

/// Split an EDF+ label `"<type> <name>"` into name and upper-case type; a label that is just a
/// type word (`ECG`) is its own name with that type.
pub fn split_label(label: &str) -> (String, Option<String>) {
    let label = label.trim();
    let (first, rest) = match label.split_once(' ') {
        Some((first, rest)) => (first, rest.trim()),
        None => (label, ""),
    };
    let known = EDF_PLUS_TYPES
        .iter()
        .find(|t| t.eq_ignore_ascii_case(first));
    match known {
        Some(t) if rest.is_empty() => (label.to_string(), Some(t.to_ascii_uppercase())),
        Some(t) => (rest.to_string(), Some(t.to_ascii_uppercase())),
        None => (label.to_string(), None),
    }
}

/// Factor from a physical dimension to volts; `None` when it is not a voltage unit.
pub fn volts_per_unit(unit: &str) -> Option<f64> {
    match unit.trim() {
        "V" | "v" => Some(1.0),
        "mV" | "mv" => Some(1e-3),
        // micro sign U+00B5 (also what Latin-1 0xB5 reads as) and Greek mu U+03BC
        "uV" | "uv" | "UV" | "\u{b5}V" | "\u{3bc}V" => Some(1e-6),
        "nV" | "nv" => Some(1e-9),
        _ => None,
    }
}

/// The header's unit, or the sidecar's when the header's is not a voltage.
fn unit_factor(
    name: &str,
    header_unit: &str,
    sidecar_unit: Option<&str>,
    warnings: &mut Vec<String>,
) -> f64 {
    if let Some(f) = volts_per_unit(header_unit) {
        return f;
    }
    if let Some(f) = sidecar_unit.and_then(volts_per_unit) {
        return f;
    }
    warnings.push(format!(
        "channel {name} has the physical dimension {header_unit:?}, which is not a voltage unit (V, mV, uV, nV); its values are kept unconverted"
    ));
    1.0
}

/// Samples per record that most EEG-type channels have; all channels vote when none is EEG.
/// A tie between different values is an error: there is no honest way to choose which EEG
/// channels to keep, so the user must resample or drop channels.
fn majority_samples_per_record(
    all: &[(Channel, usize, Vec<String>)],
    record_seconds: f64,
) -> Result<usize, ChannelError> {
    let eeg: Vec<&(Channel, usize, Vec<String>)> =
        all.iter().filter(|(c, _, _)| c.kind == "EEG").collect();
    let voters: Vec<&(Channel, usize, Vec<String>)> = if eeg.is_empty() {
        all.iter().collect()
    } else {
        eeg
    };
    let votes = |n: usize| voters.iter().filter(|v| v.1 == n).count();
    let most = voters.iter().map(|v| votes(v.1)).max().unwrap_or(0);
    let mut leaders: Vec<usize> = voters
        .iter()
        .map(|v| v.1)
        .filter(|&n| votes(n) == most)
        .collect();
    leaders.dedup();
    leaders.sort_unstable();
    leaders.dedup();
    match leaders.as_slice() {
        [] => Ok(0),
        [one] => Ok(*one),
        _ => {
            let rates = voters
                .iter()
                .map(|(c, n, _)| (c.name.clone(), *n as f64 / record_seconds))
                .collect();
            Err(ChannelError::NoMajorityRate { rates })
        }
    }
}

/// Channel names must be unique: every op addresses channels by name.
pub fn check_unique(channels: &[Channel]) -> Result<(), ChannelError> {
    for (i, c) in channels.iter().enumerate() {
        if channels[..i].iter().any(|d| d.name == c.name) {
            return Err(ChannelError::SameName {
                name: c.name.clone(),
            });
        }
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    // Label forms from the EDF+ specification's examples (Kemp & Olivan 2003): "EEG Fpz-Cz",
    // "EOG horizontal", "ECG".
    #[test]
    fn splits_edf_plus_type_prefixes() {
        assert_eq!(
            split_label("EEG Fpz-Cz"),
            ("Fpz-Cz".into(), Some("EEG".into()))
        );
        assert_eq!(
            split_label("EOG horizontal"),
            ("horizontal".into(), Some("EOG".into()))
        );
        assert_eq!(split_label("ECG"), ("ECG".into(), Some("ECG".into())));
        assert_eq!(
            split_label("Resp nasal"),
            ("nasal".into(), Some("RESP".into()))
        );
        assert_eq!(split_label("Fz"), ("Fz".into(), None));
        assert_eq!(split_label("Fp1 ref"), ("Fp1 ref".into(), None));
    }

    #[test]
    fn choices_and_names_fail_with_their_variant() {
        let names = || vec!["Fz".to_string(), "Cz".to_string()];
        let pick = |wanted: &[&str]| {
            let wanted: Vec<String> = wanted.iter().map(|w| w.to_string()).collect();
            keep_chosen(names(), Some(&wanted), |n| (n.clone(), format!("EEG {n}")))
        };
        assert_eq!(pick(&["EEG Cz"]), Ok(vec!["Cz".to_string()]));
        assert_eq!(
            pick(&["Cz", "Cz"]),
            Err(ChannelError::ListedTwice { name: "Cz".into() })
        );
        let err = pick(&["Pz"]).unwrap_err();
        assert_eq!(
            err,
            ChannelError::NoSuchChannel {
                name: "Pz".into(),
                channels: names(),
            }
        );
        assert_eq!(
            err.to_string(),
            "data.channels: the recording has no channel named \"Pz\"; its channels are Fz, Cz"
        );
        let channel = |name: &str| Channel {
            signal: 0,
            name: name.into(),
            kind: "EEG".into(),
            to_volts: 1.0,
        };
        assert_eq!(
            check_unique(&[channel("Fz"), channel("Cz"), channel("Fz")]),
            Err(ChannelError::SameName { name: "Fz".into() })
        );
        let voters = vec![
            (channel("Fz"), 100, Vec::new()),
            (channel("Cz"), 200, Vec::new()),
        ];
        let err = majority_samples_per_record(&voters, 0.5).unwrap_err();
        assert_eq!(
            err,
            ChannelError::NoMajorityRate {
                rates: vec![("Fz".into(), 200.0), ("Cz".into(), 400.0)]
            }
        );
        assert!(err.to_string().contains("(Fz 200 Hz, Cz 400 Hz)"), "{err}");
    }

    #[test]
    fn converts_voltage_units() {
        assert_eq!(volts_per_unit("uV"), Some(1e-6));
        assert_eq!(volts_per_unit("\u{b5}V"), Some(1e-6));
        assert_eq!(volts_per_unit("mV"), Some(1e-3));
        assert_eq!(volts_per_unit("V"), Some(1.0));
        assert_eq!(volts_per_unit("nV"), Some(1e-9));
        assert_eq!(volts_per_unit("degC"), None);
        assert_eq!(volts_per_unit(""), None);
    }
}
