//! A study on Slurm (DESIGN §8, issue "Slurm"): `submit`, `status`, the merged manifest, and a
//! cache shared by writers on several hosts.
//!
//! The submitting tests run against a real Slurm (start a one-node one with
//! `../shared/tools/slurm-single-node.sh start`, as root). Without one they print why and pass;
//! with `PHASEWISE_TEST_SLURM=require` (set by `.ci/run`, which starts Slurm) they fail instead.
//! Jobs run the phasewise binary cargo built for these tests.

use std::fs;
use std::path::{Path, PathBuf};
use std::process::{Command, Output};

use serde_json::Value;

use crate::reliability::{
    assert_success, files_under, output_arrays, recording_path, run_cli, stderr_of, tiny_project,
    StudySpec,
};

/// `PHASEWISE_TEST_SLURM=require`: a missing Slurm fails the tests that need it.
const REQUIRE: &str = "PHASEWISE_TEST_SLURM";

/// True when a Slurm controller answers; otherwise prints why the caller skips (or panics when
/// Slurm is required).
fn slurm_up(test: &str) -> bool {
    let answer = Command::new("scontrol").arg("ping").output();
    let up = answer
        .as_ref()
        .is_ok_and(|o| o.status.success() && String::from_utf8_lossy(&o.stdout).contains("UP"));
    if up {
        return true;
    }
    let why = match &answer {
        Ok(o) => format!(
            "`scontrol ping` says: {}",
            String::from_utf8_lossy(&o.stdout).trim()
        ),
        Err(e) => format!("`scontrol` cannot run: {e}"),
    };
    if std::env::var(REQUIRE).as_deref() == Ok("require") {
        panic!("{test}: Slurm is required ({REQUIRE}=require) but {why}");
    }
    eprintln!(
        "SKIPPED {test}: no Slurm controller ({why}); start one with \
         ../shared/tools/slurm-single-node.sh start"
    );
    false
}

fn read_json(path: &Path) -> Value {
    let text = fs::read_to_string(path).unwrap_or_else(|e| panic!("{}: {e}", path.display()));
    serde_json::from_str(&text).unwrap_or_else(|e| panic!("{}: {e}", path.display()))
}

fn stdout_of(out: &Output) -> String {
    String::from_utf8_lossy(&out.stdout).into_owned()
}

/// A manifest with what may differ between machines and runs removed: times, seconds, hosts.
/// A unit that a one-machine run prepared for a group unit (`recipe.prepared_for`) cannot be
/// prepared by a per-subject task, whose run has no group unit: only its recipe's `run` kind is
/// kept for comparison (see DEVELOPERS.md, "Slurm").
fn comparable(mut manifest: Value) -> Value {
    let map = manifest.as_object_mut().expect("manifest object");
    map.remove("started");
    map.remove("finished");
    for unit in map["units"].as_array_mut().expect("units") {
        let unit = unit.as_object_mut().expect("unit");
        unit.remove("seconds");
        unit.remove("host");
        if let Some(recipe) = unit.get_mut("recipe").and_then(Value::as_object_mut) {
            let run = recipe["run"].clone();
            recipe.retain(|k, _| k != "prepared_for" && k != "axes");
            recipe.insert("run".into(), run);
        }
    }
    manifest
}

fn repo() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
}

