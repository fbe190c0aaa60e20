//! The HTML run report, rendered from a synthetic output folder built here (manifest, exported
//! arrays with sidecars, a group table), with a planted blob in one pair's time–frequency map.
//!
//! Checked against things the report code did not produce: the PNG files decode with the `png`
//! crate (PNG specification, ISO/IEC 15948), the SVG files parse as XML with `roxmltree`, the
//! colour-bar limits equal the range of the arrays as written here, and the planted blob is
//! found in the decoded pixels by its colour: the top entry of the published viridis table
//! (mpl-colormaps, CC0) for sequential maps, and the published red end of ColorBrewer's 11-class
//! RdBu table (colorbrewer2.org) for diverging ones.
//!
//! Set `PHASEWISE_REPORT_KEEP=DIR` to keep the rendered report in DIR (the browser check script,
//! tests/browser-check.sh, uses that).

use std::fs;
use std::path::{Path, PathBuf};

use ndarray::{ArrayD, IxDyn};
use phasewise::report::{
    write_report, FigureInfo, FigureKind, MapKind, ReportOptions, ReportSummary,
};
use phasewise_stages::array::Coord;
use serde_json::{json, Value};

const CHANNELS: [&str; 4] = ["Fz", "Cz", "Pz", "Oz"];
/// The planted blob: pair Fz–Pz, measure plv, condition A, at 6 Hz and 0.45 s.
const BLOB_T: f64 = 0.45;
const BLOB_F: f64 = 6.0;

fn pairs() -> Vec<[String; 2]> {
    let mut out = Vec::new();
    for (i, a) in CHANNELS.iter().enumerate() {
        for b in &CHANNELS[i + 1..] {
            out.push([a.to_string(), b.to_string()]);
        }
    }
    out
}

fn blob_pair() -> usize {
    pairs()
        .iter()
        .position(|p| p[0] == "Fz" && p[1] == "Pz")
        .unwrap()
}

fn freqs() -> Vec<f64> {
    (0..16).map(|i| 3.0 * 10f64.powf(i as f64 / 15.0)).collect()
}

fn times() -> Vec<f64> {
    (0..76).map(|i| -0.5 + 0.02 * i as f64).collect()
}

/// Deterministic noise in [-1, 1) (a fixed integer hash; no randomness in tests).
fn noise(i: usize) -> f64 {
    let mut x = (i as u64).wrapping_mul(0x9E37_79B9_7F4A_7C15) ^ 0x5851_F42D_4C95_7F2D;
    x ^= x >> 29;
    x = x.wrapping_mul(0xBF58_476D_1CE4_E5B9);
    x ^= x >> 32;
    (x % 20_000) as f64 / 10_000.0 - 1.0
}

/// A [condition, measure, pair, freq, time] array: `base + spread·noise`, plus a Gaussian blob
/// of height `blob` in condition A, measure plv, pair Fz–Pz.
fn tf_values(base: f64, spread: f64, blob: f64) -> ArrayD<f32> {
    let (f, t, np) = (freqs(), times(), pairs().len());
    let shape = [2, 2, np, f.len(), t.len()];
    let mut k = 0;
    ArrayD::from_shape_fn(IxDyn(&shape), |ix| {
        k += 1;
        let (c, m, p, fi, ti) = (ix[0], ix[1], ix[2], ix[3], ix[4]);
        let mut v = base + spread * noise(k);
        if c == 0 && m == 0 && p == blob_pair() {
            let df = (f[fi] / BLOB_F).ln() / 0.15;
            let dt = (t[ti] - BLOB_T) / 0.08;
            v += blob * (-(df * df + dt * dt) / 2.0).exp();
        }
        v as f32
    })
}

fn tf_coords() -> Vec<Coord> {
    vec![
        Coord::Labels(vec!["A".into(), "B".into()]),
        Coord::Labels(vec!["plv".into(), "wpli".into()]),
        Coord::Pairs(pairs().into()),
        Coord::Numbers(freqs()),
        Coord::Numbers(times()),
    ]
}

/// The group aggregate `group/group.npy` over channel `pairs`: statistic × subject × condition ×
/// measure × pair × band × window, one band and one window.
fn write_group(out: &Path, pairs: Vec<[String; 2]>) {
    let mut coords = vec![
        Coord::Labels(vec!["mean".into(), "sem".into(), "n".into()]),
        Coord::Labels(vec!["sub-01".into(), "sub-02".into(), "group".into()]),
    ];
    coords.extend(tf_coords().into_iter().take(2));
    coords.push(Coord::Pairs(pairs.into()));
    coords.push(Coord::Labels(vec!["theta".into()]));
    coords.push(Coord::Labels(vec!["late".into()]));
    let dims = [
        "statistic",
        "subject",
        "condition",
        "measure",
        "pair",
        "band",
        "window",
    ];
    write_array(out, "group", "group", &dims, coords, "1", &group_values());
}

fn write_array(
    dir: &Path,
    owner: &str,
    stage: &str,
    dims: &[&str],
    coords: Vec<Coord>,
    units: &str,
    v: &ArrayD<f32>,
) {
    let sub = dir.join(owner);
    fs::create_dir_all(&sub).unwrap();
    ndarray_npy::write_npy(sub.join(format!("{stage}.npy")), v).unwrap();
    let sidecar = json!({
        "stage": stage, "subject": owner, "dims": dims, "coords": coords,
        "units": units, "meta": {}, "dtype": "<f4", "shape": v.shape(),
    });
    fs::write(
        sub.join(format!("{stage}.json")),
        serde_json::to_vec_pretty(&sidecar).unwrap(),
    )
    .unwrap();
}

fn unit(
    stage: &str,
    subject: Option<&str>,
    op: &str,
    inputs: &[String],
    status: &str,
    shape: &[usize],
) -> Value {
    let key = format!("key-{stage}-{}", subject.unwrap_or("group"));
    json!({
        "stage": stage, "subject": subject, "op": op, "op_version": 1, "params": {}, "key": key,
        "inputs": inputs, "outputs": [{"file": null, "blake3": "00", "shape": shape, "dtype": "<f4"}],
        "status": status, "seconds": 0.25,
    })
}

fn key(stage: &str, subject: &str) -> String {
    format!("key-{stage}-{subject}")
}

