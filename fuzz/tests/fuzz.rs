//! The fuzz harness in the test suite: a fixed number of generated cases,
//! and every saved regression case, must run without a panic, a hang over
//! 10 s, or an allocation past 2 GiB (the counting allocator's cap aborts
//! the test binary, which fails the test).

use ingot_fuzz::{alloc::Counting, generate, run_caught, save_regression, Outcome, Seeds};
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

#[global_allocator]
static ALLOC: Counting = Counting::new();

/// Cases per test run: about 10 s on one core in the dev profile.
const CASES: u64 = 10_000;
/// The seed of the in-suite run (the long run uses another by default).
const SEED: u64 = 14;

/// Aborts the process, after saving the case, when one case runs longer
/// than 10 s: a hung case must fail the suite, not stall it.
struct Watchdog {
    started: Arc<Mutex<Option<(Instant, ingot_fuzz::case::Case)>>>,
}

impl Watchdog {
    fn start() -> Watchdog {
        let started: Arc<Mutex<Option<(Instant, ingot_fuzz::case::Case)>>> =
            Arc::new(Mutex::new(None));
        let s = started.clone();
        std::thread::spawn(move || loop {
            std::thread::sleep(Duration::from_millis(500));
            let guard = s.lock().unwrap_or_else(|e| e.into_inner());
            if let Some((t, case)) = guard.as_ref() {
                if t.elapsed() > Duration::from_secs(10) {
                    let p = save_regression(case, "hang over 10 s (test suite)");
                    eprintln!("a fuzz case ran for more than 10 s; saved as {p:?}");
                    std::process::abort();
                }
            }
        });
        Watchdog { started }
    }

    fn run(&self, case: &ingot_fuzz::case::Case) -> Outcome {
        *self.started.lock().unwrap() = Some((Instant::now(), case.clone()));
        let o = run_caught(case);
        *self.started.lock().unwrap() = None;
        o
    }
}

static PEAK: AtomicU64 = AtomicU64::new(0);

#[test]
fn generated_cases_never_panic() {
    let seeds = Seeds::load().expect("seeds");
    let dog = Watchdog::start();
    std::panic::set_hook(Box::new(|_| {}));
    let mut panics = Vec::new();
    let mut kinds = std::collections::BTreeMap::new();
    for i in 0..CASES {
        let case = generate(&seeds, SEED, i);
        *kinds.entry(format!("{:?}", case.kind)).or_insert(0u32) += 1;
        let base = ALLOC.live();
        ALLOC.reset_peak();
        if let Outcome::Panic(m) = dog.run(&case) {
            let p = save_regression(&case, &format!("panic: {m}"));
            panics.push(format!("case {i}: {m} (saved {p:?})"));
        }
        PEAK.fetch_max(ALLOC.peak().saturating_sub(base) as u64, Ordering::Relaxed);
    }
    let _ = std::panic::take_hook();
    // Every frontend was reached.
    for k in [
        "Graph",
        "GraphFiles",
        "Ranges",
        "Image",
        "Npy",
        "Extra(\"onnx\")",
    ] {
        assert!(
            kinds.get(k).copied().unwrap_or(0) > CASES as u32 / 20,
            "{kinds:?}"
        );
    }
    assert!(
        panics.is_empty(),
        "{} panics:\n{}",
        panics.len(),
        panics.join("\n")
    );
    let peak = PEAK.load(Ordering::Relaxed);
    assert!(peak < 2 << 30, "a case used {peak} bytes");
}

#[test]
fn saved_regressions_never_panic() {
    let dog = Watchdog::start();
    for (path, case) in ingot_fuzz::regressions() {
        if let Outcome::Panic(m) = dog.run(&case) {
            panic!("{}: {m}", path.display());
        }
    }
}

/// The mutators keep most cases close enough to valid that they get past
/// the first parser: a harness whose every case fails at the JSON syntax
/// would test nothing else.
#[test]
fn mutated_graphs_reach_validation() {
    let seeds = Seeds::load().expect("seeds");
    let mut reached = 0;
    let mut total = 0;
    for i in 0..400 {
        let c = generate(&seeds, SEED, i);
        if c.kind != ingot_fuzz::case::Kind::Graph {
            continue;
        }
        total += 1;
        let text = String::from_utf8_lossy(&c.blobs[0]);
        if ingot_compiler::frontend::parse(&text, std::path::Path::new("g.json")).is_ok() {
            reached += 1;
        }
    }
    assert!(total > 50 && reached * 2 > total, "{reached} of {total}");
}
