//! Labelled arrays: the one data type that flows between stages.
//!
//! A stage's output is an n-dimensional array (real `f32`, or complex `f32` for wavelet
//! coefficients) together with its [`Layout`]: the axis names (`dims`), one coordinate list per
//! axis (`coords`), the physical unit of the values and op-specific metadata ([`Meta`]).
//! The layout alone (without values) is what ops use to check parameters against the data
//! before anything is computed, so it is a type of its own.

use ndarray::ArrayD;
use num_complex::Complex32;
use serde::{Deserialize, Serialize};
use std::collections::BTreeMap;
use std::ops::Range;
use std::sync::Arc;

use crate::error::StageError;

/// A list whose entries are shared by every copy and every cut of it: cloning, cutting a run out
/// ([`SharedList::slice`]) and joining runs that lie end to end in one list
/// ([`SharedList::join`]) copy no entries. Channel pairs are held this way: a clustering output
/// of 64 channels names 2016 pairs, and the runner cuts and rejoins that axis for every box of a
/// unit that runs in slabs, and ops clone layouts freely (a rerun's profile had a tenth of its
/// time in cloning and dropping these names).
///
/// It reads as a slice (`Deref`), compares and prints as one, and is stored as a plain list.
pub struct SharedList<T> {
    all: Arc<[T]>,
    run: Range<usize>,
}

impl<T> SharedList<T> {
    /// The entries in `range`, sharing this list's storage; `None` when `range` is outside.
    pub fn slice(&self, range: Range<usize>) -> Option<SharedList<T>> {
        if range.start > range.end || range.end > self.len() {
            return None;
        }
        let start = self.run.start + range.start;
        Some(SharedList {
            all: Arc::clone(&self.all),
            run: start..start + range.len(),
        })
    }

    /// The runs of `parts` end to end. Runs that follow one another in one list give a run of
    /// that list; anything else is copied into a new list.
    pub fn join(parts: &[&SharedList<T>]) -> SharedList<T>
    where
        T: Clone,
    {
        if let Some(first) = parts.first() {
            let mut end = first.run.end;
            let adjacent = parts[1..].iter().all(|p| {
                let next = Arc::ptr_eq(&p.all, &first.all) && p.run.start == end;
                end = p.run.end;
                next
            });
            if adjacent {
                return SharedList {
                    all: Arc::clone(&first.all),
                    run: first.run.start..end,
                };
            }
        }
        parts.iter().flat_map(|p| p.iter().cloned()).collect()
    }
}

impl<T> std::ops::Deref for SharedList<T> {
    type Target = [T];
    fn deref(&self) -> &[T] {
        &self.all[self.run.clone()]
    }
}

impl<T> Clone for SharedList<T> {
    fn clone(&self) -> Self {
        SharedList {
            all: Arc::clone(&self.all),
            run: self.run.clone(),
        }
    }
}

impl<T> From<Vec<T>> for SharedList<T> {
    fn from(v: Vec<T>) -> Self {
        let run = 0..v.len();
        SharedList { all: v.into(), run }
    }
}

impl<T> FromIterator<T> for SharedList<T> {
    fn from_iter<I: IntoIterator<Item = T>>(iter: I) -> Self {
        iter.into_iter().collect::<Vec<T>>().into()
    }
}

impl<T: PartialEq> PartialEq for SharedList<T> {
    fn eq(&self, other: &Self) -> bool {
        **self == **other
    }
}

impl<T: std::fmt::Debug> std::fmt::Debug for SharedList<T> {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        (**self).fmt(f)
    }
}

impl<T: Serialize> Serialize for SharedList<T> {
    fn serialize<S: serde::Serializer>(&self, serializer: S) -> Result<S::Ok, S::Error> {
        (**self).serialize(serializer)
    }
}

impl<'de, T: Deserialize<'de>> Deserialize<'de> for SharedList<T> {
    fn deserialize<D: serde::Deserializer<'de>>(deserializer: D) -> Result<Self, D::Error> {
        Vec::<T>::deserialize(deserializer).map(SharedList::from)
    }
}

/// Coordinates of one axis.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[serde(tag = "kind", content = "values", rename_all = "snake_case")]
pub enum Coord {
    /// Text labels (channel names, condition names, measure names, subject ids, band names).
    Labels(Vec<String>),
    /// Numbers (time in s, frequency in Hz, trial index).
    Numbers(Vec<f64>),
    /// Channel pairs `[a, b]` (shared between copies and cuts: see [`SharedList`]).
    Pairs(SharedList<[String; 2]>),
}

