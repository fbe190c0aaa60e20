use base64::Engine;
use phasewise_stages::{Coord, Layout, Meta};
use serde::{Deserialize, Deserializer, Serialize, Serializer};

/// Numeric coordinates up to this length are written as plain lists.
pub const PLAIN_NUMBERS: usize = 64;

const BASE64: base64::engine::GeneralPurpose = base64::engine::general_purpose::STANDARD;

/// Why a packed coordinate of a record does not unpack (the record is then damaged and its
/// object recomputed).
#[derive(Clone, Debug, PartialEq, Eq, thiserror::Error)]
pub enum PackedCoordError {
    /// The `values` string is not base64.
    #[error("a packed coordinate is not base64: {0}")]
    NotBase64(#[from] base64::DecodeError),
    /// `numbers_f64le` bytes that are not a whole number of 8-byte numbers.
    #[error("a packed coordinate has {bytes} bytes, not a whole number of f64")]
    NotWholeF64 {
        /// The number of bytes decoded.
        bytes: usize,
    },
    /// A `numbers_delta2` varint of more than 64 bits.
    #[error("a packed coordinate has a varint longer than 64 bits")]
    VarintTooLong,
    /// `numbers_delta2` bytes that end inside a varint.
    #[error("a packed coordinate ends inside a varint")]
    EndsInsideVarint,
}

#[derive(Serialize)]
#[serde(tag = "kind", content = "values", rename_all = "snake_case")]
enum CoordOut<'a> {
    Labels(&'a [String]),
    Numbers(&'a [f64]),
    Pairs(&'a [[String; 2]]),
    NumbersDelta2(String),
    NumbersF64le(String),
}

#[derive(Deserialize)]
#[serde(tag = "kind", content = "values", rename_all = "snake_case")]
enum CoordIn {
    Labels(Vec<String>),
    Numbers(Vec<f64>),
    Pairs(Vec<[String; 2]>),
    NumbersDelta2(String),
    NumbersF64le(String),
}

/// `Layout`'s fields, in its order and under its names.
#[derive(Serialize)]
struct LayoutOut<'a> {
    dims: &'a [String],
    coords: Vec<CoordOut<'a>>,
    units: &'a str,
    complex: bool,
    meta: &'a Meta,
}

#[derive(Deserialize)]
struct LayoutIn {
    dims: Vec<String>,
    coords: Vec<CoordIn>,
    units: String,
    complex: bool,
    meta: Meta,
}

/// `serde(with)`: write a layout with its long numeric coordinates packed.
pub fn serialize<S: Serializer>(layout: &Layout, serializer: S) -> Result<S::Ok, S::Error> {
    LayoutOut {
        dims: &layout.dims,
        coords: layout.coords.iter().map(pack).collect(),
        units: &layout.units,
        complex: layout.complex,
        meta: &layout.meta,
    }
    .serialize(serializer)
}

/// `serde(with)`: read a layout written by [`serialize`] (plain coordinates read as plain).
pub fn deserialize<'de, D: Deserializer<'de>>(deserializer: D) -> Result<Layout, D::Error> {
    let raw = LayoutIn::deserialize(deserializer)?;
    let coords = raw
        .coords
        .into_iter()
        .map(unpack)
        .collect::<Result<Vec<Coord>, PackedCoordError>>()
        .map_err(serde::de::Error::custom)?;
    Ok(Layout {
        dims: raw.dims,
        coords,
        units: raw.units,
        complex: raw.complex,
        meta: raw.meta,
    })
}

fn pack(coord: &Coord) -> CoordOut<'_> {
    match coord {
        Coord::Labels(v) => CoordOut::Labels(v),
        Coord::Pairs(v) => CoordOut::Pairs(v),
        Coord::Numbers(v) if v.len() <= PLAIN_NUMBERS && v.iter().all(|x| x.is_finite()) => {
            CoordOut::Numbers(v)
        }
        Coord::Numbers(v) => {
            let delta = delta2_bytes(v);
            if delta.len() <= 8 * v.len() {
                CoordOut::NumbersDelta2(BASE64.encode(delta))
            } else {
                let bytes: Vec<u8> = v.iter().flat_map(|x| x.to_le_bytes()).collect();
                CoordOut::NumbersF64le(BASE64.encode(bytes))
            }
        }
    }
}

fn unpack(coord: CoordIn) -> Result<Coord, PackedCoordError> {
    let decode = |text: &str| BASE64.decode(text).map_err(PackedCoordError::NotBase64);
    Ok(match coord {
        CoordIn::Labels(v) => Coord::Labels(v),
        CoordIn::Numbers(v) => Coord::Numbers(v),
        CoordIn::Pairs(v) => Coord::Pairs(v.into()),
        CoordIn::NumbersDelta2(text) => Coord::Numbers(from_delta2_bytes(&decode(&text)?)?),
        CoordIn::NumbersF64le(text) => {
            let bytes = decode(&text)?;
            if bytes.len() % 8 != 0 {
                return Err(PackedCoordError::NotWholeF64 { bytes: bytes.len() });
            }
            let numbers = bytes
                .chunks_exact(8)
                .map(|c| f64::from_le_bytes(c.try_into().unwrap_or([0; 8])))
                .collect();
            Coord::Numbers(numbers)
        }
    })
}

/// The `numbers_delta2` bytes of `numbers`.
pub fn delta2_bytes(numbers: &[f64]) -> Vec<u8> {
    let mut out = Vec::with_capacity(numbers.len() + 32);
    let (mut b1, mut b2) = (0u64, 0u64);
    for x in numbers {
        let b = x.to_bits();
        let residual = b.wrapping_sub(b1.wrapping_mul(2)).wrapping_add(b2) as i64;
        let mut z = ((residual << 1) ^ (residual >> 63)) as u64;
        while z >= 0x80 {
            out.push((z as u8) | 0x80);
            z >>= 7;
        }
        out.push(z as u8);
        (b2, b1) = (b1, b);
    }
    out
}

/// The numbers of `numbers_delta2` bytes; an error for a truncated or over-long varint.
pub fn from_delta2_bytes(bytes: &[u8]) -> Result<Vec<f64>, PackedCoordError> {
    let mut out = Vec::with_capacity(bytes.len());
    let (mut b1, mut b2) = (0u64, 0u64);
    let mut z = 0u64;
    let mut shift = 0u32;
    for &byte in bytes {
        if shift > 63 || (shift == 63 && byte > 1) {
            return Err(PackedCoordError::VarintTooLong);
        }
        z |= u64::from(byte & 0x7f) << shift;
        if byte & 0x80 != 0 {
            shift += 7;
            continue;
        }
        let residual = ((z >> 1) as i64) ^ -((z & 1) as i64);
        let b = (residual as u64)
            .wrapping_add(b1.wrapping_mul(2))
            .wrapping_sub(b2);
        out.push(f64::from_bits(b));
        (b2, b1) = (b1, b);
        (z, shift) = (0, 0);
    }
    if shift != 0 {
        return Err(PackedCoordError::EndsInsideVarint);
    }
    Ok(out)
}
