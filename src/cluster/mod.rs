//! A study on a Slurm cluster (DESIGN §8): `phasewise submit` and `phasewise status`.
//!
//! Submission is planning plus two `sbatch` calls; nothing runs here. The plan (the same one
//! `phasewise plan` prints) says which subjects have a stale unit; they become the tasks of one
//! job array, each task running `phasewise run PIPELINE --subject ID` on a node, all sharing one
//! cache. The group job (`--dependency=afterok:<array>`, `--kill-on-invalid-dep=yes`) runs the
//! whole pipeline once every task succeeded — the subjects' units are then found cached — so it
//! computes the group stages and merges the subjects' manifest parts into `manifest.json`
//! (`run --merge-parts`, [`crate::manifest::merge_with_parts`]).
//!
//! Files, all in `<output>/jobs/`: `subjects.txt` (the list; task i takes line i+1),
//! `subjects.sh` and `group.sh` (the job scripts, [`script`]), `logs/` (Slurm's output files),
//! `submitted.json` (the job ids of the last submission, read by `status` and `--wait`).
//!
//! The scheduler is reached only through its commands ([`slurm`]), so whatever runs on a
//! cluster is what `sbatch`, `squeue` and `sacct` say.

pub mod script;
pub mod slurm;

use std::collections::BTreeSet;
use std::path::{Path, PathBuf};
use std::time::Duration;

use serde::{Deserialize, Serialize};

use crate::fsio::atomic_write;
use crate::paths::clean;
use crate::plan::Status;
use crate::room::Room;
use crate::session::{self, Env, Options};
use crate::study::{RunError, Study};
use slurm::State;

/// What can stop a submission or a status query.
#[derive(Debug, thiserror::Error)]
pub enum ClusterError {
    /// The pipeline or its data are wrong (as `run` reports them).
    #[error(transparent)]
    Pipeline(#[from] RunError),
    /// `sbatch` is not on `PATH`.
    #[error("sbatch was not found on PATH: submit runs on a machine with Slurm's commands (a login node); `--dry-run` writes the job scripts without it")]
    NoSbatch,
    /// sbatch refused a job; its own message.
    #[error("sbatch refused the job; nothing was submitted\n  {command}\n  {message}")]
    Sbatch {
        /// The command.
        command: String,
        /// sbatch's standard error.
        message: String,
    },
    /// A file or folder of the submission cannot be written or read.
    #[error("{}: {message}", path.display())]
    Io {
        /// The file or folder.
        path: PathBuf,
        /// What went wrong.
        message: String,
    },
    /// An option value that cannot be used.
    #[error("{option}: {why}")]
    BadValue {
        /// The option as given.
        option: String,
        /// Why not.
        why: String,
    },
    /// The last submission still has jobs in the queue.
    #[error("the last submission of this study is still in the queue (jobs {jobs}); wait for it (`phasewise status`) or cancel it with scancel before submitting again")]
    Busy {
        /// Its job ids.
        jobs: String,
    },
    /// The scheduler could not be asked.
    #[error("{0}")]
    Scheduler(String),
}

impl ClusterError {
    /// The exit status (DESIGN §7): 2 for what the user must fix before anything can run.
    pub fn exit_code(&self) -> i32 {
        match self {
            ClusterError::Pipeline(e) => e.exit_code(),
            ClusterError::Scheduler(_) => 1,
            _ => 2,
        }
    }
}

/// Resources of every job of a submission, each an sbatch option.
#[derive(Clone, Debug, Default)]
pub struct Resources {
    /// `--partition`.
    pub partition: Option<String>,
    /// `--account`.
    pub account: Option<String>,
    /// `--time`.
    pub time: Option<String>,
    /// `--mem`.
    pub mem: Option<String>,
    /// `--cpus-per-task`; also each task's `--jobs`.
    pub cpus: Option<usize>,
    /// At most this many array tasks at once (`--array=…%K`).
    pub max_parallel: Option<usize>,
    /// Further sbatch options, verbatim.
    pub extra: Vec<String>,
}

/// `phasewise submit`'s options.
#[derive(Clone, Debug, Default)]
pub struct SubmitOptions {
    /// `--set` arguments, passed on to every job.
    pub overrides: Vec<String>,
    /// `--cache`.
    pub cache: Option<PathBuf>,
    /// Resources.
    pub resources: Resources,
    /// Write the scripts and print the commands only.
    pub dry_run: bool,
    /// `--skip-room-check`, passed on to every job.
    pub skip_room_check: bool,
}

/// The job ids of a submission, kept in `<output>/jobs/submitted.json`.
#[derive(Clone, Debug, PartialEq, Eq, Serialize, Deserialize)]
pub struct Submitted {
    /// The array job (`None` when only the group job was needed).
    pub array: Option<String>,
    /// The group job.
    pub group: String,
    /// The subjects, in task order.
    pub subjects: Vec<String>,
    /// When (RFC 3339).
    pub submitted: String,
}

/// What `submit` did.
#[derive(Clone, Debug)]
pub enum SubmitReport {
    /// Every unit is fresh: nothing submitted.
    NothingStale {
        /// Number of units.
        units: usize,
    },
    /// The scripts were written and the commands printed (`--dry-run`).
    DryRun {
        /// The sbatch commands, as a shell would take them.
        commands: Vec<String>,
        /// The subjects that would run.
        subjects: Vec<String>,
        /// The jobs folder.
        jobs: PathBuf,
    },
    /// Submitted.
    Submitted {
        /// The job ids.
        submitted: Submitted,
        /// The jobs folder.
        jobs: PathBuf,
    },
}

/// The folders and files of a study's submissions.
#[derive(Clone, Debug)]
pub struct JobFiles {
    /// `<output>/jobs`.
    pub dir: PathBuf,
    /// `<output>/jobs/logs`.
    pub logs: PathBuf,
}

impl JobFiles {
    fn new(output: &Path) -> JobFiles {
        let dir = output.join("jobs");
        JobFiles {
            logs: dir.join("logs"),
            dir,
        }
    }
    fn list(&self) -> PathBuf {
        self.dir.join("subjects.txt")
    }
    fn array_script(&self) -> PathBuf {
        self.dir.join("subjects.sh")
    }
    fn group_script(&self) -> PathBuf {
        self.dir.join("group.sh")
    }
    fn record(&self) -> PathBuf {
        self.dir.join("submitted.json")
    }

