//! Serde helpers for op params shared by the time-frequency ops.
//!
//! serde's derived structs also accept a *list* of their fields in order, so inside an untagged
//! enum `[5, 8, 5]` would silently become `{from: 5, to: 8, count: 5}`. [`map_only`] makes a
//! variant accept only a mapping.

use serde::de::{DeserializeOwned, Deserializer, Error};
use serde::Deserialize;
use serde_json::{Map, Value};

/// Deserialises `T` from a mapping only (a list is refused), for `deserialize_with` on an
/// untagged enum's struct variant.
pub fn map_only<'de, D: Deserializer<'de>, T: DeserializeOwned>(d: D) -> Result<T, D::Error> {
    let map = Map::<String, Value>::deserialize(d)?;
    T::deserialize(Value::Object(map)).map_err(D::Error::custom)
}
