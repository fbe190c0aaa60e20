//! The command line (DESIGN §7): clap definitions and the glue from arguments to the library.
//!
//! Exit status: 0 success; 1 a stage failed (or `verify` found a difference); 2 the pipeline or
//! the command line is wrong. `--cache DIR` (or `PHASEWISE_CACHE`) is accepted by every command
//! that reads or writes the cache. Logs go to stderr through `tracing`; `-v`/`-q` set the level.

use std::io::IsTerminal;
use std::path::{Path, PathBuf};

use anyhow::{anyhow, Context, Result};
use clap::{Args, Parser, Subcommand};

use crate::plan::Status;
use crate::session::{self, Env, Options};
use crate::sources::RecordingReader;
use crate::study::{subject_label, RunError};
use crate::words::count;

/// `--version`: the package version and the source revision it was built from (`-dirty` when the
/// sources differed from that commit), the same revision the manifest records.
const VERSION: &str = concat!(
    env!("CARGO_PKG_VERSION"),
    " (revision ",
    env!("PHASEWISE_REVISION"),
    ")"
);

/// Declarative, cached, reproducible pipelines for phase-synchronization connectivity studies.
#[derive(Parser, Debug)]
#[command(name = "phasewise", version = VERSION, about)]
pub struct Cli {
    /// More log output (repeat for more).
    #[arg(short, long, global = true, action = clap::ArgAction::Count)]
    pub verbose: u8,
    /// Only errors are printed; a run's warnings stay in its manifest. What a command is asked
    /// to show (plan, inspect, status, schema, completions, a dry run's list, the pipeline `new`
    /// prints without --out) is still printed.
    #[arg(short, long, global = true)]
    pub quiet: bool,
    /// The command.
    #[command(subcommand)]
    pub command: Command,
}