    /// The last submission, if one was recorded.
    pub fn last(&self) -> Option<Submitted> {
        let bytes = std::fs::read(self.record()).ok()?;
        serde_json::from_slice(&bytes).ok()
    }

    /// The log of the array task running `subject` in `submitted`.
    pub fn subject_log(&self, submitted: &Submitted, subject: &str) -> Option<PathBuf> {
        let array = submitted.array.as_deref()?;
        let task = submitted.subjects.iter().position(|s| s == subject)?;
        Some(slurm::task_log(&self.logs, array, task))
    }
}

fn absolute(path: &Path) -> PathBuf {
    clean(&std::path::absolute(path).unwrap_or_else(|_| path.to_path_buf()))
}

/// Folders that cluster nodes do not share with the login node (each has its own).
const NODE_LOCAL: [&str; 3] = ["/tmp", "/var/tmp", "/dev/shm"];

/// A warning when `cache` lies in a folder the nodes cannot share.
pub fn cache_warning(cache: &Path) -> Option<String> {
    NODE_LOCAL
        .iter()
        .find(|dir| cache.starts_with(dir))
        .map(|dir| {
            format!(
                "the cache {} is under {dir}, which is local to each machine on most clusters: \
                 the nodes would not share it (give --cache a folder on a shared filesystem)",
                cache.display()
            )
        })
}

fn io_error(path: &Path) -> impl Fn(std::io::Error) -> ClusterError + '_ {
    move |e| ClusterError::Io {
        path: path.to_path_buf(),
        message: e.to_string(),
    }
}

/// The subjects with a stale unit, in the study's order, and whether a group unit is stale.
fn stale_parts(study: &Study, plan: &crate::plan::Plan) -> (Vec<String>, bool) {
    let mut subjects = BTreeSet::new();
    let mut group = false;
    for (u, line) in plan.units.iter().enumerate() {
        if matches!(line.status, Status::Stale(_)) {
            match study.subject(u) {
                Some(s) => {
                    subjects.insert(s.to_string());
                }
                None => group = true,
            }
        }
    }
    let ordered = study
        .sources
        .iter()
        .map(|s| s.subject.clone())
        .filter(|s| subjects.contains(s))
        .collect();
    (ordered, group)
}

