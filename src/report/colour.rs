//! Colour maps of the report's figures and the colour-science helpers their tests need.
//!
//! Both maps are published tables, taken from the `colorous` crate (d3-scale-chromatic's
//! schemes), not recalled or refitted here:
//! - sequential, for non-negative measures drawn from 0 (PLV, PLI, wPLI): viridis
//!   (van der Walt, Smith & Firing, 2015, matplotlib; CC0), colorous's 256-entry table;
//! - diverging, centred on zero, for signed quantities (baseline-corrected values, condition
//!   differences, t, PPC, dwPLI, imaginary coherency): ColorBrewer "RdBu" (C. Brewer,
//!   colorbrewer2.org), its 11-class table, reversed so that negative is blue and positive red,
//!   with straight-line interpolation between neighbouring classes (exact at every class).
//!
//! "No value" (NaN, the matrix diagonal, a pair not computed) is no colour of either map: cells
//! are hatched ([`NO_VALUE_BG`] with [`NO_VALUE_INK`] stripes), and every colour bar shows the
//! hatch in its legend.
//!
//! The sRGB and CIELAB conversions follow IEC 61966-2-1 (sRGB) and CIE 1976 L*a*b* with the
//! D65 white point.

/// An 8-bit sRGB colour.
pub type Rgb = [u8; 3];

/// Background of a cell without a value (under its hatch).
pub const NO_VALUE_BG: Rgb = [255, 255, 255];
/// Stripes of the "no value" hatch: a mid grey that neither map contains.
pub const NO_VALUE_INK: Rgb = [140, 140, 140];

/// Which colour map a colour bar uses.
#[derive(Clone, Copy, Debug, PartialEq, Eq, serde::Serialize)]
#[serde(rename_all = "snake_case")]
pub enum MapKind {
    /// Sequential (viridis), low = dark violet, high = yellow.
    Sequential,
    /// Diverging around zero (ColorBrewer RdBu reversed): negative blue, zero near white,
    /// positive red.
    Diverging,
}

impl MapKind {
    /// The colour at position `t` in [0, 1] (clamped; NaN gives the map's middle).
    pub fn at(self, t: f64) -> Rgb {
        let t = if t.is_nan() { 0.5 } else { t.clamp(0.0, 1.0) };
        match self {
            MapKind::Sequential => viridis(t),
            MapKind::Diverging => diverging(t),
        }
    }

    /// Short name shown in captions.
    pub fn name(self) -> &'static str {
        match self {
            MapKind::Sequential => "viridis (sequential)",
            MapKind::Diverging => "ColorBrewer RdBu (diverging, white at zero)",
        }
    }
}

/// Viridis at `t` in [0, 1], through colorous's 256-entry table.
pub fn viridis(t: f64) -> Rgb {
    colorous::VIRIDIS.eval_continuous(t).into_array()
}

/// Number of classes of the published RdBu table used.
const RDBU_CLASSES: usize = 11;

/// Class `i` of the published 11-class RdBu table, reversed (0 = deepest blue).
fn rdbu_class(i: usize) -> Rgb {
    colorous::RED_BLUE
        .eval_rational(RDBU_CLASSES - 1 - i, RDBU_CLASSES)
        .into_array()
}

/// The diverging map at `t`: straight lines in sRGB between neighbouring published classes.
fn diverging(t: f64) -> Rgb {
    let x = t * (RDBU_CLASSES - 1) as f64;
    let i = (x.floor() as usize).min(RDBU_CLASSES - 2);
    let u = x - i as f64;
    let (a, b) = (rdbu_class(i), rdbu_class(i + 1));
    let mut out = [0u8; 3];
    for k in 0..3 {
        out[k] = (f64::from(a[k]) + u * (f64::from(b[k]) - f64::from(a[k]))).round() as u8;
    }
    out
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

fn srgb_decode(v: f64) -> f64 {
    if v <= 0.040_45 {
        v / 12.92
    } else {
        ((v + 0.055) / 1.055).powf(2.4)
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

/// Hex form `#rrggbb` for HTML and SVG.
pub fn hex(c: Rgb) -> String {
    format!("#{:02x}{:02x}{:02x}", c[0], c[1], c[2])
}

#[cfg(test)]
mod tests {
    use super::*;

    fn within(c: Rgb, want: [f64; 3], tol: f64) -> bool {
        c.iter()
            .zip(want)
            .all(|(&a, w)| (f64::from(a) - w * 255.0).abs() <= tol)
    }

    #[test]
    fn viridis_matches_published_table() {
        // Entries 0, 32, 64, 128, 192 and 255 of the published 256-entry viridis table
        // (mpl-colormaps, van der Walt & Smith 2015, CC0), as floats. colorous samples its copy
        // of the table through a uniform B-spline, which at a table entry averages it with its
        // neighbours (1/6, 4/6, 1/6) and truncates to 8 bits: within 1.5 of 255 on this smooth
        // table.
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
            assert!(within(got, want, 1.5), "entry {i}: {got:?} vs {want:?}");
        }
    }

    #[test]
    fn diverging_hits_the_published_rdbu_classes() {
        // ColorBrewer RdBu, 11 classes (colorbrewer2.org), from its red end: 67001f b2182b
        // d6604d f4a582 fddbc7 f7f7f7 d1e5f0 92c5de 4393c3 2166ac 053061. Reversed here.
        let published: [u32; 11] = [
            0x67001f, 0xb2182b, 0xd6604d, 0xf4a582, 0xfddbc7, 0xf7f7f7, 0xd1e5f0, 0x92c5de,
            0x4393c3, 0x2166ac, 0x053061,
        ];
        for (k, hexv) in published.iter().rev().enumerate() {
            let want = [
                (hexv >> 16) as u8,
                (hexv >> 8 & 0xff) as u8,
                (hexv & 0xff) as u8,
            ];
            assert_eq!(MapKind::Diverging.at(k as f64 / 10.0), want, "class {k}");
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
    fn diverging_lightness_peaks_at_zero() {
        // The defining property of a diverging map: L* rises to the centre and falls after it.
        let l = |t: f64| srgb_to_lab(MapKind::Diverging.at(t))[0];
        for i in 0..32 {
            let (a, b) = (i as f64 / 64.0, (i + 1) as f64 / 64.0);
            assert!(l(b) >= l(a) - 0.3, "rising half at {a}");
            assert!(l(1.0 - b) >= l(1.0 - a) - 0.3, "falling half at {a}");
        }
    }

    #[test]
    fn no_value_is_in_neither_map() {
        // The hatch colour must not be mistaken for any value: far (> 20 in 8-bit RGB distance)
        // from every colour of both maps.
        for i in 0..=1000 {
            for map in [MapKind::Sequential, MapKind::Diverging] {
                let c = map.at(i as f64 / 1000.0);
                let d: f64 = c
                    .iter()
                    .zip(NO_VALUE_INK)
                    .map(|(&a, b)| (f64::from(a) - f64::from(b)).powi(2))
                    .sum::<f64>()
                    .sqrt();
                assert!(d > 20.0, "{map:?} at {i}: {c:?}");
            }
        }
    }
}
