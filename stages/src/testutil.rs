//! Helpers for unit tests: reading the reference fixtures that `tests/reference/gen_*.py`
//! wrote with pinned numpy/scipy/pyedflib.

use std::path::PathBuf;

use ndarray::ArrayD;

/// `tests/reference/fixtures/<area>/<name>` in the workspace.
pub fn fixture_path(area: &str, name: &str) -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
        .join("../tests/reference/fixtures")
        .join(area)
        .join(name)
}

/// A float64 NPY fixture.
pub fn read_f64(area: &str, name: &str) -> ArrayD<f64> {
    let path = fixture_path(area, &format!("{name}.npy"));
    ndarray_npy::read_npy(&path).unwrap_or_else(|e| panic!("reading {}: {e}", path.display()))
}

/// A float64 NPY fixture, flattened in C order.
pub fn read_vec(area: &str, name: &str) -> Vec<f64> {
    read_f64(area, name).iter().copied().collect()
}

/// A JSON fixture.
pub fn read_json(area: &str, name: &str) -> serde_json::Value {
    let path = fixture_path(area, &format!("{name}.json"));
    let text = std::fs::read_to_string(&path)
        .unwrap_or_else(|e| panic!("reading {}: {e}", path.display()));
    serde_json::from_str(&text).unwrap_or_else(|e| panic!("parsing {}: {e}", path.display()))
}

/// Largest |a - b| / max(|b|, floor) over two equally long slices.
pub fn max_rel_diff(a: &[f64], b: &[f64], floor: f64) -> f64 {
    assert_eq!(a.len(), b.len(), "length mismatch");
    a.iter()
        .zip(b)
        .map(|(x, y)| (x - y).abs() / y.abs().max(floor))
        .fold(0.0, f64::max)
}

/// Asserts that NaNs sit at the same places and that the finite values agree within `tol`
/// relative to max(|expected|, floor). (`max_rel_diff` alone would skip NaNs: `f64::max`
/// ignores them.)
pub fn assert_close(actual: &[f64], expected: &[f64], floor: f64, tol: f64, what: &str) {
    assert_eq!(actual.len(), expected.len(), "{what}: length mismatch");
    for (i, (a, e)) in actual.iter().zip(expected).enumerate() {
        assert_eq!(
            a.is_nan(),
            e.is_nan(),
            "{what}: element {i} is {a}, expected {e}"
        );
    }
    let keep = |(a, e): (&f64, &f64)| (!e.is_nan()).then_some((*a, *e));
    let (a, e): (Vec<f64>, Vec<f64>) = actual.iter().zip(expected).filter_map(keep).unzip();
    let err = max_rel_diff(&a, &e, floor);
    assert!(
        err <= tol,
        "{what}: largest relative difference {err:e} > {tol:e}"
    );
}

/// Largest |got − want| divided by the peak |want|: the error of a filter output measured against
/// the signal's size, so tiny values near zero crossings do not dominate.
pub fn largest_error_of_peak(got: &[f64], want: &[f64]) -> f64 {
    assert_eq!(got.len(), want.len(), "length mismatch");
    let peak = want.iter().fold(0.0_f64, |m, v| m.max(v.abs()));
    got.iter()
        .zip(want)
        .map(|(g, w)| (g - w).abs())
        .fold(0.0, f64::max)
        / peak
}

/// The bit patterns of a real array's values in logical order (for bit-for-bit comparisons).
pub fn real_bits(a: &crate::LabelledArray) -> Vec<u32> {
    a.real_values()
        .expect("real values")
        .iter()
        .map(|v| v.to_bits())
        .collect()
}

/// The message of a recording that must fail to read with an input error.
pub fn read_error(path: &std::path::Path, events: crate::io::EventSource) -> String {
    let err = crate::io::read_recording(path, events, &mut crate::Notes::default()).unwrap_err();
    assert!(matches!(err, crate::StageError::Input(_)), "{err:?}");
    err.to_string()
}