/// A job name sbatch and `squeue` show: `phasewise-<pipeline name>` in safe characters.
fn job_name(pipeline_name: &str, suffix: &str) -> String {
    let name: String = pipeline_name
        .chars()
        .map(|c| {
            if c.is_ascii_alphanumeric() || "-_.".contains(c) {
                c
            } else {
                '_'
            }
        })
        .collect();
    format!("phasewise-{name}{suffix}")
}

/// Refuse a submission while the last one still has jobs in the queue: both would share the
/// list file and the cache's units.
fn check_not_busy(files: &JobFiles) -> Result<(), ClusterError> {
    let Some(last) = files.last() else {
        return Ok(());
    };
    let mut ids: Vec<&str> = vec![&last.group];
    ids.extend(last.array.as_deref());
    let states = slurm::states(&ids);
    let waiting: Vec<String> = states
        .iter()
        .filter(|(_, s)| !s.ended())
        .map(|(id, _)| id.clone())
        .collect();
    if waiting.is_empty() {
        Ok(())
    } else {
        Err(ClusterError::Busy {
            jobs: waiting.join(", "),
        })
    }
}

/// `phasewise submit PIPELINE`: plan, write the job scripts, submit them (unless `dry_run`).
/// Warnings (a cache under /tmp) go to `warn` before anything is written.
pub fn submit(
    file: &Path,
    options: &SubmitOptions,
    env: Env<'_>,
    warn: &mut dyn FnMut(&str),
) -> Result<SubmitReport, ClusterError> {
    if let Some(k) = options.resources.max_parallel {
        if k == 0 {
            return Err(ClusterError::BadValue {
                option: "--max-parallel".into(),
                why: "expected at least 1".into(),
            });
        }
    }
    let session_options = Options {
        overrides: options.overrides.clone(),
        cache: options.cache.clone(),
        ..Options::default()
    };
    let (study, plan, recipes) = session::plan(file, &session_options, env)?;
    let (subjects, group_stale) = stale_parts(&study, &plan);
    if subjects.is_empty() && !group_stale {
        return Ok(SubmitReport::NothingStale {
            units: plan.units.len(),
        });
    }
    // The whole study, before its jobs each check their own subject against the same disk.
    if !options.skip_room_check {
        let room = Room::assess(&study, &plan, &recipes);
        if let Some(w) = room.check().map_err(RunError::from)? {
            warn(&w);
        }
    }
    if let Some(bad) = subjects.iter().find(|s| s.contains(['\n', '\r'])) {
        return Err(ClusterError::BadValue {
            option: format!("subject {bad:?}"),
            why: "a subject label with a line break cannot go into the list file".into(),
        });
    }
    let cache = absolute(study.store.root());
    if let Some(w) = cache_warning(&cache) {
        warn(&w);
    }
    if !options.dry_run && slurm::on_path("sbatch").is_none() {
        return Err(ClusterError::NoSbatch);
    }
    let output = absolute(&study.pipeline.output);
    let files = JobFiles::new(&output);
    if !options.dry_run {
        check_not_busy(&files)?;
    }
    std::fs::create_dir_all(&files.logs).map_err(io_error(&files.logs))?;

    let program = std::env::current_exe().map_err(|e| ClusterError::Io {
        path: PathBuf::from("phasewise"),
        message: format!("cannot tell where this program is: {e}"),
    })?;
    let pipeline = absolute(&study.pipeline.file);
    let command = script::Command {
        program: &program,
        pipeline: &pipeline,
        cache: &cache,
        overrides: &options.overrides,
        jobs: options.resources.cpus.unwrap_or(1),
        skip_room_check: options.skip_room_check,
    };
    let sbatch_options = script::sbatch_options(&options.resources);
    let name = &study.pipeline.name;
    let array_text = script::array_script(
        &job_name(name, ""),
        &command,
        &files.list(),
        &sbatch_options,
    )?;
    let group_text = script::group_script(&job_name(name, "-group"), &command, &sbatch_options)?;
    let mut list = subjects.join("\n");
    list.push('\n');
    for (path, text) in [
        (files.list(), list),
        (files.array_script(), array_text),
        (files.group_script(), group_text),
    ] {
        atomic_write(&path, text.as_bytes()).map_err(io_error(&path))?;
    }

    let array_args = (!subjects.is_empty()).then(|| {
        let mut range = format!("--array=0-{}", subjects.len() - 1);
        if let Some(k) = options.resources.max_parallel {
            range.push_str(&format!("%{k}"));
        }
        vec![
            range,
            format!(
                "--output={}",
                slurm::log_pattern(&files.logs, "subject-%A_%a.out")
            ),
            files.array_script().to_string_lossy().into_owned(),
        ]
    });
    let group_args = |array: Option<&str>| {
        let mut args = Vec::new();
        if let Some(id) = array {
            args.push(format!("--dependency=afterok:{id}"));
        }
        args.push(format!(
            "--output={}",
            slurm::log_pattern(&files.logs, "group-%j.out")
        ));
        args.push(files.group_script().to_string_lossy().into_owned());
        args
    };

    if options.dry_run {
        let shell = |args: &[String]| {
            std::iter::once("sbatch --parsable".to_string())
                .chain(args.iter().map(|a| script::quote(a)))
                .collect::<Vec<_>>()
                .join(" ")
        };
        let mut commands = Vec::new();
        if let Some(args) = &array_args {
            commands.push(shell(args));
        }
        commands.push(
            shell(&group_args(array_args.as_ref().map(|_| "ARRAY_JOB_ID")))
                .replace("ARRAY_JOB_ID", "<array job id>"),
        );
        return Ok(SubmitReport::DryRun {
            commands,
            subjects,
            jobs: files.dir,
        });
    }

    let array = array_args.as_deref().map(slurm::sbatch).transpose()?;
    let group = match slurm::sbatch(&group_args(array.as_deref())) {
        Ok(id) => id,
        Err(e) => {
            // Nothing half-submitted: take the array back.
            if let Some(id) = &array {
                slurm::scancel(id);
            }
            return Err(e);
        }
    };
    let submitted = Submitted {
        array,
        group,
        subjects,
        submitted: session::now(),
    };
    let record = serde_json::to_vec_pretty(&submitted).unwrap_or_default();
    atomic_write(&files.record(), &record).map_err(io_error(&files.record()))?;
    Ok(SubmitReport::Submitted {
        submitted,
        jobs: files.dir,
    })
}