/// The commands.
#[derive(Subcommand, Debug)]
pub enum Command {
    /// Run a pipeline: compute what is stale, export results, write the manifest.
    Run {
        /// Pipeline selection and overrides.
        #[command(flatten)]
        target: Target,
        /// Number of threads, at least 1 (default: all cores).
        #[arg(long, short = 'j', value_parser = at_least_one)]
        jobs: Option<usize>,
        /// After the run, merge the manifest parts of earlier `run --subject` runs (of the same
        /// pipeline and overrides) into manifest.json: each unit as the part that computed it
        /// recorded it, host included. The group job of `submit` runs this.
        #[arg(long, conflicts_with = "subjects")]
        merge_parts: bool,
        /// Run even when the disk looks too small for what the run writes (by default a run
        /// that certainly cannot fit stops before it starts; `plan` shows the sizes).
        #[arg(long)]
        skip_room_check: bool,
    },
    /// Show, for every stage × subject, whether it is fresh or stale and why.
    Plan {
        /// Pipeline selection and overrides.
        #[command(flatten)]
        target: Target,
        /// Print the plan as one JSON object (units, fresh or stale, reasons, recipes).
        #[arg(long)]
        json: bool,
    },
    /// Recompute a study from its manifest in a fresh cache and compare the outputs.
    Verify {
        /// The manifest.json of a run.
        manifest: PathBuf,
        /// Where the recordings are now: each recorded input is looked for at its path below
        /// the recordings glob's folder, under DIR.
        #[arg(long, value_name = "DIR")]
        data: Option<PathBuf>,
    },
    /// Write a bundle for a journal or a data repository: BIDS derivative layout, the pipeline,
    /// the manifest and RO-Crate 1.1 metadata (README, "A bundle for a journal or a repository").
    Archive {
        /// The manifest.json of a whole run.
        manifest: PathBuf,
        /// The bundle's folder (new or empty).
        #[arg(long, value_name = "DIR")]
        out: PathBuf,
        /// The results' license: an SPDX identifier (CC-BY-4.0) or a URL.
        #[arg(long)]
        license: Option<String>,
        /// An author of the results, as the paper names them (repeatable, in order): BIDS
        /// `Authors` and the crate's `author`.
        #[arg(long = "author", value_name = "NAME")]
        authors: Vec<String>,
    },
    /// Describe a cached result: dims, shape, coords, value summary.
    Inspect {
        /// Pipeline selection and overrides.
        #[command(flatten)]
        target: Target,
        /// The stage.
        stage: String,
    },
    /// Write the simulated demo study.
    Simulate {
        /// Where to write it.
        #[arg(long)]
        out: PathBuf,
        /// Number of simulated participants.
        #[arg(long, default_value_t = 6)]
        subjects: usize,
        /// Seed of the simulation.
        #[arg(long, default_value_t = 1)]
        seed: u64,
    },
    /// Remove cache objects that no manifest of these pipelines refers to.
    Prune {
        /// The pipelines whose manifests are kept.
        #[arg(required = true)]
        pipelines: Vec<PathBuf>,
        /// Only list what would be removed (each object: the op and subject its record names,
        /// its size, its path), then the total.
        #[arg(long)]
        dry_run: bool,
        /// The cache folder (default: `.phasewise/` beside the first pipeline).
        #[arg(long, env = "PHASEWISE_CACHE")]
        cache: Option<PathBuf>,
    },
    /// Write a commented pipeline fitted to a dataset.
    New {
        /// The dataset folder.
        #[arg(long)]
        data: PathBuf,
        /// The pipeline file to write (default: print it).
        #[arg(long)]
        out: Option<PathBuf>,
    },
    /// Write a self-contained HTML report of a run.
    Report {
        /// The pipeline.
        pipeline: PathBuf,
        /// The HTML file to write.
        #[arg(long)]
        out: Option<PathBuf>,
    },
    /// Send a study to a Slurm cluster: one array task per stale subject, then the group job.
    Submit(Submit),
    /// Show each subject's state of a submitted study (pending, running, done, failed, ...).
    Status {
        /// The pipeline file.
        pipeline: PathBuf,
        /// Override a param: STAGE.PARAM=VALUE (as given to `submit`).
        #[arg(long = "set", value_name = "STAGE.PARAM=VALUE")]
        set: Vec<String>,
        /// The cache folder (default: `.phasewise/` beside the pipeline file).
        #[arg(long, env = "PHASEWISE_CACHE")]
        cache: Option<PathBuf>,
    },
    /// Print a completion script for a shell (e.g. `phasewise completions bash > phasewise.bash`).
    Completions {
        /// The shell.
        shell: clap_complete::Shell,
    },
    /// Print the JSON Schema of the pipeline file, for editors that check YAML as it is typed.
    Schema,
    /// Run the pipeline once per variant of some params (a grid of `--vary` lists), each into
    /// `<output>/variants/<name>/`, sharing one cache; line up their group results in
    /// `<output>/sweep.tsv` (README, "Does it hold with other parameters?").
    Sweep {
        /// Pipeline, `--set` overrides that every variant shares, and cache.
        #[command(flatten)]
        target: Target,
        /// A param and its alternative values, as a YAML list: STAGE.PARAM=[V1, V2, ...]
        /// (repeatable: several combine as a grid).
        #[arg(
            long = "vary",
            value_name = "STAGE.PARAM=[V1, V2, ...]",
            required = true
        )]
        vary: Vec<String>,
        /// Number of threads, at least 1 (default: all cores).
        #[arg(long, short = 'j', value_parser = at_least_one)]
        jobs: Option<usize>,
        /// Run even when the disk looks too small for what a variant writes.
        #[arg(long)]
        skip_room_check: bool,
    },
}

/// A pipeline with its overrides, subject selection and cache.
#[derive(Args, Debug)]
pub struct Target {
    /// The pipeline file.
    pub pipeline: PathBuf,
    /// Override a param: STAGE.PARAM=VALUE (VALUE is YAML, e.g. `norm.window=[-0.4,-0.1]`).
    #[arg(long = "set", value_name = "STAGE.PARAM=VALUE")]
    pub set: Vec<String>,
    /// Only this subject (repeatable); group stages are skipped. `inspect` describes the
    /// stage's result of each subject given.
    #[arg(long = "subject", value_name = "ID")]
    pub subjects: Vec<String>,
    /// The cache folder (default: `.phasewise/` beside the pipeline file).
    #[arg(long, env = "PHASEWISE_CACHE")]
    pub cache: Option<PathBuf>,
}

