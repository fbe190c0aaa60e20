//! A figure as a list of drawing primitives in logical pixels, and its rendering to SVG and PNG.
//!
//! Figures are built once as a [`Scene`] and then drawn twice through plotters, onto its SVG
//! backend and its bitmap backend, so both files show the same picture. PNGs are drawn at a
//! higher pixel density (`scale`) so they stay sharp in print; the SVG is drawn at the same
//! density and its outer size is then set back to logical pixels, which keeps its coordinates
//! precise without making it display larger.
//!
//! Text in PNGs uses the DejaVu Sans font embedded in the binary, so no system fonts are needed.

use std::path::Path;
use std::sync::OnceLock;

use plotters::prelude::*;
use plotters::style::text_anchor::{HPos, Pos, VPos};
use plotters::style::{FontFamily, FontStyle, FontTransform};

use super::colour::Rgb;

/// The embedded font (see assets/FONT-LICENSE.md).
static FONT: &[u8] = include_bytes!(concat!(
    env!("CARGO_MANIFEST_DIR"),
    "/assets/DejaVuSans.ttf"
));

/// Horizontal anchor of a text.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum HAlign {
    /// The position is the text's left end.
    Left,
    /// The position is the text's centre.
    Centre,
    /// The position is the text's right end.
    Right,
}

/// Vertical anchor of a text.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum VAlign {
    /// The position is the text's top.
    Top,
    /// The position is the text's middle.
    Middle,
    /// The position is the text's bottom.
    Bottom,
}

/// One drawing primitive, in logical pixels (origin top left).
#[derive(Clone, Debug)]
pub enum Shape {
    /// A filled rectangle.
    Fill {
        /// Corners (x0, y0, x1, y1).
        rect: [f64; 4],
        /// Fill colour.
        colour: Rgb,
    },
    /// A rectangle outline.
    Frame {
        /// Corners (x0, y0, x1, y1).
        rect: [f64; 4],
        /// Line colour.
        colour: Rgb,
    },
    /// A polyline.
    Line {
        /// Points.
        points: Vec<(f64, f64)>,
        /// Line colour.
        colour: Rgb,
        /// Width in logical pixels.
        width: f64,
    },
    /// A text.
    Text {
        /// Anchor position.
        at: (f64, f64),
        /// The text.
        text: String,
        /// Font size in logical pixels.
        size: f64,
        /// Anchors.
        align: (HAlign, VAlign),
        /// Rotated a quarter turn anticlockwise (for vertical axis labels).
        vertical: bool,
        /// Colour.
        colour: Rgb,
    },
}

/// A figure to draw.
#[derive(Clone, Debug, Default)]
pub struct Scene {
    /// Width in logical pixels.
    pub width: f64,
    /// Height in logical pixels.
    pub height: f64,
    /// Primitives, drawn in order.
    pub shapes: Vec<Shape>,
}

/// Text colour of the figures.
pub const INK: Rgb = [34, 34, 40];
/// Colour of secondary text and frames.
pub const GREY: Rgb = [110, 110, 118];

impl Scene {
    /// An empty scene of this logical size.
    pub fn new(width: f64, height: f64) -> Self {
        Scene {
            width,
            height,
            shapes: Vec::new(),
        }
    }

    /// Add a filled rectangle.
    pub fn fill(&mut self, rect: [f64; 4], colour: Rgb) {
        self.shapes.push(Shape::Fill { rect, colour });
    }

    /// Add a rectangle outline.
    pub fn frame(&mut self, rect: [f64; 4], colour: Rgb) {
        self.shapes.push(Shape::Frame { rect, colour });
    }

    /// Add a straight line.
    pub fn line(&mut self, a: (f64, f64), b: (f64, f64), colour: Rgb, width: f64) {
        self.shapes.push(Shape::Line {
            points: vec![a, b],
            colour,
            width,
        });
    }

    /// Add a polyline through `points`.
    pub fn polyline(&mut self, points: Vec<(f64, f64)>, colour: Rgb, width: f64) {
        self.shapes.push(Shape::Line {
            points,
            colour,
            width,
        });
    }

    /// Add a dashed straight line (dashes of `dash` logical pixels).
    pub fn dashed(&mut self, a: (f64, f64), b: (f64, f64), colour: Rgb, dash: f64) {
        let len = ((b.0 - a.0).powi(2) + (b.1 - a.1).powi(2)).sqrt();
        let n = (len / (2.0 * dash)).ceil().max(1.0) as usize;
        for i in 0..n {
            let t0 = (2 * i) as f64 * dash / len;
            let t1 = (((2 * i + 1) as f64 * dash) / len).min(1.0);
            let p = |t: f64| (a.0 + t * (b.0 - a.0), a.1 + t * (b.1 - a.1));
            self.line(p(t0), p(t1), colour, 1.0);
        }
    }