fn manifest() -> Value {
    let chain = [
        ("reref", "re-reference"),
        ("trials", "epoch"),
        ("tf", "wavelet"),
        ("sync", "clustering"),
        ("norm", "baseline"),
    ];
    let mut units = Vec::new();
    for (s, status) in [("sub-01", "computed"), ("sub-02", "cached")] {
        let mut prev = format!("file-{s}");
        for (stage, op) in chain {
            units.push(unit(stage, Some(s), op, &[prev.clone()], status, &[2]));
            prev = key(stage, s);
        }
    }
    let mut agg = unit(
        "group",
        None,
        "aggregate",
        &[key("norm", "sub-01"), key("norm", "sub-02")],
        "computed",
        &[3],
    );
    agg["params"] = json!({"over": "subjects", "bands": {"theta": [4.0, 8.0]}, "windows": {"late": [0.3, 0.7]}});
    units.push(agg);
    let counts = json!({"A": {"kept": 38, "dropped": 1, "rejected": 1}, "B": {"kept": 40, "dropped": 0, "rejected": 0}});
    json!({
        "format": "phasewise-manifest", "format_version": 1,
        "tool": {"name": "phasewise", "version": "0.1.0", "revision": "test"},
        "platform": {"os": "linux", "arch": "x86_64"},
        "pipeline": {"path": "demo.yaml", "blake3": "ab", "name": "synthetic-report-test", "overrides": [], "subjects": null, "stages": []},
        "inputs": [{"path": "a.edf", "size": 1000, "blake3": "cd"}, {"path": "b.edf", "size": 1200, "blake3": "ef"}],
        "units": units,
        "epochs": {"sub-01": {"trials": counts}, "sub-02": {"trials": counts}},
        "warnings": [{"stage": "tf", "subject": "sub-02", "message": "the wavelet at 3 Hz is longer than the buffer"}],
        "started": "2026-01-01T00:00:00Z", "finished": "2026-01-01T00:01:00Z",
        "future_field": {"ignored": true},
    })
}

/// Group aggregate [statistic, subject, condition, measure, pair, band, window]; the blob pair
/// has the largest value in condition A.
fn group_values() -> ArrayD<f32> {
    let np = pairs().len();
    ArrayD::from_shape_fn(IxDyn(&[3, 3, 2, 2, np, 1, 1]), |ix| {
        let v = 0.02 * noise(1000 + ix[2] * 97 + ix[3] * 31 + ix[4] * 7 + ix[1] * 3 + ix[0]);
        let planted = if ix[2] == 0 && ix[3] == 0 && ix[4] == blob_pair() {
            0.3
        } else {
            0.0
        };
        (v + planted) as f32
    })
}

struct Fixture {
    _tmp: tempfile::TempDir,
    out: PathBuf,
    html: PathBuf,
    norm: ArrayD<f32>,
    norm2: ArrayD<f32>,
    sync: ArrayD<f32>,
}

fn fixture() -> Fixture {
    let tmp = tempfile::tempdir().unwrap();
    let out = tmp.path().join("results");
    fs::create_dir_all(&out).unwrap();
    fs::write(
        out.join("manifest.json"),
        serde_json::to_vec_pretty(&manifest()).unwrap(),
    )
    .unwrap();
    let dims = ["condition", "measure", "pair", "freq", "time"];
    // Baseline-subtracted: values of both signs around zero.
    let norm = tf_values(0.0, 0.03, 0.4);
    write_array(&out, "sub-01", "norm", &dims, tf_coords(), "1", &norm);
    // A second subject of the same stage: the report also draws their mean.
    let norm2 = tf_values(0.0, 0.05, 0.3);
    write_array(&out, "sub-02", "norm", &dims, tf_coords(), "1", &norm2);
    // Raw phase locking: non-negative.
    let sync = tf_values(0.2, 0.05, 0.5);
    write_array(&out, "sub-02", "sync", &dims, tf_coords(), "1", &sync);
    write_group(&out, pairs());
    // Not drawable: epoched voltages.
    let trials = ArrayD::from_elem(IxDyn(&[4, 2, 3]), 1e-6f32);
    let tcoords = vec![
        Coord::Labels(CHANNELS.iter().map(|c| c.to_string()).collect()),
        Coord::Numbers(vec![0.0, 1.0]),
        Coord::Numbers(vec![0.0, 0.01, 0.02]),
    ];
    write_array(
        &out,
        "sub-01",
        "trials",
        &["channel", "trial", "time"],
        tcoords,
        "V",
        &trials,
    );
    let tsv = "subject\tcondition\tmeasure\tpair\tband\twindow\tmean\tsem\tn\n\
               sub-01\tA\tplv\tFz-Pz\ttheta\tlate\t0.31\tn/a\t1\n\
               group\tA\tplv\tFz-Pz\ttheta\tlate\t0.3\t0.01\t2\n";
    fs::write(out.join("group.tsv"), tsv).unwrap();
    let html = out.join("report.html");
    Fixture {
        _tmp: tmp,
        out,
        html,
        norm,
        norm2,
        sync,
    }
}

fn render(f: &Fixture) -> ReportSummary {
    let summary = write_report(&f.out, &f.html, &ReportOptions::default()).unwrap();
    if let Ok(keep) = std::env::var("PHASEWISE_REPORT_KEEP") {
        copy_report(&f.html, Path::new(&keep));
    }
    summary
}

fn copy_report(html: &Path, to: &Path) {
    let figs = phasewise::report::figures_dir_for(html);
    let to_figs = to.join(figs.file_name().unwrap());
    fs::create_dir_all(&to_figs).unwrap();
    fs::copy(html, to.join(html.file_name().unwrap())).unwrap();
    for e in fs::read_dir(&figs).unwrap() {
        let p = e.unwrap().path();
        fs::copy(&p, to_figs.join(p.file_name().unwrap())).unwrap();
    }
}

/// Decodes a PNG (png crate) into (width, height, RGB bytes).
fn decode_png(bytes: &[u8]) -> (u32, u32, Vec<u8>) {
    let decoder = png::Decoder::new(std::io::Cursor::new(bytes));
    let mut reader = decoder.read_info().expect("PNG header");
    let mut buf = vec![0; reader.output_buffer_size().expect("PNG size fits memory")];
    let info = reader.next_frame(&mut buf).expect("PNG data");
    let channels = info.color_type.samples();
    assert!(
        channels >= 3,
        "expected an RGB(A) PNG, got {:?}",
        info.color_type
    );
    let rgb = buf[..info.buffer_size()]
        .chunks(channels)
        .flat_map(|px| px[..3].to_vec())
        .collect();
    (info.width, info.height, rgb)
}