impl Coord {
    /// Number of entries.
    pub fn len(&self) -> usize {
        match self {
            Coord::Labels(v) => v.len(),
            Coord::Numbers(v) => v.len(),
            Coord::Pairs(v) => v.len(),
        }
    }
    /// True when the axis has no entries.
    pub fn is_empty(&self) -> bool {
        self.len() == 0
    }
    /// The entries in `range`.
    pub fn slice(&self, range: std::ops::Range<usize>) -> Result<Coord, StageError> {
        let bad = || {
            StageError::data(format!(
                "internal: {range:?} is outside an axis of {}",
                self.len()
            ))
        };
        Ok(match self {
            Coord::Labels(v) => Coord::Labels(v.get(range.clone()).ok_or_else(bad)?.to_vec()),
            Coord::Numbers(v) => Coord::Numbers(v.get(range.clone()).ok_or_else(bad)?.to_vec()),
            Coord::Pairs(v) => Coord::Pairs(v.slice(range.clone()).ok_or_else(bad)?),
        })
    }

    /// The entries of `parts` end to end; all parts must be of one kind.
    pub fn join(parts: &[&Coord]) -> Result<Coord, StageError> {
        let Some(first) = parts.first() else {
            return Err(StageError::data("internal: no coordinates to join"));
        };
        let mixed = || StageError::data("internal: joining coordinates of two kinds");
        if let Coord::Pairs(_) = first {
            let runs = parts
                .iter()
                .map(|p| p.pairs_shared().ok_or_else(mixed))
                .collect::<Result<Vec<_>, _>>()?;
            return Ok(Coord::Pairs(SharedList::join(&runs)));
        }
        let mut out = (*first).clone();
        for p in &parts[1..] {
            match (&mut out, p) {
                (Coord::Labels(a), Coord::Labels(b)) => a.extend_from_slice(b),
                (Coord::Numbers(a), Coord::Numbers(b)) => a.extend_from_slice(b),
                _ => return Err(mixed()),
            }
        }
        Ok(out)
    }

    /// The pairs as they are held, if this is a pair axis.
    fn pairs_shared(&self) -> Option<&SharedList<[String; 2]>> {
        match self {
            Coord::Pairs(v) => Some(v),
            _ => None,
        }
    }

    /// The labels, if this is a label axis.
    pub fn labels(&self) -> Option<&[String]> {
        match self {
            Coord::Labels(v) => Some(v),
            _ => None,
        }
    }
    /// The numbers, if this is a numeric axis.
    pub fn numbers(&self) -> Option<&[f64]> {
        match self {
            Coord::Numbers(v) => Some(v),
            _ => None,
        }
    }
    /// The pairs, if this is a pair axis.
    pub fn pairs(&self) -> Option<&[[String; 2]]> {
        match self {
            Coord::Pairs(v) => Some(v),
            _ => None,
        }
    }
}

/// The join of parts along one axis, built a part at a time into values allocated once, in
/// row-major order. A streamed unit's consumer ([`crate::op`], "Parts") pushes each part's output
/// as soon as it is made and drops it, so the parts and the whole are never all in memory.
/// (`ndarray::concatenate` is not used: it lays the joined axis outermost in memory, so a join
/// along an inner axis gave an array that neither the NPY writer nor the ops' contiguous fast
/// paths could take whole, and was walked element by element; BENCHMARKS.md has the profile.)
#[derive(Debug)]
pub struct Joining {
    axis: usize,
    first: Option<Layout>,
    coords: Vec<Coord>,
    values: Values,
    at: usize,
}

impl Joining {
    /// Room for a join of shape `shape` along axis number `axis`.
    pub fn new(shape: &[usize], axis: usize, complex: bool) -> Joining {
        let shape = ndarray::IxDyn(shape);
        let values = if complex {
            let zeros = bytemuck::zeroed_vec(ndarray::Dimension::size(&shape));
            Values::Complex(ArrayD::from_shape_vec(shape, zeros).expect("the shape's own size"))
        } else {
            Values::Real(ArrayD::zeros(shape))
        };
        Joining {
            axis,
            first: None,
            coords: Vec::new(),
            values,
            at: 0,
        }
    }

