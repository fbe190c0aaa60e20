//! Reading what a finished run leaves in its output folder: `manifest.json`, the exported arrays
//! (`<subject>/<stage>.npy` and `group/<stage>.npy`, each with a `.json` sidecar) and the tidy
//! tables (`<stage>.tsv`).
//!
//! Everything is parsed leniently: unknown fields are ignored and fields of unexpected shape are
//! kept as raw JSON, so the report keeps working while the manifest format grows. Only a missing
//! or unreadable manifest is an error; an array that cannot be read is listed as skipped, with
//! its [`LoadError`] (the file, and what was expected there).

use std::fs;
use std::path::{Path, PathBuf};

use ndarray::ArrayD;
use phasewise_stages::array::Coord;
use serde_json::Value;

use super::ReportError;

/// Why one exported array (or its sidecar) cannot be read; each names the file and what was
/// expected there.
#[derive(Debug, thiserror::Error)]
pub enum LoadError {
    /// The sidecar cannot be read.
    #[error("{}: cannot read it ({source}); expected the JSON sidecar the run writes beside each exported array", path.display())]
    Unreadable {
        /// The sidecar.
        path: PathBuf,
        /// The cause.
        source: std::io::Error,
    },
    /// The sidecar is not JSON.
    #[error("{}: expected a JSON document, found invalid JSON ({source})", path.display())]
    NotJson {
        /// The sidecar.
        path: PathBuf,
        /// The parser's message.
        source: serde_json::Error,
    },
    /// A field of the sidecar has the wrong shape.
    #[error("{}: field `{field}`: expected {expected} ({detail})", path.display())]
    Field {
        /// The sidecar.
        path: PathBuf,
        /// The field (`dims`, `coords`, …).
        field: &'static str,
        /// What it should hold.
        expected: &'static str,
        /// What the reader found.
        detail: String,
    },
    /// The sidecar lists a different number of axes and coordinate lists.
    #[error("{}: {dims} axis names but {coords} coordinate lists; expected one list per axis", path.display())]
    AxisCount {
        /// The sidecar.
        path: PathBuf,
        /// Number of axis names.
        dims: usize,
        /// Number of coordinate lists.
        coords: usize,
    },
    /// The array file holds no real float array.
    #[error("{}: expected a real f32 or f64 NPY array, cannot read it as one ({detail})", path.display())]
    NotReal {
        /// The array file.
        path: PathBuf,
        /// The NPY reader's message.
        detail: String,
    },
    /// The array's shape is not the one its sidecar describes.
    #[error("{}: shape {found:?}, expected {expected:?} from the sidecar's coordinates", path.display())]
    Shape {
        /// The array file.
        path: PathBuf,
        /// Shape in the file.
        found: Vec<usize>,
        /// Shape the sidecar gives.
        expected: Vec<usize>,
    },
    /// The array's axes cannot be drawn as a connectivity map.
    #[error("{}: {source}", path.display())]
    Layout {
        /// The array file.
        path: PathBuf,
        /// What the axes lack.
        source: super::cube::LayoutError,
    },
}

/// One unit (stage × subject) of the manifest.
#[derive(Clone, Debug, Default)]
pub struct Unit {
    /// Stage name.
    pub stage: String,
    /// Subject id, `None` for group units.
    pub subject: Option<String>,
    /// Op name.
    pub op: String,
    /// Effective params.
    pub params: Value,
    /// The unit's key.
    pub key: String,
    /// Keys of its inputs.
    pub inputs: Vec<String>,
    /// `computed` or `cached` (or whatever the manifest says).
    pub status: String,
    /// Seconds spent, when recorded.
    pub seconds: Option<f64>,
    /// Shapes of its outputs.
    pub shapes: Vec<Vec<usize>>,
}

/// The parts of the manifest the report shows.
#[derive(Clone, Debug, Default)]
pub struct Manifest {
    /// The whole document, for fields shown as they are.
    pub raw: Value,
    /// Units in manifest order.
    pub units: Vec<Unit>,
    /// Epoch counts, as recorded.
    pub epochs: Value,
    /// Warnings, each as one line of text.
    pub warnings: Vec<String>,
}

/// The layout written beside an exported array.
#[derive(Clone, Debug, Default)]
pub struct Sidecar {
    /// Axis names.
    pub dims: Vec<String>,
    /// One coordinate list per axis.
    pub coords: Vec<Coord>,
    /// Unit of the values.
    pub units: String,
    /// Metadata, as recorded.
    pub meta: Value,
}