/// How a submission ended (`submit --wait`).
#[derive(Clone, Debug)]
pub struct WaitReport {
    /// The group job's state.
    pub group: State,
    /// The group job's log.
    pub group_log: PathBuf,
    /// Each subject that did not succeed: label, state, log.
    pub failed: Vec<(String, State, PathBuf)>,
}

impl WaitReport {
    /// Every task and the group job succeeded.
    pub fn success(&self) -> bool {
        self.group == State::Done && self.failed.is_empty()
    }
}

/// Block until the group job of `submitted` has ended, polling the scheduler every `every`.
pub fn wait(
    submitted: &Submitted,
    jobs: &Path,
    every: Duration,
) -> Result<WaitReport, ClusterError> {
    let files = JobFiles {
        logs: jobs.join("logs"),
        dir: jobs.to_path_buf(),
    };
    let mut unknown_since: Option<std::time::Instant> = None;
    let group = loop {
        let state = slurm::states(&[&submitted.group])
            .get(&submitted.group)
            .copied();
        match state {
            Some(s) if s.ended() => break s,
            Some(_) => unknown_since = None,
            None => {
                // Neither squeue nor sacct knows it (any more): give the controller a moment,
                // then judge by what it left behind.
                let since = *unknown_since.get_or_insert_with(std::time::Instant::now);
                if since.elapsed() > Duration::from_secs(30) {
                    return Err(ClusterError::Scheduler(format!(
                        "the scheduler no longer knows group job {}; see its log {}",
                        submitted.group,
                        slurm::group_log(&files.logs, &submitted.group).display()
                    )));
                }
            }
        }
        std::thread::sleep(every);
    };
    let mut failed = Vec::new();
    if let Some(array) = &submitted.array {
        let states = slurm::states(&[array]);
        for (task, subject) in submitted.subjects.iter().enumerate() {
            let state = states
                .get(&format!("{array}_{task}"))
                .copied()
                .unwrap_or(State::Failed);
            if state != State::Done {
                failed.push((
                    subject.clone(),
                    state,
                    slurm::task_log(&files.logs, array, task),
                ));
            }
        }
    }
    Ok(WaitReport {
        group,
        group_log: slurm::group_log(&files.logs, &submitted.group),
        failed,
    })
}

