//! The BrainVision header (`.vhdr`) and the text layer it shares with the marker file: an
//! identification line, then `[Section]` lines and `key=value` lines; `;` starts a comment line;
//! the `[Comment]` section is free text. The text is UTF-8 when `Codepage=UTF-8`, else Latin-1
//! (the spec's `ANSI`, where the micro sign is byte 0xB5).

use std::path::{Path, PathBuf};

/// One `key=value` line of a section.
#[derive(Clone, Debug, PartialEq)]
pub struct Entry {
    /// 1-based line number in the file.
    pub line: usize,
    /// The key (left of the first `=`), trimmed.
    pub key: String,
    /// The value (right of the first `=`), trimmed.
    pub value: String,
}

/// A parsed BrainVision text file: its sections with their entries, in file order.
#[derive(Clone, Debug, Default)]
pub struct IniText {
    /// `(section name, entries)`; entries before any section are under `""`.
    pub sections: Vec<(String, Vec<Entry>)>,
}

/// An error at a line of a text file, naming the key when there is one.
#[derive(Clone, Debug, PartialEq, thiserror::Error)]
#[error("{}: {message}", place(*.line, .key.as_deref()))]
pub struct LineError {
    /// 1-based line number (0: the file as a whole).
    pub line: usize,
    /// The key of that line, when the problem is its value.
    pub key: Option<String>,
    /// What is wrong and what was expected.
    pub message: String,
}

/// `line 7, Key`, `line 7`, `Key` or `header`.
fn place(line: usize, key: Option<&str>) -> String {
    match (line, key) {
        (0, Some(k)) => k.to_string(),
        (0, None) => "header".to_string(),
        (l, Some(k)) => format!("line {l}, {k}"),
        (l, None) => format!("line {l}"),
    }
}

impl LineError {
    /// An error at `line`, in the value of `key`.
    pub fn at_key(line: usize, key: &str, message: impl Into<String>) -> Self {
        LineError {
            line,
            key: Some(key.to_string()),
            message: message.into(),
        }
    }

    /// An error in the value of `entry`.
    pub fn at(entry: &Entry, message: impl Into<String>) -> Self {
        LineError {
            line: entry.line,
            key: Some(entry.key.clone()),
            message: message.into(),
        }
    }
}

/// Bytes to text: UTF-8 (without BOM) when it decodes and the file does not declare another
/// code page, else Latin-1 (every byte is the code point of the same value).
pub fn decode_text(bytes: &[u8]) -> String {
    let bytes = bytes.strip_prefix(b"\xef\xbb\xbf").unwrap_or(bytes);
    let declares_ansi = bytes
        .split(|&b| b == b'\n')
        .any(|l| l.trim_ascii().eq_ignore_ascii_case(b"Codepage=ANSI"));
    match std::str::from_utf8(bytes) {
        Ok(text) if !declares_ansi => text.to_string(),
        _ => bytes.iter().map(|&b| char::from(b)).collect(),
    }
}

impl IniText {
    /// Parse `text`, whose first line must contain `identification` (case-insensitive).
    /// Sections listed in `strict` must hold only `key=value` lines; other sections (and the
    /// free text of `[Comment]`) are kept loosely: lines without `=` are ignored there.
    pub fn parse(text: &str, identification: &str, strict: &[&str]) -> Result<IniText, LineError> {
        let mut lines = text.lines().enumerate().map(|(i, l)| (i + 1, l.trim()));
        let first = lines.next().map(|(_, l)| l).unwrap_or_default();
        if !first
            .to_ascii_lowercase()
            .contains(&identification.to_ascii_lowercase())
        {
            return Err(LineError {
                line: 1,
                key: None,
                message: format!(
                    "this is not a BrainVision file: its first line is {:?}, expected one that names the \"{identification}\"",
                    first.chars().take(80).collect::<String>()
                ),
            });
        }
        let mut out = IniText::default();
        out.sections.push((String::new(), Vec::new()));
        for (line, text) in lines {
            if text.is_empty() || text.starts_with(';') {
                continue;
            }
            if let Some(name) = text.strip_prefix('[').and_then(|t| t.strip_suffix(']')) {
                out.sections.push((name.trim().to_string(), Vec::new()));
                continue;
            }
            let (section, entries) = out.sections.last_mut().expect("one section at least");
            if section.eq_ignore_ascii_case("Comment") {
                continue;
            }
            match text.split_once('=') {
                Some((key, value)) => entries.push(Entry {
                    line,
                    key: key.trim().to_string(),
                    value: value.trim().to_string(),
                }),
                None if strict.iter().any(|s| s.eq_ignore_ascii_case(section)) => {
                    return Err(LineError {
                        line,
                        key: None,
                        message: format!(
                            "expected `key=value` in section [{section}], found {:?}",
                            text.chars().take(80).collect::<String>()
                        ),
                    })
                }
                None => {}
            }
        }
        Ok(out)
    }