/// `phasewise submit`'s arguments (DESIGN §7, §8).
#[derive(Args, Debug)]
pub struct Submit {
    /// The pipeline file.
    pub pipeline: PathBuf,
    /// Override a param: STAGE.PARAM=VALUE, passed on to every job.
    #[arg(long = "set", value_name = "STAGE.PARAM=VALUE")]
    pub set: Vec<String>,
    /// The cache folder, on a filesystem every node shares (default: `.phasewise/` beside the
    /// pipeline file).
    #[arg(long, env = "PHASEWISE_CACHE")]
    pub cache: Option<PathBuf>,
    /// Slurm partition (sbatch --partition).
    #[arg(long)]
    pub partition: Option<String>,
    /// Slurm account (sbatch --account).
    #[arg(long)]
    pub account: Option<String>,
    /// Time limit of each job, as sbatch takes it (e.g. 2:00:00).
    #[arg(long)]
    pub time: Option<String>,
    /// Memory of each job, as sbatch takes it (e.g. 8G).
    #[arg(long)]
    pub mem: Option<String>,
    /// CPUs of each job (sbatch --cpus-per-task); each task runs with as many threads.
    #[arg(long, value_parser = at_least_one)]
    pub cpus: Option<usize>,
    /// At most K subjects at once.
    #[arg(long, value_name = "K", value_parser = at_least_one)]
    pub max_parallel: Option<usize>,
    /// One more sbatch option for every job, verbatim (repeatable), e.g. `--sbatch-arg=--qos=short`.
    #[arg(long = "sbatch-arg", value_name = "ARG", allow_hyphen_values = true)]
    pub sbatch_args: Vec<String>,
    /// Submit even when the cache's disk looks too small for what the study writes (every job
    /// then runs with `--skip-room-check` too).
    #[arg(long)]
    pub skip_room_check: bool,
    /// Write the job scripts and print the sbatch commands; submit nothing.
    #[arg(long)]
    pub dry_run: bool,
    /// Wait until the group job ends; exit 1 naming each subject that failed.
    #[arg(long, conflicts_with = "dry_run")]
    pub wait: bool,
}

/// A count of at least 1 (`--jobs`, `--cpus`, `--max-parallel`).
fn at_least_one(text: &str) -> std::result::Result<usize, String> {
    match text.trim().parse::<usize>() {
        Ok(0) => Err("expected at least 1, found 0".into()),
        Ok(n) => Ok(n),
        Err(_) => Err(format!(
            "expected a whole number, at least 1; found `{text}`"
        )),
    }
}

/// An error with the exit status it calls for.
#[derive(Debug, thiserror::Error)]
#[error("{message}")]
struct Exit {
    code: i32,
    message: String,
}

/// Parse arguments, run, and return the exit status.
pub fn main() -> i32 {
    let cli = match Cli::try_parse() {
        Ok(cli) => cli,
        Err(e) => {
            let _ = e.print();
            return if e.use_stderr() { 2 } else { 0 };
        }
    };
    init_logging(cli.verbose, cli.quiet);
    match dispatch(&cli) {
        Ok(code) => code,
        Err(e) => {
            eprintln!("error: {e:#}");
            e.downcast_ref::<Exit>().map_or(1, |x| x.code)
        }
    }
}

fn init_logging(verbose: u8, quiet: bool) {
    let level = match (quiet, verbose) {
        (true, _) => "error",
        (false, 0) => "warn",
        (false, 1) => "info",
        (false, 2) => "debug",
        _ => "trace",
    };
    let filter = tracing_subscriber::EnvFilter::try_from_default_env()
        .unwrap_or_else(|_| tracing_subscriber::EnvFilter::new(level));
    // Colours only on a terminal, so a log redirected to a file holds no escape codes, and not
    // when NO_COLOR is set (https://no-color.org: any non-empty value).
    let no_color = std::env::var_os("NO_COLOR").is_some_and(|v| !v.is_empty());
    let _ = tracing_subscriber::fmt()
        .with_env_filter(filter)
        .with_writer(std::io::stderr)
        .with_ansi(std::io::stderr().is_terminal() && !no_color)
        .try_init();
}

