//! Axes, ticks, number labels, heat-map panels and colour bars: the parts every figure shares.
//!
//! A heat-map panel draws a grid of values into a plot rectangle. Each axis is either numeric
//! (time in s on a linear scale, frequency in Hz on a log scale; cells span the midpoints between
//! neighbouring coordinates) or categorical (channels, bands, windows; one cell per entry).

use super::colour::{MapKind, Rgb, NO_VALUE_BG, NO_VALUE_INK};
use super::scene::{HAlign, Scene, VAlign, GREY, INK};
/// Font size of tick labels.
pub const TICK_PX: f64 = 11.0;
/// Font size of axis labels.
pub const LABEL_PX: f64 = 12.5;
/// Font size of panel titles.
pub const TITLE_PX: f64 = 13.5;

/// How values map to colours.
#[derive(Clone, Copy, Debug)]
pub struct Scale {
    /// Colour map.
    pub map: MapKind,
    /// Value at the map's low end.
    pub vmin: f64,
    /// Value at the map's high end.
    pub vmax: f64,
}

impl Scale {
    /// A scale for values in [lo, hi]: diverging ones are symmetric around zero.
    pub fn for_range(map: MapKind, lo: f64, hi: f64) -> Scale {
        match map {
            MapKind::Sequential => Scale {
                map,
                vmin: lo,
                vmax: hi,
            },
            MapKind::Diverging => {
                let m = lo.abs().max(hi.abs());
                Scale {
                    map,
                    vmin: -m,
                    vmax: m,
                }
            }
        }
    }

    /// The colour of value `v`.
    pub fn colour(&self, v: f64) -> Rgb {
        if !v.is_finite() {
            return NO_VALUE_BG;
        }
        let span = self.vmax - self.vmin;
        let t = if span > 0.0 {
            (v - self.vmin) / span
        } else {
            0.5
        };
        self.map.at(t)
    }
}

/// One axis of a heat-map panel.
#[derive(Clone, Debug, PartialEq)]
pub enum GridAxis {
    /// Numeric coordinates (cell centres), on a linear or log scale.
    Numeric {
        /// Cell centres, increasing.
        centres: Vec<f64>,
        /// Log scale (frequency).
        log: bool,
    },
    /// One cell per label.
    Categories(Vec<String>),
}

impl GridAxis {
    /// Number of cells.
    pub fn len(&self) -> usize {
        match self {
            GridAxis::Numeric { centres, .. } => centres.len(),
            GridAxis::Categories(c) => c.len(),
        }
    }

    /// True when the axis has no cells.
    pub fn is_empty(&self) -> bool {
        self.len() == 0
    }

    /// Cell edges in data units (numeric) or cell indices (categorical): len + 1 values.
    pub fn edges(&self) -> Vec<f64> {
        match self {
            GridAxis::Numeric { centres, log } => numeric_edges(centres, *log),
            GridAxis::Categories(c) => (0..=c.len()).map(|i| i as f64).collect(),
        }
    }

    /// True for a log-scaled axis.
    pub fn is_log(&self) -> bool {
        matches!(self, GridAxis::Numeric { log: true, .. })
    }
}

/// Edges halfway between centres (geometric halfway on a log axis); the outer edges lie half a
/// step beyond the first and last centre.
fn numeric_edges(c: &[f64], log: bool) -> Vec<f64> {
    let fwd = |v: f64| if log { v.ln() } else { v };
    let back = |v: f64| if log { v.exp() } else { v };
    let t: Vec<f64> = c.iter().map(|&v| fwd(v)).collect();
    match t.len() {
        0 => Vec::new(),
        1 => {
            let half = if log { 0.1 } else { 0.5 };
            vec![back(t[0] - half), back(t[0] + half)]
        }
        n => {
            let mut e = Vec::with_capacity(n + 1);
            e.push(back(t[0] - (t[1] - t[0]) / 2.0));
            e.extend(t.windows(2).map(|w| back((w[0] + w[1]) / 2.0)));
            e.push(back(t[n - 1] + (t[n - 1] - t[n - 2]) / 2.0));
            e
        }
    }
}

/// Maps data values of one axis to pixels.
#[derive(Clone, Copy, Debug)]
pub struct PixelMap {
    /// Data value at `p0`.
    pub lo: f64,
    /// Data value at `p1`.
    pub hi: f64,
    /// Pixel of `lo`.
    pub p0: f64,
    /// Pixel of `hi`.
    pub p1: f64,
    /// Log scale.
    pub log: bool,
}