    /// The entries of section `name` (case-insensitive; empty when absent).
    pub fn section(&self, name: &str) -> &[Entry] {
        self.sections
            .iter()
            .find(|(n, _)| n.eq_ignore_ascii_case(name))
            .map_or(&[], |(_, e)| e.as_slice())
    }

    /// The entry `key` of section `section` (keys are case-insensitive).
    pub fn get(&self, section: &str, key: &str) -> Option<&Entry> {
        self.section(section)
            .iter()
            .find(|e| e.key.eq_ignore_ascii_case(key))
    }

    /// Like [`IniText::get`], but a missing key is an error naming section and key.
    pub fn require(&self, section: &str, key: &str) -> Result<&Entry, LineError> {
        self.get(section, key).ok_or_else(|| LineError {
            line: 0,
            key: Some(key.to_string()),
            message: format!("the [{section}] section has no {key}= line, which is required"),
        })
    }
}

/// How samples are laid out in the data file.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Orientation {
    /// Point by point: channel 1 point 1, channel 2 point 1, ...
    Multiplexed,
    /// Channel by channel: all points of channel 1, then all of channel 2, ...
    Vectorized,
}

/// The sample type of a binary data file (little-endian).
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum BinaryFormat {
    /// 16-bit two's complement integers.
    Int16,
    /// 32-bit two's complement integers.
    Int32,
    /// IEEE 754 binary32.
    Float32,
}

impl BinaryFormat {
    /// Bytes per sample.
    pub fn width(self) -> usize {
        match self {
            BinaryFormat::Int16 => 2,
            BinaryFormat::Int32 | BinaryFormat::Float32 => 4,
        }
    }

    /// The header's name of the format.
    pub fn name(self) -> &'static str {
        match self {
            BinaryFormat::Int16 => "INT_16",
            BinaryFormat::Int32 => "INT_32",
            BinaryFormat::Float32 => "IEEE_FLOAT_32",
        }
    }
}

/// One `Ch<n>=` line of `[Channel Infos]`.
#[derive(Clone, Debug, PartialEq)]
pub struct ChannelInfo {
    /// The channel's name (`\1` decoded to a comma).
    pub label: String,
    /// The name of its reference channel (often empty).
    pub reference: String,
    /// Value of one stored unit, in `unit` (1 when the field is empty).
    pub resolution: f64,
    /// The unit of `resolution` (µV when the field is empty).
    pub unit: String,
}

/// What the header says.
#[derive(Clone, Debug, PartialEq)]
pub struct VhdrHeader {
    /// The data file, resolved against the header's folder.
    pub data_file: PathBuf,
    /// The line of `DataFile=` in the header.
    pub data_file_line: usize,
    /// The marker file, resolved against the header's folder, when the header names one.
    pub marker_file: Option<PathBuf>,
    /// Sample layout.
    pub orientation: Orientation,
    /// Sample type.
    pub format: BinaryFormat,
    /// Sampling rate in Hz (10^6 / SamplingInterval in µs).
    pub rate: f64,
    /// The channels in file order.
    pub channels: Vec<ChannelInfo>,
    /// `DataPoints=` when the header has it, with its entry.
    pub data_points: Option<(usize, Entry)>,
}