/// The time–frequency figure (group or subject) of one array, measure and pair (`a–b`), found
/// by what the summary says it shows.
fn tf_figure<'a>(s: &'a ReportSummary, source: &str, measure: &str, pair: &str) -> &'a FigureInfo {
    s.figures
        .iter()
        .find(|f| {
            matches!(f.kind, FigureKind::TimeFrequency | FigureKind::SubjectMap)
                && f.source == source
                && f.measure.as_deref() == Some(measure)
                && f.pair
                    .as_ref()
                    .map(|p| format!("{}–{}", p[0], p[1]))
                    .as_deref()
                    == Some(pair)
        })
        .unwrap_or_else(|| panic!("no {measure} {pair} figure of {source}"))
}

/// Range over conditions of one measure and pair, and of the A − B difference, in f64.
fn ranges(v: &ArrayD<f32>, m: usize, p: usize) -> ((f64, f64), (f64, f64)) {
    let (mut lo, mut hi, mut dlo, mut dhi) = (f64::MAX, f64::MIN, f64::MAX, f64::MIN);
    let (nf, nt) = (freqs().len(), times().len());
    for fi in 0..nf {
        for ti in 0..nt {
            let a = f64::from(v[[0, m, p, fi, ti]]);
            let b = f64::from(v[[1, m, p, fi, ti]]);
            lo = lo.min(a).min(b);
            hi = hi.max(a).max(b);
            dlo = dlo.min(a - b);
            dhi = dhi.max(a - b);
        }
    }
    ((lo, hi), (dlo, dhi))
}

/// The pixels of `panel` (figure PNG) whose colour is nearest `target`, as (x, y) pixel centres
/// in PNG pixels.
fn best_pixels(fig: &FigureInfo, panel: usize, target: [u8; 3]) -> Vec<(f64, f64)> {
    let (w, _, rgb) = decode_png(&fs::read(&fig.png).unwrap());
    let r = fig.panels[panel].rect;
    let s = fig.png_scale;
    let (mut best, mut at) = (u32::MAX, Vec::new());
    // Stay 2 px inside the frame so frame lines and ticks are not taken for cells.
    for y in (r[1] * s) as usize + 2..(r[3] * s) as usize - 2 {
        for x in (r[0] * s) as usize + 2..(r[2] * s) as usize - 2 {
            let i = 3 * (y * w as usize + x);
            let d: u32 = (0..3)
                .map(|k| (rgb[i + k] as i32 - target[k] as i32).pow(2) as u32)
                .sum();
            if d < best {
                (best, at) = (d, Vec::new());
            }
            if d == best {
                at.push((x as f64 + 0.5, y as f64 + 0.5));
            }
        }
    }
    at
}

/// The centre of the pixels nearest `target` (a cell drawn in that colour gives its middle).
fn nearest_pixel(fig: &FigureInfo, panel: usize, target: [u8; 3]) -> (f64, f64) {
    let at = best_pixels(fig, panel, target);
    let n = at.len() as f64;
    let (sx, sy) = at.iter().fold((0.0, 0.0), |a, p| (a.0 + p.0, a.1 + p.1));
    (sx / n, sy / n)
}

/// Data coordinates (time, freq) of a PNG pixel of a time–frequency panel.
fn pixel_to_tf(fig: &FigureInfo, panel: usize, (px, py): (f64, f64)) -> (f64, f64) {
    let p = &fig.panels[panel];
    let s = fig.png_scale;
    let (x0, y0, x1, y1) = (p.rect[0] * s, p.rect[1] * s, p.rect[2] * s, p.rect[3] * s);
    let t = p.x.lo + (px - x0) / (x1 - x0) * (p.x.hi - p.x.lo);
    assert!(p.y.log, "frequency axis should be logarithmic");
    let frac = (y1 - py) / (y1 - y0);
    let f = (p.y.lo.ln() + frac * (p.y.hi.ln() - p.y.lo.ln())).exp();
    (t, f)
}

/// The report's sections, in order: findings first, provenance last.
const SECTIONS: [&str; 14] = [
    "caution",
    "contents",
    "findings",
    "statistics",
    "tf-maps",
    "heads",
    "matrices",
    "subjects",
    "tables",
    "summary",
    "stages",
    "epochs",
    "warnings",
    "not-drawn",
];

/// Top entry of the published viridis table (0.993248, 0.906157, 0.143936) in 8 bits.
const VIRIDIS_TOP: [u8; 3] = [253, 231, 37];
/// Bottom entry of the published viridis table (0.267004, 0.004874, 0.329415) in 8 bits.
const VIRIDIS_BOTTOM: [u8; 3] = [68, 1, 84];
/// Red end of ColorBrewer's 11-class RdBu table (#67001f), the diverging map's top.
const RDBU_RED: [u8; 3] = [0x67, 0x00, 0x1f];
/// The "no value" hatch's stripe colour (src/report/colour.rs NO_VALUE_INK).
const HATCH: [u8; 3] = [140, 140, 140];
/// Centre of ColorBrewer's 11-class RdBu table (#f7f7f7): the diverging map's zero.
const RDBU_ZERO: [u8; 3] = [0xf7, 0xf7, 0xf7];

/// Every inline image decodes as a PNG; every linked file exists, PNGs decode and SVGs parse as
/// XML with an `<svg>` root; one inline image and two links per figure of the summary.
fn check_images(html: &str, html_path: &Path, s: &ReportSummary) {
    // Inline images: every data URI decodes as a PNG.
    let uris: Vec<&str> = html
        .split("src=\"data:image/png;base64,")
        .skip(1)
        .map(|r| &r[..r.find('"').unwrap()])
        .collect();
    assert_eq!(uris.len(), s.figures.len());
    for u in &uris {
        use base64::Engine;
        let bytes = base64::engine::general_purpose::STANDARD.decode(u).unwrap();
        let (w, h, _) = decode_png(&bytes);
        assert!(w > 100 && h > 100);
    }
    // Linked files: each exists; PNGs decode, SVGs parse as XML with an <svg> root. (Links
    // within the page, `#…`, are the table of contents.)
    let hrefs: Vec<&str> = html
        .split("href=\"")
        .skip(1)
        .map(|r| &r[..r.find('"').unwrap()])
        .filter(|h| !h.starts_with('#'))
        .collect();
    assert_eq!(hrefs.len(), 2 * s.figures.len());
    for h in hrefs {
        let p = html_path.parent().unwrap().join(h);
        let bytes = fs::read(&p).unwrap_or_else(|e| panic!("{h}: {e}"));
        if h.ends_with(".png") {
            decode_png(&bytes);
        } else {
            assert!(h.ends_with(".svg"), "{h}");
            let text = String::from_utf8(bytes).unwrap();
            let doc = roxmltree::Document::parse(&text).unwrap_or_else(|e| panic!("{h}: {e}"));
            assert_eq!(doc.root_element().tag_name().name(), "svg");
        }
    }
}

