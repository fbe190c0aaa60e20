//! The run report: one self-contained HTML file with figures, built only from what a finished
//! run leaves in its output folder (manifest, exported arrays with their sidecars, tables), so it
//! depends on no runner internals and can be rebuilt from an archived output folder.
//!
//! [`write_report`] reads the folder ([`input`]), draws the figures ([`tf`], [`matrix`],
//! [`graph`], through [`scene`] and [`axes`]), saves each as SVG and PNG under `figures/` beside
//! the HTML file, and writes the HTML ([`html`]) with every PNG inlined as a data URI.
//! The returned [`ReportSummary`] lists each figure with its panels' pixel rectangles, axis
//! ranges and colour-bar limits, so tests (and users) can check what was drawn.

pub mod axes;
pub mod colour;
pub mod cube;
pub mod graph;
pub mod html;
pub mod input;
pub mod matrix;
pub mod scene;
pub mod tf;

use std::fs;
use std::path::{Path, PathBuf};

use base64::Engine;
use serde::Serialize;

pub use colour::MapKind;
pub use cube::NamedRange;

/// What to show; [`Default`] gives the report the `report` command writes.
#[derive(Clone, Debug)]
pub struct ReportOptions {
    /// Pairs to draw time–frequency maps for; empty: the strongest few (see `strongest`).
    pub pairs: Vec<[String; 2]>,
    /// How many of the strongest pairs (by mean absolute value) to draw per measure.
    pub strongest: usize,
    /// Bands for channel × channel matrices of time–frequency arrays; empty: the `bands` of an
    /// `aggregate` stage in the manifest, else the whole frequency range.
    pub bands: Vec<NamedRange>,
    /// Windows for those matrices; empty: the aggregate's `windows`, else the whole time range.
    pub windows: Vec<NamedRange>,
    /// The condition difference to draw (`[a, b]` gives a − b); `None`: first minus second.
    pub contrast: Option<[String; 2]>,
    /// At most this many figures (time–frequency and matrix together); the rest are listed.
    pub max_figures: usize,
    /// At most this many rows of each table are shown in the HTML.
    pub max_table_rows: usize,
    /// Pixel density of the PNGs relative to the HTML's layout pixels.
    pub png_scale: f64,
}

impl Default for ReportOptions {
    fn default() -> Self {
        ReportOptions {
            pairs: Vec::new(),
            strongest: 3,
            bands: Vec::new(),
            windows: Vec::new(),
            contrast: None,
            max_figures: 80,
            max_table_rows: 300,
            png_scale: 2.0,
        }
    }
}

/// What kind of figure.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum FigureKind {
    /// The stage graph.
    StageGraph,
    /// Time–frequency maps of one pair and measure.
    TimeFrequency,
    /// Channel × channel matrices of one measure, band and window.
    Matrix,
}

/// One axis of a panel: the data values at the plot rectangle's edges.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct AxisInfo {
    /// Axis name (`time`, `freq`, `channel`).
    pub name: String,
    /// Value at the left (x) or bottom (y, numeric) edge; 0 for categorical axes.
    pub lo: f64,
    /// Value at the right (x) or top (y, numeric) edge; the number of cells for categorical ones.
    pub hi: f64,
    /// Log scale.
    pub log: bool,
}

/// One heat-map panel of a figure.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct PanelInfo {
    /// Panel title (a condition, or `a − b`).
    pub label: String,
    /// Plot rectangle in layout pixels (x0, y0, x1, y1); PNG pixels are these × `png_scale`.
    pub rect: [f64; 4],
    /// Horizontal axis.
    pub x: AxisInfo,
    /// Vertical axis.
    pub y: AxisInfo,
    /// Index into the figure's `colour_bars`.
    pub colour_bar: usize,
    /// Smallest and largest finite value drawn in this panel.
    pub data_range: Option<(f64, f64)>,
    /// Coordinates (x, y) of the largest value drawn (cell centre; indices for categories).
    pub peak: Option<(f64, f64)>,
}

/// One colour bar.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct ColourBarInfo {
    /// Label beside the bar (names the quantity and its unit).
    pub label: String,
    /// Unit of the values.
    pub units: String,
    /// Colour map.
    pub map: MapKind,
    /// Value at the bottom of the bar.
    pub vmin: f64,
    /// Value at the top of the bar.
    pub vmax: f64,
    /// Range of the values coloured with this bar.
    pub data_range: Option<(f64, f64)>,
}

