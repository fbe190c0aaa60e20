//! The run report: one self-contained HTML file with figures, built only from what a finished
//! run leaves in its output folder (manifest, exported arrays with their sidecars, tables), so it
//! depends on no runner internals and can be rebuilt from an archived output folder.
//!
//! [`write_report`] reads the folder ([`input`]), decides what the report is about ([`story`]:
//! the condition difference and the pairs, each with its reason), draws the figures ([`tmap`],
//! [`tf`], [`head`], [`matrix`], [`graph`], through [`scene`] and [`axes`], coloured per measure
//! and quantity by [`quantity`]), saves each as SVG and PNG in a folder named after the HTML
//! file (`report.html` → `report-figures/`), and writes the HTML ([`html`]): findings first,
//! provenance folded at the end, every PNG inlined as a data URI so the file stands alone.
//! The returned [`ReportSummary`] lists each figure with its panels' pixel rectangles, axis
//! ranges and colour-bar limits, so tests (and users) can check what was drawn.

pub mod axes;
pub mod colour;
pub mod cube;
pub mod graph;
pub mod head;
pub mod html;
pub mod input;
pub mod matrix;
pub mod quantity;
pub mod scene;
pub mod spec;
pub mod story;
pub mod tf;
pub mod tmap;
pub mod variants;

use std::fs;
use std::path::{Path, PathBuf};

use base64::Engine;
use serde::Serialize;

pub use colour::MapKind;
pub use cube::NamedRange;

/// What to show; [`Default`] gives the report the `report` command writes.
#[derive(Clone, Debug)]
pub struct ReportOptions {
    /// Pairs to draw time–frequency maps for; empty: the pairs with significant clusters of a
    /// contrast stage, else the `strongest` pairs by condition difference (see [`story`]).
    pub pairs: Vec<[String; 2]>,
    /// How many pairs per measure to draw when they are chosen by the largest difference.
    pub strongest: usize,
    /// Exported stages to draw; empty: all.
    pub stages: Vec<String>,
    /// Condition names in the pipeline's order (the epoch stage's `conditions`).
    pub condition_order: Vec<String>,
    /// At most this many figures per section.
    pub per_section: usize,
    /// Bands for channel × channel matrices of time–frequency arrays; empty: the `bands` of an
    /// `aggregate` stage in the manifest, else the whole frequency range.
    pub bands: Vec<NamedRange>,
    /// Windows for those matrices; empty: the aggregate's `windows`, else the whole time range.
    pub windows: Vec<NamedRange>,
    /// The condition difference to draw (`[a, b]` gives a − b); `None`: a contrast stage's
    /// `compare`, else the first two conditions in the pipeline's order.
    pub contrast: Option<[String; 2]>,
    /// At most this many figures (time–frequency and matrix together); the rest are listed.
    pub max_figures: usize,
    /// At most this many rows of each table are shown in the HTML.
    pub max_table_rows: usize,
    /// Pixel density of the PNGs relative to the HTML's layout pixels.
    pub png_scale: f64,
    /// The quantity drawn across a sweep's variants (each part optional; see [`variants`]).
    pub sweep: spec::SweepSpec,
}