    /// Copy the next part into place.
    pub fn push(&mut self, part: &LabelledArray) -> Result<(), StageError> {
        let k = self.axis;
        let shape = self.values.shape().to_vec();
        let fits = part.values.shape().len() == shape.len()
            && (0..shape.len()).all(|d| d == k || part.values.shape()[d] == shape[d])
            && self.at + part.values.shape().get(k).copied().unwrap_or(0) <= shape[k];
        let same = self
            .first
            .as_ref()
            .is_none_or(|f| f.dims == part.layout.dims && f.complex == part.layout.complex);
        if !fits || !same {
            return Err(StageError::data(format!(
                "internal: a part of shape {:?} does not fit a join of shape {shape:?} at {}",
                part.values.shape(),
                self.at
            )));
        }
        let n = part.values.shape()[k];
        let place = ndarray::Slice::from(self.at..self.at + n);
        match (&mut self.values, &part.values) {
            (Values::Real(to), Values::Real(from)) => {
                to.slice_axis_mut(ndarray::Axis(k), place).assign(from)
            }
            (Values::Complex(to), Values::Complex(from)) => {
                to.slice_axis_mut(ndarray::Axis(k), place).assign(from)
            }
            _ => return Err(StageError::data("internal: parts to join differ in type")),
        }
        self.coords.push(part.layout.coords[k].clone());
        if self.first.is_none() {
            self.first = Some(part.layout.clone());
        }
        self.at += n;
        Ok(())
    }

    /// The joined array: the first part's layout with the joined axis' coordinates.
    pub fn finish(self) -> Result<LabelledArray, StageError> {
        let (Some(mut layout), true) = (self.first, self.at == self.values.shape()[self.axis])
        else {
            return Err(StageError::data(format!(
                "internal: a join of {} along its axis received {}",
                self.values.shape()[self.axis],
                self.at
            )));
        };
        let coords: Vec<&Coord> = self.coords.iter().collect();
        layout.coords[self.axis] = Coord::join(&coords)?;
        LabelledArray::checked(layout, self.values)
    }
}

/// One event of a continuous recording (from a BIDS events sidecar or EDF+ annotations).
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Event {
    /// Onset in seconds from the start of the recording.
    pub onset: f64,
    /// Duration in seconds (0 when not given).
    pub duration: f64,
    /// The event's label (`trial_type` in BIDS).
    pub label: String,
}

/// What an epoch (one trial) came from.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct TrialInfo {
    /// The condition the trial belongs to.
    pub condition: String,
    /// The label of the source event.
    pub event: String,
    /// The source event's onset in seconds from the start of the recording.
    pub onset: f64,
}

/// Metadata carried beside the values. Fields are optional because not every stage has them.
#[derive(Clone, Debug, Default, PartialEq, Serialize, Deserialize)]
pub struct Meta {
    /// Sampling rate in Hz of the `time` axis (after any stride).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub sampling_rate: Option<f64>,
    /// Channel types (`EEG`, `EOG`, `ECG`, `MISC`, ...), parallel to the `channel` axis.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub channel_types: Option<Vec<String>>,
    /// Events of a continuous recording.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub events: Option<Vec<Event>>,
    /// Per-trial information of epoched data, parallel to the `trial` axis.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub trials: Option<Vec<TrialInfo>>,
    /// Electrode positions by channel name, and where they came from (DESIGN.md §4b); boxed,
    /// so that layouts without them stay small.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub positions: Option<Box<Positions>>,
    /// Anything else an op wants to hand downstream.
    #[serde(default, skip_serializing_if = "BTreeMap::is_empty")]
    pub extra: BTreeMap<String, serde_json::Value>,
}

/// Electrode positions, keyed by channel name (not parallel to the channel axis, so ops that
/// drop, rename or reorder channels leave the positions of the others true).
#[derive(Clone, Debug, Default, PartialEq, Serialize, Deserialize)]
pub struct Positions {
    /// Where they came from, for people: the electrodes sidecar's file name, or the derivation.
    pub source: String,
    /// Unit of the coordinates (`m` from a sidecar, `1` for the unit sphere of derived ones).
    pub units: String,
    /// Cartesian position of each channel that has one: x towards the right preauricular point,
    /// y towards the nasion, z up (derived ones; a sidecar's are as its coordinate system says).
    pub by_channel: BTreeMap<String, [f64; 3]>,
}

/// Axis names, coordinates, unit and metadata of an array, without its values.
#[derive(Clone, Debug, Default, PartialEq, Serialize, Deserialize)]
pub struct Layout {
    /// Axis names, outermost first.
    pub dims: Vec<String>,
    /// One coordinate list per axis.
    pub coords: Vec<Coord>,
    /// Physical unit of the values (`V`, `1` for dimensionless, `%`, `dB`, `z`).
    pub units: String,
    /// True when the values are complex.
    pub complex: bool,
    /// Metadata.
    pub meta: Meta,
}

