//! Slabs: a unit whose op works time course by time course runs on its stored input a box at a
//! time, so neither its input nor its output is ever whole in memory.
//!
//! A box fixes one index on each of the leading axes but the last of them, takes a range of
//! rows on that last one, and all of every later axis (for the clustering output
//! `[condition, measure, pair, freq, time]` cut after three axes: one condition, one measure, a
//! run of pairs). Boxes taken in order are consecutive runs of the NPY file, so the stored
//! object is read once from start to end and its hash checked in the same pass, as a whole load
//! does. The runner ([`crate::exec`]) uses this when the unit's op slices along those axes
//! ([`phasewise_stages::Op::slices_along`]) and so does the `prepare` of every group unit it
//! feeds ([`phasewise_stages::Op::prepare_slices_along`]); each box of the output is written
//! to the unit's NPY in order (hashed on the way, the same bytes as the whole array's
//! encoding) and prepared for the group units, whose prepared boxes are joined at the end.
//!
//! Nothing is committed before the input's hash is known to match: the output's record is
//! written, and the prepared arrays kept, only after the last box. Anything unexpected — the
//! input damaged, an op that notes something about a box (a warning would then speak of the box
//! alone), a box whose layout is not the whole output's cut — gives up, and the runner computes
//! the unit whole as before. So outputs, warnings and records are those of a whole run.
//!
//! The other half is [`Spool`]: a stored unit that streams from its producer in parts along an
//! inner axis (the clustering output, in ranges of frequencies) is written to the store through
//! a temporary file when every consumer can read it in slabs, instead of being joined in memory.
//! With both, the chain after the wavelet holds one part and one box at a time.

use std::io::Write;
use std::ops::Range;

use phasewise_stages::{LabelledArray, Layout, Notes, StageError, Values};

use crate::fsio::{self, Declined};
use crate::key::Fingerprint;
use crate::store::npy::{check_end, fortran_order, geometry, read_fresh, Geometry};
use crate::store::{self, Damage, HashingWriter, ObjectRecord, Store, StoreError};

/// Bytes of one box (at least one row each).
pub const SLAB_BYTES: usize = 4 << 20;

/// Environment variable that sets another box size in bytes (for tests); results do not
/// depend on it.
pub const SLAB_BYTES_VAR: &str = "PHASEWISE_SLAB_BYTES";

fn slab_bytes() -> usize {
    crate::parts::bytes_from_env(SLAB_BYTES_VAR, SLAB_BYTES)
}

/// One box of an array cut after `outer.len() + 1` leading axes.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct SlabBox {
    /// The index on each leading axis but the last.
    pub outer: Vec<usize>,
    /// The rows taken on the last leading axis.
    pub rows: Range<usize>,
}

/// The boxes, in file order, of an array of `shape` cut after `k ≥ 1` leading axes, each at
/// most `bytes` bytes of `element`-byte values (at least one row).
pub fn boxes_within(shape: &[usize], k: usize, element: usize, bytes: usize) -> Vec<SlabBox> {
    let k = k.clamp(1, shape.len().max(1));
    let Some(&rows) = shape.get(k - 1) else {
        return Vec::new();
    };
    let row_bytes = shape[k..].iter().product::<usize>() * element;
    let step = (bytes / row_bytes.max(1)).clamp(1, rows.max(1));
    let outer_shape = &shape[..k - 1];
    let outer_count: usize = outer_shape.iter().product();
    let mut out = Vec::new();
    for flat in 0..outer_count {
        let mut outer = vec![0; outer_shape.len()];
        let mut rest = flat;
        for (i, &n) in outer.iter_mut().zip(outer_shape).rev() {
            *i = rest % n;
            rest /= n;
        }
        for start in (0..rows).step_by(step) {
            out.push(SlabBox {
                outer: outer.clone(),
                rows: start..(start + step).min(rows),
            });
        }
    }
    out
}

/// [`boxes_within`] boxes of [`SLAB_BYTES`] (or the size [`SLAB_BYTES_VAR`] sets).
pub fn boxes(shape: &[usize], k: usize, element: usize) -> Vec<SlabBox> {
    boxes_within(shape, k, element, slab_bytes())
}

