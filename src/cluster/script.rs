//! The job scripts of a submission: plain bash, readable and editable, kept in `<output>/jobs/`.
//!
//! Nothing of the study is pasted into shell code unquoted: paths and `--set` values are single-
//! quoted ([`quote`]), and each array task reads its subject from the list file into a variable
//! that is only ever expanded inside double quotes. A folder, pipeline or subject label holding
//! `;`, `$( )`, quotes or spaces is therefore data, never code. Resource options go into
//! `#SBATCH` lines, which the shell ignores and sbatch reads.

use std::fmt::Write as _;
use std::path::Path;

use super::{ClusterError, Resources};

/// `text` as one single-quoted shell word (`'` written as `'\''`); plain words stay bare.
pub fn quote(text: &str) -> String {
    let plain = !text.is_empty()
        && text
            .chars()
            .all(|c| c.is_ascii_alphanumeric() || "-_./=:+,@%".contains(c));
    if plain {
        text.to_string()
    } else {
        format!("'{}'", text.replace('\'', r"'\''"))
    }
}

/// A path as one quoted shell word.
pub fn quote_path(path: &Path) -> String {
    quote(&path.to_string_lossy())
}

/// What both scripts run.
pub struct Command<'a> {
    /// The phasewise binary the nodes run (this one).
    pub program: &'a Path,
    /// The pipeline file.
    pub pipeline: &'a Path,
    /// The shared cache.
    pub cache: &'a Path,
    /// `--set` arguments.
    pub overrides: &'a [String],
    /// Threads per task (`--jobs`), following `--cpus`.
    pub jobs: usize,
    /// `--skip-room-check`.
    pub skip_room_check: bool,
}

/// The sbatch options both scripts carry, one `#SBATCH` line each.
pub fn sbatch_options(resources: &Resources) -> Vec<String> {
    let mut options = Vec::new();
    let mut add = |name: &str, value: &Option<String>| {
        if let Some(v) = value {
            options.push(format!("--{name}={v}"));
        }
    };
    add("partition", &resources.partition);
    add("account", &resources.account);
    add("time", &resources.time);
    add("mem", &resources.mem);
    if let Some(cpus) = resources.cpus {
        options.push(format!("--cpus-per-task={cpus}"));
    }
    options.extend(resources.extra.iter().cloned());
    options
}

/// One `#SBATCH` line. sbatch splits these lines at white space outside double quotes, so an
/// argument with white space is double-quoted; one with a double quote or a line break cannot
/// be written there and is refused.
fn sbatch_line(option: &str) -> Result<String, ClusterError> {
    if option.contains(['"', '\n', '\r']) {
        return Err(ClusterError::BadValue {
            option: option.to_string(),
            why: "an sbatch option in a job script cannot hold a double quote or a line break"
                .into(),
        });
    }
    if option.contains(char::is_whitespace) {
        Ok(format!("#SBATCH \"{option}\"\n"))
    } else {
        Ok(format!("#SBATCH {option}\n"))
    }
}

fn header(
    out: &mut String,
    about: &str,
    name: &str,
    options: &[String],
) -> Result<(), ClusterError> {
    out.push_str("#!/bin/bash\n");
    for line in about.lines() {
        let _ = writeln!(out, "# {line}");
    }
    out.push_str(&sbatch_line(&format!("--job-name={name}"))?);
    for option in options {
        out.push_str(&sbatch_line(option)?);
    }
    out.push_str("set -eu\n");
    Ok(())
}

fn variables(out: &mut String, command: &Command<'_>) {
    let _ = writeln!(out, "phasewise={}", quote_path(command.program));
    let _ = writeln!(out, "pipeline={}", quote_path(command.pipeline));
}

/// The arguments after `run "$pipeline"` shared by both scripts.
fn run_arguments(command: &Command<'_>) -> String {
    let mut args = format!(
        " {} --jobs={}",
        quote(&format!("--cache={}", command.cache.to_string_lossy())),
        command.jobs
    );
    for set in command.overrides {
        args.push(' ');
        args.push_str(&quote(&format!("--set={set}")));
    }
    if command.skip_room_check {
        args.push_str(" --skip-room-check");
    }
    args
}