impl Layout {
    /// The shape implied by the coordinates.
    pub fn shape(&self) -> Vec<usize> {
        self.coords.iter().map(Coord::len).collect()
    }

    /// Position of axis `name`, or an error naming the axes that exist.
    pub fn axis(&self, name: &str) -> Result<usize, StageError> {
        self.dims.iter().position(|d| d == name).ok_or_else(|| {
            StageError::data(format!(
                "the input has no `{name}` axis (its axes are [{}])",
                self.dims.join(", ")
            ))
        })
    }

    /// Coordinates of axis `name`.
    pub fn coord(&self, name: &str) -> Result<&Coord, StageError> {
        Ok(&self.coords[self.axis(name)?])
    }

    /// Numeric coordinates of axis `name` (time, freq).
    pub fn numbers(&self, name: &str) -> Result<&[f64], StageError> {
        self.coord(name)?
            .numbers()
            .ok_or_else(|| StageError::data(format!("the `{name}` axis is not numeric")))
    }

    /// Label coordinates of axis `name` (channel, condition, measure).
    pub fn labels(&self, name: &str) -> Result<&[String], StageError> {
        self.coord(name)?
            .labels()
            .ok_or_else(|| StageError::data(format!("the `{name}` axis does not hold labels")))
    }

    /// False for axes with metadata parallel to them (`channel`, `trial`), which cannot be cut
    /// by their coordinate alone.
    pub fn can_cut(axis: &str) -> bool {
        !matches!(axis, "channel" | "trial")
    }

    /// The layout of the slice `range` of axis number `k`: that axis' coordinate cut, the rest
    /// unchanged. Axes with metadata parallel to them (`channel`, `trial`) cannot be cut this
    /// way.
    pub fn slice(&self, k: usize, range: std::ops::Range<usize>) -> Result<Layout, StageError> {
        let axis = self.dims.get(k).map(String::as_str).unwrap_or("?");
        if !Layout::can_cut(axis) || range.start > range.end || k >= self.coords.len() {
            return Err(StageError::data(format!(
                "internal: cannot cut axis {axis} to {range:?}"
            )));
        }
        let mut layout = self.clone();
        layout.coords[k] = self.coords[k].slice(range)?;
        Ok(layout)
    }

    /// The sampling rate, or an error saying the input has none.
    pub fn sampling_rate(&self) -> Result<f64, StageError> {
        self.meta
            .sampling_rate
            .ok_or_else(|| StageError::data("the input carries no sampling rate"))
    }
}

/// The values of a labelled array.
#[derive(Clone, Debug, PartialEq)]
pub enum Values {
    /// Real values.
    Real(ArrayD<f32>),
    /// Complex values (wavelet coefficients).
    Complex(ArrayD<Complex32>),
}

impl Values {
    /// The array's shape.
    pub fn shape(&self) -> &[usize] {
        match self {
            Values::Real(a) => a.shape(),
            Values::Complex(a) => a.shape(),
        }
    }
    /// The numpy dtype string of the values (`<f4` or `<c8`).
    pub fn dtype(&self) -> &'static str {
        match self {
            Values::Real(_) => "<f4",
            Values::Complex(_) => "<c8",
        }
    }
}

/// An array with its layout.
#[derive(Clone, Debug, PartialEq)]
pub struct LabelledArray {
    /// Axis names, coordinates, unit, metadata.
    pub layout: Layout,
    /// The values; their shape equals `layout.shape()`.
    pub values: Values,
}

impl LabelledArray {
    /// Build a real array, checking that the shape matches the coordinates.
    pub fn real(mut layout: Layout, values: ArrayD<f32>) -> Result<Self, StageError> {
        layout.complex = false;
        Self::checked(layout, Values::Real(values))
    }

    /// Build a complex array, checking that the shape matches the coordinates.
    pub fn complex(mut layout: Layout, values: ArrayD<Complex32>) -> Result<Self, StageError> {
        layout.complex = true;
        Self::checked(layout, Values::Complex(values))
    }

    /// Build from a layout and values, checking that the shape matches the coordinates.
    pub fn checked(layout: Layout, values: Values) -> Result<Self, StageError> {
        if layout.dims.len() != layout.coords.len() || layout.shape() != values.shape() {
            return Err(StageError::data(format!(
                "internal shape mismatch: dims {:?} with coordinate lengths {:?} but values of shape {:?}",
                layout.dims,
                layout.shape(),
                values.shape()
            )));
        }
        Ok(LabelledArray { layout, values })
    }