/// What must show 1: the demo study through `submit --wait` on the real scheduler gives the
/// exported bytes of a local `run`, and one merged manifest equal to the local one apart from
/// timings and hosts.
#[test]
fn the_demo_study_submitted_equals_a_local_run() {
    if !slurm_up("the_demo_study_submitted_equals_a_local_run") {
        return;
    }
    let tmp = tempfile::tempdir().unwrap();
    let root = tmp.path();
    fs::create_dir(root.join("pipelines")).unwrap();
    fs::copy(
        repo().join("pipelines/demo.yaml"),
        root.join("pipelines/demo.yaml"),
    )
    .unwrap();
    std::os::unix::fs::symlink(repo().join("demo-data"), root.join("demo-data")).unwrap();
    let output = root.join("results/demo");

    let local = run_cli(
        root,
        &[
            "run",
            "pipelines/demo.yaml",
            "--cache",
            "cache-local",
            "-j",
            "1",
        ],
    );
    assert_success(&local, "local run");
    fs::rename(&output, root.join("results/local")).unwrap();

    let cache = root.join("cache-cluster");
    let submitted = run_cli(
        root,
        &[
            "submit",
            "pipelines/demo.yaml",
            "--cache",
            cache.to_str().unwrap(),
            "--cpus",
            "1",
            "--wait",
        ],
    );
    assert_success(&submitted, "submit --wait");
    assert!(
        stdout_of(&submitted).contains("6 subjects: 01, 02, 03, 04, 05, 06"),
        "{}",
        stdout_of(&submitted)
    );

    let local_arrays = output_arrays(&root.join("results/local"));
    let cluster_arrays = output_arrays(&output);
    assert!(
        local_arrays.len() >= 7,
        "{} exported arrays",
        local_arrays.len()
    );
    assert_eq!(
        local_arrays.iter().map(|(p, _)| p).collect::<Vec<_>>(),
        cluster_arrays.iter().map(|(p, _)| p).collect::<Vec<_>>()
    );
    for ((path, a), (_, b)) in local_arrays.iter().zip(&cluster_arrays) {
        assert!(
            a == b,
            "{} differs between the local and the cluster run",
            path.display()
        );
    }

    let merged = read_json(&output.join("manifest.json"));
    for unit in merged["units"].as_array().unwrap() {
        assert_eq!(unit["status"], "computed", "{unit}");
        assert!(
            unit["host"].as_str().is_some_and(|h| !h.is_empty()),
            "{unit}"
        );
    }
    assert_eq!(
        comparable(merged),
        comparable(read_json(&root.join("results/local/manifest.json")))
    );
}

/// What must show 2: a damaged recording fails its subject's task alone; `--wait` exits 1
/// naming it and its log; the group job never runs; after the repair a second `submit` sends
/// only that subject and the group job.
#[test]
fn a_damaged_subject_fails_alone_and_a_resubmission_sends_only_it() {
    if !slurm_up("a_damaged_subject_fails_alone_and_a_resubmission_sends_only_it") {
        return;
    }
    let tmp = tempfile::tempdir().unwrap();
    let root = tmp.path();
    let spec = StudySpec {
        rates: vec![128.0; 3],
        ..StudySpec::default()
    };
    tiny_project(root, &spec);
    let edf = recording_path(&root.join("data"), 2);
    let good = fs::read(&edf).unwrap();
    fs::write(&edf, damaged_calibration(&good)).unwrap();
    let submit = |args: &[&str]| {
        let mut all = vec!["submit", "pipeline.yaml", "--cache", "cache"];
        all.extend_from_slice(args);
        run_cli(root, &all)
    };

    let failed = submit(&["--wait"]);
    let err = stderr_of(&failed);
    assert_eq!(
        failed.status.code(),
        Some(1),
        "{}\n{err}",
        stdout_of(&failed)
    );
    let jobs = root.join("results/jobs");
    let first = read_json(&jobs.join("submitted.json"));
    let array = first["array"].as_str().unwrap();
    let log = jobs.join(format!("logs/subject-{array}_1.out"));
    assert!(
        err.contains(&format!("subject 02 failed (log {})", log.display())),
        "{err}"
    );
    assert!(
        !err.contains("subject 01") && !err.contains("subject 03"),
        "{err}"
    );
    assert!(
        fs::read_to_string(&log)
            .unwrap()
            .contains("failed for subject 02: condition `A` has no epochs left"),
        "the log says why: {}",
        fs::read_to_string(&log).unwrap()
    );
    // Slurm's output files are not terminals: no colour codes in them.
    assert!(!fs::read_to_string(&log).unwrap().contains('\u{1b}'));
    let group = first["group"].as_str().unwrap();
    assert!(
        !jobs.join(format!("logs/group-{group}.out")).exists(),
        "the group job ran"
    );
    assert!(!root.join("results/manifest.json").exists());
    assert!(!root.join("results/group").exists());

    let status = run_cli(root, &["status", "pipeline.yaml", "--cache", "cache"]);
    assert_success(&status, "status");
    let text = stdout_of(&status);
    let state_of = |who: &str| {
        text.lines()
            .find(|l| l.split_whitespace().next() == Some(who))
            .and_then(|l| l.split_whitespace().nth(1))
            .unwrap_or_else(|| panic!("no line for {who} in\n{text}"))
            .to_string()
    };
    assert_eq!(
        [
            state_of("01"),
            state_of("02"),
            state_of("03"),
            state_of("group")
        ],
        ["done", "failed", "done", "cancelled"],
        "{text}"
    );

    fs::write(&edf, &good).unwrap();
    let again = submit(&["--wait"]);
    assert_success(&again, "second submit");
    assert!(
        stdout_of(&again).contains("(1 subject: 02)"),
        "{}",
        stdout_of(&again)
    );
    assert_eq!(
        read_json(&jobs.join("submitted.json"))["subjects"],
        serde_json::json!(["02"])
    );
    let merged = read_json(&root.join("results/manifest.json"));
    let units = merged["units"].as_array().unwrap();
    let subjects: std::collections::BTreeSet<_> =
        units.iter().filter_map(|u| u["subject"].as_str()).collect();
    assert_eq!(subjects.into_iter().collect::<Vec<_>>(), ["01", "02", "03"]);
    assert!(units.iter().all(|u| u["status"] == "computed"), "{merged}");

    let fresh = submit(&[]);
    assert_success(&fresh, "third submit");
    assert!(
        stdout_of(&fresh).contains("nothing to submit"),
        "{}",
        stdout_of(&fresh)
    );
}

