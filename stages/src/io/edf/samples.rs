//! Decoding data records in bulk: many records are read with one call into a reused buffer and
//! each selected signal's bytes are converted straight into its row of the output, so no
//! allocation happens per sample or per record.

use std::io::{Read, Seek, SeekFrom};

use super::header::{FileKind, Header, SignalHeader};

/// About this many bytes of records are read at once.
const CHUNK_BYTES: usize = 8 << 20;

/// The linear map from a signal's digital values to physical values in the output unit.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Scaling {
    /// Physical units per digital step, times the unit conversion factor.
    pub gain: f64,
    /// Physical value of digital 0, times the unit conversion factor.
    pub offset: f64,
}

impl Scaling {
    /// phys = (dig − dmin)·(pmax − pmin)/(dmax − dmin) + pmin (Kemp et al. 1992), then times
    /// `factor` (e.g. 1e-6 for µV → V), written as dig·gain + offset.
    pub fn of(signal: &SignalHeader, factor: f64) -> Scaling {
        let step = (signal.phys_max - signal.phys_min) / (signal.dig_max - signal.dig_min) as f64;
        Scaling {
            gain: step * factor,
            offset: (signal.phys_min - signal.dig_min as f64 * step) * factor,
        }
    }
}

/// Read the selected signals of every record into `out`, one row per selection entry of
/// `records · samples_per_record` values (the signals must share their samples per record).
/// `out` must hold `selection.len()` such rows.
pub fn read_samples<R: Read + Seek>(
    file: &mut R,
    header: &Header,
    selection: &[(usize, Scaling)],
    out: &mut [f32],
) -> std::io::Result<()> {
    let record_bytes = header.record_bytes();
    let Some(&(first, _)) = selection.first() else {
        return Ok(());
    };
    let spr = header
        .signals
        .get(first)
        .map_or(0, |s| s.samples_per_record);
    let row_len = header.records * spr;
    let per_chunk = (CHUNK_BYTES / record_bytes.max(1)).max(1);
    let mut buffer = vec![0u8; per_chunk * record_bytes];
    let offsets: Vec<usize> = selection
        .iter()
        .map(|&(i, _)| header.signal_offset(i))
        .collect();
    file.seek(SeekFrom::Start(header.header_bytes as u64))?;
    let mut record = 0;
    while record < header.records {
        let count = per_chunk.min(header.records - record);
        let bytes = &mut buffer[..count * record_bytes];
        file.read_exact(bytes)?;
        for (k, data) in bytes.chunks_exact(record_bytes).enumerate() {
            let column = (record + k) * spr;
            for (row, (&(_, scaling), &offset)) in selection.iter().zip(&offsets).enumerate() {
                let src = &data[offset..offset + spr * header.sample_bytes()];
                let dst = &mut out[row * row_len + column..row * row_len + column + spr];
                decode(header.kind, src, scaling, dst);
            }
        }
        record += count;
    }
    Ok(())
}

/// Convert one signal's bytes of one record.
fn decode(kind: FileKind, src: &[u8], scaling: Scaling, dst: &mut [f32]) {
    let Scaling { gain, offset } = scaling;
    match kind {
        FileKind::Edf => {
            for (d, b) in dst.iter_mut().zip(src.chunks_exact(2)) {
                let digital = i16::from_le_bytes([b[0], b[1]]);
                *d = (f64::from(digital) * gain + offset) as f32;
            }
        }
        FileKind::Bdf => {
            for (d, b) in dst.iter_mut().zip(src.chunks_exact(3)) {
                // Sign-extend the 24-bit two's-complement value by placing it in the top three
                // bytes of an i32 and shifting back.
                let digital = i32::from_le_bytes([0, b[0], b[1], b[2]]) >> 8;
                *d = (f64::from(digital) * gain + offset) as f32;
            }
        }
    }
}

/// The raw bytes of signal `index` in every record (for annotation signals).
pub fn read_annotation_bytes<R: Read + Seek>(
    file: &mut R,
    header: &Header,
    index: usize,
) -> std::io::Result<Vec<Vec<u8>>> {
    let len = header
        .signals
        .get(index)
        .map_or(0, |s| s.samples_per_record * header.sample_bytes());
    let start = header.header_bytes + header.signal_offset(index);
    (0..header.records)
        .map(|r| {
            file.seek(SeekFrom::Start((start + r * header.record_bytes()) as u64))?;
            let mut bytes = vec![0u8; len];
            file.read_exact(&mut bytes)?;
            Ok(bytes)
        })
        .collect()
}
