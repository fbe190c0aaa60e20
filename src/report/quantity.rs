//! What a value means, and so how it is coloured and named: per measure and per quantity.
//!
//! - A raw measure that cannot be negative by its definition (PLV, PLI, wPLI; DESIGN §4) is drawn
//!   with the sequential map on a scale from 0 to the largest value, so that the colour's
//!   darkest end means "no synchronization".
//! - A measure that can be negative (PPC and dwPLI, whose bias corrections go below 0 by
//!   chance; imaginary coherency, signed by the direction of the lag), any value after a
//!   `baseline` stage (a change), a condition difference and a t value are drawn with the
//!   diverging map on a scale symmetric around 0.
//! - A measure this table does not know is sequential from 0 when all its values are
//!   non-negative, else diverging.

use serde_json::Value;

use super::axes::Scale;
use super::colour::MapKind;
use super::input::Manifest;

/// The trade's name of a measure (DESIGN §4 `clustering`), or the name as written.
pub fn measure_title(m: &str) -> String {
    match m {
        "plv" => "PLV".to_string(),
        "ppc" => "PPC".to_string(),
        "pli" => "PLI".to_string(),
        "wpli" => "wPLI".to_string(),
        "dwpli" => "dwPLI".to_string(),
        "icoh" => "imaginary coherency".to_string(),
        other => other.to_string(),
    }
}

/// True for measures that are never negative by definition.
pub fn non_negative_by_definition(m: &str) -> Option<bool> {
    match m {
        "plv" | "pli" | "wpli" => Some(true),
        "ppc" | "dwpli" | "icoh" => Some(false),
        _ => None,
    }
}

/// The baseline correction upstream of an array, as the manifest records it.
#[derive(Clone, Debug, PartialEq)]
pub struct Baseline {
    /// `subtract`, `percent`, `db` or `zscore`.
    pub mode: String,
    /// The baseline window (s), when recorded.
    pub window: Option<(f64, f64)>,
}

impl Baseline {
    /// "baseline-subtracted" and the like, for titles.
    pub fn adjective(&self) -> String {
        match self.mode.as_str() {
            "subtract" => "baseline-subtracted".to_string(),
            "percent" => "% change from baseline".to_string(),
            "db" => "dB change from baseline".to_string(),
            "zscore" => "z-scored to baseline".to_string(),
            m => format!("baseline-corrected ({m})"),
        }
    }

    /// One sentence for captions.
    pub fn sentence(&self) -> String {
        match self.window {
            Some((a, b)) => format!(
                " Values are {} ({} to {} s, marked by a black bar along the time axis).",
                self.adjective(),
                super::axes::fmt_num(a),
                super::axes::fmt_num(b)
            ),
            None => format!(" Values are {}.", self.adjective()),
        }
    }
}

/// The first `baseline` unit at or upstream of `stage`.
pub fn baseline_of(manifest: &Manifest, stage: &str) -> Option<Baseline> {
    let u = super::graph::upstream_units(manifest, stage)
        .into_iter()
        .find(|u| u.op == "baseline")?;
    let mode = match u.params.get("mode") {
        Some(Value::String(s)) => s.clone(),
        _ => "subtract".to_string(),
    };
    let window = u.params.get("window").and_then(|w| {
        let a = w.as_array()?;
        Some((a.first()?.as_f64()?, a.get(1)?.as_f64()?))
    });
    Some(Baseline { mode, window })
}

/// The colour map of one measure of an array: see the module's doc.
pub fn map_for(measure: &str, baseline: bool, range: Option<(f64, f64)>) -> MapKind {
    if baseline {
        return MapKind::Diverging;
    }
    let non_negative = non_negative_by_definition(measure)
        .unwrap_or_else(|| range.is_none_or(|(lo, _)| lo >= 0.0));
    if non_negative {
        MapKind::Sequential
    } else {
        MapKind::Diverging
    }
}

/// The scale of a map over values in `range`: sequential from 0 to the largest value (or from
/// the smallest, if a value below 0 slipped in), diverging symmetric around 0.
pub fn scale_for(map: MapKind, range: Option<(f64, f64)>) -> Scale {
    let (lo, hi) = range.unwrap_or((0.0, 0.0));
    match map {
        MapKind::Sequential => Scale {
            map,
            vmin: lo.min(0.0),
            vmax: if hi > lo.min(0.0) {
                hi
            } else {
                lo.min(0.0) + 1.0
            },
        },
        MapKind::Diverging => Scale::for_range(map, lo, hi),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn raw_measures_by_definition() {
        // PLV = |Σ e^{iΔφ}| / N ≥ 0 (Lachaux et al. 1999); wPLI = |Σ Im S| / Σ |Im S| ≥ 0
        // (Vinck et al. 2011); PPC = (|Σ|² − N) / (N (N − 1)) is −1/(N − 1) for opposite
        // phases of two trials (Vinck et al. 2010), so it can be negative.
        assert_eq!(map_for("plv", false, Some((0.1, 0.9))), MapKind::Sequential);
        assert_eq!(map_for("wpli", false, None), MapKind::Sequential);
        assert_eq!(map_for("ppc", false, Some((0.0, 0.5))), MapKind::Diverging);
        assert_eq!(map_for("icoh", false, None), MapKind::Diverging);
        assert_eq!(map_for("plv", true, Some((0.1, 0.9))), MapKind::Diverging);
        assert_eq!(map_for("x", false, Some((0.1, 0.9))), MapKind::Sequential);
        assert_eq!(map_for("x", false, Some((-0.1, 0.9))), MapKind::Diverging);
        let s = scale_for(MapKind::Sequential, Some((0.2, 0.7)));
        assert_eq!((s.vmin, s.vmax), (0.0, 0.7));
        let d = scale_for(MapKind::Diverging, Some((-0.2, 0.7)));
        assert_eq!((d.vmin, d.vmax), (-0.7, 0.7));
    }
}
