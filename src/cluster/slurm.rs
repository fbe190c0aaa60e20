//! The Slurm commands a submission uses: `sbatch --parsable` to submit, `squeue` (and `sacct`
//! where accounting runs) for job states, `scancel` to take back a half-made submission. Each is
//! run as a program with an argument list — never through a shell.

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use std::process::Command;

use super::ClusterError;

/// A job's or array task's state, as `status` shows it.
#[derive(Clone, Copy, Debug, PartialEq, Eq, PartialOrd, Ord)]
pub enum State {
    /// Waiting to start.
    Pending,
    /// Running (or finishing).
    Running,
    /// Ended successfully.
    Done,
    /// Ended with an error (failed, timed out, out of memory, node failure...).
    Failed,
    /// Cancelled (by a user, or because a job it depended on failed).
    Cancelled,
}

impl State {
    /// The state of a Slurm state name (`squeue %T`, `sacct State`, e.g. `CANCELLED by 0`).
    pub fn from_slurm(name: &str) -> State {
        let name = name.split_whitespace().next().unwrap_or_default();
        match name {
            "PENDING" | "REQUEUED" | "REQUEUE_HOLD" | "REQUEUE_FED" | "RESV_DEL_HOLD" => {
                State::Pending
            }
            "RUNNING" | "CONFIGURING" | "COMPLETING" | "SUSPENDED" | "STOPPED" | "SIGNALING"
            | "STAGE_OUT" | "RESIZING" => State::Running,
            "COMPLETED" => State::Done,
            "CANCELLED" => State::Cancelled,
            _ => State::Failed,
        }
    }

    /// True once the job will not change any more.
    pub fn ended(self) -> bool {
        matches!(self, State::Done | State::Failed | State::Cancelled)
    }

    /// The word `status` prints.
    pub fn word(self) -> &'static str {
        match self {
            State::Pending => "pending",
            State::Running => "running",
            State::Done => "done",
            State::Failed => "failed",
            State::Cancelled => "cancelled",
        }
    }
}

/// `program` found in a folder of `PATH`.
pub fn on_path(program: &str) -> Option<PathBuf> {
    std::env::var_os("PATH").and_then(|path| {
        std::env::split_paths(&path)
            .map(|dir| dir.join(program))
            .find(|p| p.is_file())
    })
}

/// Run `sbatch --parsable ARGS`; the job id it prints.
pub fn sbatch(args: &[String]) -> Result<String, ClusterError> {
    let out = Command::new("sbatch")
        .arg("--parsable")
        .args(args)
        .output()
        .map_err(|e| ClusterError::Scheduler(format!("cannot run sbatch: {e}")))?;
    let stdout = String::from_utf8_lossy(&out.stdout);
    // `--parsable` prints `id` or `id;cluster`.
    let id = stdout
        .trim()
        .split(';')
        .next()
        .unwrap_or_default()
        .to_string();
    if !out.status.success() || id.is_empty() || !id.chars().all(|c| c.is_ascii_digit()) {
        return Err(ClusterError::Sbatch {
            command: format!("sbatch --parsable {}", args.join(" ")),
            message: String::from_utf8_lossy(&out.stderr).trim().to_string(),
        });
    }
    Ok(id)
}

/// `scancel JOB` (best effort: used to take back a submission that could not be completed).
pub fn scancel(job: &str) {
    let _ = Command::new("scancel").arg(job).output();
}

/// The states Slurm knows of `jobs` (job ids), array tasks one by one (`<array>_<task>`):
/// from `squeue` (which remembers ended jobs for a few minutes, `MinJobAge`), then `sacct` for
/// what squeue has forgotten, where accounting runs. Jobs neither knows are absent.
pub fn states(jobs: &[&str]) -> BTreeMap<String, State> {
    let mut found = BTreeMap::new();
    if jobs.is_empty() {
        return found;
    }
    let list = jobs.join(",");
    if let Some(text) = query(
        "squeue",
        &["-h", "-r", "--states=all", "-o", "%i|%T", "-j", &list],
    ) {
        found.extend(parse_lines(&text));
    }
    if let Some(text) = query(
        "sacct",
        &["-n", "-P", "-X", "-o", "JobID,State", "-j", &list],
    ) {
        for (id, state) in parse_lines(&text) {
            found.entry(id).or_insert(state);
        }
    }
    found
}

fn query(program: &str, args: &[&str]) -> Option<String> {
    on_path(program)?;
    let out = Command::new(program).args(args).output().ok()?;
    out.status
        .success()
        .then(|| String::from_utf8_lossy(&out.stdout).into_owned())
}

/// `id|STATE` lines; ids such as `12_[3-5]` (pending tasks not yet split) are expanded.
fn parse_lines(text: &str) -> Vec<(String, State)> {
    let mut out = Vec::new();
    for line in text.lines() {
        let Some((id, state)) = line.trim().split_once('|') else {
            continue;
        };
        let state = State::from_slurm(state);
        for id in expand(id) {
            out.push((id, state));
        }
    }
    out
}

/// `12_[0-2,5%4]` → `12_0`, `12_1`, `12_2`, `12_5`; other ids as they are.
fn expand(id: &str) -> Vec<String> {
    let Some((job, rest)) = id.split_once("_[") else {
        return vec![id.to_string()];
    };
    let ranges = rest.trim_end_matches(']');
    let ranges = ranges.split('%').next().unwrap_or_default();
    let mut out = Vec::new();
    for range in ranges.split(',') {
        let (a, b) = range.split_once('-').unwrap_or((range, range));
        if let (Ok(a), Ok(b)) = (a.parse::<usize>(), b.parse::<usize>()) {
            out.extend((a..=b).map(|t| format!("{job}_{t}")));
        }
    }
    out
}

/// The log Slurm writes for array task `task` of `array` under the submission's log pattern.
pub fn task_log(logs: &Path, array: &str, task: usize) -> PathBuf {
    logs.join(format!("subject-{array}_{task}.out"))
}

/// The log of the group job.
pub fn group_log(logs: &Path, group: &str) -> PathBuf {
    logs.join(format!("group-{group}.out"))
}

/// Slurm's `--output` pattern for a file in `logs` named `name` (`%` in the folder doubled:
/// sbatch reads `%%` as one `%`).
pub fn log_pattern(logs: &Path, name: &str) -> String {
    format!("{}/{name}", logs.to_string_lossy().replace('%', "%%"))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn slurm_state_names_map_to_states() {
        // Names from the squeue(1) "JOB STATE CODES" section of Slurm's documentation.
        assert_eq!(State::from_slurm("PENDING"), State::Pending);
        assert_eq!(State::from_slurm("COMPLETING"), State::Running);
        assert_eq!(State::from_slurm("COMPLETED"), State::Done);
        assert_eq!(State::from_slurm("CANCELLED by 0"), State::Cancelled);
        for failed in ["FAILED", "TIMEOUT", "OUT_OF_MEMORY", "NODE_FAIL"] {
            assert_eq!(State::from_slurm(failed), State::Failed);
        }
    }

    #[test]
    fn pending_task_ranges_are_expanded() {
        assert_eq!(expand("7_[0-2,5%4]"), ["7_0", "7_1", "7_2", "7_5"]);
        assert_eq!(expand("7_3"), ["7_3"]);
        assert_eq!(expand("8"), ["8"]);
    }
}