fn run_error(e: RunError) -> anyhow::Error {
    anyhow!(Exit {
        code: e.exit_code(),
        message: e.to_string(),
    })
}

fn options(target: &Target, jobs: Option<usize>, quiet: bool) -> Options {
    Options {
        skip_room_check: false,
        overrides: target.set.clone(),
        subjects: target.subjects.clone(),
        cache: target.cache.clone(),
        jobs,
        output: None,
        progress: !quiet,
        data: None,
    }
}

fn dispatch(cli: &Cli) -> Result<i32> {
    let ops = phasewise_stages::registry::all();
    let env = Env {
        ops: &ops,
        reader: &RecordingReader,
    };
    match &cli.command {
        Command::Run {
            target,
            jobs,
            merge_parts,
            skip_room_check,
        } => {
            let options = Options {
                skip_room_check: *skip_room_check,
                ..options(target, *jobs, cli.quiet)
            };
            run(target, &options, *merge_parts, cli.quiet, env)
        }
        Command::Submit(args) => submit(args, cli.quiet, env),
        Command::Status {
            pipeline,
            set,
            cache,
        } => status(pipeline, set, cache.as_deref(), env),
        Command::Plan { target, json } => plan(target, *json, env),
        Command::Verify { manifest, data } => verify(manifest, data.as_deref(), cli.quiet, env),
        Command::Inspect { target, stage } => inspect(target, stage, env),
        Command::Archive {
            manifest,
            out,
            license,
            authors,
        } => {
            let done = crate::archive::archive(manifest, out, license.as_deref(), authors)
                .map_err(|e| {
                    anyhow!(Exit {
                        code: 2,
                        message: e.to_string(),
                    })
                })?;
            if !done.unchecked.is_empty() {
                eprintln!(
                    "warning: {} records no hash of the sidecars and tables (written by an \
                     older phasewise), so these were copied into the bundle unchecked (the \
                     arrays were checked): {}; run the pipeline again and archive its new \
                     manifest to have them checked",
                    manifest.display(),
                    done.unchecked.join(", ")
                );
            }
            if !cli.quiet {
                println!("{}: bundle of {} files", out.display(), done.files);
            }
            Ok(0)
        }
        Command::Simulate {
            out,
            subjects,
            seed,
        } => simulate(out, *subjects, *seed, cli.quiet),
        Command::Prune {
            pipelines,
            dry_run,
            cache,
        } => prune(pipelines, *dry_run, cache.as_deref(), cli.quiet, env),
        Command::New { data, out } => {
            crate::scaffold::run(data, out.as_deref(), cli.quiet)?;
            Ok(0)
        }
        Command::Report { pipeline, out } => report(pipeline, out.as_deref(), cli.quiet, env),
        Command::Completions { shell } => {
            let mut command = <Cli as clap::CommandFactory>::command();
            clap_complete::generate(*shell, &mut command, "phasewise", &mut std::io::stdout());
            Ok(0)
        }
        Command::Sweep {
            target,
            vary,
            jobs,
            skip_room_check,
        } => {
            let options = Options {
                skip_room_check: *skip_room_check,
                ..options(target, *jobs, cli.quiet)
            };
            sweep(target, vary, &options, cli.quiet, env)
        }
        Command::Schema => {
            let schema = crate::schema::pipeline(env.ops);
            println!("{}", serde_json::to_string_pretty(&schema)?);
            Ok(0)
        }
    }
}