/// One figure written.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct FigureInfo {
    /// Identifier, also the file stem.
    pub id: String,
    /// Kind.
    pub kind: FigureKind,
    /// Title.
    pub title: String,
    /// Which exported array it shows (`sub-01/norm`), empty for the stage graph.
    pub source: String,
    /// The SVG file.
    pub svg: PathBuf,
    /// The PNG file.
    pub png: PathBuf,
    /// Layout size (width, height) in pixels.
    pub size: (f64, f64),
    /// PNG pixels per layout pixel.
    pub png_scale: f64,
    /// Heat-map panels.
    pub panels: Vec<PanelInfo>,
    /// Colour bars.
    pub colour_bars: Vec<ColourBarInfo>,
}

/// What [`write_report`] wrote.
#[derive(Clone, Debug, Serialize)]
pub struct ReportSummary {
    /// The HTML file.
    pub html: PathBuf,
    /// Folder of the SVG and PNG files.
    pub figures_dir: PathBuf,
    /// Ids of the HTML sections, in order.
    pub sections: Vec<String>,
    /// Figures, in the order they appear.
    pub figures: Vec<FigureInfo>,
    /// Things found but not drawn, each with the reason.
    pub not_drawn: Vec<String>,
}

/// Why no report could be written.
#[derive(Debug, thiserror::Error)]
pub enum ReportError {
    /// A file could not be read or written.
    #[error("{path}: {source}")]
    Io {
        /// The file.
        path: PathBuf,
        /// The cause.
        source: std::io::Error,
    },
    /// The manifest is missing or not JSON.
    #[error("{path}: {msg}")]
    Manifest {
        /// The manifest path.
        path: PathBuf,
        /// What is wrong.
        msg: String,
    },
    /// A figure could not be drawn.
    #[error("figure {id}: {msg}")]
    Draw {
        /// The figure.
        id: String,
        /// What went wrong.
        msg: String,
    },
}

impl ReportError {
    fn io(path: &Path, source: std::io::Error) -> Self {
        ReportError::Io {
            path: path.to_path_buf(),
            source,
        }
    }
}

/// A figure with what the HTML needs to show it.
pub(crate) struct Rendered {
    pub info: FigureInfo,
    pub png_base64: String,
    pub caption: String,
}

/// State shared by the figure builders.
pub(crate) struct Ctx<'a> {
    pub opts: &'a ReportOptions,
    pub fig_dir: PathBuf,
    pub figures: Vec<Rendered>,
    pub not_drawn: Vec<String>,
}

/// A figure ready to save: its scene and what it shows.
pub(crate) struct Draft {
    pub kind: FigureKind,
    pub id: String,
    pub title: String,
    pub source: String,
    pub caption: String,
    pub scene: scene::Scene,
    pub panels: Vec<PanelInfo>,
    pub colour_bars: Vec<ColourBarInfo>,
}

impl Ctx<'_> {
    /// Number of data figures (all but the stage graph) so far.
    pub fn data_figures(&self) -> usize {
        self.figures
            .iter()
            .filter(|f| f.info.kind != FigureKind::StageGraph)
            .count()
    }

    /// True while the figure budget allows another data figure; records the skip otherwise.
    pub fn room_for(&mut self, what: &str) -> bool {
        if self.data_figures() < self.opts.max_figures {
            return true;
        }
        self.not_drawn.push(format!(
            "{what}: not drawn from here on, the report already holds {} figures (max_figures)",
            self.opts.max_figures
        ));
        false
    }

    /// Saves a figure as SVG and PNG and keeps it for the HTML.
    pub fn emit(&mut self, d: Draft) -> Result<(), ReportError> {
        let id = self.unique_id(&d.id);
        let svg_path = self.fig_dir.join(format!("{id}.svg"));
        let png_path = self.fig_dir.join(format!("{id}.png"));
        let scale = self.opts.png_scale;
        let draw_err = |msg: String| ReportError::Draw {
            id: id.clone(),
            msg,
        };
        let svg = scene::to_svg(&d.scene, scale).map_err(draw_err)?;
        fs::write(&svg_path, svg).map_err(|e| ReportError::io(&svg_path, e))?;
        scene::to_png(&d.scene, scale, &png_path).map_err(draw_err)?;
        let bytes = fs::read(&png_path).map_err(|e| ReportError::io(&png_path, e))?;
        self.figures.push(Rendered {
            info: FigureInfo {
                id,
                kind: d.kind,
                title: d.title,
                source: d.source,
                svg: svg_path,
                png: png_path,
                size: (d.scene.width, d.scene.height),
                png_scale: scale,
                panels: d.panels,
                colour_bars: d.colour_bars,
            },
            png_base64: base64::engine::general_purpose::STANDARD.encode(bytes),
            caption: d.caption,
        });
        Ok(())
    }

    fn unique_id(&self, wanted: &str) -> String {
        let base = file_safe(wanted);
        let taken = |s: &str| self.figures.iter().any(|f| f.info.id == s);
        if !taken(&base) {
            return base;
        }
        (2..)
            .map(|k| format!("{base}-{k}"))
            .find(|s| !taken(s))
            .unwrap_or(base)
    }
}