/// The array script: task `i` runs the subject on line `i + 1` of `list`.
pub fn array_script(
    name: &str,
    command: &Command<'_>,
    list: &Path,
    options: &[String],
) -> Result<String, ClusterError> {
    let mut out = String::new();
    header(
        &mut out,
        "Written by `phasewise submit`: one array task per subject. Task i runs the subject on\n\
         line i+1 of the list file, so this script serves any resubmission: write the subjects\n\
         to the list and submit with `sbatch --array=0-<lines-1> <this file>`.",
        name,
        options,
    )?;
    variables(&mut out, command);
    let _ = writeln!(out, "list={}", quote_path(list));
    out.push_str(
        "task=${SLURM_ARRAY_TASK_ID:-}\n\
         case $task in\n  \
           ''|*[!0-9]*) echo \"phasewise: SLURM_ARRAY_TASK_ID is '$task', not a task number\" >&2; exit 2 ;;\n\
         esac\n\
         mapfile -t subjects < \"$list\"\n\
         subject=${subjects[task]:-}\n\
         if [ -z \"$subject\" ]; then\n  \
           echo \"phasewise: no subject on line $((task + 1)) of $list\" >&2; exit 2\n\
         fi\n\
         printf 'phasewise: subject %s on %s\\n' \"$subject\" \"$(hostname)\" >&2\n",
    );
    let _ = writeln!(
        out,
        "exec \"$phasewise\" run \"$pipeline\" --subject=\"$subject\"{}",
        run_arguments(command)
    );
    Ok(out)
}

/// The group script: the whole study once every task is done (the subjects are found cached),
/// computing the group stages and merging the manifest parts into `manifest.json`.
pub fn group_script(
    name: &str,
    command: &Command<'_>,
    options: &[String],
) -> Result<String, ClusterError> {
    let mut options = options.to_vec();
    options.push("--kill-on-invalid-dep=yes".into());
    let mut out = String::new();
    header(
        &mut out,
        "Written by `phasewise submit`: the group stages, after every subject task succeeded\n\
         (submitted with --dependency=afterok:<array job>), and one manifest merged from the\n\
         subjects' manifest parts.",
        name,
        &options,
    )?;
    variables(&mut out, command);
    out.push_str("printf 'phasewise: group stages on %s\\n' \"$(hostname)\" >&2\n");
    let _ = writeln!(
        out,
        "exec \"$phasewise\" run \"$pipeline\"{} --merge-parts",
        run_arguments(command)
    );
    Ok(out)
}

#[cfg(test)]
mod tests {
    use super::*;

    /// What bash makes of a quoted word: `printf %s <word>` run by bash itself.
    fn through_bash(word: &str) -> String {
        let out = std::process::Command::new("bash")
            .arg("-c")
            .arg(format!("printf %s {word}"))
            .output()
            .expect("bash runs");
        String::from_utf8(out.stdout).expect("utf-8")
    }

    #[test]
    fn quoted_words_reach_the_program_unchanged() {
        for text in [
            "plain",
            "two words",
            "it's",
            "$(touch /nonexistent-x)",
            "a;b",
            "`x`",
            "\"q\"",
            "",
            "'",
            "back\\slash",
            "new\nline",
        ] {
            assert_eq!(through_bash(&quote(text)), text, "{text:?}");
        }
    }

    #[test]
    fn a_double_quote_or_line_break_in_an_sbatch_line_is_refused() {
        assert!(sbatch_line("--comment=a\"b").is_err());
        assert!(sbatch_line("--comment=a\nb").is_err());
        assert_eq!(
            sbatch_line("--comment=a b").unwrap(),
            "#SBATCH \"--comment=a b\"\n"
        );
    }
}