    /// Add a horizontal text.
    pub fn text(
        &mut self,
        at: (f64, f64),
        text: impl Into<String>,
        size: f64,
        align: (HAlign, VAlign),
    ) {
        self.shapes.push(Shape::Text {
            at,
            text: text.into(),
            size,
            align,
            vertical: false,
            colour: INK,
        });
    }

    /// Add a text in a given colour.
    pub fn text_in(
        &mut self,
        at: (f64, f64),
        text: impl Into<String>,
        size: f64,
        align: (HAlign, VAlign),
        colour: Rgb,
    ) {
        self.shapes.push(Shape::Text {
            at,
            text: text.into(),
            size,
            align,
            vertical: false,
            colour,
        });
    }

    /// Add a vertical text (reading upwards), centred on `at`.
    pub fn vertical_text(&mut self, at: (f64, f64), text: impl Into<String>, size: f64) {
        self.shapes.push(Shape::Text {
            at,
            text: text.into(),
            size,
            align: (HAlign::Centre, VAlign::Middle),
            vertical: true,
            colour: INK,
        });
    }
}

/// Why a figure could not be drawn or written.
#[derive(Debug, thiserror::Error)]
pub enum DrawError {
    /// The font compiled into the binary was not accepted by the drawing library.
    #[error("the embedded font could not be loaded")]
    Font,
    /// The drawing library failed (its own message).
    #[error("{0}")]
    Backend(String),
    /// The PNG file could not be created.
    #[error("{}: {source}", path.display())]
    Create {
        /// The PNG file.
        path: std::path::PathBuf,
        /// Why.
        source: std::io::Error,
    },
    /// Encoding or writing the PNG failed.
    #[error(transparent)]
    Png(#[from] png::EncodingError),
}

/// Makes the embedded font known to plotters under the family name the scenes use.
fn register_font() -> Result<(), DrawError> {
    static DONE: OnceLock<bool> = OnceLock::new();
    let ok = *DONE.get_or_init(|| {
        plotters::style::register_font("sans-serif", FontStyle::Normal, FONT).is_ok()
    });
    if ok {
        Ok(())
    } else {
        Err(DrawError::Font)
    }
}

/// Draws a scene as SVG text.
pub fn to_svg(scene: &Scene, scale: f64) -> Result<String, DrawError> {
    register_font()?;
    let size = pixel_size(scene, scale);
    let mut out = String::new();
    {
        let root = SVGBackend::with_string(&mut out, size).into_drawing_area();
        draw(&root, scene, scale, false)?;
        root.present()
            .map_err(|e| DrawError::Backend(e.to_string()))?;
    }
    Ok(logical_svg_size(&out, scene))
}

/// Draws a scene into a PNG file: RGB, 8 bits, encoded with the `png` crate at its best
/// compression and adaptive filtering (the figures are mostly flat colour, which this shrinks
/// well below a fast encoder's output; the report's page size depends on it).
pub fn to_png(scene: &Scene, scale: f64, path: &Path) -> Result<(), DrawError> {
    register_font()?;
    let (w, h) = pixel_size(scene, scale);
    let mut buf = vec![0u8; w as usize * h as usize * 3];
    {
        let root = BitMapBackend::with_buffer(&mut buf, (w, h)).into_drawing_area();
        draw(&root, scene, scale, true)?;
        root.present()
            .map_err(|e| DrawError::Backend(e.to_string()))?;
    }
    let file = std::fs::File::create(path).map_err(|source| DrawError::Create {
        path: path.to_path_buf(),
        source,
    })?;
    let mut enc = png::Encoder::new(std::io::BufWriter::new(file), w, h);
    enc.set_color(png::ColorType::Rgb);
    enc.set_depth(png::BitDepth::Eight);
    enc.set_compression(png::Compression::High);
    enc.set_filter(png::Filter::Adaptive);
    let mut writer = enc.write_header()?;
    writer.write_image_data(&buf)?;
    Ok(writer.finish()?)
}

fn pixel_size(scene: &Scene, scale: f64) -> (u32, u32) {
    (
        (scene.width * scale).round().max(1.0) as u32,
        (scene.height * scale).round().max(1.0) as u32,
    )
}

/// Rewrites the root element's width and height to logical pixels, keeping the viewBox of the
/// high-density drawing, so the SVG displays at the same size as the HTML shows the PNG.
fn logical_svg_size(svg: &str, scene: &Scene) -> String {
    let Some(start) = svg.find("<svg") else {
        return svg.to_string();
    };
    let Some(len) = svg[start..].find('>') else {
        return svg.to_string();
    };
    let tag = &svg[start..start + len];
    let mut new_tag = String::new();
    for attr in tag.split(' ') {
        if !new_tag.is_empty() {
            new_tag.push(' ');
        }
        if attr.starts_with("width=") {
            new_tag.push_str(&format!("width=\"{}\"", scene.width.round()));
        } else if attr.starts_with("height=") {
            new_tag.push_str(&format!("height=\"{}\"", scene.height.round()));
        } else {
            new_tag.push_str(attr);
        }
    }
    format!("{}{}{}", &svg[..start], new_tag, &svg[start + len..])
}

fn colour(c: Rgb) -> RGBColor {
    RGBColor(c[0], c[1], c[2])
}

fn px(v: f64, scale: f64) -> i32 {
    (v * scale).round() as i32
}

fn draw<DB: DrawingBackend>(
    root: &DrawingArea<DB, plotters::coord::Shift>,
    scene: &Scene,
    scale: f64,
    bitmap: bool,
) -> Result<(), DrawError> {
    let backend = |e: DrawingAreaErrorKind<DB::ErrorType>| DrawError::Backend(e.to_string());
    root.fill(&WHITE).map_err(backend)?;
    for shape in &scene.shapes {
        draw_shape(root, shape, scale, bitmap).map_err(backend)?;
    }
    Ok(())
}

fn draw_shape<DB: DrawingBackend>(
    root: &DrawingArea<DB, plotters::coord::Shift>,
    shape: &Shape,
    scale: f64,
    bitmap: bool,
) -> Result<(), DrawingAreaErrorKind<DB::ErrorType>> {
    match shape {
        Shape::Fill { rect, colour: c } => {
            let (a, b) = corners(rect, scale);
            root.draw(&Rectangle::new([a, b], colour(*c).filled()))
        }
        Shape::Frame { rect, colour: c } => {
            let (a, b) = corners(rect, scale);
            root.draw(&Rectangle::new(
                [a, b],
                colour(*c).stroke_width(scale.round() as u32),
            ))
        }
        Shape::Line {
            points,
            colour: c,
            width,
        } => {
            let pts: Vec<(i32, i32)> = points
                .iter()
                .map(|p| (px(p.0, scale), px(p.1, scale)))
                .collect();
            let w = (width * scale).round().max(1.0) as u32;
            root.draw(&PathElement::new(pts, colour(*c).stroke_width(w)))
        }
        Shape::Text {
            at,
            text,
            size,
            align,
            vertical,
            colour: c,
        } => draw_text(
            root,
            (*at, text, *size, *align, *vertical, *c),
            scale,
            bitmap,
        ),
    }
}

type TextSpec<'a> = ((f64, f64), &'a str, f64, (HAlign, VAlign), bool, Rgb);