/// An EDF whose first signal's physical range (header fields of the EDF specification, Kemp et
/// al. 1992: physical minimum and maximum, 8 ASCII characters per signal) is blown up to ±9999999:
/// the header is valid, so the study plans and submits, but every epoch of that channel exceeds
/// the rejection threshold and the subject's run fails with "no epochs left" on its node.
fn damaged_calibration(edf: &[u8]) -> Vec<u8> {
    let mut bytes = edf.to_vec();
    let signals: usize = std::str::from_utf8(&bytes[252..256])
        .unwrap()
        .trim()
        .parse()
        .unwrap();
    let minimum = 256 + signals * (16 + 80 + 8);
    let maximum = minimum + signals * 8;
    bytes[minimum..minimum + 8].copy_from_slice(b"-9999999");
    bytes[maximum..maximum + 8].copy_from_slice(b"9999999 ");
    bytes
}

/// What must show 3: `--dry-run` writes scripts that `bash -n` accepts and that name every
/// option given; nothing is submitted (no sbatch on PATH at all). Run by hand, the array script
/// computes its subject from a folder whose name holds shell metacharacters with a `--set` value
/// holding quotes, and nothing in them is executed.
#[test]
fn dry_run_scripts_name_every_option_and_treat_metacharacters_as_data() {
    let tmp = tempfile::tempdir().unwrap();
    let root = tmp.path().join("study $(touch PWNED); 'quoted' \"x\" `y`");
    fs::create_dir(&root).unwrap();
    tiny_project(&root, &StudySpec::default());
    let set = "trials.conditions={A: ['cue-a'], B: [\"cue-b\"]}";
    let mut cmd = crate::reliability::command(
        &root,
        &[
            "submit",
            "pipeline.yaml",
            "--cache",
            "cache dir",
            "--set",
            set,
            "--partition=short",
            "--account=lab-7",
            "--time=0:20:00",
            "--mem=300M",
            "--cpus=2",
            "--max-parallel=1",
            "--sbatch-arg=--qos=normal",
            "--sbatch-arg=--comment=two words",
            "--dry-run",
        ],
    );
    let out = cmd.env("PATH", "/nonexistent").output().unwrap();
    assert_success(&out, "submit --dry-run");
    let text = stdout_of(&out);
    let jobs = root.join("results/jobs");
    assert!(
        !jobs.join("submitted.json").exists(),
        "a dry run recorded a submission"
    );
    assert!(text.contains("--array=0-1%1"), "{text}");
    assert!(
        text.contains("--dependency=afterok:<array job id>"),
        "{text}"
    );
    let array = fs::read_to_string(jobs.join("subjects.sh")).unwrap();
    let group = fs::read_to_string(jobs.join("group.sh")).unwrap();
    for script in [&array, &group] {
        for line in [
            "#SBATCH --partition=short",
            "#SBATCH --account=lab-7",
            "#SBATCH --time=0:20:00",
            "#SBATCH --mem=300M",
            "#SBATCH --cpus-per-task=2",
            "#SBATCH --qos=normal",
            "#SBATCH \"--comment=two words\"",
        ] {
            assert!(script.contains(line), "{line} missing from\n{script}");
        }
        assert!(script.contains(" --jobs=2"), "{script}");
        assert!(script.contains("'--set=trials.conditions="), "{script}");
    }
    assert!(
        group.contains("#SBATCH --kill-on-invalid-dep=yes"),
        "{group}"
    );
    assert_eq!(
        fs::read_to_string(jobs.join("subjects.txt")).unwrap(),
        "01\n02\n"
    );
    for script in ["subjects.sh", "group.sh"] {
        let check = Command::new("bash")
            .arg("-n")
            .arg(jobs.join(script))
            .output()
            .unwrap();
        assert!(
            check.status.success(),
            "bash -n {script}: {}",
            stderr_of(&check)
        );
    }

    // Task 1 by hand, as Slurm would start it.
    let task = Command::new("bash")
        .arg(jobs.join("subjects.sh"))
        .env("SLURM_ARRAY_TASK_ID", "1")
        .env("NO_COLOR", "1")
        .current_dir(tmp.path())
        .output()
        .unwrap();
    assert_success(&task, "the array script's task 1");
    let part = read_json(&root.join("results/manifest.parts/02.json"));
    assert_eq!(part["pipeline"]["overrides"], serde_json::json!([set]));
    assert!(root.join("cache dir/objects").is_dir());
    let pwned: Vec<_> = files_under(tmp.path())
        .into_iter()
        .filter(|p| {
            p.to_string_lossy().contains("PWNED") && !p.starts_with(root.file_name().unwrap())
        })
        .collect();
    assert!(pwned.is_empty(), "{pwned:?}");
    assert!(!Path::new("PWNED").exists() && !jobs.join("PWNED").exists());
}

