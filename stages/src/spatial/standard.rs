//! Positions of standard 10-20 / 10-10 electrode labels, derived on the unit sphere from the
//! system's own geometric definition (Jasper 1958, "The ten-twenty electrode system of the
//! International Federation"; its 10 % extension as named by the American
//! Electroencephalographic Society 1991 guideline). No table of coordinates from any program is
//! used: every position below follows from the percent rules.
//!
//! Derivation (an idealised spherical head of radius 1):
//! - Frame: x towards the right preauricular point (RPA), y towards the nasion (Nz), z up. The
//!   nasion, the inion (Iz) and both preauricular points lie on the equator z = 0:
//!   Nz = (0, 1, 0), Iz = (0, −1, 0), LPA = (−1, 0, 0), RPA = (1, 0, 0).
//! - Midline: the nasion–inion arc (180°) is cut at 10 % steps from the nasion: Fpz 10 %,
//!   AFz 20 %, Fz 30 %, FCz 40 %, Cz 50 %, CPz 60 %, Pz 70 %, POz 80 %, Oz 90 %. At fraction p
//!   the point is (0, cos 180°p, sin 180°p); Cz is the vertex (0, 0, 1).
//! - The coronal arc LPA–Cz–RPA is cut the same way: T7 at 10 %, C3 30 %, Cz 50 %, C4 70 %,
//!   T8 90 %. So T7 and T8, like Fpz and Oz, lie 10 % of their arc (18°) above the fiducial
//!   plane.
//! - The circumferential ring through Fpz, T7, Oz and T8 (the horizontal circle at elevation
//!   18°) is cut at 10 % steps of its half from Fpz to Oz on each side: Fp1/Fp2 10 %, AF7/AF8
//!   20 %, F7/F8 30 %, FT7/FT8 40 %, T7/T8 50 %, TP7/TP8 60 %, P7/P8 70 %, PO7/PO8 80 %,
//!   O1/O2 90 %. On that circle arc length is proportional to azimuth, so the point at fraction
//!   q on the right is (cos 18° sin 180°q, cos 18° cos 180°q, sin 18°), mirrored (x → −x) on
//!   the left.
//! - The other electrodes of a row lie on the arc from the row's left ring electrode through its
//!   midline electrode to its right ring electrode (e.g. F7–Fz–F8), which the definition cuts
//!   into equal parts: with 10-10 numbering, number k (odd left, even right) lies ⌈k/2⌉/4 of the
//!   way from the midline electrode to the ring electrode (F1 1/4, F3 1/2, F5 3/4, F7 = the ring
//!   electrode). The arc is taken as the circle in which the plane through those three points
//!   cuts the sphere; for the central row that is the coronal great circle, so C3 lands at 30 %
//!   of LPA–RPA as the definition requires.
//! - Old names: T3 = T7, T4 = T8, T5 = P7, T6 = P8. Labels match case-insensitively.

use std::f64::consts::PI;

/// Elevation of the circumferential ring: 10 % of a 180° arc.
const RING_ELEVATION: f64 = 0.1 * PI;

/// Rows: label prefix, the 10 % step of its midline and ring electrodes, and the prefix its ring
/// electrodes use (T7 in the central row, FT7, TP7).
const ROWS: [(&str, u32, &str); 9] = [
    ("Fp", 1, "Fp"),
    ("AF", 2, "AF"),
    ("F", 3, "F"),
    ("FC", 4, "FT"),
    ("C", 5, "T"),
    ("CP", 6, "TP"),
    ("P", 7, "P"),
    ("PO", 8, "PO"),
    ("O", 9, "O"),
];

/// The point at fraction `p` of the nasion–inion arc.
fn midline(p: f64) -> [f64; 3] {
    let a = PI * p;
    [0.0, a.cos(), a.sin()]
}

/// The point at fraction `q` of the ring's half from Fpz to Oz, on the right (`side` 1) or left
/// (`side` −1).
fn ring(q: f64, side: f64) -> [f64; 3] {
    let (a, c) = (PI * q, RING_ELEVATION.cos());
    [side * c * a.sin(), c * a.cos(), RING_ELEVATION.sin()]
}