fn run(
    target: &Target,
    options: &Options,
    merge_parts: bool,
    quiet: bool,
    env: Env<'_>,
) -> Result<i32> {
    let summary = session::run(&target.pipeline, options, env).map_err(run_error)?;
    if merge_parts {
        crate::cluster::merge_parts(&summary.manifest_path, summary.manifest.clone())
            .map_err(|e| anyhow!("merging the manifest parts: {e}"))?;
    }
    if !quiet {
        println!(
            "{}: {} computed, {} cached; {}; manifest {}",
            count(summary.computed + summary.cached, "unit", "units"),
            summary.computed,
            summary.cached,
            count(summary.outputs, "output", "outputs"),
            summary.manifest_path.display()
        );
    }
    if summary.report && summary.manifest_path.file_name() == Some("manifest.json".as_ref()) {
        let output = summary.manifest_path.parent().unwrap_or(Path::new("."));
        let options = crate::pipeline::load(&target.pipeline, &target.set, env.ops)
            .map(|p| crate::report::spec::options_for(&p))
            .unwrap_or_default();
        write_report(output, None, &options, quiet)?;
    }
    // `-q`: warnings stay in the manifest only.
    if !quiet && !summary.warnings.is_empty() {
        eprintln!("{}:", count(summary.warnings.len(), "warning", "warnings"));
        for w in &summary.warnings {
            eprintln!(
                "  {} ({}): {}",
                w.stage,
                subject_label(w.subject.as_deref()),
                w.message
            );
        }
    }
    Ok(0)
}

/// `phasewise report PIPELINE`: the HTML report of the pipeline's last complete run.
fn report(pipeline: &Path, out: Option<&Path>, quiet: bool, env: Env<'_>) -> Result<i32> {
    let resolved = crate::pipeline::load(pipeline, &[], env.ops)
        .map_err(|e| run_error(RunError::Pipeline(e)))?;
    let options = crate::report::spec::options_for(&resolved);
    write_report(&crate::paths::clean(&resolved.output), out, &options, quiet)?;
    Ok(0)
}

/// Render the report of the run whose outputs are in `output` (default `<output>/report.html`).
fn write_report(
    output: &Path,
    out: Option<&Path>,
    options: &crate::report::ReportOptions,
    quiet: bool,
) -> Result<()> {
    let file = out.map_or_else(|| output.join("report.html"), Path::to_path_buf);
    let summary = crate::report::write_report(output, &file, options).map_err(|e| {
        anyhow!(Exit {
            code: 2,
            message: e.to_string(),
        })
    })?;
    if !quiet {
        println!(
            "report {}: {} (SVG and PNG in {})",
            summary.html.display(),
            count(summary.figures.len(), "figure", "figures"),
            summary.figures_dir.display()
        );
    }
    Ok(())
}

fn plan(target: &Target, json: bool, env: Env<'_>) -> Result<i32> {
    let (study, plan, recipes) =
        session::plan(&target.pipeline, &options(target, None, true), env).map_err(run_error)?;
    let room = crate::room::Room::assess(&study, &plan, &recipes);
    if json {
        let mut value = plan.to_json(&recipes);
        value["room"] = serde_json::to_value(&room)?;
        println!("{}", serde_json::to_string_pretty(&value)?);
        return Ok(0);
    }
    for ((u, line), recipe) in plan.units.iter().enumerate().zip(&recipes) {
        let who = study.subject(u).unwrap_or("group");
        match &line.status {
            Status::Fresh => println!("fresh  {} [{who}]", line.stage),
            Status::Stale(_) => println!(
                "stale  {} [{who}]: {}; runs {recipe}",
                line.stage,
                line.status_line()
            ),
        }
    }
    println!(
        "{} of {} stale",
        plan.stale_count(),
        count(plan.units.len(), "unit", "units")
    );
    for disk in &room.disks {
        if disk.at_most > 0 {
            println!("the run {disk}");
        }
    }
    if let Err(e) = room.check() {
        println!("{e}");
    }
    Ok(0)
}

fn verify(manifest: &Path, data: Option<&Path>, quiet: bool, env: Env<'_>) -> Result<i32> {
    let report = crate::verify::verify_with(manifest, data, env).map_err(|e| {
        anyhow!(Exit {
            code: 2,
            message: e.to_string(),
        })
    })?;
    // `-q`: a study that reproduces prints nothing; one that does not prints every line.
    if quiet && report.reproduced() {
        return Ok(0);
    }
    for line in report.lines() {
        println!("{line}");
    }
    if report.reproduced() {
        match report.not_hashed() {
            0 => println!("verified: every output is bit-identical"),
            n => println!(
                "verified: every hashed output is bit-identical; {} had no hash and {} \
                 checked through the outputs {}",
                count(n, "streamed output", "streamed outputs"),
                if n == 1 { "is" } else { "are" },
                if n == 1 { "it feeds" } else { "they feed" }
            ),
        }
        Ok(0)
    } else {
        println!("not reproduced");
        Ok(1)
    }
}