/// An exported array found in the output folder (values read on demand).
#[derive(Clone, Debug)]
pub struct Exported {
    /// Subject id, or `group`.
    pub owner: String,
    /// Stage name (the file stem).
    pub stage: String,
    /// Path of the `.npy` file.
    pub npy: PathBuf,
    /// Its sidecar.
    pub sidecar: Sidecar,
}

/// A tidy table.
#[derive(Clone, Debug)]
pub struct Table {
    /// The subject folder it lies in, `None` for the output folder itself (group tables).
    pub owner: Option<String>,
    /// Stage name (the file stem).
    pub stage: String,
    /// Path of the file.
    pub path: PathBuf,
    /// Column names.
    pub header: Vec<String>,
    /// Rows (cells as written).
    pub rows: Vec<Vec<String>>,
}

/// Everything read from one output folder.
#[derive(Clone, Debug)]
pub struct RunOutput {
    /// The folder.
    pub dir: PathBuf,
    /// The manifest.
    pub manifest: Manifest,
    /// Exported arrays, sorted by owner then stage.
    pub arrays: Vec<Exported>,
    /// Tables, sorted by stage.
    pub tables: Vec<Table>,
    /// Things found but not readable, one sentence each.
    pub skipped: Vec<String>,
}

/// Reads an output folder.
pub fn read_output(dir: &Path) -> Result<RunOutput, ReportError> {
    let path = dir.join("manifest.json");
    let text = fs::read_to_string(&path).map_err(|e| ReportError::Manifest {
        path: path.clone(),
        msg: format!(
            "cannot read it ({e}); run the pipeline first so that its output folder has a manifest"
        ),
    })?;
    let raw: Value = serde_json::from_str(&text).map_err(|e| ReportError::Manifest {
        path: path.clone(),
        msg: format!("expected a JSON document, found invalid JSON ({e})"),
    })?;
    let manifest = parse_manifest(raw);
    let mut skipped = Vec::new();
    let arrays = find_arrays(dir, &mut skipped)?;
    let tables = find_tables(dir, &mut skipped)?;
    Ok(RunOutput {
        dir: dir.to_path_buf(),
        manifest,
        arrays,
        tables,
        skipped,
    })
}

fn parse_manifest(raw: Value) -> Manifest {
    let units = raw
        .get("units")
        .and_then(Value::as_array)
        .map(|u| u.iter().map(parse_unit).collect())
        .unwrap_or_default();
    let warnings = raw
        .get("warnings")
        .and_then(Value::as_array)
        .map(|w| w.iter().map(warning_text).collect())
        .unwrap_or_default();
    Manifest {
        epochs: raw.get("epochs").cloned().unwrap_or(Value::Null),
        units,
        warnings,
        raw,
    }
}

/// A string field, or empty.
pub fn str_of(v: &Value, key: &str) -> String {
    match v.get(key) {
        Some(Value::String(s)) => s.clone(),
        Some(Value::Null) | None => String::new(),
        Some(other) => other.to_string(),
    }
}

fn parse_unit(v: &Value) -> Unit {
    let subject = match v.get("subject") {
        Some(Value::String(s)) => Some(s.clone()),
        _ => None,
    };
    let inputs = v
        .get("inputs")
        .and_then(Value::as_array)
        .map(|a| {
            a.iter()
                .filter_map(|i| match i {
                    Value::String(s) => Some(s.clone()),
                    Value::Object(_) => i.get("key").and_then(Value::as_str).map(str::to_string),
                    _ => None,
                })
                .collect()
        })
        .unwrap_or_default();
    let shapes = v
        .get("outputs")
        .and_then(Value::as_array)
        .map(|o| {
            o.iter()
                .filter_map(|out| shape_of(out.get("shape")))
                .collect()
        })
        .unwrap_or_default();
    Unit {
        stage: str_of(v, "stage"),
        subject,
        op: str_of(v, "op"),
        params: v.get("params").cloned().unwrap_or(Value::Null),
        key: str_of(v, "key"),
        inputs,
        status: str_of(v, "status"),
        seconds: v.get("seconds").and_then(Value::as_f64),
        shapes,
    }
}

fn shape_of(v: Option<&Value>) -> Option<Vec<usize>> {
    v?.as_array()?
        .iter()
        .map(|d| d.as_u64().map(|d| d as usize))
        .collect()
}