    /// The slice `range` of the axis `axis`: the values and that axis' coordinate cut, the
    /// rest of the layout unchanged. Axes with metadata parallel to them (`channel`, `trial`)
    /// cannot be cut this way.
    pub fn slice(&self, axis: &str, range: std::ops::Range<usize>) -> Result<Self, StageError> {
        let k = self.layout.axis(axis)?;
        let layout = self.layout.slice(k, range.clone())?;
        let cut = ndarray::Slice::from(range);
        let values = match &self.values {
            Values::Real(a) => Values::Real(a.slice_axis(ndarray::Axis(k), cut).to_owned()),
            Values::Complex(a) => Values::Complex(a.slice_axis(ndarray::Axis(k), cut).to_owned()),
        };
        Self::checked(layout, values)
    }

    /// The parts joined end to end along `axis` (values and that axis' coordinate); the rest
    /// of the layout is the first part's, and every part must have the same dims and values
    /// type.
    pub fn join(parts: &[LabelledArray], axis: &str) -> Result<Self, StageError> {
        let first = parts
            .first()
            .ok_or_else(|| StageError::data("internal: nothing to join"))?;
        let k = first.layout.axis(axis)?;
        let mut shape = first.values.shape().to_vec();
        shape[k] = parts
            .iter()
            .map(|p| p.values.shape().get(k).copied().unwrap_or(0))
            .sum();
        let mut joining = Joining::new(&shape, k, first.layout.complex);
        for p in parts {
            joining.push(p)?;
        }
        joining.finish()
    }

    /// The real values, or an error when they are complex.
    pub fn real_values(&self) -> Result<&ArrayD<f32>, StageError> {
        match &self.values {
            Values::Real(a) => Ok(a),
            Values::Complex(_) => Err(StageError::data(
                "expected real values but the input is complex (wavelet coefficients?)",
            )),
        }
    }

