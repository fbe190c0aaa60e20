//! Stage keys: what decides whether a cached result can be reused.
//!
//! A unit's key is blake3 over its [`Fingerprint`], written as canonical JSON:
//!
//! | field        | why it is in the key                                              |
//! |--------------|-------------------------------------------------------------------|
//! | `op`         | a different op computes different numbers                          |
//! | `op_version` | ops bump it whenever their numbers change                          |
//! | `params`     | the *effective* params (defaults filled in), canonical JSON         |
//! | `inputs`     | the keys of the input units (or of the source recordings)           |
//! | `subject`    | two subjects with identical files still get their own results      |
//!
//! A source's key is blake3 over the content hashes of the recording and its sidecars (the
//! events sidecar among them), the reader's version, and how the files are read when that is
//! not the default (`data.events: annotations`, `data.channels`, `data.rate`, ...).
//! What is never hashed: absolute paths and modification times (a renamed or copied project keeps
//! its cache), stage names (renaming a stage does not invalidate its results), thread counts.
//!
//! Canonical JSON: object keys sorted, no whitespace, and numbers normalised so that `50` and
//! `50.0` hash equal (an integral float within ±2⁵³ is written as an integer; other floats in
//! Rust's shortest round-trip form).

use std::fmt::Write as _;

use serde::{Deserialize, Serialize};
use serde_json::Value;

/// Domain separation: a key can never collide with a hash of some other kind of record.
const UNIT_DOMAIN: &str = "phasewise unit key v1\n";
const SOURCE_DOMAIN: &str = "phasewise source key v1\n";

/// Everything that goes into a unit's key, as named fields so that a mismatch can be explained.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Fingerprint {
    /// The op's name.
    pub op: String,
    /// The op's version.
    pub op_version: u32,
    /// Effective params.
    pub params: Value,
    /// The inputs, in order.
    pub inputs: Vec<InputKey>,
    /// The subject, `None` for group units.
    pub subject: Option<String>,
}

/// One input of a unit, as recorded in its fingerprint.
#[derive(Clone, Debug, PartialEq, Eq, Serialize, Deserialize)]
pub struct InputKey {
    /// The producing stage (`recordings` for the source).
    pub stage: String,
    /// The producing unit's subject.
    pub subject: Option<String>,
    /// Its key.
    pub key: String,
}

impl Fingerprint {
    /// The key: blake3 over the canonical JSON of the fingerprint (64 hex digits).
    pub fn key(&self) -> String {
        // Input stage names are kept for explanations only: they are not hashed.
        let inputs: Vec<&str> = self.inputs.iter().map(|i| i.key.as_str()).collect();
        let value = serde_json::json!({
            "op": self.op,
            "op_version": self.op_version,
            "params": self.params,
            "inputs": inputs,
            "subject": self.subject,
        });
        let mut hasher = blake3::Hasher::new();
        hasher.update(UNIT_DOMAIN.as_bytes());
        hasher.update(canonical_json(&value).as_bytes());
        hasher.finalize().to_hex().to_string()
    }
}

/// A source's key from the content hashes of its files (recording first, then sidecars, each
/// with the part of its name after the subject's entities, e.g. `events.tsv`).
pub fn source_key(files: &[(String, String)]) -> String {
    let mut hasher = blake3::Hasher::new();
    hasher.update(SOURCE_DOMAIN.as_bytes());
    for (role, hash) in files {
        hasher.update(role.as_bytes());
        hasher.update(b"\0");
        hasher.update(hash.as_bytes());
        hasher.update(b"\n");
    }
    hasher.finalize().to_hex().to_string()
}

/// Canonical JSON text: sorted keys, no whitespace, normalised numbers.
pub fn canonical_json(value: &Value) -> String {
    let mut out = String::new();
    write_canonical(value, &mut out);
    out
}

fn write_canonical(value: &Value, out: &mut String) {
    match value {
        Value::Null | Value::Bool(_) | Value::String(_) => out.push_str(&value.to_string()),
        Value::Number(n) => write_number(n, out),
        Value::Array(items) => {
            out.push('[');
            for (i, item) in items.iter().enumerate() {
                if i > 0 {
                    out.push(',');
                }
                write_canonical(item, out);
            }
            out.push(']');
        }
        Value::Object(map) => {
            let mut keys: Vec<&String> = map.keys().collect();
            keys.sort();
            out.push('{');
            for (i, key) in keys.into_iter().enumerate() {
                if i > 0 {
                    out.push(',');
                }
                out.push_str(&Value::String(key.clone()).to_string());
                out.push(':');
                write_canonical(&map[key], out);
            }
            out.push('}');
        }
    }
}

/// 2⁵³: beyond it not every integer is a float, so integral floats are left as floats.
const EXACT_INTEGERS: f64 = 9_007_199_254_740_992.0;

fn write_number(n: &serde_json::Number, out: &mut String) {
    if let Some(i) = n.as_i64() {
        let _ = write!(out, "{i}");
    } else if let Some(u) = n.as_u64() {
        let _ = write!(out, "{u}");
    } else if let Some(f) = n.as_f64() {
        if f.fract() == 0.0 && f.abs() < EXACT_INTEGERS {
            // Integral: written like an integer so that 50.0 and 50 agree; -0.0 becomes 0.
            let _ = write!(out, "{}", f as i64);
        } else {
            let _ = write!(out, "{f:?}");
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use serde_json::json;

    #[test]
    fn canonical_json_sorts_keys_and_normalises_numbers() {
        let a = json!({"q": 30, "freqs": [50.0], "b": {"z": 1, "a": 1.5}});
        let b = json!({"b": {"a": 1.5, "z": 1.0}, "freqs": [50], "q": 30.0});
        assert_eq!(canonical_json(&a), canonical_json(&b));
        assert_eq!(
            canonical_json(&a),
            r#"{"b":{"a":1.5,"z":1},"freqs":[50],"q":30}"#
        );
        // 150e-6 keeps its shortest round-trip form.
        assert_eq!(canonical_json(&json!(150e-6)), "0.00015");
    }

    #[test]
    fn keys_change_with_every_field() {
        let base = Fingerprint {
            op: "scale".into(),
            op_version: 1,
            params: json!({"factor": 2}),
            inputs: vec![InputKey {
                stage: "recordings".into(),
                subject: Some("01".into()),
                key: "k".into(),
            }],
            subject: Some("01".into()),
        };
        let mut variants = vec![base.clone(); 5];
        variants[0].op = "other".into();
        variants[1].op_version = 2;
        variants[2].params = json!({"factor": 3});
        variants[3].inputs[0].key = "k2".into();
        variants[4].subject = Some("02".into());
        for v in &variants {
            assert_ne!(v.key(), base.key());
        }
        let mut renamed = base.clone();
        renamed.inputs[0].stage = "data".into();
        assert_eq!(renamed.key(), base.key());
        let mut same = base.clone();
        same.params = json!({"factor": 2.0});
        assert_eq!(same.key(), base.key());
    }
}
