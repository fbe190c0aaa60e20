//! The NPY codec of the store: numpy's format written as a stream (hashed on the way, never
//! built whole in memory) and read back straight into an array's memory with its hash checked
//! before anything decoded is returned.

use std::fs::File;
use std::io::{Read, Write};

use ndarray::{ArrayD, IxDyn, ShapeBuilder};
use ndarray_npy::{ReadNpyExt, WriteNpyExt};
use num_complex::Complex32;
use phasewise_stages::Values;

use super::{Damage, ObjectRecord, StoreError};

/// The NPY bytes of an array (the reference encoding; the store streams the same bytes through
/// [`write_npy_to`] without building them in memory).
pub fn npy_bytes(values: &Values) -> Result<Vec<u8>, StoreError> {
    let mut bytes = Vec::new();
    write_npy_to(values, &mut bytes)?;
    Ok(bytes)
}

/// Write an array's NPY encoding to `writer`: the header, then the values straight from the
/// array's memory (one `write_all` for a contiguous array), so no copy of the values is made.
pub fn write_npy_to<W: Write>(values: &Values, writer: W) -> Result<(), StoreError> {
    let written = match values {
        Values::Real(a) => a.write_npy(writer),
        Values::Complex(a) => a.write_npy(writer),
    };
    Ok(written?)
}

/// A writer that hashes (blake3) and counts every byte it passes on.
pub struct HashingWriter<W> {
    inner: W,
    hasher: blake3::Hasher,
    len: u64,
}

impl<W: Write> HashingWriter<W> {
    /// Hash and count what goes to `inner`.
    pub fn new(inner: W) -> Self {
        HashingWriter {
            inner,
            hasher: blake3::Hasher::new(),
            len: 0,
        }
    }

    /// The blake3 (hex) and number of the bytes written so far, and the inner writer.
    pub fn finish(self) -> (String, u64, W) {
        (
            self.hasher.finalize().to_hex().to_string(),
            self.len,
            self.inner,
        )
    }
}

impl<W: Write> Write for HashingWriter<W> {
    fn write(&mut self, buf: &[u8]) -> std::io::Result<usize> {
        let n = self.inner.write(buf)?;
        hash_update(&mut self.hasher, &buf[..n]);
        self.len += n as u64;
        Ok(n)
    }

    fn flush(&mut self) -> std::io::Result<()> {
        self.inner.flush()
    }
}

/// Below this many bytes one thread hashes; above, blake3 splits the work over the rayon pool.
pub(crate) const PARALLEL_HASH_BYTES: usize = 1 << 20;

pub(crate) fn hash_update(hasher: &mut blake3::Hasher, bytes: &[u8]) {
    if bytes.len() >= PARALLEL_HASH_BYTES {
        hasher.update_rayon(bytes);
    } else {
        hasher.update(bytes);
    }
}

/// Stream an array's NPY encoding into `sink`, hashing it on the way; returns (blake3, size).
/// Small writes (a non-contiguous array is written element by element) are gathered first.
pub(crate) fn stream_npy<W: Write>(values: &Values, sink: W) -> Result<(String, u64), StoreError> {
    let mut out = std::io::BufWriter::with_capacity(1 << 20, HashingWriter::new(sink));
    write_npy_to(values, &mut out)?;
    let tee = out
        .into_inner()
        .map_err(|e| StoreError::Npy(e.into_error().into()))?;
    let (hash, len, _) = tee.finish();
    Ok((hash, len))
}

/// The blake3 (hex) and size of an array's NPY encoding, computed without building it.
pub fn npy_digest(values: &Values) -> Result<(String, u64), StoreError> {
    stream_npy(values, std::io::sink())
}

/// Decode NPY bytes as real or complex values.
pub fn values_from_npy(bytes: &[u8], complex: bool) -> Result<Values, ndarray_npy::ReadNpyError> {
    if complex {
        ArrayD::<Complex32>::read_npy(bytes).map(Values::Complex)
    } else {
        ArrayD::<f32>::read_npy(bytes).map(Values::Real)
    }
}

