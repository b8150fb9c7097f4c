//! `ingot-fuzz`: the long fuzz run.
//!
//! ```text
//! cargo run --release -p ingot-fuzz -- --cases 1000000 [--seed S] [--target onnx]
//! ```
//!
//! `--target NAME` runs only the extra target `NAME` (the ONNX importer).
//!
//! The supervisor starts a worker (this binary with `--worker`) that runs
//! cases `start..cases` one after another, each under `catch_unwind`, and
//! announces each case on its standard output before running it. The
//! supervisor watches that stream: a worker silent for more than 10 s is
//! killed (a hang); a worker that dies (an abort, or an allocation past the
//! 2 GiB cap of the counting allocator) is restarted after the case it was
//! running. Every failing case is rebuilt from `(seed, index)` and saved
//! under `fuzz/regressions/`, where `cargo test -p ingot-fuzz` replays it.
//! Single-threaded on purpose: the worker runs one case at a time.

use ingot_fuzz::{
    alloc::Counting, case::Case, generate, generate_extra, run_caught, save_regression, Outcome,
    Seeds,
};
use std::io::{BufRead, Write};
use std::process::{Command, Stdio};
use std::sync::mpsc;
use std::time::{Duration, Instant};

#[global_allocator]
static ALLOC: Counting = Counting::new();

/// A case running longer than this is a hang.
const HANG: Duration = Duration::from_secs(10);

struct Opts {
    cases: u64,
    seed: u64,
    start: u64,
    worker: bool,
    target: Option<String>,
}

fn parse_args() -> Result<Opts, String> {
    let mut o = Opts {
        cases: 100_000,
        seed: 0x1467_0001,
        start: 0,
        worker: false,
        target: None,
    };
    let mut args = std::env::args().skip(1);
    while let Some(a) = args.next() {
        let mut num = |name: &str| -> Result<u64, String> {
            args.next()
                .and_then(|v| v.replace('_', "").parse().ok())
                .ok_or_else(|| format!("{name} needs a number"))
        };
        match a.as_str() {
            "--cases" => o.cases = num("--cases")?,
            "--seed" => o.seed = num("--seed")?,
            "--start" => o.start = num("--start")?,
            "--worker" => o.worker = true,
            "--target" => {
                let t = args.next().ok_or("--target needs a name")?;
                if !ingot_fuzz::extra_targets().iter().any(|x| x.name == t) {
                    return Err(format!("no fuzz target `{t}`"));
                }
                o.target = Some(t);
            }
            "-h" | "--help" => {
                println!("usage: ingot-fuzz [--cases N] [--seed S] [--target onnx]");
                std::process::exit(0);
            }
            other => return Err(format!("unknown argument `{other}`")),
        }
    }
    Ok(o)
}

fn main() {
    let o = match parse_args() {
        Ok(o) => o,
        Err(e) => {
            eprintln!("ingot-fuzz: {e}");
            std::process::exit(2);
        }
    };
    let seeds = match Seeds::load() {
        Ok(s) => s,
        Err(e) => {
            eprintln!("ingot-fuzz: {e}");
            std::process::exit(2);
        }
    };
    if o.worker {
        worker(&o, &seeds);
    } else {
        supervise(&o, &seeds);
    }
}

/// Case `i` of this run: of every kind, or of `--target` alone.
fn case(o: &Opts, seeds: &Seeds, i: u64) -> Case {
    match &o.target {
        Some(t) => generate_extra(seeds, t, o.seed, i).expect("target checked when parsed"),
        None => generate(seeds, o.seed, i),
    }
}

/// Runs cases, announcing each (`case I`) before running it, and reports
/// panics (`panic I MESSAGE`) and the largest peak heap (`done PEAK`).
fn worker(o: &Opts, seeds: &Seeds) {
    // Panics are expected to be caught and reported, not printed.
    std::panic::set_hook(Box::new(|_| {}));
    let out = std::io::stdout();
    let mut out = out.lock();
    let mut max_peak = 0usize;
    for i in o.start..o.cases {
        let case = case(o, seeds, i);
        let _ = writeln!(out, "case {i}");
        let _ = out.flush();
        let base = ALLOC.live();
        ALLOC.reset_peak();
        if let Outcome::Panic(m) = run_caught(&case) {
            let _ = writeln!(out, "panic {i} {}", m.replace('\n', " "));
        }
        max_peak = max_peak.max(ALLOC.peak().saturating_sub(base));
    }
    let _ = writeln!(out, "done {max_peak}");
    let _ = out.flush();
}

#[derive(Default)]
struct Tally {
    executed: u64,
    panics: u64,
    hangs: u64,
    over_memory: u64,
    other_crashes: u64,
    max_peak: usize,
}