/// One line of text for a warning recorded as a string or as an object.
fn warning_text(w: &Value) -> String {
    match w {
        Value::String(s) => s.clone(),
        Value::Object(_) => {
            let msg = ["message", "msg", "text"]
                .iter()
                .map(|k| str_of(w, k))
                .find(|s| !s.is_empty())
                .unwrap_or_else(|| w.to_string());
            let place: Vec<String> = ["stage", "subject"]
                .iter()
                .map(|k| str_of(w, k))
                .filter(|s| !s.is_empty())
                .collect();
            if place.is_empty() {
                msg
            } else {
                format!("[{}] {msg}", place.join(" · "))
            }
        }
        other => other.to_string(),
    }
}

fn sorted_entries(dir: &Path) -> Result<Vec<PathBuf>, ReportError> {
    let rd = fs::read_dir(dir).map_err(|e| ReportError::io(dir, e))?;
    let mut out: Vec<PathBuf> = rd.filter_map(|e| e.ok().map(|e| e.path())).collect();
    out.sort();
    Ok(out)
}

fn find_arrays(dir: &Path, skipped: &mut Vec<String>) -> Result<Vec<Exported>, ReportError> {
    let mut out = Vec::new();
    for sub in sorted_entries(dir)? {
        // Subject folders and `group`; the report's own `figures` folder holds no arrays.
        if !sub.is_dir() || sub.file_name().is_some_and(|n| n == "figures") {
            continue;
        }
        let owner = file_name(&sub);
        for f in sorted_entries(&sub)? {
            if f.extension().is_some_and(|e| e == "npy") {
                match read_sidecar(&f.with_extension("json")) {
                    Ok(sidecar) => out.push(Exported {
                        owner: owner.clone(),
                        stage: file_stem(&f),
                        npy: f,
                        sidecar,
                    }),
                    Err(e) => skipped.push(e.to_string()),
                }
            }
        }
    }
    Ok(out)
}

fn file_name(p: &Path) -> String {
    p.file_name()
        .map(|n| n.to_string_lossy().into_owned())
        .unwrap_or_default()
}

fn file_stem(p: &Path) -> String {
    p.file_stem()
        .map(|n| n.to_string_lossy().into_owned())
        .unwrap_or_default()
}

/// Reads a sidecar: the exported form of format 2 (`attrs.format_version`, see
/// `crate::output::sidecar`), else the layout fields at the top level, or under `layout`.
pub fn read_sidecar(path: &Path) -> Result<Sidecar, LoadError> {
    let text = fs::read_to_string(path).map_err(|source| LoadError::Unreadable {
        path: path.to_path_buf(),
        source,
    })?;
    let v: Value = serde_json::from_str(&text).map_err(|source| LoadError::NotJson {
        path: path.to_path_buf(),
        source,
    })?;
    let field = |field, expected, detail: String| LoadError::Field {
        path: path.to_path_buf(),
        field,
        expected,
        detail,
    };
    if v["attrs"]["format_version"]
        .as_u64()
        .is_some_and(|n| n >= 2)
    {
        let (dims, coords) = crate::output::sidecar_axes(&v).map_err(|e| {
            field(
                "coords",
                "axis names and a coordinate per axis, as the run exports them (format 2)",
                e.to_string(),
            )
        })?;
        return Ok(Sidecar {
            dims,
            coords,
            units: str_of(&v["attrs"], "units"),
            meta: v["attrs"].clone(),
        });
    }
    let body = if v.get("dims").is_some() {
        &v
    } else {
        v.get("layout").unwrap_or(&v)
    };
    let dims: Vec<String> =
        serde_json::from_value(body.get("dims").cloned().unwrap_or(Value::Null))
            .map_err(|e| field("dims", "a list of axis names", e.to_string()))?;
    let coords: Vec<Coord> =
        serde_json::from_value(body.get("coords").cloned().unwrap_or(Value::Null))
            .map_err(|e| field("coords", "one {kind, values} list per axis", e.to_string()))?;
    if dims.len() != coords.len() {
        return Err(LoadError::AxisCount {
            path: path.to_path_buf(),
            dims: dims.len(),
            coords: coords.len(),
        });
    }
    Ok(Sidecar {
        dims,
        coords,
        units: str_of(body, "units"),
        meta: body.get("meta").cloned().unwrap_or(Value::Null),
    })
}