/// Identification text of the first header line (versions 1.0 and 2.0 spell "Brain Vision"
/// and "BrainVision"; both end in this).
const HEADER_ID: &str = "Data Exchange Header File";
const COMMON: &str = "Common Infos";
const BINARY: &str = "Binary Infos";
const CHANNELS: &str = "Channel Infos";

/// The data and marker file names a header gives, resolved against its folder, without checking
/// anything else: for the source key, where a damaged header must not hide its data file.
pub fn referenced_files(vhdr: &Path) -> Vec<PathBuf> {
    let Ok(bytes) = std::fs::read(vhdr) else {
        return Vec::new();
    };
    let text = decode_text(&bytes);
    let Ok(ini) = IniText::parse(&text, HEADER_ID, &[]) else {
        return Vec::new();
    };
    ["DataFile", "MarkerFile"]
        .iter()
        .filter_map(|k| ini.get(COMMON, k))
        .filter(|e| !e.value.is_empty())
        .map(|e| resolve(vhdr, &e.value))
        .collect()
}

/// A file name from a header, relative to the header's folder (an absolute name stays).
fn resolve(vhdr: &Path, name: &str) -> PathBuf {
    vhdr.parent().unwrap_or(Path::new("")).join(name)
}

impl VhdrHeader {
    /// Parse the text of the header file `vhdr`.
    pub fn parse(vhdr: &Path, text: &str) -> Result<VhdrHeader, LineError> {
        let ini = IniText::parse(text, HEADER_ID, &[COMMON, BINARY, CHANNELS])?;
        let data = ini.require(COMMON, "DataFile")?;
        if data.value.is_empty() {
            return Err(LineError::at(data, "the data file name is empty"));
        }
        let marker_file = ini
            .get(COMMON, "MarkerFile")
            .filter(|e| !e.value.is_empty())
            .map(|e| resolve(vhdr, &e.value));
        only(&ini, COMMON, "DataFormat", "BINARY", "")?;
        only(
            &ini,
            COMMON,
            "DataType",
            "TIMEDOMAIN",
            " (continuous samples)",
        )?;
        let orientation = orientation(ini.require(COMMON, "DataOrientation")?)?;
        let format = binary_format(ini.require(BINARY, "BinaryFormat")?)?;
        only(
            &ini,
            BINARY,
            "UseBigEndianOrder",
            "NO",
            " (little-endian data)",
        )?;
        let count = ini.require(COMMON, "NumberOfChannels")?;
        let count = match count.value.parse::<usize>() {
            Ok(n) if n > 0 => n,
            _ => {
                return Err(LineError::at(
                    count,
                    format!(
                        "{:?} is not a positive whole number of channels",
                        count.value
                    ),
                ))
            }
        };
        let interval = ini.require(COMMON, "SamplingInterval")?;
        let rate = match interval.value.parse::<f64>() {
            Ok(us) if us.is_finite() && us > 0.0 => 1e6 / us,
            _ => {
                return Err(LineError::at(
                    interval,
                    format!(
                        "{:?} is not a positive sampling interval in microseconds",
                        interval.value
                    ),
                ))
            }
        };
        let data_points = match ini.get(COMMON, "DataPoints") {
            None => None,
            Some(e) => match e.value.parse::<usize>() {
                Ok(n) => Some((n, e.clone())),
                Err(_) => {
                    return Err(LineError::at(
                        e,
                        format!("{:?} is not a whole number of data points", e.value),
                    ))
                }
            },
        };
        let channels = channel_infos(&ini, count)?;
        Ok(VhdrHeader {
            data_file: resolve(vhdr, &data.value),
            data_file_line: data.line,
            marker_file,
            orientation,
            format,
            rate,
            channels,
            data_points,
        })
    }
}

/// An optional key that, when present, must have the one value phasewise supports.
fn only(ini: &IniText, section: &str, key: &str, value: &str, what: &str) -> Result<(), LineError> {
    match ini.get(section, key) {
        Some(e) if !e.value.eq_ignore_ascii_case(value) => Err(LineError::at(
            e,
            format!("{:?} is not supported; expected {value}{what}", e.value),
        )),
        _ => Ok(()),
    }
}

