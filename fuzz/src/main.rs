//! `phasewise-fuzz`: seeded, coverage-free mutation fuzzing of phasewise's parsers on the
//! stable toolchain (an equivalent of cargo-fuzz, which needs nightly).
//!
//! ```text
//! phasewise-fuzz <edf|tsv|pipeline|all> [--seconds N] [--seed S] [--max-execs N]
//! phasewise-fuzz <target> --replay FILE
//! phasewise-fuzz seeds <target> DIR     # the seed corpus as files, for afl-fuzz -i
//! phasewise-fuzz afl <target>           # the program afl-fuzz runs (built with --features afl)
//! ```
//! Prints, per target, the executions, the distinct panics found (each saved under
//! `artifacts/<target>/`), the executions slower than the slow limit and the slowest one.
//! Exits 1 when anything was found, so a CI step fails on a finding.

mod afl_mode;
mod harness;
mod mutate;
mod rng;
mod targets;

use std::path::PathBuf;
use std::time::Duration;

use targets::TARGETS;

struct Args {
    target: String,
    seconds: u64,
    seed: u64,
    max_execs: u64,
    replay: Option<PathBuf>,
}

fn parse_args() -> Result<Args, String> {
    let mut args = std::env::args().skip(1);
    let mut parsed = Args {
        target: args.next().ok_or("usage: phasewise-fuzz <edf|tsv|pipeline|all> [--seconds N] [--seed S] [--max-execs N] [--replay FILE]")?,
        seconds: 60,
        seed: 1,
        max_execs: u64::MAX,
        replay: None,
    };
    while let Some(flag) = args.next() {
        let value = args.next().ok_or(format!("{flag} needs a value"))?;
        let number = || {
            value
                .parse::<u64>()
                .map_err(|_| format!("{flag}: {value:?} is not a number"))
        };
        match flag.as_str() {
            "--seconds" => parsed.seconds = number()?,
            "--seed" => parsed.seed = number()?,
            "--max-execs" => parsed.max_execs = number()?,
            "--replay" => parsed.replay = Some(PathBuf::from(&value)),
            _ => return Err(format!("unknown option {flag}")),
        }
    }
    Ok(parsed)
}

/// The target named `name`, or exit 2 naming the targets.
fn target_named(name: &str) -> &'static targets::Target {
    TARGETS.iter().find(|t| t.name == name).unwrap_or_else(|| {
        eprintln!("unknown target {name:?}; targets: edf, tsv, pipeline");
        std::process::exit(2);
    })
}

fn main() {
    let raw: Vec<String> = std::env::args().skip(1).collect();
    match raw.iter().map(String::as_str).collect::<Vec<_>>().as_slice() {
        ["seeds", name, dir] => {
            let target = target_named(name);
            match afl_mode::write_seeds(target, std::path::Path::new(dir)) {
                Ok(n) => println!("{name}: {n} seeds written to {dir}"),
                Err(e) => {
                    eprintln!("{dir}: cannot write the seeds: {e}");
                    std::process::exit(2);
                }
            }
            return;
        }
        ["afl", name] => {
            afl_mode::run(target_named(name));
            return;
        }
        _ => {}
    }
    let args = match parse_args() {
        Ok(a) => a,
        Err(message) => {
            eprintln!("{message}");
            std::process::exit(2);
        }
    };
    harness::quiet_panics();
    let chosen: Vec<_> = TARGETS
        .iter()
        .filter(|t| args.target == "all" || t.name == args.target)
        .collect();
    if chosen.is_empty() {
        eprintln!(
            "unknown target {:?}; targets: edf, tsv, pipeline, all",
            args.target
        );
        std::process::exit(2);
    }
    if let Some(file) = &args.replay {
        let result = harness::replay(chosen[0], file);
        println!(
            "{}: {}",
            file.display(),
            result.as_deref().unwrap_or("no panic")
        );
        std::process::exit(i32::from(result.is_some()));
    }
    let mut found = false;
    for target in chosen {
        let budget = Duration::from_secs(args.seconds);
        let report = harness::campaign(target, args.seed, budget, args.max_execs);
        println!(
            "{}: {} executions, {} distinct panics, {} slow (> {:?}), slowest {:?}",
            target.name,
            report.executions,
            report.crashes.len(),
            report.slow,
            harness::SLOW,
            report.slowest
        );
        for (message, count) in &report.crashes {
            println!("  panic ({count}x): {message}");
        }
        found |= !report.crashes.is_empty() || report.slow > 0;
    }
    std::process::exit(i32::from(found));
}