#[test]
fn report_has_every_section_and_every_image_decodes() {
    let f = fixture();
    let s = render(&f);
    let html = fs::read_to_string(&f.html).unwrap();
    for id in SECTIONS {
        assert!(
            html.contains(&format!("<section id=\"{id}\">")),
            "section {id} missing"
        );
        assert!(s.sections.iter().any(|x| x == id));
    }
    assert!(html.contains("not a clinical device") && html.contains("diagnosis or treatment"));
    assert!(!html.contains("<script"), "the page needs no scripts");
    assert!(
        !html.contains("DESIGN"),
        "the page cites no file users lack"
    );
    assert!(
        !html.contains("http://") && !html.contains("https://"),
        "the page loads nothing from outside"
    );
    check_images(&html, &f.html, &s);
    // What the manifest says is shown.
    assert!(html.contains("synthetic-report-test"));
    assert!(html.contains("the wavelet at 3 Hz is longer than the buffer"));
    assert!(html.contains("<th>kept</th>") && html.contains("<td class=\"n\">38</td>"));
    assert!(html.contains("<th>subject</th><th>stage</th><th>condition</th>"));
    assert!(s.figures.iter().any(|f| f.kind == FigureKind::StageGraph));
    assert!(
        s.not_drawn.iter().any(|n| n.contains("sub-01/trials")),
        "{:?}",
        s.not_drawn
    );
    // The group table shows the group row, not the subject's.
    assert!(html.contains("<td class=\"n\">0.3</td><td class=\"n\">0.01</td>"));
    assert!(!html.contains("<td class=\"n\">0.31</td>"));
}

#[test]
fn run_summary_shows_the_set_overrides() {
    // `pipeline.overrides` of the manifest (the `--set` arguments, src/manifest.rs): none in
    // the fixture, then two.
    let f = fixture();
    render(&f);
    let html = fs::read_to_string(&f.html).unwrap();
    assert!(
        html.contains("<dt>run with overrides (--set)</dt><dd>none</dd>"),
        "the summary says there were no overrides"
    );
    let mut m = manifest();
    m["pipeline"]["overrides"] = json!(["norm.window=[-0.25,-0.05]", "stats.alpha=0.01"]);
    fs::write(
        f.out.join("manifest.json"),
        serde_json::to_vec_pretty(&m).unwrap(),
    )
    .unwrap();
    render(&f);
    let html = fs::read_to_string(&f.html).unwrap();
    assert!(
        html.contains(
            "<dt>run with overrides (--set)</dt><dd>norm.window=[-0.25,-0.05]; \
             stats.alpha=0.01</dd>"
        ),
        "{}",
        &html[html.find("<dl class=\"kv\">").unwrap()..][..1500]
    );
}

/// Rewrites the fixture's group aggregate with channels named `labels` (no positions in the
/// metadata): SEEG-like contact names are not 10-20 / 10-10 labels, so they have no position.
fn relabel_group(f: &Fixture, labels: [&str; 4]) {
    let mut pairs = Vec::new();
    for (i, a) in labels.iter().enumerate() {
        for b in &labels[i + 1..] {
            pairs.push([a.to_string(), b.to_string()]);
        }
    }
    write_group(&f.out, pairs);
}

#[test]
fn no_head_is_drawn_for_channels_without_positions() {
    // The fixture as written (10-20 labels) has head figures; the same values on SEEG contact
    // names have none, with one note saying why, and no scalp outline anywhere.
    let f = fixture();
    let s = render(&f);
    assert!(s.figures.iter().any(|x| x.kind == FigureKind::Head));
    for (labels, placed) in [
        (
            ["LA1", "LA2", "LA3", "RH1"],
            "0 of its 4 channels have a position",
        ),
        (
            ["Cz", "LA2", "LA3", "RH1"],
            "1 of its 4 channels has a position",
        ),
    ] {
        relabel_group(&f, labels);
        let s = render(&f);
        let heads: Vec<&str> = s
            .figures
            .iter()
            .filter(|x| x.kind == FigureKind::Head)
            .map(|x| x.id.as_str())
            .collect();
        assert!(heads.is_empty(), "{labels:?}: {heads:?}");
        let notes: Vec<&String> = s
            .not_drawn
            .iter()
            .filter(|n| n.contains("head figure"))
            .collect();
        assert_eq!(notes.len(), 1, "{labels:?}: {:?}", s.not_drawn);
        assert!(
            notes[0].contains("group/group") && notes[0].contains(placed),
            "{}",
            notes[0]
        );
        let html = fs::read_to_string(&f.html).unwrap();
        assert!(!html.contains("head-group-group"), "{labels:?}");
        assert!(!html.contains("is at least n/a"), "{labels:?}");
        assert_eq!(html.matches("no head figures").count(), 1, "{labels:?}");
    }
}

