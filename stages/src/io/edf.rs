//! EDF, EDF+ and BDF: header parsing, bulk sample decoding, annotation lists, and the EDF+C
//! writer.
//!
//! The formats follow Kemp et al. 1992 (EDF: a 256-byte fixed header, 256 bytes per signal, then
//! data records of 16-bit little-endian two's-complement samples), Kemp & Olivan 2003 (EDF+:
//! `EDF+C`/`EDF+D` in the reserved field and an `EDF Annotations` signal holding time-stamped
//! annotation lists, TALs) and BioSemi's BDF variant (first byte 0xFF, `BIOSEMI`, 24-bit
//! samples). This module owns the byte-level format only; turning a file into a labelled array
//! (channel names and types, units, which channels to keep) is done in [`crate::io`].
//!
//! Submodules: `header` (parse and check the header), `samples` (decode records in bulk,
//! extract annotation bytes), `tal` (parse and format TALs) and `write` (the EDF+C writer).

mod header;
mod samples;
mod tal;
mod write;

pub use header::{EdfHeaderError, Expected, FieldName, FileKind, Header, SignalHeader, SignalRef};
pub use samples::{read_annotation_bytes, read_samples, Scaling};
pub use tal::{parse_record_tals, RecordTals, TalError};
pub use write::{write_edf_plus, EdfWriteError, EdfWriteSpec, SignalSpec};

/// Width in bytes of the fixed part of the header and of each signal's header block.
pub const BLOCK: usize = 256;