fn orientation(e: &Entry) -> Result<Orientation, LineError> {
    match e.value.to_ascii_uppercase().as_str() {
        "MULTIPLEXED" => Ok(Orientation::Multiplexed),
        "VECTORIZED" => Ok(Orientation::Vectorized),
        _ => Err(LineError::at(
            e,
            format!(
                "unknown data orientation {:?}; expected MULTIPLEXED or VECTORIZED",
                e.value
            ),
        )),
    }
}

fn binary_format(e: &Entry) -> Result<BinaryFormat, LineError> {
    match e.value.to_ascii_uppercase().as_str() {
        "INT_16" => Ok(BinaryFormat::Int16),
        "INT_32" => Ok(BinaryFormat::Int32),
        "IEEE_FLOAT_32" => Ok(BinaryFormat::Float32),
        _ => Err(LineError::at(
            e,
            format!(
                "unknown or unsupported binary format {:?}; expected INT_16, INT_32 or IEEE_FLOAT_32",
                e.value
            ),
        )),
    }
}

/// The number of a key `<prefix><n>` (prefix case-insensitive), e.g. `Ch12` → 12.
pub fn numbered(key: &str, prefix: &str) -> Option<usize> {
    let head = key.get(..prefix.len())?;
    match head.eq_ignore_ascii_case(prefix) {
        true => key[prefix.len()..].parse().ok(),
        false => None,
    }
}

/// Split a comma-separated value, decoding `\1` (the spec's escape for a comma in a name).
pub fn fields(value: &str) -> Vec<String> {
    value
        .split(',')
        .map(|f| f.replace("\\1", ",").trim().to_string())
        .collect()
}

/// `Ch1=` … `Ch<count>=`: each present once, no other channel numbers.
fn channel_infos(ini: &IniText, count: usize) -> Result<Vec<ChannelInfo>, LineError> {
    let mut found: Vec<Option<ChannelInfo>> = vec![None; count];
    for e in ini.section(CHANNELS) {
        let Some(n) = numbered(&e.key, "Ch") else {
            continue;
        };
        if n == 0 || n > count {
            return Err(LineError::at(
                e,
                format!("channel number {n} is outside 1..{count} (NumberOfChannels={count})"),
            ));
        }
        if found[n - 1].is_some() {
            return Err(LineError::at(e, format!("channel {n} is described twice")));
        }
        found[n - 1] = Some(channel_info(e)?);
    }
    found
        .into_iter()
        .enumerate()
        .map(|(i, c)| {
            c.ok_or_else(|| LineError {
                line: 0,
                key: Some(format!("Ch{}", i + 1)),
                message: format!(
                    "the [{CHANNELS}] section does not describe channel {} (NumberOfChannels={count})",
                    i + 1
                ),
            })
        })
        .collect()
}

