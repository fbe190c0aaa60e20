//! Running a target on many mutated inputs: panics are caught and kept, every execution is
//! timed, and a watchdog thread ends the process if one execution hangs.
//!
//! A finding is saved as `artifacts/<target>/<kind>-<n>.bin` (kind `crash` or `slow`) with the
//! panic message beside it, so it can be replayed with `phasewise-fuzz <target> --replay FILE`.

use std::collections::BTreeMap;
use std::fs;
use std::panic::{self, AssertUnwindSafe};
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

use crate::mutate::mutate;
use crate::rng::Rng;
use crate::targets::Target;

/// One execution slower than this is a finding (the parsers read files of a few kB).
pub const SLOW: Duration = Duration::from_secs(2);
/// One execution slower than this is a hang: the process saves the input and exits.
pub const HANG: Duration = Duration::from_secs(20);

/// What a campaign found.
#[derive(Default)]
pub struct Report {
    /// Inputs run.
    pub executions: u64,
    /// Distinct panic messages (location included), with how often each was hit.
    pub crashes: BTreeMap<String, u64>,
    /// Executions slower than [`SLOW`].
    pub slow: u64,
    /// The slowest execution.
    pub slowest: Duration,
}

/// The message of the last panic, recorded by the panic hook instead of printing it.
static LAST_PANIC: Mutex<Option<String>> = Mutex::new(None);

/// Install a panic hook that records the message and location quietly.
pub fn quiet_panics() {
    panic::set_hook(Box::new(|info| {
        let message = info
            .payload()
            .downcast_ref::<&str>()
            .map(|s| s.to_string())
            .or_else(|| info.payload().downcast_ref::<String>().cloned())
            .unwrap_or_default();
        let at = info
            .location()
            .map_or(String::new(), |l| format!(" at {l}"));
        if let Ok(mut last) = LAST_PANIC.lock() {
            *last = Some(format!("{message}{at}"));
        }
    }));
}

/// Run `target` for `budget` (or `max_execs` inputs) from `seed`.
pub fn campaign(target: &Target, seed: u64, budget: Duration, max_execs: u64) -> Report {
    let scratch = tempfile::tempdir().expect("a temporary folder");
    let seeds = (target.seeds)(scratch.path());
    assert!(!seeds.is_empty(), "target {} has no seeds", target.name);
    let artifacts = Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("artifacts")
        .join(target.name);
    let watchdog = Watchdog::start(artifacts.clone());
    let mut rng = Rng::new(seed);
    let mut report = Report::default();
    let started = Instant::now();
    while started.elapsed() < budget && report.executions < max_execs {
        let exec = report.executions;
        let base = rng.pick(&seeds);
        let other = rng.pick(&seeds);
        // One input in 16 is a seed as it is: the happy path must stay panic-free too.
        let mut input = if rng.one_in(16) {
            base.clone()
        } else {
            mutate(&mut rng, base, other)
        };
        if let Some(aware) = target.aware.filter(|_| rng.one_in(2)) {
            aware(&mut rng, &mut input);
        }
        let elapsed = watchdog.guard(&input, || (target.run)(scratch.path(), &input, exec));
        report.executions += 1;
        report.slowest = report.slowest.max(elapsed.time);
        if elapsed.time > SLOW {
            report.slow += 1;
            save(
                &artifacts,
                "slow",
                report.slow,
                &input,
                &format!("{:?}", elapsed.time),
            );
        }
        if let Some(message) = elapsed.panic {
            let count = report.crashes.entry(message.clone()).or_insert(0);
            *count += 1;
            if *count == 1 {
                save(
                    &artifacts,
                    "crash",
                    report.crashes.len() as u64,
                    &input,
                    &message,
                );
            }
        }
    }
    report
}