/// The layout of box `b` of an array of layout `whole`.
pub fn box_layout(whole: &Layout, b: &SlabBox) -> Result<Layout, StageError> {
    // Cut axis by axis without copying the whole layout for each (a pair coordinate holds
    // thousands of names).
    let cut = b.outer.len();
    let mut coords = Vec::with_capacity(whole.coords.len());
    for (axis, coord) in whole.coords.iter().enumerate() {
        coords.push(match axis.cmp(&cut) {
            std::cmp::Ordering::Less => coord.slice(b.outer[axis]..b.outer[axis] + 1)?,
            std::cmp::Ordering::Equal => coord.slice(b.rows.clone())?,
            std::cmp::Ordering::Greater => coord.clone(),
        });
    }
    let cut_dims = whole.dims.get(..=cut).unwrap_or(&whole.dims);
    if cut >= whole.coords.len() || !cut_dims.iter().all(|d| Layout::can_cut(d)) {
        return Err(StageError::data(format!(
            "internal: cannot cut [{}] into boxes after {} axes",
            whole.dims.join(", "),
            cut + 1
        )));
    }
    Ok(Layout {
        dims: whole.dims.clone(),
        coords,
        units: whole.units.clone(),
        complex: whole.complex,
        meta: whole.meta.clone(),
    })
}

/// The arrays of `boxes` (one each, in order, every box of the cut) joined back into one: the
/// rows of each leading position first, then the leading axes from the innermost out.
pub fn join_boxes(
    parts: Vec<LabelledArray>,
    boxes: &[SlabBox],
) -> Result<LabelledArray, StageError> {
    let Some(first) = boxes.first() else {
        return Err(StageError::data("internal: no boxes to join"));
    };
    if parts.len() != boxes.len() {
        return Err(StageError::data("internal: one array per box expected"));
    }
    let dims = parts[0].layout.dims.clone();
    let depth = first.outer.len();
    // (leading index so far, array) for each group joined at the current depth.
    let mut level: Vec<(Vec<usize>, Vec<LabelledArray>)> = Vec::new();
    for (b, part) in boxes.iter().zip(parts) {
        match level.last_mut() {
            Some((outer, group)) if *outer == b.outer => group.push(part),
            _ => level.push((b.outer.clone(), vec![part])),
        }
    }
    for axis in (0..=depth).rev() {
        let joined: Vec<(Vec<usize>, LabelledArray)> = level
            .into_iter()
            .map(|(outer, group)| Ok((outer, LabelledArray::join(&group, &dims[axis])?)))
            .collect::<Result<_, StageError>>()?;
        if axis == 0 {
            return joined
                .into_iter()
                .next()
                .map(|(_, a)| a)
                .ok_or_else(|| StageError::data("internal: no boxes to join"));
        }
        level = Vec::new();
        for (outer, array) in joined {
            let up = outer[..axis - 1].to_vec();
            match level.last_mut() {
                Some((o, group)) if *o == up => group.push(array),
                _ => level.push((up, vec![array])),
            }
        }
    }
    Err(StageError::data("internal: no boxes to join"))
}

/// Why [`Store::read_slabs`] stopped; `E` is the visitor's own error.
#[derive(Debug, thiserror::Error)]
pub enum SlabStop<E> {
    /// The stored object does not match its record.
    #[error(transparent)]
    Damaged(Damage),
    /// The object's form does not allow reading it in these boxes; the caller should do the
    /// work whole.
    #[error(transparent)]
    Declined(SlabDecline),
    /// The visitor gave up on a box; the caller should do the work whole.
    #[error("{0}")]
    Visitor(E),
}

/// Why a stored object is not read in slabs (nothing is wrong with it).
#[derive(Debug, thiserror::Error)]
pub enum SlabDecline {
    /// Another dtype, a big-endian machine, or a header over 1 MiB.
    #[error("not a form read in slabs")]
    Form,
    /// Stored in Fortran order.
    #[error("not stored in C order")]
    NotCOrder,
    /// A box that is not a cut of the object's layout.
    #[error("a box does not cut the stored layout: {0}")]
    Box(StageError),
    /// The boxes cover more than the array.
    #[error("boxes beyond the array")]
    Beyond,
    /// The boxes cover less than the array.
    #[error("boxes short of the array")]
    Short,
    /// A box's values do not have its layout's shape.
    #[error("a box's values do not have its shape: {0}")]
    Shape(ndarray::ShapeError),
    /// A box's values do not fit its layout.
    #[error("a box's values do not fit its layout: {0}")]
    Layout(StageError),
}