/// Bad input exits 2 and submits nothing: sbatch missing, an output folder that cannot be
/// written; a cache under /tmp is warned about; a fresh study submits nothing and says so.
#[test]
fn bad_submissions_exit_2_and_submit_nothing() {
    let tmp = tempfile::tempdir().unwrap();
    let root = tmp.path();
    tiny_project(root, &StudySpec::default());
    let submit = |args: &[&str], path: &str| {
        let mut all = vec!["submit", "pipeline.yaml"];
        all.extend_from_slice(args);
        crate::reliability::command(root, &all)
            .env("PATH", path)
            .output()
            .unwrap()
    };

    let no_sbatch = submit(&["--cache", "cache"], "/nonexistent");
    assert_eq!(
        no_sbatch.status.code(),
        Some(2),
        "{}",
        stderr_of(&no_sbatch)
    );
    assert!(stderr_of(&no_sbatch).contains("sbatch was not found on PATH"));
    assert!(!root.join("results/jobs").exists());

    let in_tmp = submit(
        &["--cache", "/tmp/phasewise-cache", "--dry-run"],
        "/nonexistent",
    );
    assert_success(&in_tmp, "dry run with a cache in /tmp");
    assert!(
        stderr_of(&in_tmp).contains("the cache /tmp/phasewise-cache is under /tmp"),
        "{}",
        stderr_of(&in_tmp)
    );

    let pipeline = fs::read_to_string(root.join("pipeline.yaml")).unwrap();
    fs::write(root.join("blocker"), "a file, not a folder").unwrap();
    fs::write(
        root.join("blocked.yaml"),
        pipeline.replace("output: results", "output: blocker/results"),
    )
    .unwrap();
    let blocked = crate::reliability::command(
        root,
        &["submit", "blocked.yaml", "--cache", "cache", "--dry-run"],
    )
    .output()
    .unwrap();
    assert_eq!(blocked.status.code(), Some(2), "{}", stderr_of(&blocked));
    assert!(
        stderr_of(&blocked).contains("blocker/results/jobs"),
        "{}",
        stderr_of(&blocked)
    );

    assert_success(
        &run_cli(root, &["run", "pipeline.yaml", "--cache", "cache"]),
        "run",
    );
    let fresh = submit(&["--cache", "cache"], "/nonexistent");
    assert_success(&fresh, "submit of a fresh study");
    assert!(
        stdout_of(&fresh).contains("nothing to submit: all 13 units are fresh"),
        "{}",
        stdout_of(&fresh)
    );
}

