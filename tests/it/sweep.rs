//! `phasewise sweep` on the tiny study (DESIGN §6, §7): a variant is exactly the run with the
//! same `--set` (bit-identical exports); units a variant does not change are computed once;
//! a rerun computes nothing; wrong `--vary` arguments write nothing. The demo's sweep (the
//! planted pair across wavelet cycles) is in `demo.rs`.

use std::fs;
use std::path::Path;

use crate::reliability::{
    assert_success, files_under, manifest, run_cli, stderr_of, tiny_project, unit_statuses,
    StudySpec,
};

fn project() -> tempfile::TempDir {
    let dir = tempfile::tempdir().expect("tempdir");
    tiny_project(dir.path(), &StudySpec::default());
    dir
}

/// A two-by-two grid: the baseline's mode and the aggregate's late window.
const GRID: [&str; 6] = [
    "sweep",
    "pipeline.yaml",
    "--vary",
    "norm.mode=[subtract, zscore]",
    "--vary",
    "group.windows.late=[[0.3, 0.7], [0.2, 0.9]]",
];

/// (stage, status) of every unit in a variant's manifest.
fn statuses(output: &Path) -> Vec<(String, String)> {
    unit_statuses(&manifest(output))
        .into_iter()
        .map(|(stage, _, status)| (stage, status))
        .collect()
}

#[test]
fn each_variant_is_the_run_with_that_set_and_shares_what_it_does_not_change() {
    let p = project();
    let dir = p.path();
    assert_success(&run_cli(dir, &GRID), "sweep");
    let variants = dir.join("results/variants");
    let names: Vec<String> = fs::read_dir(&variants)
        .unwrap()
        .flatten()
        .map(|e| e.file_name().to_string_lossy().into_owned())
        .collect::<std::collections::BTreeSet<_>>()
        .into_iter()
        .collect();
    assert_eq!(
        names,
        [
            "norm.mode=subtract,group.windows.late=[0.2,0.9]",
            "norm.mode=subtract,group.windows.late=[0.3,0.7]",
            "norm.mode=zscore,group.windows.late=[0.2,0.9]",
            "norm.mode=zscore,group.windows.late=[0.3,0.7]",
        ]
    );
    // Everything up to the changed stage is computed for the first variant only; `norm` once
    // per mode; `group` once per variant.
    let mut computed = std::collections::BTreeMap::<String, usize>::new();
    for name in &names {
        for (stage, status) in statuses(&variants.join(name)) {
            if status == "computed" {
                *computed.entry(stage).or_default() += 1;
            }
        }
    }
    let per_subject = 2; // the tiny study's two subjects
    for stage in ["reref", "line", "trials", "tf", "sync"] {
        assert_eq!(
            computed.get(stage),
            Some(&per_subject),
            "{stage}: {computed:?}"
        );
    }
    assert_eq!(
        computed.get("norm"),
        Some(&(2 * per_subject)),
        "{computed:?}"
    );
    assert_eq!(computed.get("group"), Some(&4), "{computed:?}");

    // A variant's exports are byte for byte those of `run --set` with its values.
    let plain = run_cli(
        dir,
        &[
            "run",
            "pipeline.yaml",
            "--set",
            "norm.mode=zscore",
            "--set",
            "group.windows.late=[0.2, 0.9]",
        ],
    );
    assert_success(&plain, "run --set");
    let variant = variants.join("norm.mode=zscore,group.windows.late=[0.2,0.9]");
    for file in ["group/group.npy", "group.tsv"] {
        assert_eq!(
            fs::read(dir.join("results").join(file)).unwrap(),
            fs::read(variant.join(file)).unwrap(),
            "{file}"
        );
    }
    // That run had nothing to compute: the sweep had computed every unit of it.
    assert!(
        statuses(&dir.join("results"))
            .iter()
            .all(|(_, s)| s == "cached"),
        "{:?}",
        statuses(&dir.join("results"))
    );

    // sweep.tsv: the group rows of each variant's table, the variant and its values in front.
    let sweep = fs::read_to_string(dir.join("results/sweep.tsv")).unwrap();
    let mut lines = sweep.lines();
    let header: Vec<&str> = lines.next().unwrap().split('\t').collect();
    assert_eq!(
        header[..4],
        ["variant", "norm.mode", "group.windows.late", "stage"]
    );
    let table = fs::read_to_string(variant.join("group.tsv")).unwrap();
    let group_rows: Vec<&str> = table.lines().filter(|l| l.starts_with("group\t")).collect();
    assert!(!group_rows.is_empty());
    let ours: Vec<String> = lines
        .filter(|l| l.starts_with("norm.mode=zscore,group.windows.late=[0.2,0.9]\t"))
        .map(|l| l.splitn(5, '\t').nth(4).unwrap().to_string())
        .collect();
    assert_eq!(ours, group_rows, "the variant's group rows, in order");
    assert_eq!(
        sweep.lines().count() - 1,
        4 * group_rows.len(),
        "four variants' group rows"
    );
    let dictionary: serde_json::Value =
        serde_json::from_str(&fs::read_to_string(dir.join("results/sweep.json")).unwrap()).unwrap();
    for column in header {
        assert!(dictionary.get(column).is_some(), "{column} not described");
    }

    // The same sweep again computes nothing.
    let again = run_cli(dir, &GRID);
    assert_success(&again, "second sweep");
    let text = String::from_utf8_lossy(&again.stdout);
    assert_eq!(text.matches(" 0 computed").count(), 4, "{text}");
}

