//! Why a stored object cannot be trusted: one value per kind of damage, each naming the file
//! (record or values) and what the record expected. A damaged object is never used: the unit is
//! computed again and the reason shown as a warning (`damaged cache object recomputed: …`) or,
//! in `plan`, as the unit's stale reason.

use std::path::PathBuf;
use std::sync::Arc;

use phasewise_stages::StageError;

/// What is wrong with a stored object (its record `<key>.json` or its values `<key>.npy`).
#[derive(Clone, Debug, thiserror::Error)]
pub enum Damage {
    /// The values are there, their record is not.
    #[error("its record (.json) is missing")]
    RecordMissing,
    /// The record says the values are stored; they are not.
    #[error("its values (.npy) are missing")]
    ValuesMissing,
    /// The values' file has another size than the record says.
    #[error("its values (.npy) have {found} bytes, the record says {recorded}")]
    Size {
        /// The file's size.
        found: u64,
        /// The record's `npy_size`.
        recorded: u64,
    },
    /// The values' file is smaller than the recorded shape needs.
    #[error("its values (.npy) have {size} bytes, too few for the recorded shape")]
    TooSmallForShape {
        /// The record's `npy_size`.
        size: u64,
    },
    /// The record's shape has more elements than memory can address.
    #[error("its recorded shape overflows")]
    ShapeOverflow,
    /// The values' file could not be opened or read.
    #[error("cannot read its values: {0}")]
    Unreadable(Arc<std::io::Error>),
    /// The values' file goes on after the recorded shape's last value.
    #[error("its values (.npy) are longer than the record says")]
    Longer,
    /// The values' file ends before the recorded shape's last value.
    #[error("its values (.npy) are shorter than the record says")]
    Shorter,
    /// The values' content hash differs from the record's.
    #[error("its values' blake3 is {found}, the record says {recorded}")]
    Hash {
        /// The blake3 of the bytes read.
        found: String,
        /// The record's `blake3`.
        recorded: String,
    },
    /// The values (hash-checked) are not an NPY array of the recorded type.
    #[error("its values (.npy) do not decode: {0}")]
    Undecodable(Arc<ndarray_npy::ReadNpyError>),
    /// The values (hash-checked) do not have the recorded shape.
    #[error("its values do not have the recorded shape: {0}")]
    Shape(ndarray::ShapeError),
    /// The values do not fit the recorded layout (its coordinates, its complex flag).
    #[error("its values do not fit its layout: {0}")]
    Layout(Arc<StageError>),
    /// The record is that of another key.
    #[error("its record belongs to key {key}")]
    OtherKey {
        /// The key the record names.
        key: String,
    },
    /// The record is not JSON.
    #[error("its record is not valid JSON: {0}")]
    RecordNotJson(Arc<serde_json::Error>),
    /// The record is JSON but not an object record (`format` is not `phasewise-object`).
    #[error("its record is not a phasewise object record")]
    NotARecord,
    /// The record's bytes are not those its seal (its last field, `record_blake3`) was made
    /// from: changed after it was written (a coordinate, a label, a note, the seal itself).
    #[error(
        "its record {} was changed after it was written (its blake3 is {found}, its \
         `record_blake3` says {recorded})",
        path.display()
    )]
    RecordAltered {
        /// The record's file.
        path: PathBuf,
        /// The blake3 of the record's bytes before its seal.
        found: String,
        /// The record's `record_blake3`.
        recorded: String,
    },
    /// A record of the current format version whose bytes do not end in its seal.
    #[error("its record {} does not end in its `record_blake3` seal", path.display())]
    RecordUnsealed {
        /// The record's file.
        path: PathBuf,
    },
    /// The record lacks a field, has one of the wrong type, or a packed coordinate that does
    /// not unpack ([`super::record_layout::PackedCoordError`], named in serde's message).
    #[error("its record is incomplete: {0}")]
    RecordIncomplete(Arc<serde_json::Error>),
}

impl Damage {
    /// [`Damage::Unreadable`] from an I/O error.
    pub fn unreadable(e: std::io::Error) -> Damage {
        Damage::Unreadable(Arc::new(e))
    }
}