    /// The complex values, or an error when they are real.
    pub fn complex_values(&self) -> Result<&ArrayD<Complex32>, StageError> {
        match &self.values {
            Values::Complex(a) => Ok(a),
            Values::Real(_) => Err(StageError::data(
                "expected complex wavelet coefficients but the input is real",
            )),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn pair_names(n: usize) -> Vec<[String; 2]> {
        (0..n).map(|i| [format!("a{i}"), format!("b{i}")]).collect()
    }

    /// Cuts and joins of shared pair names hold exactly the entries that cutting and joining a
    /// plain `Vec` gives (std's slices are the reference), whether the runs share storage
    /// (adjacent runs of one list) or are copied (runs out of order, or of two lists).
    #[test]
    fn shared_lists_cut_and_join_as_plain_lists_do() {
        let plain = pair_names(10);
        let shared = SharedList::from(plain.clone());
        let cuts = [0..3, 3..7, 7..10];
        let runs: Vec<SharedList<[String; 2]>> = cuts
            .iter()
            .map(|r| shared.slice(r.clone()).unwrap())
            .collect();
        for (run, r) in runs.iter().zip(&cuts) {
            assert_eq!(**run, plain[r.clone()]);
        }
        // A cut of a cut is counted from the cut's own start.
        assert_eq!(*runs[1].slice(1..3).unwrap(), plain[4..6]);
        assert!(runs[1].slice(2..5).is_none());
        #[allow(clippy::reversed_empty_ranges)]
        let backwards = 3..2;
        assert!(shared.slice(backwards).is_none());
        assert_eq!(*shared.slice(10..10).unwrap(), plain[10..10]);

        // Adjacent runs of one list: the join is a run of that same storage.
        let joined = SharedList::join(&runs.iter().collect::<Vec<_>>());
        assert_eq!(joined, shared);
        assert!(Arc::ptr_eq(&joined.all, &shared.all));
        let middle = SharedList::join(&[&runs[1], &runs[2]]);
        assert_eq!(*middle, plain[3..10]);
        assert!(Arc::ptr_eq(&middle.all, &shared.all));

        // Out of order, and runs of two lists: copied, in the order given.
        let swapped = SharedList::join(&[&runs[2], &runs[0]]);
        let want: Vec<_> = plain[7..10].iter().chain(&plain[0..3]).cloned().collect();
        assert_eq!(*swapped, want);
        assert!(!Arc::ptr_eq(&swapped.all, &shared.all));
        let other = SharedList::from(plain[3..7].to_vec());
        let mixed = SharedList::join(&[&runs[0], &other, &runs[2]]);
        assert_eq!(mixed, shared);
        assert!(!Arc::ptr_eq(&mixed.all, &shared.all));
    }

    /// A shared list is written and read as the plain JSON list of its run (serde_json, the
    /// JSON reference the records use), so records made before it read back the same.
    #[test]
    fn a_shared_list_is_stored_as_a_plain_list() {
        let plain = pair_names(5);
        let run = SharedList::from(plain.clone()).slice(1..4).unwrap();
        let text = serde_json::to_string(&run).unwrap();
        assert_eq!(text, serde_json::to_string(&plain[1..4]).unwrap());
        let back: SharedList<[String; 2]> = serde_json::from_str(&text).unwrap();
        assert_eq!(back, run);
        let coord = Coord::Pairs(run);
        let back: Coord = serde_json::from_str(&serde_json::to_string(&coord).unwrap()).unwrap();
        assert_eq!(back, coord);
        // Printed as the slice it reads as (std's slice `Debug` is the reference).
        assert_eq!(
            format!("{:?}", coord.pairs_shared().unwrap()),
            format!("{:?}", &plain[1..4])
        );
    }

    /// Coordinates of the same kind join end to end; pairs and labels do not mix.
    #[test]
    fn coordinates_join_by_kind() {
        let shared = SharedList::from(pair_names(4));
        let a = Coord::Pairs(shared.slice(0..1).unwrap());
        let b = Coord::Pairs(shared.slice(1..4).unwrap());
        assert_eq!(Coord::join(&[&a, &b]).unwrap(), Coord::Pairs(shared));
        let labels = Coord::Labels(vec!["x".into()]);
        assert!(Coord::join(&[&a, &labels]).is_err());
        assert!(Coord::join(&[&labels, &a]).is_err());
        let numbers = Coord::Numbers(vec![1.0]);
        assert_eq!(
            Coord::join(&[&numbers, &Coord::Numbers(vec![2.0])]).unwrap(),
            Coord::Numbers(vec![1.0, 2.0])
        );
    }

    /// Joining slices along an inner axis gives back the whole array, checked against ndarray's
    /// own `concatenate` (a general-purpose reference), and in row-major order, so the NPY
    /// writer and the contiguous fast paths take it whole.
    #[test]
    fn join_along_an_inner_axis_restores_the_array_in_row_major_order() {
        let values =
            ndarray::Array::from_shape_fn((2, 5, 3), |(a, b, c)| (a * 100 + b * 10 + c) as f32)
                .into_dyn();
        let layout = Layout {
            dims: vec!["condition".into(), "freq".into(), "time".into()],
            coords: vec![
                Coord::Labels(vec!["a".into(), "b".into()]),
                Coord::Numbers(vec![4.0, 5.0, 6.0, 7.0, 8.0]),
                Coord::Numbers(vec![0.0, 0.1, 0.2]),
            ],
            units: "1".into(),
            complex: false,
            meta: Meta::default(),
        };
        let whole = LabelledArray::checked(layout, Values::Real(values.clone())).unwrap();
        let parts: Vec<LabelledArray> = [0..2, 2..3, 3..5]
            .into_iter()
            .map(|r| whole.slice("freq", r).unwrap())
            .collect();
        let joined = LabelledArray::join(&parts, "freq").unwrap();
        assert_eq!(joined, whole);
        let views: Vec<_> = parts
            .iter()
            .map(|p| p.real_values().unwrap().view())
            .collect();
        let reference = ndarray::concatenate(ndarray::Axis(1), &views).unwrap();
        let got = joined.real_values().unwrap();
        assert_eq!(got, &reference);
        assert!(got.is_standard_layout());

        // Filled part by part: a part that does not fit, or a join left short, is refused.
        let mut joining = Joining::new(&[2, 5, 3], 1, false);
        joining.push(&parts[0]).unwrap();
        assert!(
            joining.push(&whole).is_err(),
            "5 more along freq do not fit in 3"
        );
        joining.push(&parts[1]).unwrap();
        assert!(joining.finish().is_err(), "2 of 5 entries are missing");
        let mut joining = Joining::new(&[2, 5, 3], 1, false);
        for p in &parts {
            joining.push(p).unwrap();
        }
        assert_eq!(joining.finish().unwrap(), whole);
    }
}