#[test]
fn colour_bars_span_the_arrays_range() {
    let f = fixture();
    let s = render(&f);
    let p = blob_pair();
    // Non-negative phase locking: sequential map from the smallest to the largest value.
    let fig = tf_figure(&s, "sub-02/sync", "plv", "Fz–Pz");
    let ((lo, hi), (dlo, dhi)) = ranges(&f.sync, 0, p);
    let bar = &fig.colour_bars[0];
    assert_eq!(bar.map, MapKind::Sequential);
    // PLV is never negative (Lachaux et al. 1999): its scale starts at 0, not at the data's
    // smallest value, and ends at the largest.
    assert!(lo > 0.1, "the fixture's raw plv stays above 0.1 ({lo})");
    assert_eq!((bar.vmin, bar.vmax), (0.0, hi));
    assert_eq!(bar.data_range, Some((lo, hi)));
    // The difference is signed: diverging, symmetric around zero.
    let diff = &fig.colour_bars[1];
    assert_eq!(diff.map, MapKind::Diverging);
    assert_eq!(diff.vmax, dlo.abs().max(dhi.abs()));
    assert_eq!(diff.vmin, -diff.vmax);
    assert_eq!(diff.data_range, Some((dlo, dhi)));
    // Baseline-subtracted values: diverging, symmetric, reaching the largest magnitude.
    let fig = tf_figure(&s, "sub-01/norm", "plv", "Fz–Pz");
    let ((lo, hi), _) = ranges(&f.norm, 0, p);
    let bar = &fig.colour_bars[0];
    assert_eq!(bar.map, MapKind::Diverging);
    assert_eq!(bar.vmax, lo.abs().max(hi.abs()));
    assert_eq!(bar.data_range, Some((lo, hi)));
    // The mean over the two subjects' norm arrays (f64, as the report documents).
    let mean: ArrayD<f32> = ndarray::Zip::from(&f.norm)
        .and(&f.norm2)
        .map_collect(|&a, &b| ((f64::from(a) + f64::from(b)) / 2.0) as f32);
    let fig_mean = tf_figure(&s, "subject-mean/norm", "plv", "Fz–Pz");
    let ((mlo, mhi), _) = ranges(&mean, 0, p);
    let got = fig_mean.colour_bars[0].data_range.unwrap();
    // The test's mean is rounded to f32 on the way; the report keeps f64.
    assert!(
        (got.0 - mlo).abs() < 1e-6 && (got.1 - mhi).abs() < 1e-6,
        "{got:?} vs {mlo}, {mhi}"
    );
    // The HTML states the same limits as data attributes.
    let html = fs::read_to_string(&f.html).unwrap();
    assert!(html.contains(&format!(
        "data-vmin=\"{}\" data-vmax=\"{}\"",
        bar.vmin, bar.vmax
    )));
}

#[test]
fn planted_blob_is_drawn_where_it_was_planted() {
    let f = fixture();
    let s = render(&f);
    // The blob pair is among the strongest pairs picked by default, for both arrays.
    for (source, colour) in [
        ("sub-02/sync", VIRIDIS_TOP),
        ("sub-01/norm", RDBU_RED),
        ("subject-mean/norm", RDBU_RED),
    ] {
        let fig = tf_figure(&s, source, "plv", "Fz–Pz");
        assert_eq!(fig.panels[0].label, "A");
        let px = nearest_pixel(fig, 0, colour);
        let (t, fr) = pixel_to_tf(fig, 0, px);
        // The blob is centred between grid points (time step 0.02 s, frequency step a factor
        // 10^(1/15) ≈ 1.166) and noise may move its top by a cell: allow about two cells.
        assert!(
            (t - BLOB_T).abs() <= 0.05,
            "{source}: strongest colour at t = {t}"
        );
        assert!(
            (fr / BLOB_F).ln().abs() <= 1.35f64.ln(),
            "{source}: strongest colour at f = {fr}"
        );
    }
    // The group matrix shows the blob pair as its strongest cell in condition A.
    let m = s
        .figures
        .iter()
        .find(|f| {
            f.kind == FigureKind::Matrix
                && f.source == "group/group"
                && f.measure.as_deref() == Some("plv")
        })
        .expect("group plv matrix");
    let labels: Vec<&str> = m.panels.iter().map(|p| p.label.as_str()).collect();
    assert_eq!(labels, ["A", "B", "A \u{2212} B"]);
    // Every pixel in the strongest colour lies in the Fz–Pz cell or its mirror Pz–Fz.
    let r = m.panels[0].rect;
    let n = CHANNELS.len() as f64;
    for (px, py) in best_pixels(m, 0, RDBU_RED) {
        let col = ((px / m.png_scale - r[0]) / (r[2] - r[0]) * n) as usize;
        let row = ((py / m.png_scale - r[1]) / (r[3] - r[1]) * n) as usize;
        let mut hit = [CHANNELS[row], CHANNELS[col]];
        hit.sort();
        assert_eq!(hit, ["Fz", "Pz"]);
    }
}

/// Euclidean distance of two 8-bit colours.
fn dist(a: [u8; 3], b: [u8; 3]) -> f64 {
    (0..3)
        .map(|k| (f64::from(a[k]) - f64::from(b[k])).powi(2))
        .sum::<f64>()
        .sqrt()
}

/// The pixels of a PNG inside `rect` (layout pixels), `inset` PNG pixels in from each edge.
fn pixels_in(fig: &FigureInfo, rect: [f64; 4], inset: usize) -> Vec<[u8; 3]> {
    let (w, _, rgb) = decode_png(&fs::read(&fig.png).unwrap());
    let s = fig.png_scale;
    let mut out = Vec::new();
    for y in (rect[1] * s) as usize + inset..(rect[3] * s) as usize - inset {
        for x in (rect[0] * s) as usize + inset..(rect[2] * s) as usize - inset {
            let i = 3 * (y * w as usize + x);
            out.push([rgb[i], rgb[i + 1], rgb[i + 2]]);
        }
    }
    out
}

#[test]
fn raw_plv_is_drawn_sequential_from_zero() {
    let f = fixture();
    let s = render(&f);
    let fig = tf_figure(&s, "sub-02/sync", "plv", "Fz–Pz");
    let ((lo, hi), _) = ranges(&f.sync, 0, blob_pair());
    // From the pixels: on a scale from 0, the smallest value (lo / hi of the way up) is far from
    // the map's bottom colour; a scale from the data's minimum would paint it exactly there.
    let px = pixels_in(fig, fig.panels[0].rect, 2);
    let nearest = px
        .iter()
        .map(|&c| dist(c, VIRIDIS_BOTTOM))
        .fold(f64::MAX, f64::min);
    assert!(
        lo / hi > 0.15 && nearest > 30.0,
        "a cell is painted near viridis' bottom ({nearest:.1} away) though the data start at {lo}"
    );
    // And the largest value is painted in viridis' top colour.
    let top = px
        .iter()
        .map(|&c| dist(c, VIRIDIS_TOP))
        .fold(f64::MAX, f64::min);
    assert!(top < 3.0, "no cell in viridis' top colour ({top:.1} away)");
}