fn supervise(o: &Opts, seeds: &Seeds) {
    let exe = std::env::current_exe().expect("own path");
    let t0 = Instant::now();
    let mut t = Tally::default();
    let mut start = o.start;
    let mut last_report = Instant::now();
    while start < o.cases {
        let mut child = Command::new(&exe)
            .args(["--worker", "--cases", &o.cases.to_string()])
            .args(["--seed", &o.seed.to_string(), "--start", &start.to_string()])
            .args(o.target.iter().flat_map(|t| ["--target", t.as_str()]))
            .stdout(Stdio::piped())
            .stderr(Stdio::piped())
            .spawn()
            .expect("start the worker");
        let stdout = child.stdout.take().expect("piped");
        let stderr = child.stderr.take().expect("piped");
        let (tx, rx) = mpsc::channel::<String>();
        std::thread::spawn(move || {
            for line in std::io::BufReader::new(stdout).lines() {
                let Ok(line) = line else { break };
                if tx.send(line).is_err() {
                    break;
                }
            }
        });
        let err_reader = std::thread::spawn(move || {
            let mut s = String::new();
            let _ = std::io::Read::read_to_string(&mut std::io::BufReader::new(stderr), &mut s);
            s
        });
        let mut current: Option<u64> = None;
        let mut finished = false;
        loop {
            match rx.recv_timeout(HANG) {
                Ok(line) => {
                    if let Some(i) = line.strip_prefix("case ") {
                        if current.is_some() {
                            t.executed += 1;
                        }
                        current = i.parse().ok();
                    } else if let Some(rest) = line.strip_prefix("panic ") {
                        let (i, msg) = rest.split_once(' ').unwrap_or((rest, ""));
                        t.panics += 1;
                        let i: u64 = i.parse().unwrap_or(0);
                        let p = save_regression(&case(o, seeds, i), &format!("panic: {msg}"));
                        eprintln!("case {i}: panic: {msg} (saved {})", show(p));
                    } else if let Some(peak) = line.strip_prefix("done ") {
                        if current.take().is_some() {
                            t.executed += 1;
                        }
                        t.max_peak = t.max_peak.max(peak.parse().unwrap_or(0));
                        finished = true;
                    }
                    if last_report.elapsed() > Duration::from_secs(60) {
                        last_report = Instant::now();
                        eprintln!(
                            "progress: {} executed, {} panics, {} hangs, {} over 2 GiB, {:.0} s",
                            t.executed,
                            t.panics,
                            t.hangs,
                            t.over_memory,
                            t0.elapsed().as_secs_f64()
                        );
                    }
                }
                Err(mpsc::RecvTimeoutError::Timeout) => {
                    let _ = child.kill();
                    if let Some(i) = current {
                        t.hangs += 1;
                        t.executed += 1;
                        let p = save_regression(&case(o, seeds, i), "hang over 10 s");
                        eprintln!("case {i}: no progress for 10 s (saved {})", show(p));
                        start = i + 1;
                    }
                    break;
                }
                Err(mpsc::RecvTimeoutError::Disconnected) => break,
            }
        }
        let status = child.wait().expect("worker status");
        let stderr_text = err_reader.join().unwrap_or_default();
        if finished {
            break;
        }
        if let (Some(i), false) = (current, status.success()) {
            t.executed += 1;
            let why = if stderr_text.contains("memory allocation") {
                t.over_memory += 1;
                "allocation past the 2 GiB cap"
            } else {
                t.other_crashes += 1;
                "worker died"
            };
            let p = save_regression(
                &case(o, seeds, i),
                &format!("{why}: {}", stderr_text.trim()),
            );
            eprintln!("case {i}: {why} (saved {})", show(p));
            start = i + 1;
        } else if current.is_none() && !finished {
            eprintln!("worker ended without finishing: {status}\n{stderr_text}");
            std::process::exit(1);
        }
    }
    let secs = t0.elapsed().as_secs_f64();
    println!("| figure | value |");
    println!("|---|---|");
    println!("| cases executed | {} |", t.executed);
    println!("| panics | {} |", t.panics);
    println!("| hangs over 10 s | {} |", t.hangs);
    println!("| runs over 2 GiB | {} |", t.over_memory);
    println!("| other crashes | {} |", t.other_crashes);
    println!("| largest peak heap of one case | {} bytes |", t.max_peak);
    println!(
        "| wall time | {secs:.0} s ({:.0} cases/s) |",
        t.executed as f64 / secs
    );
    println!("| seed | {} |", o.seed);
    println!(
        "| targets | {} |",
        o.target
            .as_deref()
            .unwrap_or("all (graph, graph files, ranges, image, npy, onnx)")
    );
    if t.panics + t.hangs + t.over_memory + t.other_crashes > 0 {
        std::process::exit(1);
    }
}

fn show(p: std::io::Result<std::path::PathBuf>) -> String {
    match p {
        Ok(p) => p.display().to_string(),
        Err(e) => format!("not saved: {e}"),
    }
}