/// Read `file` (whose first `header` bytes were already read into `head`) straight into the
/// values of `record`'s shape, hashing every byte; the hash is checked before anything decoded
/// is returned. `None` when the header is not one this fast path knows (the caller then decodes
/// the slow, general way).
pub(crate) fn read_values(
    file: &mut File,
    record: &ObjectRecord,
) -> Result<Option<Values>, Damage> {
    let Some(Geometry {
        count,
        complex,
        header_len,
    }) = geometry(record)?
    else {
        return Ok(None);
    };
    let mut hasher = blake3::Hasher::new();
    let mut head = vec![0u8; header_len];
    file.read_exact(&mut head).map_err(short_or_unreadable)?;
    hasher.update(&head);
    let values = if complex {
        Data::Complex(read_fresh(file, count, Some(&mut hasher))?)
    } else {
        Data::Real(read_fresh(file, count, Some(&mut hasher))?)
    };
    check_end(file, Some(hasher), record)?;
    // The bytes are exactly those written for this record, so the header is the one the NPY
    // writer produced for its shape; only the memory order is left to read from it.
    let Some(fortran) = fortran_order(&head) else {
        return Ok(None);
    };
    let shape = IxDyn(&record.shape).set_f(fortran);
    let built = match values {
        Data::Real(v) => ArrayD::from_shape_vec(shape, v).map(Values::Real),
        Data::Complex(v) => ArrayD::from_shape_vec(shape, v).map(Values::Complex),
    };
    built.map(Some).map_err(Damage::Shape)
}

/// Where a stored object's values lie in its NPY file.
pub(crate) struct Geometry {
    /// Number of values.
    pub count: usize,
    /// Complex (`<c8`) rather than real (`<f4`).
    pub complex: bool,
    /// Bytes before the first value.
    pub header_len: usize,
}

/// The [`Geometry`] of `record`'s NPY, from its shape, dtype and size; `None` for a form the
/// fast readers do not take (another dtype, a big-endian machine, a header over 1 MiB).
pub(crate) fn geometry(record: &ObjectRecord) -> Result<Option<Geometry>, Damage> {
    let count = record
        .shape
        .iter()
        .try_fold(1usize, |n, &d| n.checked_mul(d))
        .ok_or(Damage::ShapeOverflow)?;
    let (width, complex) = match record.dtype.as_str() {
        "<f4" => (4usize, false),
        "<c8" => (8usize, true),
        _ => return Ok(None),
    };
    if complex != record.layout.complex || !cfg!(target_endian = "little") {
        return Ok(None);
    }
    let data_len = count.checked_mul(width).ok_or(Damage::ShapeOverflow)? as u64;
    let Some(header_len) = record.npy_size.checked_sub(data_len) else {
        return Err(Damage::TooSmallForShape {
            size: record.npy_size,
        });
    };
    if header_len > 1 << 20 {
        return Ok(None);
    }
    Ok(Some(Geometry {
        count,
        complex,
        header_len: header_len as usize,
    }))
}

/// The memory order an NPY header (as the NPY writer produced it) declares: `Some(true)` for
/// Fortran order, `Some(false)` for C order, `None` when it says neither.
pub(crate) fn fortran_order(head: &[u8]) -> Option<bool> {
    let text = String::from_utf8_lossy(head);
    if text.contains("'fortran_order': False") {
        Some(false)
    } else if text.contains("'fortran_order': True") {
        Some(true)
    } else {
        None
    }
}