#[test]
fn no_value_cells_are_hatched_unlike_zero() {
    let f = fixture();
    let s = render(&f);
    let m = s
        .figures
        .iter()
        .find(|f| f.kind == FigureKind::Matrix && f.source == "group/group")
        .expect("group matrix");
    let n = CHANNELS.len();
    let r = m.panels[0].rect;
    let (cw, ch) = ((r[2] - r[0]) / n as f64, (r[3] - r[1]) / n as f64);
    let cell = |i: usize, j: usize| {
        [
            r[0] + j as f64 * cw,
            r[1] + i as f64 * ch,
            r[0] + (j + 1) as f64 * cw,
            r[1] + (i + 1) as f64 * ch,
        ]
    };
    let hatched = |px: &[[u8; 3]]| {
        px.iter().filter(|&&c| dist(c, HATCH) < 30.0).count() as f64 / px.len() as f64
    };
    for i in 0..n {
        for j in 0..n {
            let px = pixels_in(m, cell(i, j), 3);
            let share = hatched(&px);
            if i == j {
                // The diagonal has no value: stripes of the hatch colour, which is neither the
                // map's zero (#f7f7f7) nor any other colour of it (colour.rs tests).
                assert!(share > 0.08, "diagonal cell {i}: {share:.2} hatched");
                assert!(dist(HATCH, RDBU_ZERO) > 100.0);
            } else {
                assert!(
                    share == 0.0,
                    "cell ({i}, {j}) with a value is hatched ({share:.2})"
                );
            }
        }
    }
    // The legend says so: the page explains the hatch.
    let html = fs::read_to_string(&f.html).unwrap();
    assert!(html.contains("hatched: no value"));
}

#[test]
fn a_folder_without_manifest_is_an_error_naming_it() {
    let tmp = tempfile::tempdir().unwrap();
    let e = write_report(
        tmp.path(),
        &tmp.path().join("r.html"),
        &ReportOptions::default(),
    )
    .unwrap_err();
    let msg = e.to_string();
    assert!(
        msg.contains("manifest.json") && msg.contains("run the pipeline first"),
        "{msg}"
    );
}

/// The demo pipeline of this test: DESIGN §3's chain on the simulated study, with the
/// baseline-subtracted maps exported so that the report can draw them.
const DEMO_PIPELINE: &str = r#"
name: report-demo
data:
  recordings: "demo-data/sub-*/eeg/*_eeg.edf"
  events: sidecar
output: results
stages:
  reref: { op: re-reference, input: recordings, params: { method: average } }
  line: { op: notch, input: reref, params: { freqs: [50], harmonics: true, q: 30 } }
  trials:
    op: epoch
    input: line
    params: { conditions: { left: [cue-left], right: [cue-right] }, window: [-1.0, 1.5] }
  tf:
    op: wavelet
    input: trials
    params:
      freqs: { from: 3, to: 30, count: 16, spacing: log }
      cycles: { from: 3, to: 8 }
      crop: [-0.6, 1.1]
      stride: 5
    cache: false
  sync: { op: clustering, input: tf, params: { measure: [plv, wpli], pairs: all, across: trials } }
  norm:
    op: baseline
    input: sync
    params: { window: [-0.5, -0.2], mode: subtract }
    export: true
  group:
    op: aggregate
    input: norm
    params: { over: subjects, bands: { theta: [4, 8] }, windows: { late: [0.3, 0.8] } }
    export: true
  stats:
    op: contrast
    input: norm
    params:
      over: subjects
      compare: [left, right]
      measure: [wpli]
      pairs: all
      times: [0.0, 1.1]
      correction: cluster
      permutations: 4096
      alpha: 0.05
      seed: 1
    export: true
"#;

/// End to end: simulate the demo study, run the pipeline with the `phasewise` binary, render
/// the report, and find the planted coupling (read from the simulator's truth.json, not from
/// the report) where it was planted: in the maps, outlined as a significant cluster of the
/// contrast stage (six subjects: 2^6 = 64 sign-flip patterns, a pattern and its mirror image
/// giving the same |t|, so the smallest possible p is 2/64 < 0.05; with five it would be 2/32
/// and nothing could be significant), and as the
/// strongest line on the head.
#[test]
fn demo_report_shows_the_planted_coupling() {
    use assert_cmd::Command;
    let tmp = tempfile::tempdir().unwrap();
    let dir = tmp.path();
    Command::cargo_bin("phasewise")
        .unwrap()
        .args(["simulate", "--subjects", "6", "--out"])
        .arg(dir.join("demo-data"))
        .assert()
        .success();
    fs::write(dir.join("demo.yaml"), DEMO_PIPELINE).unwrap();
    Command::cargo_bin("phasewise")
        .unwrap()
        .arg("run")
        .arg(dir.join("demo.yaml"))
        .assert()
        .success();
    let out = dir.join("results");
    let html_path = out.join("report.html");
    let s = write_report(&out, &html_path, &ReportOptions::default()).unwrap();
    if let Ok(keep) = std::env::var("PHASEWISE_REPORT_KEEP") {
        copy_report(&html_path, &Path::new(&keep).join("demo"));
    }
    let html = fs::read_to_string(&html_path).unwrap();
    for id in SECTIONS {
        assert!(
            html.contains(&format!("<section id=\"{id}\">")),
            "section {id} missing"
        );
    }
    check_images(&html, &html_path, &s);

    let truth: Value =
        serde_json::from_slice(&fs::read(dir.join("demo-data/truth.json")).unwrap()).unwrap();
    let c = &truth["coupling"];
    let pair = format!(
        "{}–{}",
        c["pair"][0].as_str().unwrap(),
        c["pair"][1].as_str().unwrap()
    );
    let freq = c["frequency_hz"].as_f64().unwrap();
    let (w0, w1) = (
        c["window_s"][0].as_f64().unwrap(),
        c["window_s"][1].as_f64().unwrap(),
    );
    assert_eq!(
        c["condition"], "cue-left",
        "the pipeline above maps cue-left to `left`"
    );
    // The planted pair is among the strongest pairs the report picks by default, and its
    // strongest colour in the `left` panel lies inside the planted window, near the frequency.
    // wPLI: the coupling is lagged, and the imaginary part ignores the zero-lag mixing.
    let fig = tf_figure(&s, "subject-mean/norm", "wpli", &pair);
    assert_eq!(fig.panels[0].label, "left");
    assert!(fig.why.contains("significant cluster"), "{}", fig.why);
    // SEM and n on the group figure: a time course under each panel, all six subjects counted.
    assert_eq!(fig.courses.len(), fig.panels.len());
    assert!(fig.courses.iter().all(|c| c.n.iter().all(|&n| n == 6.0)));
    let (t, f) = pixel_to_tf(fig, 0, nearest_pixel(fig, 0, RDBU_RED));
    assert!(
        t >= w0 && t <= w1,
        "strongest wpli at t = {t}, planted in [{w0}, {w1}] s"
    );
    // Frequency resolution of the Morlet wavelet at the planted frequency (DESIGN §4:
    // σ_t = n / (2π f), so σ_f = 1 / (2π σ_t) = f / n), with n from the cycles ramp of the
    // pipeline above (3 → 8 cycles, log-spaced over 3 → 30 Hz): the top may sit within 2 σ_f.
    let n = 3.0 * (8.0f64 / 3.0).powf((freq / 3.0).ln() / 10f64.ln());
    let sigma_f = freq / n;
    assert!(
        (f - freq).abs() <= 2.0 * sigma_f,
        "strongest wpli at f = {f}, planted at {freq} Hz (σ_f = {sigma_f:.2} Hz)"
    );
    println!("planted coupling {pair}: strongest colour of the mean wpli map at t = {t:.3} s, f = {f:.2} Hz");

    // The t-map of the planted pair, outlined: its black outline pixels (the colour nothing
    // else in a t-map uses) lie around the planted window and frequency.
    let tm = s
        .figures
        .iter()
        .find(|f| {
            f.kind == FigureKind::TMap
                && f.pair.as_ref().map(|p| format!("{}–{}", p[0], p[1])) == Some(pair.clone())
        })
        .expect("t-map of the planted pair");
    assert!(tm.outlined, "the planted pair has no significant cluster");
    let black = best_pixels(tm, 1, [0, 0, 0]);
    let (n, (st, sf)) = (
        black.len() as f64,
        black.iter().fold((0.0, 0.0), |a, &p| {
            let (t, f) = pixel_to_tf(tm, 1, p);
            (a.0 + t, a.1 + f.ln())
        }),
    );
    let (tc, fc) = (st / n, (sf / n).exp());
    assert!(
        tc >= w0 && tc <= w1,
        "outline centred at t = {tc}, planted in [{w0}, {w1}] s"
    );
    assert!(
        (fc - freq).abs() <= 2.0 * sigma_f,
        "outline centred at f = {fc}, planted at {freq} Hz"
    );
    // The findings name it.
    let findings = &html[html.find("<section id=\"findings\">").unwrap()..];
    let findings = &findings[..findings.find("</section>").unwrap()];
    assert!(
        findings.contains("Significant: wPLI") && findings.contains(&pair),
        "findings: {findings}"
    );

    // On the head (theta × late, where the coupling was planted), its line is the strongest.
    let head = s
        .figures
        .iter()
        .find(|f| f.kind == FigureKind::Head && f.measure.as_deref() == Some("wpli"))
        .expect("wpli head figure");
    let lines = &head.panels[0].lines;
    let strongest = lines
        .iter()
        .max_by(|a, b| a.1.abs().total_cmp(&b.1.abs()))
        .expect("lines on the head");
    assert_eq!(format!("{}–{}", strongest.0[0], strongest.0[1]), pair);

    // A page that opens fast: under 5 MB with every figure inlined.
    let size = fs::metadata(&html_path).unwrap().len();
    assert!(size < 5_000_000, "the page is {size} bytes");
    // The figures lie in a folder named after the report file.
    assert!(s.figures_dir.ends_with("report-figures"));
    browser_check(&html_path);
}