/// Why a [`Spool`] could not be written to the store.
#[derive(Debug, thiserror::Error)]
pub enum SpoolError {
    /// Fewer or more indices along the part axis than the output has.
    #[error("internal: {at} of {shape:?} spooled along axis {axis}")]
    Incomplete {
        /// Indices spooled.
        at: usize,
        /// The output's shape.
        shape: Vec<usize>,
        /// The part axis.
        axis: usize,
    },
}

/// The NPY header (numpy's format, version 1.0 while the text fits, else 2.0; the dictionary
/// padded with spaces to a multiple of 64 bytes and ended by a newline) of a C-order array of
/// `shape` and type `descr` (`<f4`, `<c8`): the bytes the NPY writer (ndarray-npy) puts before
/// the values.
pub fn npy_header(shape: &[usize], descr: &str) -> Vec<u8> {
    let dims: Vec<String> = shape.iter().map(usize::to_string).collect();
    let tuple = match dims.len() {
        1 => format!("({},)", dims[0]),
        _ => format!("({})", dims.join(", ")),
    };
    let text = format!("{{'descr': '{descr}', 'fortran_order': False, 'shape': {tuple}}}");
    // As the NPY writer does: 1 to 64 bytes of padding (a whole 64 when the text with its
    // newline already ends on a multiple of 64).
    let padded = |prefix: usize| {
        let unpadded = prefix + text.len() + 1;
        unpadded + 64 - unpadded % 64
    };
    let (version, prefix) = if padded(10) - 10 <= u16::MAX as usize {
        (1u8, 10)
    } else {
        (2u8, 12)
    };
    let total = padded(prefix);
    let mut out = Vec::with_capacity(total);
    out.extend_from_slice(b"\x93NUMPY");
    out.extend_from_slice(&[version, 0]);
    let len = total - prefix;
    if version == 1 {
        out.extend_from_slice(&(len as u16).to_le_bytes());
    } else {
        out.extend_from_slice(&(len as u32).to_le_bytes());
    }
    out.extend_from_slice(text.as_bytes());
    out.resize(total - 1, b' ');
    out.push(b'\n');
    out
}

/// The values of an array in row-major order, as bytes.
pub fn value_bytes(
    values: &Values,
    mut sink: impl FnMut(&[u8]) -> std::io::Result<()>,
) -> std::io::Result<()> {
    let internal = || std::io::Error::other("internal: a standard layout without a slice");
    match values {
        Values::Real(a) => {
            let a = a.as_standard_layout();
            sink(bytemuck::cast_slice(a.as_slice().ok_or_else(internal)?))
        }
        Values::Complex(a) => {
            let a = a.as_standard_layout();
            sink(bytemuck::cast_slice(a.as_slice().ok_or_else(internal)?))
        }
    }
}

impl Store {
    /// Read the stored object `key` box by box in file order, handing each box (with its
    /// layout) to `visit`, and check the whole file against `record` at the end. `visit` sees
    /// values before they are known to be intact: nothing it does may be committed unless this
    /// returns `Ok`.
    pub fn read_slabs<E>(
        &self,
        key: &str,
        record: &ObjectRecord,
        boxes: &[SlabBox],
        mut visit: impl FnMut(&SlabBox, LabelledArray) -> Result<(), E>,
    ) -> Result<(), SlabStop<E>> {
        let (npy, _) = self.object_paths(key);
        let damaged = SlabStop::Damaged;
        let declined = SlabStop::Declined;
        let mut file = std::fs::File::open(&npy).map_err(|e| damaged(Damage::unreadable(e)))?;
        // Written by this process and unchanged since: its hash was taken as it was written.
        let check = !self.wrote_intact(key, record, &file);
        let Some(Geometry {
            count,
            complex,
            header_len,
        }) = geometry(record).map_err(damaged)?
        else {
            return Err(declined(SlabDecline::Form));
        };
        let mut hasher = blake3::Hasher::new();
        let mut head = vec![0u8; header_len];
        std::io::Read::read_exact(&mut file, &mut head)
            .map_err(|e| damaged(store::npy::short_or_unreadable(e)))?;
        hasher.update(&head);
        if fortran_order(&head) != Some(false) {
            return Err(declined(SlabDecline::NotCOrder));
        }
        let mut read = 0;
        for b in boxes {
            let layout =
                box_layout(&record.layout, b).map_err(|e| declined(SlabDecline::Box(e)))?;
            let shape = ndarray::IxDyn(&layout.shape());
            let n = ndarray::Dimension::size(&shape);
            read += n;
            if read > count {
                return Err(declined(SlabDecline::Beyond));
            }
            let values = if complex {
                let v = read_fresh(&mut file, n, check.then_some(&mut hasher)).map_err(damaged)?;
                ndarray::ArrayD::from_shape_vec(shape, v).map(Values::Complex)
            } else {
                let v = read_fresh(&mut file, n, check.then_some(&mut hasher)).map_err(damaged)?;
                ndarray::ArrayD::from_shape_vec(shape, v).map(Values::Real)
            }
            .map_err(|e| declined(SlabDecline::Shape(e)))?;
            let slab = LabelledArray::checked(layout, values)
                .map_err(|e| declined(SlabDecline::Layout(e)))?;
            visit(b, slab).map_err(SlabStop::Visitor)?;
        }
        if read != count {
            return Err(declined(SlabDecline::Short));
        }
        check_end(&mut file, check.then_some(hasher), record).map_err(damaged)
    }