fn sub(a: [f64; 3], b: [f64; 3]) -> [f64; 3] {
    [a[0] - b[0], a[1] - b[1], a[2] - b[2]]
}
fn dot(a: [f64; 3], b: [f64; 3]) -> f64 {
    a[0] * b[0] + a[1] * b[1] + a[2] * b[2]
}
fn cross(a: [f64; 3], b: [f64; 3]) -> [f64; 3] {
    [
        a[1] * b[2] - a[2] * b[1],
        a[2] * b[0] - a[0] * b[2],
        a[0] * b[1] - a[1] * b[0],
    ]
}
fn scale(a: [f64; 3], s: f64) -> [f64; 3] {
    [a[0] * s, a[1] * s, a[2] * s]
}
fn add(a: [f64; 3], b: [f64; 3]) -> [f64; 3] {
    [a[0] + b[0], a[1] + b[1], a[2] + b[2]]
}
fn unit(a: [f64; 3]) -> [f64; 3] {
    scale(a, 1.0 / dot(a, a).sqrt())
}

/// The point a fraction `f` of the way along the arc from `m` to `end`, on the circle in which
/// the plane through `m`, `end` and `other` (the row's far ring electrode) cuts the unit sphere.
fn along_row(m: [f64; 3], end: [f64; 3], other: [f64; 3], f: f64) -> [f64; 3] {
    let n = unit(cross(sub(end, m), sub(other, m)));
    let centre = scale(n, dot(n, m));
    let rho = dot(sub(m, centre), sub(m, centre)).sqrt();
    let u = unit(sub(m, centre));
    let e = sub(end, centre);
    let v = unit(sub(e, scale(u, dot(e, u))));
    let theta = dot(e, v).atan2(dot(e, u));
    let a = f * theta;
    add(
        centre,
        add(scale(u, rho * a.cos()), scale(v, rho * a.sin())),
    )
}