/// Opens the report in headless Chromium through tests/browser-check.sh (no console messages
/// allowed) and leaves its screenshot in the target folder, out of git. Skipped, saying so, where
/// Chromium is not installed.
fn browser_check(report: &Path) {
    let found = std::process::Command::new("sh")
        .args(["-c", "command -v chromium || command -v chromium-browser"])
        .output()
        .is_ok_and(|o| o.status.success());
    if !found {
        println!("browser check skipped: chromium is not installed");
        return;
    }
    let shot = Path::new(env!("CARGO_TARGET_TMPDIR")).join("report-demo-screenshot.png");
    let script = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/browser-check.sh");
    let out = std::process::Command::new("bash")
        .arg(script)
        .arg(report)
        .arg(&shot)
        .output()
        .unwrap();
    assert!(
        out.status.success(),
        "browser check failed:\n{}{}",
        String::from_utf8_lossy(&out.stdout),
        String::from_utf8_lossy(&out.stderr)
    );
    println!("{}", String::from_utf8_lossy(&out.stdout).trim());
}

/// The ± 1 SEM shading of the group time courses (src/report/tf.rs SEM_SHADE), a colour no
/// line or text of a course panel uses.
const SEM_SHADE: [u8; 3] = [188, 208, 232];

/// Under each group time–frequency map the report draws its band's time course, mean ± SEM
/// across subjects. Checked against numpy (tests/reference/gen_report.py, numpy pinned in
/// tests/reference/requirements.txt): the report is drawn from the per-subject arrays that the
/// fixture holds, and (1) the course values it reports equal numpy's mean, SEM (nanstd ddof 1
/// over √n) and n, for each condition and the paired difference, including a time where one
/// subject has no value inside the band (n drops to 4, the `aggregate` op's rule) and one where
/// the missing cell lies outside the band (n stays 5); (2) in the figure's PNG, the shaded
/// band's half-height at the time of the largest SEM equals numpy's SEM, and its middle the
/// mean, to within a pixel and a half.
#[test]
fn group_courses_show_the_sem_numpy_computes() {
    use ndarray::{Array1, Array2};
    use phasewise::report::NamedRange;
    let fx = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/reference/fixtures/report");
    let read = |name: &str| -> ArrayD<f64> {
        ndarray_npy::read_npy(fx.join(format!("{name}.npy"))).unwrap()
    };
    let input = read("course_input");
    let freqs: Array1<f64> = ndarray_npy::read_npy(fx.join("course_freqs.npy")).unwrap();
    let times: Array1<f64> = ndarray_npy::read_npy(fx.join("course_times.npy")).unwrap();
    let want: Vec<Array2<f64>> = ["course_mean", "course_sem", "course_n"]
        .iter()
        .map(|n| ndarray_npy::read_npy(fx.join(format!("{n}.npy"))).unwrap())
        .collect();
    let meta: Value = serde_json::from_slice(&fs::read(fx.join("course.json")).unwrap()).unwrap();
    let band = [
        meta["band"][0].as_f64().unwrap(),
        meta["band"][1].as_f64().unwrap(),
    ];
    let chans = ["Fz", "Cz", "Pz"];
    let pairs: Vec<[String; 2]> = vec![
        [chans[0].into(), chans[1].into()],
        [chans[0].into(), chans[2].into()],
        [chans[1].into(), chans[2].into()],
    ];
    let pair = pairs[meta["pair_index"].as_u64().unwrap() as usize].clone();

    let tmp = tempfile::tempdir().unwrap();
    let out = tmp.path().join("results");
    fs::create_dir_all(&out).unwrap();
    let manifest = json!({"format": "phasewise-manifest", "units": [], "warnings": []});
    fs::write(out.join("manifest.json"), manifest.to_string()).unwrap();
    let coords = || {
        vec![
            Coord::Labels(vec!["A".into(), "B".into()]),
            Coord::Labels(vec!["wpli".into()]),
            Coord::Pairs(pairs.clone().into()),
            Coord::Numbers(freqs.to_vec()),
            Coord::Numbers(times.to_vec()),
        ]
    };
    let dims = ["condition", "measure", "pair", "freq", "time"];
    for s in 0..input.shape()[0] {
        let v = input.index_axis(ndarray::Axis(0), s).mapv(|x| x as f32);
        let owner = format!("sub-{:02}", s + 1);
        write_array(&out, &owner, "norm", &dims, coords(), "1", &v);
    }
    let opts = ReportOptions {
        pairs: vec![pair.clone()],
        contrast: Some(["A".into(), "B".into()]),
        bands: vec![NamedRange {
            name: "theta".into(),
            lo: band[0],
            hi: band[1],
        }],
        ..ReportOptions::default()
    };
    let html = out.join("report.html");
    let s = write_report(&out, &html, &opts).unwrap();
    let fig = tf_figure(
        &s,
        "subject-mean/norm",
        "wpli",
        &format!("{}–{}", pair[0], pair[1]),
    );
    assert_eq!(
        fig.courses.len(),
        3,
        "a course under each of A, B and A − B"
    );

    // (1) The values: numpy's, to f64 rounding (the inputs are f32-exact).
    let close =
        |a: f64, b: f64| (a.is_nan() && b.is_nan()) || (a - b).abs() <= 1e-12 * b.abs().max(1e-3);
    for (i, c) in fig.courses.iter().enumerate() {
        assert_eq!((c.band.lo, c.band.hi), (band[0], band[1]));
        assert_eq!(c.times, times.to_vec());
        for j in 0..times.len() {
            for (k, got) in [&c.mean, &c.sem, &c.n].into_iter().enumerate() {
                assert!(
                    close(got[j], want[k][[i, j]]),
                    "course {} ({}), time {}: statistic {k} is {}, numpy gives {}",
                    i,
                    c.label,
                    times[j],
                    got[j],
                    want[k][[i, j]]
                );
            }
        }
    }
    assert_eq!(
        fig.courses[2].n[9], 4.0,
        "the subject without a value inside the band drops out"
    );
    assert_eq!(
        fig.courses[2].n[14], 5.0,
        "a missing cell outside the band changes nothing"
    );
    assert!(fig.courses[2].label.contains('\u{2212}'));

    // (2) The pixels: the shading's extent at the time of the largest SEM of the difference.
    let (w, h, rgb) = decode_png(&fs::read(&fig.png).unwrap());
    let sc = fig.png_scale;
    for (i, c) in fig.courses.iter().enumerate() {
        let j = (0..times.len())
            .filter(|&j| want[1][[i, j]].is_finite())
            .max_by(|&a, &b| want[1][[i, a]].total_cmp(&want[1][[i, b]]))
            .unwrap();
        let [x0, y0, x1, y1] = c.rect.map(|v| v * sc);
        let px = (x0 + (times[j] - c.x.lo) / (c.x.hi - c.x.lo) * (x1 - x0)) as usize;
        let shaded: Vec<usize> = (y0 as usize..(y1 as usize).min(h as usize))
            .filter(|&y| {
                let k = 3 * (y * w as usize + px);
                rgb[k..k + 3] == SEM_SHADE
            })
            .collect();
        let (top, bottom) = (
            *shaded.first().expect("shaded pixels") as f64,
            *shaded.last().unwrap() as f64 + 1.0,
        );
        let value = |y: f64| c.y.hi - (y - y0) / (y1 - y0) * (c.y.hi - c.y.lo);
        let per_px = (c.y.hi - c.y.lo) / (y1 - y0);
        let (half, mid) = (
            (value(top) - value(bottom)) / 2.0,
            (value(top) + value(bottom)) / 2.0,
        );
        let (mu, se) = (want[0][[i, j]], want[1][[i, j]]);
        assert!(
            (half - se).abs() <= 1.5 * per_px,
            "course {}: shading half-height {half:.5} at t = {}, numpy SEM {se:.5} (1 px = {per_px:.5})",
            c.label,
            times[j]
        );
        assert!(
            (mid - mu).abs() <= 1.5 * per_px,
            "course {}: shading centred at {mid:.5}, numpy mean {mu:.5}",
            c.label
        );
        println!(
            "course {}: at t = {} s shading ±{half:.4} around {mid:.4}; numpy SEM {se:.4}, mean {mu:.4}",
            c.label, times[j]
        );
    }
    // The caption says what the shading is and how many subjects.
    let page = fs::read_to_string(&html).unwrap();
    assert!(page.contains("± 1 SEM across subjects"));
}