/// An unknown partition: sbatch's own error, exit 2, nothing submitted.
#[test]
fn an_unknown_partition_shows_sbatchs_error() {
    if !slurm_up("an_unknown_partition_shows_sbatchs_error") {
        return;
    }
    let tmp = tempfile::tempdir().unwrap();
    let root = tmp.path();
    tiny_project(root, &StudySpec::default());
    let out = run_cli(
        root,
        &[
            "submit",
            "pipeline.yaml",
            "--cache",
            "cache",
            "--partition",
            "no-such-partition",
        ],
    );
    let err = stderr_of(&out);
    assert_eq!(out.status.code(), Some(2), "{err}");
    assert!(
        err.contains("sbatch: error") && err.contains("partition"),
        "{err}"
    );
    assert!(err.contains("nothing was submitted"), "{err}");
    assert!(!root.join("results/jobs/submitted.json").exists());
}

// ---------------------------------------------------------------------------------------------
// What must show 4: two writers with one pid on two hosts share a cache.

const WRITER_DIR: &str = "PHASEWISE_TEST_WRITER_DIR";
const WRITER_HOST: &str = "PHASEWISE_TEST_WRITER_HOST";
const OBJECTS: usize = 300;

/// Deterministic bytes of object `i` of `owner` (both writers write the `shared` ones, with
/// equal bytes, as equal keys give equal bytes).
fn object_bytes(owner: &str, i: usize) -> Vec<u8> {
    let seed = blake3::hash(format!("{owner}/{i}").as_bytes());
    let len = 4096 + 97 * i;
    let mut out = Vec::with_capacity(len);
    let mut reader = blake3::Hasher::new().update(seed.as_bytes()).finalize_xof();
    out.resize(len, 0);
    reader.fill(&mut out);
    out
}

fn object_path(cache: &Path, owner: &str, i: usize) -> PathBuf {
    cache
        .join("objects")
        .join(format!("{:02x}", i % 8))
        .join(format!("{owner}-{i}.bin"))
}

/// One writer, started by the test below inside its own PID and UTS namespaces.
#[test]
#[ignore = "a writer process of two_writers_with_one_pid_on_two_hosts_share_a_cache"]
fn namespace_writer() {
    let (Ok(dir), Ok(host)) = (std::env::var(WRITER_DIR), std::env::var(WRITER_HOST)) else {
        return;
    };
    // SAFETY: a plain system call with a valid buffer; allowed in the writer's own UTS namespace.
    let rc = unsafe { libc::sethostname(host.as_ptr().cast(), host.len()) };
    assert_eq!(rc, 0, "sethostname: {}", std::io::Error::last_os_error());
    assert_eq!(phasewise::fsio::host_name(), host);
    let cache = PathBuf::from(dir);
    for i in 0..OBJECTS {
        for owner in [host.as_str(), "shared"] {
            let path = object_path(&cache, owner, i);
            phasewise::fsio::atomic_write(&path, &object_bytes(owner, i)).expect("write");
            if i % 7 == 0 {
                phasewise::fsio::remove_stale_temps(path.parent().unwrap());
            }
        }
    }
    println!("WRITER host={host} pid={}", std::process::id());
}