impl PixelMap {
    /// Pixel of value `v`.
    pub fn to_px(&self, v: f64) -> f64 {
        let f = |x: f64| if self.log { x.ln() } else { x };
        let span = f(self.hi) - f(self.lo);
        if span == 0.0 {
            return (self.p0 + self.p1) / 2.0;
        }
        self.p0 + (f(v) - f(self.lo)) / span * (self.p1 - self.p0)
    }
}

/// Draws the cells of `values` (row-major: rows along `y`, columns along `x`) into `rect`.
/// Returns the pixel maps of the x and y axes.
pub fn draw_cells(
    scene: &mut Scene,
    rect: [f64; 4],
    x: &GridAxis,
    y: &GridAxis,
    value: &dyn Fn(usize, usize) -> f64,
    scale: &Scale,
) -> (PixelMap, PixelMap) {
    let xe = x.edges();
    let ye = y.edges();
    let xm = axis_map(&xe, rect[0], rect[2], x.is_log());
    // Rows grow upwards for numeric axes (frequency), downwards for categories (matrix rows).
    let ym = match y {
        GridAxis::Numeric { log, .. } => axis_map(&ye, rect[3], rect[1], *log),
        GridAxis::Categories(_) => axis_map(&ye, rect[1], rect[3], false),
    };
    let xp: Vec<f64> = xe.iter().map(|&v| xm.to_px(v)).collect();
    let yp: Vec<f64> = ye.iter().map(|&v| ym.to_px(v)).collect();
    for r in 0..y.len() {
        for c in 0..x.len() {
            let (y0, y1) = (yp[r].min(yp[r + 1]), yp[r].max(yp[r + 1]));
            let v = value(r, c);
            scene.fill([xp[c], y0, xp[c + 1], y1], scale.colour(v));
            if !v.is_finite() {
                hatch(scene, [xp[c], y0, xp[c + 1], y1]);
            }
        }
    }
    (xm, ym)
}

/// Spacing of the "no value" hatch, in layout pixels.
const HATCH_STEP: f64 = 4.0;

/// Diagonal stripes (lower left to upper right) over `rect`: the mark of a cell without a value.
pub fn hatch(scene: &mut Scene, rect: [f64; 4]) {
    let [x0, y0, x1, y1] = rect;
    let (w, h) = (x1 - x0, y1 - y0);
    if w <= 0.0 || h <= 0.0 {
        return;
    }
    // Lines x + y = k, clipped to the rectangle, every HATCH_STEP along x + y.
    let mut k = x0 + y0 + HATCH_STEP / 2.0;
    while k < x1 + y1 {
        let a = (x0.max(k - y1), (k - x0.max(k - y1)));
        let b = (x1.min(k - y0), (k - x1.min(k - y0)));
        scene.line(a, b, NO_VALUE_INK, 0.8);
        k += HATCH_STEP;
    }
}

/// The pixel map of an axis whose cell edges are `edges`, from pixel `p0` to `p1`.
pub(crate) fn axis_map(edges: &[f64], p0: f64, p1: f64, log: bool) -> PixelMap {
    let lo = edges.first().copied().unwrap_or(0.0);
    let hi = edges.last().copied().unwrap_or(1.0);
    PixelMap {
        lo,
        hi,
        p0,
        p1,
        log,
    }
}

/// Nice tick values inside [lo, hi] for a linear axis, about `n` of them.
pub fn linear_ticks(lo: f64, hi: f64, n: usize) -> Vec<f64> {
    // Written so that NaN ends also take this branch.
    if hi.partial_cmp(&lo) != Some(std::cmp::Ordering::Greater)
        || !lo.is_finite()
        || !hi.is_finite()
    {
        return vec![lo];
    }
    let raw = (hi - lo) / n.max(1) as f64;
    let mag = 10f64.powf(raw.log10().floor());
    let step = [1.0, 2.0, 2.5, 5.0, 10.0]
        .iter()
        .map(|m| m * mag)
        .find(|s| *s >= raw)
        .unwrap_or(10.0 * mag);
    let first = (lo / step).ceil() as i64;
    let last = (hi / step).floor() as i64;
    (first..=last).map(|k| k as f64 * step).collect()
}