/// `<name>,<reference>,<resolution>,<unit>[,...]`; an empty resolution is 1, an empty unit µV
/// (the spec's defaults, recalled from memory of the vendor's format description).
fn channel_info(e: &Entry) -> Result<ChannelInfo, LineError> {
    let parts = fields(&e.value);
    let field = |i: usize| parts.get(i).map(String::as_str).unwrap_or("");
    let label = field(0).to_string();
    if label.is_empty() {
        return Err(LineError::at(e, "the channel has no name"));
    }
    let resolution = match field(2) {
        "" => 1.0,
        text => match text.parse::<f64>() {
            Ok(r) if r.is_finite() && r > 0.0 => r,
            _ => {
                return Err(LineError::at(
                    e,
                    format!("resolution {text:?} of channel {label} is not a positive number"),
                ))
            }
        },
    };
    let unit = match field(3) {
        "" => "\u{b5}V".to_string(),
        unit => unit.to_string(),
    };
    Ok(ChannelInfo {
        label,
        reference: field(1).to_string(),
        resolution,
        unit,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    const HEADER: &str = "Brain Vision Data Exchange Header File Version 1.0
; a comment
[Common Infos]
Codepage=UTF-8
DataFile=rec.eeg
MarkerFile=rec.vmrk
DataFormat=BINARY
DataOrientation=VECTORIZED
NumberOfChannels=2
SamplingInterval=3906.25

[Binary Infos]
BinaryFormat=INT_32

[Channel Infos]
Ch1=Fp1,,0.5,\u{b5}V
Ch2=a\\1b,Fp1,,mV

[Comment]
free text = not a key
A line without an equals sign
";

    fn parse(text: &str) -> Result<VhdrHeader, LineError> {
        VhdrHeader::parse(Path::new("/d/x.vhdr"), text)
    }

    #[test]
    fn parses_every_part_of_a_header() {
        let h = parse(HEADER).unwrap();
        assert_eq!(h.data_file, Path::new("/d/rec.eeg"));
        assert_eq!(h.marker_file.as_deref(), Some(Path::new("/d/rec.vmrk")));
        assert_eq!(h.orientation, Orientation::Vectorized);
        assert_eq!(h.format, BinaryFormat::Int32);
        // 10^6 µs / 3906.25 µs = 256 Hz exactly.
        assert_eq!(h.rate, 256.0);
        assert_eq!(h.channels[0].resolution, 0.5);
        assert_eq!(h.channels[1].label, "a,b");
        assert_eq!(h.channels[1].reference, "Fp1");
        assert_eq!(h.channels[1].resolution, 1.0);
        assert_eq!(h.channels[1].unit, "mV");
        assert_eq!(
            referenced_files(Path::new("/nonexistent/x.vhdr")),
            Vec::<PathBuf>::new()
        );
    }

    #[test]
    fn errors_name_line_and_key() {
        let cases = [
            (
                "BinaryFormat=INT_32",
                "BinaryFormat=UINT_8",
                "line 13, BinaryFormat: unknown or unsupported binary format \"UINT_8\"",
            ),
            (
                "DataOrientation=VECTORIZED",
                "DataOrientation=DIAGONAL",
                "line 8, DataOrientation: unknown data orientation",
            ),
            (
                "NumberOfChannels=2",
                "NumberOfChannels=3",
                "Ch3: the [Channel Infos] section does not describe channel 3",
            ),
            (
                "NumberOfChannels=2",
                "NumberOfChannels=two",
                "line 9, NumberOfChannels",
            ),
            (
                "SamplingInterval=3906.25",
                "SamplingInterval=0",
                "line 10, SamplingInterval",
            ),
            (
                "Ch1=Fp1,,0.5",
                "Ch1=Fp1,,-0.5",
                "line 16, Ch1: resolution \"-0.5\"",
            ),
            (
                "Ch2=a",
                "Ch3=a",
                "line 17, Ch3: channel number 3 is outside 1..2",
            ),
            (
                "DataFile=rec.eeg\n",
                "",
                "DataFile: the [Common Infos] section has no DataFile= line",
            ),
            (
                "DataFormat=BINARY",
                "DataFormat=ASCII",
                "line 7, DataFormat",
            ),
            (
                "[Binary Infos]\n",
                "[Binary Infos]\nno equals sign\n",
                "line 13: expected `key=value` in section [Binary Infos]",
            ),
            (
                "Brain Vision Data Exchange Header",
                "Some other",
                "line 1: this is not a BrainVision file",
            ),
        ];
        for (from, to, needle) in cases {
            assert!(HEADER.contains(from), "{from}");
            let err = parse(&HEADER.replacen(from, to, 1))
                .unwrap_err()
                .to_string();
            assert!(err.contains(needle), "{to}: {err}");
        }
    }

    #[test]
    fn latin1_text_is_decoded() {
        // "µV" in Latin-1 is the byte 0xB5 then 'V' (ISO 8859-1).
        let text = decode_text(b"Codepage=ANSI\nCh1=Fz,,1,\xb5V\n");
        assert!(text.contains("Fz,,1,\u{b5}V"), "{text}");
        assert_eq!(decode_text("x\u{b5}".as_bytes()), "x\u{b5}");
    }
}