#[test]
fn wrong_varies_are_refused_before_anything_is_written() {
    let p = project();
    let dir = p.path();
    for (vary, expected) in [
        ("nosuch.mode=[a, b]", "nosuch"),
        ("norm.nosuch=[1, 2]", "nosuch"),
        ("norm.mode=[]", "the list of values is empty"),
        ("norm.mode=zscore", "expected a YAML list"),
        ("norm.mode=[subtract, sideways]", "sideways"),
        ("norm=[1, 2]", "expected STAGE.PARAM"),
    ] {
        let out = run_cli(dir, &["sweep", "pipeline.yaml", "--vary", vary]);
        assert_eq!(out.status.code(), Some(2), "{vary}: {}", stderr_of(&out));
        let err = stderr_of(&out);
        assert!(err.contains(expected), "{vary}: {err}");
        assert!(
            files_under(&dir.join("results")).is_empty(),
            "{vary} wrote {:?}",
            files_under(&dir.join("results"))
        );
    }
    // The same param varied twice.
    let out = run_cli(
        dir,
        &[
            "sweep",
            "pipeline.yaml",
            "--vary",
            "norm.mode=[zscore]",
            "--vary",
            "norm.mode=[subtract]",
        ],
    );
    assert_eq!(out.status.code(), Some(2), "{}", stderr_of(&out));
    assert!(stderr_of(&out).contains("varied twice"));
    assert!(files_under(&dir.join("results")).is_empty());
}

/// The report of a results folder that holds a sweep (issue 23): its section "Across the
/// sweep's variants" draws one group value per variant and condition, and its numbers are the
/// cells of `sweep.tsv` (read here by plain tab splitting, not by the report's reader); each
/// point is drawn in its condition's colour where the summary says (decoded from the PNG by the
/// `png` crate). Before the sweep, the same folder's report has no such section.
#[test]
fn the_report_draws_the_sweep_values_it_reads_from_sweep_tsv() {
    use phasewise::report::{write_report, FigureKind, ReportOptions};
    let p = project();
    let dir = p.path();
    let results = dir.join("results");
    assert_success(&run_cli(dir, &["run", "pipeline.yaml"]), "run");
    let html = results.join("report.html");
    let before = write_report(&results, &html, &ReportOptions::default()).unwrap();
    assert!(before.sweep.is_none());
    assert!(
        !before.sections.iter().any(|s| s == "sweep"),
        "{:?}",
        before.sections
    );
    assert!(!before.figures.iter().any(|f| f.kind == FigureKind::Sweep));

    assert_success(
        &run_cli(
            dir,
            &[
                "sweep",
                "pipeline.yaml",
                "--vary",
                "norm.mode=[subtract, zscore]",
            ],
        ),
        "sweep",
    );
    let summary = write_report(&results, &html, &ReportOptions::default()).unwrap();
    let s = summary.sweep.clone().expect("a sweep section");
    assert!(summary.sections.iter().any(|x| x == "sweep"));
    assert!(!s.why.is_empty());
    // sweep.tsv, read by hand.
    let text = fs::read_to_string(results.join("sweep.tsv")).unwrap();
    let mut lines = text.lines();
    let header: Vec<&str> = lines.next().unwrap().split('\t').collect();
    let col = |name: &str| header.iter().position(|h| *h == name).unwrap();
    let rows: Vec<Vec<&str>> = lines.map(|l| l.split('\t').collect()).collect();
    let ours: Vec<&Vec<&str>> = rows
        .iter()
        .filter(|r| {
            r[col("stage")] == s.stage
                && r[col("measure")] == s.measure
                && r[col("channel_a")] == s.pair[0]
                && r[col("channel_b")] == s.pair[1]
                && r[col("band")] == s.band
                && r[col("window")] == s.window
        })
        .collect();
    // Two variants × the tiny study's two conditions.
    assert_eq!(ours.len(), 4, "{ours:?}");
    assert_eq!(s.points.len(), ours.len());
    assert_eq!(s.params, ["norm.mode"]);
    for p in &s.points {
        let row = ours
            .iter()
            .find(|r| r[col("variant")] == p.variant && r[col("condition")] == p.condition)
            .unwrap_or_else(|| panic!("no sweep.tsv row for {p:?}"));
        assert_eq!(
            (p.mean.as_str(), p.sem.as_str(), p.n.as_str()),
            (row[col("mean")], row[col("sem")], row[col("n")]),
            "{p:?}"
        );
        assert_eq!(p.values, [row[col("norm.mode")]]);
    }
    // The HTML table holds those cells.
    let page = fs::read_to_string(&html).unwrap();
    let section = &page[page.find("<section id=\"sweep\">").unwrap()..];
    let section = &section[..section.find("</section>").unwrap()];
    for p in &s.points {
        let line = format!(
            "<td>{}</td><td>{}</td><td>{}</td><td class=\"n\">{}</td>",
            p.variant, p.values[0], p.condition, p.mean
        );
        assert!(
            section.contains(&line),
            "{line} not in the section:\n{section}"
        );
    }
    // Each point in its colour at its place in the PNG.
    let fig = summary
        .figures
        .iter()
        .find(|f| f.kind == FigureKind::Sweep && f.id == s.figure)
        .expect("the sweep figure");
    let bytes = fs::read(&fig.png).unwrap();
    let decoder = png::Decoder::new(std::io::Cursor::new(bytes));
    let mut reader = decoder.read_info().unwrap();
    let mut buf = vec![0; reader.output_buffer_size().unwrap()];
    let info = reader.next_frame(&mut buf).unwrap();
    let channels = info.color_type.samples();
    for p in &s.points {
        let (x, y) = p.at.expect("a drawn point");
        let (px, py) = (
            (x * fig.png_scale).round() as usize,
            (y * fig.png_scale).round() as usize,
        );
        let at = (py * info.width as usize + px) * channels;
        assert_eq!(buf[at..at + 3], p.colour, "{p:?}");
    }
}