/// Two writers that really share one pid (each the first process of its own PID namespace) on
/// two host names (UTS namespaces) fill one cache at once: every object of each is there with
/// its bytes, no temporary is left, another host's fresh temporary survives both writers'
/// clean-ups, and only a temporary older than the grace period is removed.
#[test]
fn two_writers_with_one_pid_on_two_hosts_share_a_cache() {
    let probe = Command::new("unshare")
        .args(["--pid", "--fork", "--uts", "true"])
        .output();
    if !probe.as_ref().is_ok_and(|o| o.status.success()) {
        eprintln!(
            "SKIPPED two_writers_with_one_pid_on_two_hosts_share_a_cache: `unshare --pid --fork \
             --uts` is not permitted here ({})",
            probe.map_or_else(|e| e.to_string(), |o| stderr_of(&o))
        );
        return;
    }
    let tmp = tempfile::tempdir().unwrap();
    let cache = tmp.path().join("cache");
    let dir = cache.join("objects/00");
    fs::create_dir_all(&dir).unwrap();
    // A temporary of a writer on a third host, mid-write: its pid is not running here.
    let live = dir.join(".tmp-nodeC-4000000-0123456789abcdef-0-x.npy");
    fs::write(&live, b"half").unwrap();
    let old = dir.join(".tmp-nodeD-1-fedcba9876543210-0-y.npy");
    fs::write(&old, b"left by a killed run").unwrap();
    let two_hours_ago = std::time::SystemTime::now() - std::time::Duration::from_secs(7200);
    fs::File::options()
        .write(true)
        .open(&old)
        .unwrap()
        .set_modified(two_hours_ago)
        .unwrap();

    let exe = std::env::current_exe().unwrap();
    let writers: Vec<_> = ["nodeA", "nodeB"]
        .iter()
        .map(|host| {
            Command::new("unshare")
                .args(["--pid", "--fork", "--uts", "--"])
                .arg(&exe)
                .args([
                    "cluster::namespace_writer",
                    "--exact",
                    "--ignored",
                    "--nocapture",
                ])
                .env(WRITER_DIR, &cache)
                .env(WRITER_HOST, host)
                .stdout(std::process::Stdio::piped())
                .stderr(std::process::Stdio::piped())
                .spawn()
                .unwrap()
        })
        .collect();
    let outputs: Vec<Output> = writers
        .into_iter()
        .map(|w| w.wait_with_output().unwrap())
        .collect();
    for (out, host) in outputs.iter().zip(["nodeA", "nodeB"]) {
        assert_success(out, host);
        assert!(
            stdout_of(out).contains(&format!("WRITER host={host} pid=1")),
            "the writers must share pid 1: {}",
            stdout_of(out)
        );
    }
    for i in 0..OBJECTS {
        for owner in ["nodeA", "nodeB", "shared"] {
            let path = object_path(&cache, owner, i);
            let bytes = fs::read(&path).unwrap_or_else(|e| panic!("{}: {e}", path.display()));
            assert!(
                bytes == object_bytes(owner, i),
                "{} is damaged",
                path.display()
            );
        }
    }
    assert!(live.exists(), "another host's live temporary was removed");
    assert!(
        !old.exists(),
        "a temporary older than the grace period was kept"
    );
    let left: Vec<_> = files_under(&cache)
        .into_iter()
        .filter(|p| {
            p.file_name()
                .is_some_and(|n| n.to_string_lossy().starts_with(".tmp-"))
        })
        .collect();
    assert_eq!(
        left,
        [PathBuf::from("objects/00").join(live.file_name().unwrap())]
    );
}