/// After the last value: the file must end there and everything read must hash to the record's
/// blake3 (when it was hashed: `None` for an object [`Store::wrote_intact`](super::Store)).
pub(crate) fn check_end(
    file: &mut File,
    hasher: Option<blake3::Hasher>,
    record: &ObjectRecord,
) -> Result<(), Damage> {
    let mut rest = [0u8; 1];
    if file.read(&mut rest).map_err(Damage::unreadable)? != 0 {
        return Err(Damage::Longer);
    }
    match hasher {
        Some(hasher) => check_hash(hasher.finalize(), record),
        None => Ok(()),
    }
}

/// The content hash of everything read against the record's.
pub(crate) fn check_hash(hash: blake3::Hash, record: &ObjectRecord) -> Result<(), Damage> {
    let found = hash.to_hex().to_string();
    if found != record.blake3 {
        return Err(Damage::Hash {
            found,
            recorded: record.blake3.clone(),
        });
    }
    Ok(())
}

/// A read that ended early is [`Damage::Shorter`]; any other read error
/// [`Damage::Unreadable`].
pub(crate) fn short_or_unreadable(e: std::io::Error) -> Damage {
    match e.kind() {
        std::io::ErrorKind::UnexpectedEof => Damage::Shorter,
        _ => Damage::unreadable(e),
    }
}

pub(crate) enum Data {
    Real(Vec<f32>),
    Complex(Vec<Complex32>),
}

/// `count` values read from `file` straight into new memory, hashing every byte as it arrives
/// (in pieces small enough to be hashed while still in the CPU's cache) when given a hasher. The memory is not
/// zeroed first: zeroing would be a pass over the whole array that the read overwrites anyway
/// (freed arrays are reused by the allocator, so it would not come free from the kernel).
#[cfg(unix)]
pub(crate) fn read_fresh<T: bytemuck::Pod>(
    file: &mut File,
    count: usize,
    mut hasher: Option<&mut blake3::Hasher>,
) -> Result<Vec<T>, Damage> {
    use std::os::fd::AsRawFd;
    let len = count
        .checked_mul(std::mem::size_of::<T>())
        .ok_or(Damage::ShapeOverflow)?;
    let mut data: Vec<T> = Vec::with_capacity(count);
    let base = data.as_mut_ptr().cast::<u8>();
    let mut filled = 0;
    while filled < len {
        let want = (len - filled).min(READ_CHUNK);
        // SAFETY: `base + filled .. + want` lies inside the allocation of `count` values, and
        // read(2) only writes into it.
        let n = unsafe { libc::read(file.as_raw_fd(), base.add(filled).cast(), want) };
        if n < 0 {
            let e = std::io::Error::last_os_error();
            if e.kind() == std::io::ErrorKind::Interrupted {
                continue;
            }
            return Err(Damage::unreadable(e));
        }
        if n == 0 {
            return Err(Damage::Shorter);
        }
        // SAFETY: read(2) has just written these `n` bytes.
        let piece = unsafe { std::slice::from_raw_parts(base.add(filled), n as usize) };
        if let Some(hasher) = hasher.as_deref_mut() {
            hash_update(hasher, piece);
        }
        filled += n as usize;
    }
    // SAFETY: every byte of the `count` values is written, and any bytes are a valid `T` (Pod).
    unsafe { data.set_len(count) };
    Ok(data)
}

#[cfg(not(unix))]
pub(crate) fn read_fresh<T: bytemuck::Pod>(
    file: &mut File,
    count: usize,
    mut hasher: Option<&mut blake3::Hasher>,
) -> Result<Vec<T>, Damage> {
    let mut data = vec![T::zeroed(); count];
    for piece in bytemuck::cast_slice_mut::<T, u8>(&mut data).chunks_mut(READ_CHUNK) {
        file.read_exact(piece).map_err(short_or_unreadable)?;
        if let Some(hasher) = hasher.as_deref_mut() {
            hash_update(hasher, piece);
        }
    }
    Ok(data)
}

/// Read size of [`read_values`]: the piece just read is hashed while it is still in cache.
pub(crate) const READ_CHUNK: usize = 1 << 21;