/// Letters, digits, `-` and `_` only (channel names like `Fp1` stay readable).
fn file_safe(s: &str) -> String {
    let mut out = String::new();
    for c in s.chars() {
        if c.is_ascii_alphanumeric() || c == '_' {
            out.push(c);
        } else if !out.ends_with('-') {
            out.push('-');
        }
    }
    out.trim_matches('-').to_string()
}

/// "no unit" for dimensionless values, else the unit.
pub(crate) fn units_text(units: &str) -> String {
    match units.trim() {
        "" | "1" => "no unit".to_string(),
        u => u.to_string(),
    }
}

/// Writes the report for the run whose output folder is `output_dir` to `out_file`, and its
/// figures (SVG and PNG) to `figures/` beside `out_file`.
pub fn write_report(
    output_dir: &Path,
    out_file: &Path,
    options: &ReportOptions,
) -> Result<ReportSummary, ReportError> {
    let run = input::read_output(output_dir)?;
    let parent = out_file
        .parent()
        .filter(|p| !p.as_os_str().is_empty())
        .unwrap_or(Path::new("."));
    let fig_dir = parent.join("figures");
    fs::create_dir_all(&fig_dir).map_err(|e| ReportError::io(&fig_dir, e))?;
    let mut ctx = Ctx {
        opts: options,
        fig_dir: fig_dir.clone(),
        figures: Vec::new(),
        not_drawn: run.skipped.clone(),
    };
    graph::stage_graph(&mut ctx, &run.manifest)?;
    // Order of drawing, so that the figure budget (max_figures) drops the most numerous
    // figures: the group aggregate's matrices, the subject means' maps (and their matrices
    // only when no aggregate gives them), then per-subject matrices, then per-subject maps.
    let arrays = tf::load_cubes(&mut ctx, &run);
    let (group, subjects): (Vec<_>, Vec<_>) = arrays.iter().partition(|a| a.group_level());
    let (means, aggregates): (Vec<_>, Vec<_>) =
        group.into_iter().partition(|a| !a.averaged.is_empty());
    let has_aggregate = aggregates
        .iter()
        .any(|a| a.cube.plane == cube::Plane::BandWindow);
    for a in &aggregates {
        tf::tf_figures(&mut ctx, a)?;
        matrix::matrix_figures(&mut ctx, a, &run.manifest)?;
    }
    for a in &means {
        tf::tf_figures(&mut ctx, a)?;
        if !has_aggregate {
            matrix::matrix_figures(&mut ctx, a, &run.manifest)?;
        }
    }
    for a in &subjects {
        matrix::matrix_figures(&mut ctx, a, &run.manifest)?;
    }
    for a in &subjects {
        tf::tf_figures(&mut ctx, a)?;
    }
    let (text, sections) = html::page(&run, &ctx, parent);
    fs::write(out_file, text).map_err(|e| ReportError::io(out_file, e))?;
    Ok(ReportSummary {
        html: out_file.to_path_buf(),
        figures_dir: fig_dir,
        sections,
        figures: ctx.figures.into_iter().map(|f| f.info).collect(),
        not_drawn: ctx.not_drawn,
    })
}