fn inspect(target: &Target, stage: &str, env: Env<'_>) -> Result<i32> {
    let mut opts = options(target, None, true);
    let subjects: Vec<String> = opts
        .subjects
        .iter()
        .map(|s| s.strip_prefix("sub-").unwrap_or(s).to_string())
        .collect();
    // Inspecting one subject of a group pipeline still needs all subjects' units.
    opts.subjects.clear();
    let study = session::open(&target.pipeline, &opts, env).map_err(run_error)?;
    let asked: Vec<Option<&str>> = if subjects.is_empty() {
        vec![None]
    } else {
        subjects.iter().map(|s| Some(s.as_str())).collect()
    };
    // Each subject asked for, in order, once; a group stage's one result is shown once.
    let mut texts: Vec<String> = Vec::new();
    for subject in asked {
        let text = crate::inspect::inspect(&study, stage, subject).map_err(|e| {
            anyhow!(Exit {
                code: e.exit_code(),
                message: e.to_string(),
            })
        })?;
        if !texts.contains(&text) {
            texts.push(text);
        }
    }
    print!("{}", texts.join("\n"));
    Ok(0)
}

fn simulate(out: &Path, subjects: usize, seed: u64, quiet: bool) -> Result<i32> {
    let config = phasewise_stages::simulate::SimulateConfig::new(subjects, seed);
    phasewise_stages::simulate::write_study(out, &config)
        .with_context(|| format!("simulating into {}", out.display()))?;
    if !quiet {
        println!(
            "wrote a simulated study of {subjects} subjects to {}",
            out.display()
        );
    }
    Ok(0)
}

fn prune(
    pipelines: &[PathBuf],
    dry_run: bool,
    cache: Option<&Path>,
    quiet: bool,
    env: Env<'_>,
) -> Result<i32> {
    let mut outputs = Vec::new();
    let mut store_root = cache.map(Path::to_path_buf);
    for file in pipelines {
        let p = crate::pipeline::load(file, &[], env.ops).map_err(|e| run_error(e.into()))?;
        store_root.get_or_insert_with(|| session::cache_dir(&p, None));
        outputs.push(p.output.clone());
    }
    let store = crate::store::Store::new(store_root.unwrap_or_default());
    let keep = crate::prune::referenced_keys(&outputs).map_err(|e| anyhow!(e))?;
    let report = crate::prune::prune(&store, &keep, dry_run);
    if dry_run {
        for object in &report.objects {
            let what = match &object.made_by {
                Some((op, subject)) => {
                    format!("op {op}, {}", subject_label(subject.as_deref()))
                }
                None if object
                    .path
                    .file_name()
                    .is_some_and(|n| n.to_string_lossy().starts_with(crate::fsio::TEMP_PREFIX)) =>
                {
                    "left-over temporary file".to_string()
                }
                None => "object with no readable record".to_string(),
            };
            println!(
                "{what}: {} {}",
                crate::words::bytes(object.bytes),
                object.path.display()
            );
        }
    }
    if !quiet || dry_run {
        let verb = if dry_run { "would remove" } else { "removed" };
        println!(
            "{verb} {} ({}, {}); {} kept",
            count(report.objects.len(), "object", "objects"),
            count(report.removed.len(), "file", "files"),
            crate::words::bytes(report.bytes),
            count(report.kept, "object", "objects")
        );
    }
    Ok(0)
}

fn cluster_error(e: crate::cluster::ClusterError) -> anyhow::Error {
    anyhow!(Exit {
        code: e.exit_code(),
        message: e.to_string(),
    })
}