    /// Write a unit's object from its output boxes: `fill` writes the values of each box, in
    /// file order, to the writer it is given (after the NPY header of `layout`'s shape, which
    /// this writes) and returns the unit's notes. The NPY (when `stored`) and the record are
    /// committed only when `fill` succeeds; `Ok(Err(why))` (`fill`'s error) when it did not,
    /// and then nothing is written.
    pub fn put_slabs<E>(
        &self,
        layout: &Layout,
        fingerprint: &Fingerprint,
        stored: bool,
        fill: impl FnOnce(&mut dyn FnMut(&[u8]) -> std::io::Result<()>) -> Result<Notes, E>,
    ) -> Result<Result<ObjectRecord, E>, StoreError> {
        let dtype = if layout.complex { "<c8" } else { "<f4" };
        let key = fingerprint.key();
        let (npy_path, json_path) = self.object_paths(&key);
        let write = |out: &mut dyn Write| -> std::io::Result<Result<(Notes, String, u64), E>> {
            let mut tee = HashingWriter::new(out);
            tee.write_all(&npy_header(&layout.shape(), dtype))?;
            // A write error is the caller's failure to report (a full disk, say), not the
            // fill's reason to give up, so it is kept whole and passed on as an I/O error.
            let mut failed = None;
            let notes = fill(&mut |bytes: &[u8]| {
                tee.write_all(bytes).inspect_err(|e| {
                    failed = Some(std::io::Error::new(e.kind(), e.to_string()));
                })
            });
            if let Some(e) = failed {
                return Err(e);
            }
            let (hash, len, _) = tee.finish();
            Ok(notes.map(|n| (n, hash, len)))
        };
        let written = if stored {
            let abort = std::env::var_os(store::ABORT_BEFORE_RENAME).is_some();
            fsio::write_then_rename_unsynced(&npy_path, abort, |file| {
                write(file).map(|r| r.map_err(Declined::Wrong))
            })
            .map(|r| {
                r.map_err(|declined| match declined {
                    Declined::Wrong(why) => why,
                    Declined::Unchanged => unreachable!("put_slabs does not compare its target"),
                })
            })
        } else {
            write(&mut std::io::sink())
        };
        let (notes, blake3, npy_size) = match written {
            Ok(Ok(done)) => done,
            Ok(Err(why)) => return Ok(Err(why)),
            Err(source) => {
                return Err(StoreError::Write {
                    path: npy_path,
                    source,
                })
            }
        };
        if stored {
            self.remember_written(&key, &blake3);
        }
        let record = ObjectRecord::new(layout, dtype, &notes, fingerprint)
            .with_values(stored, blake3, npy_size);
        store::write_record(&json_path, &record)?;
        Ok(Ok(record))
    }
}