/// Run one saved input and say whether it panics.
pub fn replay(target: &Target, file: &Path) -> Option<String> {
    let scratch = tempfile::tempdir().expect("a temporary folder");
    (target.seeds)(scratch.path());
    let input = fs::read(file).unwrap_or_else(|e| panic!("reading {}: {e}", file.display()));
    run_caught(|| (target.run)(scratch.path(), &input, 0))
}

/// The outcome of one guarded execution.
struct Elapsed {
    time: Duration,
    panic: Option<String>,
}

fn run_caught(f: impl FnOnce()) -> Option<String> {
    match panic::catch_unwind(AssertUnwindSafe(f)) {
        Ok(()) => None,
        Err(_) => Some(
            LAST_PANIC
                .lock()
                .ok()
                .and_then(|mut m| m.take())
                .unwrap_or_else(|| "panic without a message".into()),
        ),
    }
}

/// Save an input that is a finding.
fn save(dir: &Path, kind: &str, n: u64, input: &[u8], note: &str) {
    let _ = fs::create_dir_all(dir);
    let _ = fs::write(dir.join(format!("{kind}-{n}.bin")), input);
    let _ = fs::write(dir.join(format!("{kind}-{n}.txt")), note);
}

/// A thread that watches the running execution and ends the process on a hang.
struct Watchdog {
    /// Milliseconds since `epoch` when the current execution started; 0 when none runs.
    started_ms: Arc<AtomicU64>,
    current: Arc<Mutex<Vec<u8>>>,
    epoch: Instant,
}

impl Watchdog {
    fn start(artifacts: PathBuf) -> Watchdog {
        let dog = Watchdog {
            started_ms: Arc::new(AtomicU64::new(0)),
            current: Arc::new(Mutex::new(Vec::new())),
            epoch: Instant::now(),
        };
        let (started, current, epoch) = (dog.started_ms.clone(), dog.current.clone(), dog.epoch);
        std::thread::spawn(move || loop {
            std::thread::sleep(Duration::from_millis(500));
            let at = started.load(Ordering::SeqCst);
            let now = epoch.elapsed().as_millis() as u64;
            if at != 0 && now.saturating_sub(at) > HANG.as_millis() as u64 {
                let input = current.lock().map(|c| c.clone()).unwrap_or_default();
                save(
                    &artifacts,
                    "hang",
                    1,
                    &input,
                    "execution exceeded the hang limit",
                );
                eprintln!(
                    "HANG: an execution ran over {HANG:?}; input saved in {}",
                    artifacts.display()
                );
                std::process::exit(3);
            }
        });
        dog
    }

    fn guard(&self, input: &[u8], f: impl FnOnce()) -> Elapsed {
        if let Ok(mut c) = self.current.lock() {
            c.clear();
            c.extend_from_slice(input);
        }
        let start = Instant::now();
        let ms = (self.epoch.elapsed().as_millis() as u64).max(1);
        self.started_ms.store(ms, Ordering::SeqCst);
        let panic = run_caught(f);
        self.started_ms.store(0, Ordering::SeqCst);
        Elapsed {
            time: start.elapsed(),
            panic,
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn seeds(_: &Path) -> Vec<Vec<u8>> {
        vec![b"abcdefgh".to_vec()]
    }

    /// Panics on any input holding a NUL byte, which the mutations soon produce.
    fn fragile(_: &Path, input: &[u8], _: u64) {
        assert!(!input.contains(&0), "a NUL byte");
    }

    /// The harness must see a panic when there is one, or a clean report means nothing.
    #[test]
    fn a_panicking_target_is_reported() {
        quiet_panics();
        let target = Target {
            name: "selftest",
            seeds,
            run: fragile,
            aware: None,
        };
        let report = campaign(&target, 7, Duration::from_secs(10), 2_000);
        assert_eq!(report.executions, 2_000);
        assert_eq!(report.crashes.len(), 1, "{:?}", report.crashes);
        let (message, count) = report.crashes.iter().next().expect("one crash");
        assert!(message.contains("a NUL byte"), "{message}");
        assert!(*count > 0 && *count < 2_000);
    }
}