/// Reads an exported array's values as f32 (f64 files are narrowed; complex ones refused).
pub fn read_values(a: &Exported) -> Result<ArrayD<f32>, LoadError> {
    use ndarray_npy::read_npy;
    let shape: Vec<usize> = a.sidecar.coords.iter().map(Coord::len).collect();
    let values: ArrayD<f32> = match read_npy::<_, ArrayD<f32>>(&a.npy) {
        Ok(v) => v,
        Err(first) => match read_npy::<_, ArrayD<f64>>(&a.npy) {
            Ok(v) => v.mapv(|x| x as f32),
            Err(_) => {
                return Err(LoadError::NotReal {
                    path: a.npy.clone(),
                    detail: first.to_string(),
                })
            }
        },
    };
    if values.shape() != shape.as_slice() {
        return Err(LoadError::Shape {
            path: a.npy.clone(),
            found: values.shape().to_vec(),
            expected: shape,
        });
    }
    Ok(values)
}

impl Exported {
    /// Its layout error, with its file.
    pub fn layout_error(&self, source: super::cube::LayoutError) -> LoadError {
        LoadError::Layout {
            path: self.npy.clone(),
            source,
        }
    }
}

/// Tables in the output folder (group stages) first, then in each subject folder.
fn find_tables(dir: &Path, skipped: &mut Vec<String>) -> Result<Vec<Table>, ReportError> {
    let mut out = Vec::new();
    tables_in(dir, None, &mut out, skipped)?;
    for sub in sorted_entries(dir)? {
        if sub.is_dir() {
            tables_in(&sub, Some(file_name(&sub)), &mut out, skipped)?;
        }
    }
    Ok(out)
}

fn tables_in(
    dir: &Path,
    owner: Option<String>,
    out: &mut Vec<Table>,
    skipped: &mut Vec<String>,
) -> Result<(), ReportError> {
    for f in sorted_entries(dir)? {
        if f.is_file() && f.extension().is_some_and(|e| e == "tsv") {
            match fs::read_to_string(&f) {
                Ok(text) => out.push(parse_tsv(&f, owner.clone(), &text)),
                Err(e) => skipped.push(format!("{}: cannot read it ({e})", f.display())),
            }
        }
    }
    Ok(())
}

fn parse_tsv(path: &Path, owner: Option<String>, text: &str) -> Table {
    let mut lines = text.lines().filter(|l| !l.trim().is_empty());
    let header = lines
        .next()
        .map(|h| h.split('\t').map(str::to_string).collect())
        .unwrap_or_default();
    let rows = lines
        .map(|l| l.split('\t').map(str::to_string).collect())
        .collect();
    Table {
        owner,
        stage: file_stem(path),
        path: path.to_path_buf(),
        header,
        rows,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    // Each failure names its file and what was expected there.
    #[test]
    fn sidecar_and_array_errors_name_the_file_and_the_expectation() {
        let tmp = tempfile::tempdir().unwrap();
        let bad = tmp.path().join("norm.json");
        fs::write(&bad, "{ not json").unwrap();
        let e = read_sidecar(&bad).unwrap_err();
        assert!(matches!(e, LoadError::NotJson { .. }), "{e:?}");
        assert!(e.to_string().contains("norm.json") && e.to_string().contains("expected a JSON"));

        fs::write(&bad, r#"{"dims": ["pair", "time"], "coords": []}"#).unwrap();
        let e = read_sidecar(&bad).unwrap_err();
        assert!(
            matches!(
                e,
                LoadError::AxisCount {
                    dims: 2,
                    coords: 0,
                    ..
                }
            ),
            "{e:?}"
        );

        fs::write(&bad, r#"{"dims": "pair", "coords": []}"#).unwrap();
        let e = read_sidecar(&bad).unwrap_err();
        assert!(matches!(e, LoadError::Field { field: "dims", .. }), "{e:?}");

        let e = read_sidecar(&tmp.path().join("missing.json")).unwrap_err();
        assert!(matches!(e, LoadError::Unreadable { .. }), "{e:?}");

        // An array whose shape is not the sidecar's.
        let npy = tmp.path().join("norm.npy");
        ndarray_npy::write_npy(&npy, &ndarray::Array2::<f32>::zeros((2, 3))).unwrap();
        let a = Exported {
            owner: "sub-01".into(),
            stage: "norm".into(),
            npy: npy.clone(),
            sidecar: Sidecar {
                dims: vec!["time".into()],
                coords: vec![Coord::Numbers(vec![0.0, 0.1])],
                ..Sidecar::default()
            },
        };
        match read_values(&a).unwrap_err() {
            LoadError::Shape {
                path,
                found,
                expected,
            } => {
                assert_eq!((path, found, expected), (npy, vec![2, 3], vec![2]));
            }
            other => panic!("{other:?}"),
        }
    }
}