/// A unit's output arriving in parts along an inner axis (a streamed consumer's parts, see
/// [`crate::parts`]), written straight into its NPY file instead of being joined in memory:
/// the file (header, then the values in row-major order) is made at its full size in the
/// cache's object folder under a temporary name, and each part's rows (the axes before the part
/// axis, flattened) are written at their final offsets. On commit the file is read back in order
/// once to hash it and is renamed into the store; uncommitted, it is removed. The NPY is the same
/// bytes as the joined array's encoding, and each byte is written once (an earlier form wrote the
/// parts to a scratch file and copied them into the object, writing every byte twice).
pub struct Spool {
    file: tempfile::NamedTempFile,
    layout: Layout,
    axis: usize,
    /// Values per index of the part axis in one row.
    inner: usize,
    element: usize,
    /// Rows (the product of the axes before the part axis) and the axis' length.
    rows: usize,
    len: usize,
    /// Bytes of the NPY header.
    header: u64,
    at: usize,
}

impl Spool {
    /// An empty spool for an output of `layout`, in parts along axis number `axis`, in a
    /// temporary file under `dir` (on the store's filesystem: it is renamed into the store).
    pub fn new(dir: &std::path::Path, layout: &Layout, axis: usize) -> std::io::Result<Spool> {
        std::fs::create_dir_all(dir)?;
        let shape = layout.shape();
        let dtype = if layout.complex { "<c8" } else { "<f4" };
        let element = if layout.complex { 8 } else { 4 };
        let header = npy_header(&shape, dtype);
        let mut file = tempfile::Builder::new()
            .prefix(fsio::TEMP_PREFIX)
            .tempfile_in(dir)?;
        file.write_all(&header)?;
        let total = shape.iter().product::<usize>() * element;
        file.as_file().set_len((header.len() + total) as u64)?;
        Ok(Spool {
            file,
            layout: layout.clone(),
            axis,
            inner: shape.get(axis + 1..).unwrap_or(&[]).iter().product(),
            element,
            rows: shape.get(..axis).unwrap_or(&[]).iter().product(),
            len: shape.get(axis).copied().unwrap_or(0),
            header: header.len() as u64,
            at: 0,
        })
    }

    /// Add the next part (its layout the whole's with the axis cut to the next range): each of
    /// its rows goes to its place in the file.
    pub fn push(&mut self, part: &LabelledArray) -> Result<(), StageError> {
        use std::os::unix::fs::FileExt;
        let n = part.values.shape().get(self.axis).copied().unwrap_or(0);
        let expected = self.layout.slice(self.axis, self.at..self.at + n);
        if expected.as_ref().ok() != Some(&part.layout) {
            return Err(StageError::data(format!(
                "internal: a part of shape {:?} does not continue an output of shape {:?} at {}",
                part.values.shape(),
                self.layout.shape(),
                self.at
            )));
        }
        let io = |e: std::io::Error| {
            let path = self.file.path().display();
            StageError::data(format!(
                "cannot write {path}: {}",
                fsio::WriteReason(&e, fsio::Destination::Cache)
            ))
        };
        let part_row = n * self.inner * self.element;
        let whole_row = (self.len * self.inner * self.element) as u64;
        let skip = (self.at * self.inner * self.element) as u64;
        let (file, rows, header) = (self.file.as_file(), self.rows, self.header);
        value_bytes(&part.values, |bytes| {
            if part_row == 0 {
                return Ok(());
            }
            for (r, row) in bytes.chunks_exact(part_row).take(rows).enumerate() {
                file.write_all_at(row, header + r as u64 * whole_row + skip)?;
            }
            Ok(())
        })
        .map_err(io)?;
        self.at += n;
        Ok(())
    }