/// `phasewise submit PIPELINE`.
fn submit(args: &Submit, quiet: bool, env: Env<'_>) -> Result<i32> {
    use crate::cluster::{self, Resources, SubmitOptions, SubmitReport};
    let options = SubmitOptions {
        overrides: args.set.clone(),
        cache: args.cache.clone(),
        resources: Resources {
            partition: args.partition.clone(),
            account: args.account.clone(),
            time: args.time.clone(),
            mem: args.mem.clone(),
            cpus: args.cpus,
            max_parallel: args.max_parallel,
            extra: args.sbatch_args.clone(),
        },
        dry_run: args.dry_run,
        skip_room_check: args.skip_room_check,
    };
    let mut warn = |w: &str| {
        if !quiet {
            eprintln!("warning: {w}");
        }
    };
    let report =
        cluster::submit(&args.pipeline, &options, env, &mut warn).map_err(cluster_error)?;
    let (submitted, jobs) = match report {
        SubmitReport::NothingStale { units } => {
            if !quiet {
                println!(
                    "nothing to submit: all {} are fresh",
                    count(units, "unit", "units")
                );
            }
            return Ok(0);
        }
        SubmitReport::DryRun {
            commands,
            subjects,
            jobs,
        } => {
            println!(
                "dry run: job scripts written to {}; {} would run ({})",
                jobs.display(),
                count(subjects.len(), "subject", "subjects"),
                subjects.join(", ")
            );
            for c in commands {
                println!("{c}");
            }
            return Ok(0);
        }
        SubmitReport::Submitted { submitted, jobs } => (submitted, jobs),
    };
    if !quiet {
        match &submitted.array {
            Some(array) => println!(
                "submitted array job {array} ({}: {}) and group job {} (after it); scripts and logs in {}",
                count(submitted.subjects.len(), "subject", "subjects"),
                submitted.subjects.join(", "),
                submitted.group,
                jobs.display()
            ),
            None => println!(
                "every subject is fresh; submitted group job {}; scripts and logs in {}",
                submitted.group,
                jobs.display()
            ),
        }
    }
    if !args.wait {
        return Ok(0);
    }
    let done = cluster::wait(&submitted, &jobs, std::time::Duration::from_secs(2))
        .map_err(cluster_error)?;
    for (subject, state, log) in &done.failed {
        eprintln!("subject {subject} {} (log {})", state.word(), log.display());
    }
    if done.success() {
        if !quiet {
            println!(
                "every job succeeded; group job log {}",
                done.group_log.display()
            );
        }
        Ok(0)
    } else {
        if done.failed.is_empty() {
            eprintln!(
                "the group job {} {} (log {})",
                submitted.group,
                done.group.word(),
                done.group_log.display()
            );
        } else {
            eprintln!(
                "{} failed; the group job {} did not run ({})",
                count(done.failed.len(), "subject", "subjects"),
                submitted.group,
                done.group.word()
            );
        }
        Ok(1)
    }
}

/// `phasewise status PIPELINE`.
fn status(pipeline: &Path, set: &[String], cache: Option<&Path>, env: Env<'_>) -> Result<i32> {
    let lines = crate::cluster::status(pipeline, set, cache, env).map_err(cluster_error)?;
    for line in lines {
        let who = line.subject.as_deref().unwrap_or("group");
        let mut text = format!("{who:<12} {:<10}", line.state.word());
        if let Some(job) = &line.job {
            text.push_str(&format!(" job {job}"));
        }
        if let Some(log) = &line.log {
            text.push_str(&format!(" log {}", log.display()));
        }
        println!("{}", text.trim_end());
    }
    Ok(0)
}

/// `phasewise sweep PIPELINE --vary ...`.
fn sweep(
    target: &Target,
    vary: &[String],
    options: &Options,
    quiet: bool,
    env: Env<'_>,
) -> Result<i32> {
    if !target.subjects.is_empty() {
        return Err(anyhow!(Exit {
            code: 2,
            message: "sweep runs every subject (its table lines up group results): drop --subject"
                .into(),
        }));
    }
    let summary = crate::sweep::sweep(&target.pipeline, options, vary, env).map_err(|e| {
        anyhow!(Exit {
            code: e.exit_code(),
            message: e.to_string(),
        })
    })?;
    if !quiet {
        for (variant, run) in &summary.runs {
            println!(
                "{}: {} computed, {} cached; manifest {}",
                variant.name,
                run.computed,
                run.cached,
                run.manifest_path.display()
            );
        }
        println!(
            "{}: {} across {}",
            summary.table.display(),
            count(summary.rows, "row", "rows"),
            count(summary.runs.len(), "variant", "variants")
        );
    }
    Ok(0)
}