/// The unit-sphere position of a standard 10-20 / 10-10 label, or `None` for any other label.
pub fn position(label: &str) -> Option<[f64; 3]> {
    let l = label.trim().to_ascii_lowercase();
    let alias = match l.as_str() {
        "t3" => "t7",
        "t4" => "t8",
        "t5" => "p7",
        "t6" => "p8",
        other => other,
    };
    match alias {
        "nz" => return Some([0.0, 1.0, 0.0]),
        "iz" => return Some([0.0, -1.0, 0.0]),
        "lpa" => return Some([-1.0, 0.0, 0.0]),
        "rpa" => return Some([1.0, 0.0, 0.0]),
        _ => {}
    }
    // Longest prefixes first, so that "FC3" is not read as "F" + "C3".
    let mut candidates: Vec<(&str, u32, &str, bool)> = Vec::new();
    for &(row, step, ring_prefix) in &ROWS {
        candidates.push((row, step, ring_prefix, false));
        if ring_prefix != row {
            candidates.push((ring_prefix, step, ring_prefix, true));
        }
    }
    candidates.sort_by_key(|c| std::cmp::Reverse(c.0.len()));
    for (prefix, step, _, ring_only) in candidates {
        let Some(rest) = alias.strip_prefix(&prefix.to_ascii_lowercase()) else {
            continue;
        };
        let q = f64::from(step) / 10.0;
        if rest == "z" && !ring_only {
            return Some(midline(q));
        }
        let k: u32 = rest.parse().ok().filter(|k| (1..=8).contains(k))?;
        let side = if k.is_multiple_of(2) { 1.0 } else { -1.0 };
        let steps = k.div_ceil(2); // 1..=4 from the midline
                                   // Ring-named electrodes (T7, FT8, ...) are only the ring's; the Fp and O rows have only
                                   // their ring electrodes (Fp1/Fp2, O1/O2), numbered 1 and 2.
        let on_ring_only = matches!(prefix, "Fp" | "O");
        return match (ring_only, on_ring_only, steps) {
            (true, _, 4) => Some(ring(q, side)),
            (true, _, _) => None,
            (false, true, 1) => Some(ring(q, side)),
            (false, true, _) => None,
            (false, false, 4) => Some(ring(q, side)),
            (false, false, s) => {
                let m = midline(q);
                let end = ring(q, side);
                let other = ring(q, -side);
                Some(along_row(m, end, other, f64::from(s) / 4.0))
            }
        };
    }
    None
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Great-circle angle between two unit vectors, in units of 180° (so 0.2 = a 20 % arc of a
    /// nasion–inion line).
    fn arc(a: [f64; 3], b: [f64; 3]) -> f64 {
        dot(a, b).clamp(-1.0, 1.0).acos() / PI
    }

    fn at(label: &str) -> [f64; 3] {
        position(label).unwrap_or_else(|| panic!("{label} has no position"))
    }

    const TOL: f64 = 1e-12;

    #[test]
    fn midline_and_coronal_arcs_follow_the_ten_twenty_percentages() {
        // Jasper 1958: Cz at the vertex; Fz, Pz 20 % of the nasion–inion arc from Cz; Fpz, Oz
        // 10 % above the nasion and inion; C3, C4 20 % of the preauricular arc from Cz; T7, T8
        // 10 % above the preauricular points.
        assert!(arc(at("Cz"), [0.0, 0.0, 1.0]) < TOL);
        for l in ["Fz", "Pz", "C3", "C4"] {
            assert!((arc(at("Cz"), at(l)) - 0.2).abs() < TOL, "{l}");
        }
        for (l, fiducial) in [("Fpz", "Nz"), ("Oz", "Iz"), ("T7", "LPA"), ("T8", "RPA")] {
            assert!((arc(at(l), at(fiducial)) - 0.1).abs() < TOL, "{l}");
            // 10 % above the fiducial plane: elevation 18°.
            assert!((at(l)[2] - (0.1 * PI).sin()).abs() < TOL, "{l}");
        }
        // Fpz, T7, Oz, T8 share the circumferential ring; the ring's quarters are equal.
        assert!((arc(at("Fpz"), at("T8")) - arc(at("T8"), at("Oz"))).abs() < TOL);
        assert!((arc(at("T7"), at("T8")) - 0.8).abs() < TOL);
    }

    #[test]
    fn rows_are_cut_in_equal_parts_and_mirror() {
        // F3 halfway between Fz and F7 along their row (Jasper 1958), and likewise P3, and
        // 10-10's F1 a quarter of the way; left and right mirror in x.
        for (mid, half, ring_e) in [
            ("Fz", "F3", "F7"),
            ("Pz", "P4", "P8"),
            ("FCz", "FC3", "FT7"),
        ] {
            let (a, b) = (arc(at(mid), at(half)), arc(at(half), at(ring_e)));
            // Equal chords on one circle: equal arcs on the sphere too.
            assert!((a - b).abs() < TOL, "{half}: {a} vs {b}");
        }
        let (f1, f3) = (arc(at("Fz"), at("F1")), arc(at("Fz"), at("F3")));
        assert!((arc(at("F1"), at("F3")) - f1).abs() < TOL && f3 > f1);
        for (l, r) in [("F3", "F4"), ("CP5", "CP6"), ("Fp1", "Fp2"), ("PO7", "PO8")] {
            let (a, b) = (at(l), at(r));
            assert!(
                a[0] < 0.0 && (a[0] + b[0]).abs() < TOL && (a[1] - b[1]).abs() < TOL,
                "{l}"
            );
        }
        // C3 lies on the coronal great circle at 30 % from the left preauricular point.
        assert!((arc(at("C3"), at("LPA")) - 0.3).abs() < TOL && at("C3")[1].abs() < TOL);
        // Every derived point is on the unit sphere.
        for l in ["AF3", "FC6", "TP7", "P1", "O2", "Fp1", "F9", "T3"] {
            if let Some(p) = position(l) {
                assert!((dot(p, p) - 1.0).abs() < TOL, "{l}");
            }
        }
    }

    #[test]
    fn old_names_and_case_and_unknown_labels() {
        assert_eq!(position("T3"), position("T7"));
        assert_eq!(position("t6"), position("P8"));
        assert_eq!(position("FP1"), position("Fp1"));
        assert_eq!(position("CZ"), position("Cz"));
        for l in ["VEOG", "F9", "Fp3", "T5a", "", "EMG1", "FT3", "Oz2"] {
            assert_eq!(position(l), None, "{l}");
        }
    }
}