fn draw_text<DB: DrawingBackend>(
    root: &DrawingArea<DB, plotters::coord::Shift>,
    (at, text, size, align, vertical, c): TextSpec<'_>,
    scale: f64,
    bitmap: bool,
) -> Result<(), DrawingAreaErrorKind<DB::ErrorType>> {
    // plotters' SVG backend writes font-size = size / 1.24 and its font rasteriser scales by
    // the line height, so the two backends get the size they need to show `size` px letters.
    let font_px = if bitmap { size * 1.15 } else { size * 1.24 } * scale;
    let h = match align.0 {
        HAlign::Left => HPos::Left,
        HAlign::Centre => HPos::Center,
        HAlign::Right => HPos::Right,
    };
    let v = match align.1 {
        VAlign::Top => VPos::Top,
        VAlign::Middle => VPos::Center,
        VAlign::Bottom => VPos::Bottom,
    };
    let mut font = FontFamily::SansSerif.into_font().resize(font_px);
    if vertical {
        font = font.transform(FontTransform::Rotate270);
    }
    let style = font.color(&colour(c)).pos(Pos::new(h, v));
    let pos = (px(at.0, scale), px(at.1, scale));
    root.draw(&Text::new(text.to_string(), pos, style))
}

fn corners(rect: &[f64; 4], scale: f64) -> ((i32, i32), (i32, i32)) {
    (
        (px(rect[0], scale), px(rect[1], scale)),
        (px(rect[2], scale), px(rect[3], scale)),
    )
}