/// The per-subject section draws every chosen pair for every subject, the first pair for all
/// subjects before the next pair (so the section's cap never hides a subject's first pair).
#[test]
fn each_subject_gets_every_chosen_pair() {
    let f = fixture();
    let chosen: Vec<[String; 2]> = vec![["Fz".into(), "Pz".into()], ["Cz".into(), "Oz".into()]];
    let opts = ReportOptions {
        pairs: chosen.clone(),
        ..ReportOptions::default()
    };
    let s = write_report(&f.out, &f.html, &opts).unwrap();
    let subject_maps: Vec<&FigureInfo> = s
        .figures
        .iter()
        .filter(|x| x.kind == FigureKind::SubjectMap)
        .collect();
    for source in ["sub-01/norm", "sub-02/norm", "sub-02/sync"] {
        for pair in &chosen {
            assert!(
                subject_maps
                    .iter()
                    .any(|x| x.source == source && x.pair.as_ref() == Some(pair)),
                "no {}–{} map of {source}",
                pair[0],
                pair[1]
            );
        }
    }
    let first_of_second = subject_maps
        .iter()
        .position(|x| x.pair.as_ref() == Some(&chosen[1]))
        .unwrap();
    assert!(subject_maps[..first_of_second]
        .iter()
        .all(|x| x.pair.as_ref() == Some(&chosen[0])));
    assert_eq!(
        first_of_second, 3,
        "the first pair for all three subject arrays first"
    );
}