/// Tick values inside [lo, hi] for a log axis: 1-2-5 or 1-2-3-4-5-6-8 per decade, whichever
/// gives a readable number of labels.
pub fn log_ticks(lo: f64, hi: f64) -> Vec<f64> {
    let positive = lo.partial_cmp(&0.0) == Some(std::cmp::Ordering::Greater);
    if !positive || hi.partial_cmp(&lo) != Some(std::cmp::Ordering::Greater) {
        return vec![lo];
    }
    let dense = [1.0, 2.0, 3.0, 4.0, 5.0, 6.0, 8.0];
    let sparse = [1.0, 2.0, 5.0];
    let pick = |mantissas: &[f64]| -> Vec<f64> {
        let d0 = lo.log10().floor() as i32;
        let d1 = hi.log10().ceil() as i32;
        (d0..=d1)
            .flat_map(|d| mantissas.iter().map(move |m| m * 10f64.powi(d)))
            .filter(|v| *v >= lo * 0.9999 && *v <= hi * 1.0001)
            .collect()
    };
    let t = pick(&dense);
    if t.len() <= 9 {
        t
    } else {
        pick(&sparse)
    }
}

/// A number label: up to 3 significant digits, scientific for very small or large values,
/// with a typographic minus sign.
pub fn fmt_num(v: f64) -> String {
    if !v.is_finite() {
        return "n/a".to_string();
    }
    if v == 0.0 {
        return "0".to_string();
    }
    let a = v.abs();
    let s = if !(1e-3..1e5).contains(&a) {
        format!("{v:.2e}")
    } else {
        let digits = (2 - a.log10().floor() as i32).clamp(0, 6) as usize;
        let s = format!("{v:.digits$}");
        if s.contains('.') {
            s.trim_end_matches('0').trim_end_matches('.').to_string()
        } else {
            s
        }
    };
    s.replace('-', "\u{2212}")
}

/// Draws the frame, ticks and tick labels of a numeric x axis under `rect`.
pub fn x_numeric_axis(scene: &mut Scene, rect: [f64; 4], map: &PixelMap, label: &str) {
    let ticks = if map.log {
        log_ticks(map.lo, map.hi)
    } else {
        linear_ticks(map.lo, map.hi, 5)
    };
    for t in ticks {
        let x = map.to_px(t);
        scene.line((x, rect[3]), (x, rect[3] + 4.0), INK, 1.0);
        scene.text(
            (x, rect[3] + 6.0),
            fmt_num(t),
            TICK_PX,
            (HAlign::Centre, VAlign::Top),
        );
    }
    let mid = (rect[0] + rect[2]) / 2.0;
    scene.text(
        (mid, rect[3] + 24.0),
        label,
        LABEL_PX,
        (HAlign::Centre, VAlign::Top),
    );
}

/// Draws ticks and tick labels of a numeric y axis left of `rect`; the axis label is drawn only
/// when given (panels side by side share the first panel's label).
pub fn y_numeric_axis(scene: &mut Scene, rect: [f64; 4], map: &PixelMap, label: Option<&str>) {
    let ticks = if map.log {
        log_ticks(map.lo, map.hi)
    } else {
        linear_ticks(map.lo, map.hi, 5)
    };
    for t in ticks {
        let y = map.to_px(t);
        scene.line((rect[0] - 4.0, y), (rect[0], y), INK, 1.0);
        scene.text(
            (rect[0] - 6.0, y),
            fmt_num(t),
            TICK_PX,
            (HAlign::Right, VAlign::Middle),
        );
    }
    if let Some(label) = label {
        scene.vertical_text((rect[0] - 40.0, (rect[1] + rect[3]) / 2.0), label, LABEL_PX);
    }
}

/// Labels one categorical axis: rows left of `rect` (`rows`) or columns under it.
pub fn category_labels(scene: &mut Scene, rect: [f64; 4], labels: &[String], rows: bool) {
    let n = labels.len().max(1) as f64;
    for (i, l) in labels.iter().enumerate() {
        if rows {
            let y = rect[1] + (i as f64 + 0.5) * (rect[3] - rect[1]) / n;
            scene.text(
                (rect[0] - 5.0, y),
                l.clone(),
                TICK_PX,
                (HAlign::Right, VAlign::Middle),
            );
        } else {
            let x = rect[0] + (i as f64 + 0.5) * (rect[2] - rect[0]) / n;
            let cell = (rect[2] - rect[0]) / n;
            if estimate_width(l, TICK_PX) + 2.0 <= cell {
                scene.text(
                    (x, rect[3] + 5.0),
                    l.clone(),
                    TICK_PX,
                    (HAlign::Centre, VAlign::Top),
                );
            } else {
                let y = rect[3] + 5.0 + estimate_width(l, TICK_PX) / 2.0;
                scene.vertical_text((x, y), l.clone(), TICK_PX);
            }
        }
    }
}

