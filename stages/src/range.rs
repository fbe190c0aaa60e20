//! Inclusive ranges of coordinates: the one rule for baseline windows, aggregate bands and
//! windows, the wavelet's crop and the report's band × window means.
//!
//! Every range a user writes is inclusive at both ends (DESIGN §4). Coordinates typed by a user
//! (`-0.2`) and those computed by an op (`-50 / 250`) may differ in the last bits, so a point
//! counts as inside when it lies within a small slack of the range: 1e-9 of the bound's
//! magnitude (at least 1e-9 absolute). That is far below any sample spacing or frequency step a
//! recording has (1e-9 s is a 1 GHz sampling period) and far above the rounding of an f64
//! coordinate computed from a few operations (about 1e-16 relative).

/// The slack around a bound `x`.
pub fn slack(x: f64) -> f64 {
    1e-9 * x.abs().max(1.0)
}

/// True when `x` lies in the inclusive range `[lo, hi]` (with [`slack`]); false for NaN.
pub fn contains([lo, hi]: [f64; 2], x: f64) -> bool {
    x >= lo - slack(lo) && x <= hi + slack(hi)
}

/// Indices of the coordinates inside the inclusive range, in order.
pub fn points_within(coords: &[f64], range: [f64; 2]) -> Vec<usize> {
    coords
        .iter()
        .enumerate()
        .filter(|(_, &x)| contains(range, x))
        .map(|(i, _)| i)
        .collect()
}

/// True when the range `[lo, hi]` lies within an axis running from `first` to `last`.
pub fn within_axis([lo, hi]: [f64; 2], first: f64, last: f64) -> bool {
    lo >= first - slack(first) && hi <= last + slack(last)
}

/// `[a, b]` as text for messages.
pub fn range_text([lo, hi]: [f64; 2]) -> String {
    format!(
        "[{}, {}]",
        crate::table::number_text(lo),
        crate::table::number_text(hi)
    )
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn computed_coordinates_on_a_bound_are_inside() {
        // -50 / 250 and -0.2 differ in the last bit or not at all; either way the point is in.
        let times: Vec<f64> = (-100..=100).map(|k| k as f64 / 250.0).collect();
        let inside = points_within(&times, [-0.2, 0.0]);
        assert_eq!(inside.first().map(|&i| times[i]), Some(-50.0 / 250.0));
        assert_eq!(inside.len(), 51);
        // The next sample out (4 ms away) is far outside the slack.
        assert!(!contains([-0.2, 0.0], 0.004));
        assert!(!contains([-0.2, 0.0], f64::NAN));
        assert!(within_axis([-0.4, 0.4], times[0], times[200]));
        assert!(!within_axis([-0.41, 0.4], times[0], times[200]));
    }
}