impl Default for ReportOptions {
    fn default() -> Self {
        ReportOptions {
            pairs: Vec::new(),
            strongest: 1,
            stages: Vec::new(),
            condition_order: Vec::new(),
            per_section: 12,
            bands: Vec::new(),
            windows: Vec::new(),
            contrast: None,
            max_figures: 60,
            max_table_rows: 300,
            png_scale: 1.5,
            sweep: spec::SweepSpec::default(),
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
    /// Mean difference and paired t of a contrast stage, significant points outlined.
    TMap,
    /// Connectivity on a head outline, one head per band × window.
    Head,
    /// Time–frequency maps of one subject.
    SubjectMap,
    /// One group value across the variants of a sweep ([`variants`]).
    Sweep,
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
    /// Head figures: the pairs drawn as lines, with their values.
    pub lines: Vec<([String; 2], f64)>,
}

/// One time-course panel under a group time–frequency map: the mean over a frequency band by
/// time, with a shaded band of ± 1 SEM across subjects.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct CourseInfo {
    /// The condition (or `a − b`) of the map above.
    pub label: String,
    /// The frequency band averaged (Hz, inclusive).
    pub band: NamedRange,
    /// Plot rectangle in layout pixels (x0, y0, x1, y1).
    pub rect: [f64; 4],
    /// Horizontal axis (time, s).
    pub x: AxisInfo,
    /// Vertical axis (the measure's unit), linear: `lo` at the bottom edge, `hi` at the top.
    pub y: AxisInfo,
    /// Time of each column (s); each column's shading spans its cell, as in the map above.
    pub times: Vec<f64>,
    /// Mean across subjects of the subjects' band means, per time.
    pub mean: Vec<f64>,
    /// SEM across subjects (sd with ddof 1 over √n), per time; the shading's half-height.
    pub sem: Vec<f64>,
    /// Subjects with a value, per time.
    pub n: Vec<f64>,
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
    /// The channel pair shown, for figures of one pair.
    pub pair: Option<[String; 2]>,
    /// The measure shown, for figures of one measure.
    pub measure: Option<String>,
    /// Why this pair was chosen (the caption says the same).
    pub why: String,
    /// True when significant points are outlined.
    pub outlined: bool,
    /// Time courses with their SEM, under group time–frequency maps.
    pub courses: Vec<CourseInfo>,
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
    /// The section on a sweep, when the output folder holds one (`sweep.tsv`).
    pub sweep: Option<variants::SweepSection>,
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
    #[error("figure {id}: {source}")]
    Draw {
        /// The figure.
        id: String,
        /// What went wrong.
        source: scene::DrawError,
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
    pub choice: story::Choice,
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
    pub pair: Option<[String; 2]>,
    pub measure: Option<String>,
    pub why: String,
    pub outlined: bool,
    pub courses: Vec<CourseInfo>,
}

impl Ctx<'_> {
    /// Number of data figures (all but the stage graph) so far.
    pub fn data_figures(&self) -> usize {
        self.figures
            .iter()
            .filter(|f| f.info.kind != FigureKind::StageGraph)
            .count()
    }

    /// True while the budgets (per section, and in all) allow another figure of `kind`;
    /// records the skip otherwise.
    pub fn room_for(&mut self, kind: FigureKind, what: &str) -> bool {
        let in_section = self.figures.iter().filter(|f| f.info.kind == kind).count();
        if in_section < self.opts.per_section && self.data_figures() < self.opts.max_figures {
            return true;
        }
        self.not_drawn.push(format!(
            "{what}: not drawn, the section already holds {in_section} figures (at most {} per \
             section, `figures` in the pipeline's report block; {} in all)",
            self.opts.per_section, self.opts.max_figures
        ));
        false
    }

    /// Saves a figure as SVG and PNG and keeps it for the HTML.
    pub fn emit(&mut self, d: Draft) -> Result<(), ReportError> {
        let id = self.unique_id(&d.id);
        let svg_path = self.fig_dir.join(format!("{id}.svg"));
        let png_path = self.fig_dir.join(format!("{id}.png"));
        let scale = self.opts.png_scale;
        let draw_err = |source| ReportError::Draw {
            id: id.clone(),
            source,
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
                pair: d.pair,
                measure: d.measure,
                why: d.why,
                outlined: d.outlined,
                courses: d.courses,
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

/// The figure folder of a report file: `report.html` → `report-figures`, so that reports
/// written to one folder do not share (and overwrite) each other's figures.
pub fn figures_dir_for(out_file: &Path) -> PathBuf {
    let parent = out_file
        .parent()
        .filter(|p| !p.as_os_str().is_empty())
        .unwrap_or(Path::new("."));
    let stem = out_file
        .file_stem()
        .map(|s| s.to_string_lossy().into_owned())
        .unwrap_or_else(|| "report".to_string());
    parent.join(format!("{}-figures", file_safe(&stem)))
}

/// Writes the report for the run whose output folder is `output_dir` to `out_file`, and its
/// figures (SVG and PNG) to the folder [`figures_dir_for`] names.
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
    let fig_dir = figures_dir_for(out_file);
    fs::create_dir_all(&fig_dir).map_err(|e| ReportError::io(&fig_dir, e))?;
    let mut ctx = Ctx {
        opts: options,
        choice: story::Choice::default(),
        fig_dir: fig_dir.clone(),
        figures: Vec::new(),
        not_drawn: run.skipped.clone(),
    };
    graph::stage_graph(&mut ctx, &run.manifest)?;
    let stats = tmap::load_stats(&mut ctx, &run);
    let arrays = tf::load_cubes(&mut ctx, &run);
    ctx.choice = story::choose(options, &arrays, &stats);
    // Group level first (what the study found), then each subject.
    let (group, subjects): (Vec<_>, Vec<_>) = arrays.iter().partition(|a| a.group_level());
    let has_aggregate = group
        .iter()
        .any(|a| a.cube.plane == cube::Plane::BandWindow);
    for s in &stats {
        tmap::tmap_figures(&mut ctx, s)?;
    }
    for a in &group {
        tf::tf_figures(&mut ctx, a, &run.manifest, &arrays)?;
    }
    for a in &group {
        if a.cube.plane == cube::Plane::BandWindow {
            head::head_figures(&mut ctx, a, &run)?;
        } else if !has_aggregate {
            if let Some(bw) = matrix::to_band_window(&ctx, a, &run.manifest, &arrays) {
                head::head_figures(&mut ctx, &bw, &run)?;
            }
        }
    }
    for a in &group {
        if a.cube.plane == cube::Plane::BandWindow || !has_aggregate {
            matrix::matrix_figures(&mut ctx, a, &run.manifest, &arrays)?;
        }
    }
    // Per subject: every chosen pair's maps, the first pair for every subject, then the next
    // pair for every subject, so that the section's budget is shared by every subject and
    // reaches the later pairs (what does not fit is listed).
    for pick in ctx.choice.pairs.clone() {
        for a in &subjects {
            tf::subject_figures(&mut ctx, a, &pick)?;
        }
    }
    let sweep = variants::sweep_section(&mut ctx, output_dir, &options.condition_order)?;
    let (text, sections) = html::page(&run, &ctx, parent, &stats, sweep.as_ref());
    fs::write(out_file, text).map_err(|e| ReportError::io(out_file, e))?;
    Ok(ReportSummary {
        html: out_file.to_path_buf(),
        figures_dir: fig_dir,
        sections,
        figures: ctx.figures.into_iter().map(|f| f.info).collect(),
        not_drawn: ctx.not_drawn,
        sweep,
    })
}