/// A rough width of a text in DejaVu Sans (average advance ≈ 0.6 em), for layout decisions.
pub fn estimate_width(text: &str, size: f64) -> f64 {
    text.chars().count() as f64 * size * 0.6
}

/// Draws a vertical colour bar in `rect` with its end values and a few ticks, and its label
/// (with units) to the right. Returns nothing; the caller records the scale in the summary.
pub fn colour_bar(scene: &mut Scene, rect: [f64; 4], scale: &Scale, label: &str) {
    let steps = 128;
    let h = rect[3] - rect[1];
    for i in 0..steps {
        let t = (i as f64 + 0.5) / steps as f64;
        let y1 = rect[3] - i as f64 * h / steps as f64;
        let y0 = rect[3] - (i + 1) as f64 * h / steps as f64;
        scene.fill([rect[0], y0, rect[2], y1], scale.map.at(t));
    }
    scene.frame(rect, GREY);
    let map = PixelMap {
        lo: scale.vmin,
        hi: scale.vmax,
        p0: rect[3],
        p1: rect[1],
        log: false,
    };
    let span = scale.vmax - scale.vmin;
    let mut ticks = vec![(scale.vmin, true), (scale.vmax, true)];
    if span > 0.0 {
        for t in linear_ticks(scale.vmin, scale.vmax, 4) {
            // Inner ticks too close to an end label would overlap it.
            if (t - scale.vmin).abs() > 0.12 * span && (scale.vmax - t).abs() > 0.12 * span {
                ticks.push((t, false));
            }
        }
    }
    for (t, end) in ticks {
        let y = map.to_px(t);
        scene.line((rect[2], y), (rect[2] + 4.0, y), INK, 1.0);
        let text = if end { fmt_end(t) } else { fmt_num(t) };
        scene.text(
            (rect[2] + 6.0, y),
            text,
            TICK_PX,
            (HAlign::Left, VAlign::Middle),
        );
    }
    let x = rect[2] + 6.0 + 52.0;
    scene.vertical_text((x, (rect[1] + rect[3]) / 2.0), label, LABEL_PX);
    // The legend of "no value", under the bar.
    let sw = [rect[0], rect[3] + 22.0, rect[2], rect[3] + 34.0];
    scene.fill(sw, NO_VALUE_BG);
    hatch(scene, sw);
    scene.frame(sw, GREY);
    scene.text(
        (rect[2] + 4.0, (sw[1] + sw[3]) / 2.0),
        "no value",
        TICK_PX - 1.0,
        (HAlign::Left, VAlign::Middle),
    );
}

/// End values of a colour bar get one more digit than inner ticks: they state the data range.
fn fmt_end(v: f64) -> String {
    if v == 0.0 || !v.is_finite() {
        return fmt_num(v);
    }
    let s = format!("{:.3e}", v);
    // Back to plain notation when it is short enough.
    let a = v.abs();
    let s = if (1e-3..1e5).contains(&a) {
        let digits = (3 - a.log10().floor() as i32).clamp(0, 7) as usize;
        format!("{v:.digits$}")
    } else {
        s
    };
    s.replace('-', "\u{2212}")
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn log_edges_are_geometric_midpoints() {
        // Geometric mean of neighbours is the midpoint on a log axis (definition of log scale).
        let e = numeric_edges(&[4.0, 9.0], true);
        assert!((e[1] - 6.0).abs() < 1e-12);
        assert!((e[0] - 4.0 * (4.0f64 / 9.0).sqrt()).abs() < 1e-12);
    }

    #[test]
    fn ticks_lie_inside_and_are_round() {
        let t = linear_ticks(-0.6, 1.1, 5);
        assert!(t.iter().all(|v| *v >= -0.6 && *v <= 1.1));
        assert!(t.contains(&0.0));
        let l = log_ticks(3.0, 30.0);
        assert_eq!(l.first(), Some(&3.0));
        assert_eq!(l.last(), Some(&30.0));
    }

    #[test]
    fn numbers_read_well() {
        assert_eq!(fmt_num(0.25), "0.25");
        assert_eq!(fmt_num(-0.5), "\u{2212}0.5");
        assert_eq!(fmt_num(30.0), "30");
        assert_eq!(fmt_num(1.5e-6), "1.50e\u{2212}6");
    }
}