    /// Commit the whole output to the store as the object of `fingerprint`, with `notes`:
    /// `Ok(Err(why))` when parts are missing (nothing is stored).
    pub fn commit(
        self,
        store: &Store,
        fingerprint: &Fingerprint,
        notes: &Notes,
    ) -> Result<Result<ObjectRecord, SpoolError>, StoreError> {
        use std::io::{Read, Seek, SeekFrom};
        if self.at != self.len {
            return Ok(Err(SpoolError::Incomplete {
                at: self.at,
                shape: self.layout.shape(),
                axis: self.axis,
            }));
        }
        let key = fingerprint.key();
        let (npy_path, json_path) = store.object_paths(&key);
        let failed = |source: std::io::Error| StoreError::Write {
            path: npy_path.clone(),
            source,
        };
        // Every byte is in place: hand the file to the disk now (a hint that does not wait), so
        // that the fsync of an export of it later finds it mostly written.
        fsio::start_writeback(self.file.as_file());
        // The hash of the bytes as the file holds them, read back in order (from the page
        // cache: they were just written).
        let mut hasher = blake3::Hasher::new();
        let mut npy_size = 0u64;
        {
            let mut file = self.file.as_file();
            file.seek(SeekFrom::Start(0)).map_err(failed)?;
            let mut buffer = vec![0u8; 4 << 20];
            loop {
                let n = match file.read(&mut buffer) {
                    Ok(0) => break,
                    Ok(n) => n,
                    Err(e) if e.kind() == std::io::ErrorKind::Interrupted => continue,
                    Err(e) => return Err(failed(e)),
                };
                store::npy::hash_update(&mut hasher, &buffer[..n]);
                npy_size += n as u64;
            }
        }
        if let Some(dir) = npy_path.parent() {
            std::fs::create_dir_all(dir).map_err(failed)?;
        }
        if std::env::var_os(store::ABORT_BEFORE_RENAME).is_some() {
            std::process::abort();
        }
        self.file.persist(&npy_path).map_err(|e| failed(e.error))?;
        let blake3 = hasher.finalize().to_hex().to_string();
        store.remember_written(&key, &blake3);
        let dtype = if self.layout.complex { "<c8" } else { "<f4" };
        let record = ObjectRecord::new(&self.layout, dtype, notes, fingerprint)
            .with_values(true, blake3, npy_size);
        store::write_record(&json_path, &record)?;
        Ok(Ok(record))
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::ArrayD;
    use phasewise_stages::Coord;

    fn layout(shape: &[usize]) -> Layout {
        let dims = ["condition", "measure", "pair", "freq", "time"];
        Layout {
            dims: dims[..shape.len()].iter().map(|d| d.to_string()).collect(),
            coords: shape
                .iter()
                .map(|&n| Coord::Numbers((0..n).map(|i| i as f64 * 0.5).collect()))
                .collect(),
            units: "1".into(),
            ..Layout::default()
        }
    }

    fn counting(shape: &[usize]) -> LabelledArray {
        let n = shape.iter().product::<usize>();
        let values = ArrayD::from_shape_vec(shape, (0..n).map(|i| i as f32).collect()).unwrap();
        LabelledArray::real(layout(shape), values).unwrap()
    }

    #[test]
    fn boxes_cover_the_array_in_file_order() {
        // Each box's values, read in order, are the next run of the row-major values.
        let whole = counting(&[2, 3, 7, 4]);
        for (k, bytes) in [(1, 1), (2, 40), (3, 64), (3, 1 << 20), (4, 8)] {
            let boxes = boxes_within(&[2, 3, 7, 4], k, 4, bytes);
            let mut next = 0.0f32;
            for b in &boxes {
                let mut part = whole.clone();
                for (axis, &i) in b.outer.iter().enumerate() {
                    part = part.slice(&whole.layout.dims[axis], i..i + 1).unwrap();
                }
                let axis = &whole.layout.dims[b.outer.len()];
                part = part.slice(axis, b.rows.clone()).unwrap();
                assert_eq!(part.layout, box_layout(&whole.layout, b).unwrap());
                for &v in part.real_values().unwrap().iter() {
                    assert_eq!(v, next, "k {k}, bytes {bytes}, box {b:?}");
                    next += 1.0;
                }
            }
            assert_eq!(next as usize, 2 * 3 * 7 * 4, "k {k}, bytes {bytes}");
            let parts = boxes
                .iter()
                .map(|b| {
                    let layout = box_layout(&whole.layout, b).unwrap();
                    let n: usize = layout.shape().iter().product();
                    let start = {
                        let mut flat = 0;
                        for (axis, &i) in b.outer.iter().enumerate() {
                            flat = flat * whole.values.shape()[axis] + i;
                        }
                        let axis = b.outer.len();
                        (flat * whole.values.shape()[axis] + b.rows.start)
                            * whole.values.shape()[axis + 1..].iter().product::<usize>()
                    };
                    let v = (start..start + n).map(|i| i as f32).collect();
                    let shape = layout.shape();
                    LabelledArray::real(layout, ArrayD::from_shape_vec(shape, v).unwrap()).unwrap()
                })
                .collect();
            assert_eq!(
                join_boxes(parts, &boxes).unwrap(),
                whole,
                "k {k}, bytes {bytes}"
            );
        }
    }

    #[test]
    fn a_spooled_output_is_stored_as_the_joined_array_would_be() {
        // Reference: the store's own writer of the whole array (ndarray-npy's NPY encoding).
        // Parts of uneven lengths along an inner axis and along the first one.
        let whole = counting(&[2, 3, 5, 7, 4]);
        let dir = tempfile::tempdir().unwrap();
        let store = Store::new(dir.path());
        let fingerprint = |op: &str| Fingerprint {
            op: op.into(),
            op_version: 1,
            params: serde_json::json!({}),
            inputs: vec![],
            subject: None,
        };
        let notes = Notes::default();
        let joined = store
            .put(&whole, &notes, &fingerprint("whole"), true)
            .unwrap();
        let want = std::fs::read(store.object_paths(&joined.key).0).unwrap();
        for (axis, cuts) in [
            (3, vec![0..2, 2..3, 3..7]),
            (0, vec![0..1, 1..2]),
            (4, vec![0..1, 1..4]),
        ] {
            let mut spool = Spool::new(dir.path(), &whole.layout, axis).unwrap();
            let name = &whole.layout.dims[axis];
            for cut in &cuts {
                spool
                    .push(&whole.slice(name, cut.clone()).unwrap())
                    .unwrap();
            }
            let f = fingerprint(&format!("spooled along {axis}"));
            let record = spool.commit(&store, &f, &notes).unwrap().unwrap();
            assert_eq!(record.blake3, joined.blake3, "axis {axis}");
            assert_eq!(record.npy_size, joined.npy_size, "axis {axis}");
            assert_eq!(record.layout, joined.layout, "axis {axis}");
            let got = std::fs::read(store.object_paths(&record.key).0).unwrap();
            assert!(got == want, "axis {axis}");
            let (loaded, _) = store.load(&record.key).unwrap();
            assert_eq!(loaded, whole);
        }
        // A part out of order is refused.
        let mut spool = Spool::new(dir.path(), &whole.layout, 3).unwrap();
        assert!(spool.push(&whole.slice("freq", 2..3).unwrap()).is_err());
        // Parts that stop short are not committed.
        spool.push(&whole.slice("freq", 0..2).unwrap()).unwrap();
        let f = fingerprint("short");
        assert!(spool.commit(&store, &f, &notes).unwrap().is_err());
        assert!(matches!(
            store.lookup(&f.key()),
            crate::store::Lookup::Absent
        ));
        // Each spool's file was renamed into the store or, uncommitted, removed.
        let temps: Vec<_> = std::fs::read_dir(dir.path())
            .unwrap()
            .flatten()
            .filter(|e| {
                e.file_name()
                    .to_string_lossy()
                    .starts_with(fsio::TEMP_PREFIX)
            })
            .collect();
        assert!(temps.is_empty(), "{temps:?}");
    }

    #[test]
    fn the_header_is_the_npy_writers() {
        // Reference: ndarray-npy's writer (numpy's NPY format 1.0); an array with a zero-length
        // axis is written as its header alone, so long shapes can be compared too.
        use ndarray_npy::WriteNpyExt;
        for shape in [
            vec![],
            vec![5],
            vec![0],
            vec![2, 3],
            vec![3, 2, 0, 24, 107],
            vec![0, 123_456_789, 4_000_000_000],
        ] {
            for complex in [false, true] {
                let n = shape.iter().product::<usize>();
                let mut bytes = Vec::new();
                if complex {
                    let v = vec![num_complex::Complex32::new(1.0, -2.0); n];
                    ArrayD::from_shape_vec(shape.clone(), v)
                        .unwrap()
                        .write_npy(&mut bytes)
                } else {
                    let v = vec![1.5f32; n];
                    ArrayD::from_shape_vec(shape.clone(), v)
                        .unwrap()
                        .write_npy(&mut bytes)
                }
                .unwrap();
                let header = npy_header(&shape, if complex { "<c8" } else { "<f4" });
                assert_eq!(&bytes[..header.len()], &header[..], "{shape:?}");
                assert_eq!(bytes.len() - header.len(), n * if complex { 8 } else { 4 });
            }
        }
    }
}