/// One line of `phasewise status`.
#[derive(Clone, Debug)]
pub struct StatusLine {
    /// The subject, `None` for the group units.
    pub subject: Option<String>,
    /// What is known.
    pub state: StatusState,
    /// The job (array task) of the last submission that ran it.
    pub job: Option<String>,
    /// Its log, when it exists.
    pub log: Option<PathBuf>,
}

/// A subject's (or the group's) state.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum StatusState {
    /// From the scheduler.
    Scheduler(State),
    /// Every unit is fresh in the cache (a manifest part or an earlier run recorded it).
    Done,
    /// Stale and not known to the scheduler: not submitted, or its job is forgotten.
    Stale,
}

impl StatusState {
    /// The word `status` prints.
    pub fn word(self) -> &'static str {
        match self {
            StatusState::Scheduler(s) => s.word(),
            StatusState::Done => "done",
            StatusState::Stale => "stale",
        }
    }
}

/// `phasewise status PIPELINE`: each subject's state and the group's, from the scheduler for
/// the last submission's jobs it still knows, and from the cache and the manifest parts
/// (fresh units) otherwise.
pub fn status(
    file: &Path,
    overrides: &[String],
    cache: Option<&Path>,
    env: Env<'_>,
) -> Result<Vec<StatusLine>, ClusterError> {
    let options = Options {
        overrides: overrides.to_vec(),
        cache: cache.map(Path::to_path_buf),
        ..Options::default()
    };
    let (study, plan, _) = session::plan(file, &options, env)?;
    let output = absolute(&study.pipeline.output);
    let files = JobFiles::new(&output);
    let last = files.last();
    let scheduler = last.as_ref().map(|l| {
        let mut ids: Vec<&str> = vec![&l.group];
        ids.extend(l.array.as_deref());
        slurm::states(&ids)
    });
    let (stale_subjects, group_stale) = stale_parts(&study, &plan);
    let has_group = (0..study.units.len()).any(|u| study.subject(u).is_none());
    let who = study
        .sources
        .iter()
        .map(|s| Some(s.subject.clone()))
        .chain(has_group.then_some(None));
    let mut lines = Vec::new();
    for subject in who {
        let (job, log) = match (&last, &subject) {
            (Some(l), Some(s)) => match (&l.array, l.subjects.iter().position(|x| x == s)) {
                (Some(array), Some(task)) => (
                    Some(format!("{array}_{task}")),
                    Some(slurm::task_log(&files.logs, array, task)),
                ),
                _ => (None, None),
            },
            (Some(l), None) => (
                Some(l.group.clone()),
                Some(slurm::group_log(&files.logs, &l.group)),
            ),
            (None, _) => (None, None),
        };
        let known = job
            .as_ref()
            .and_then(|j| scheduler.as_ref().and_then(|s| s.get(j)).copied());
        let stale = match &subject {
            Some(s) => stale_subjects.contains(s),
            None => group_stale,
        };
        let state = match known {
            Some(s) if !s.ended() || s == State::Done => StatusState::Scheduler(s),
            // A failed or cancelled job is the last word only while the units are stale (a
            // later run may have computed them).
            Some(s) if stale => StatusState::Scheduler(s),
            _ if stale => StatusState::Stale,
            _ => StatusState::Done,
        };
        lines.push(StatusLine {
            subject,
            state,
            job,
            log: log.filter(|p| p.exists()),
        });
    }
    Ok(lines)
}

/// `run --merge-parts`: merge the manifest parts in the output folder into the manifest just
/// written at `manifest_path` (the group job's last step), so that each unit computed by an
/// array task is recorded as that task recorded it, with its host.
pub fn merge_parts(
    manifest_path: &Path,
    current: crate::manifest::Manifest,
) -> Result<(), MergeError> {
    let output = manifest_path.parent().unwrap_or(Path::new("."));
    let merged = crate::manifest::merge_with_parts(current, output)?;
    crate::output::write_atomically(manifest_path, &crate::manifest::to_bytes(&merged))?;
    Ok(())
}

/// Why [`merge_parts`] failed.
#[derive(Debug, thiserror::Error)]
pub enum MergeError {
    /// The parts do not merge.
    #[error(transparent)]
    Manifest(#[from] crate::manifest::ManifestError),
    /// The merged manifest could not be written.
    #[error(transparent)]
    Write(#[from] crate::output::OutputError),
}
