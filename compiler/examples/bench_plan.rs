//! Memory-planner benchmark: one row per network of the test set.
//!
//! `cargo run --release -p ingot-compiler --example bench_plan`

use ingot_compiler::lower::QGraph;
use ingot_compiler::plan::{self, synth, PlanOptions};
use std::time::Instant;

fn row(q: &QGraph) {
    let opts = PlanOptions { verify: false, ..PlanOptions::default() };
    let mut times = Vec::new();
    let mut p = None;
    for _ in 0..5 {
        let t = Instant::now();
        p = Some(plan::plan(q, &opts).expect("plan"));
        times.push(t.elapsed().as_secs_f64());
    }
    times.sort_by(f64::total_cmp);
    let p = p.expect("ran");
    plan::verify::verify(q, &p).expect("verified");
    println!(
        "| {:<20} | {:>4} | {:>5} | {:>10} | {:>10} | {:>6.4} | {:>11} | {:>10} | {:>6.1}% | {:>10} | {:>10} | {:>9.2} |",
        q.name,
        q.maps.len(),
        q.steps.len(),
        p.arena_bytes,
        p.lower_bound,
        p.ratio(),
        p.naive_bytes,
        p.copying_bytes,
        100.0 * p.arena_bytes as f64 / p.copying_bytes.max(1) as f64,
        p.order_peak_before,
        p.order_peak_after,
        times[times.len() / 2] * 1e3,
    );
}

fn main() {
    println!("| network              | maps | steps |      arena |  lower bd. |  ratio |       naive |    copying | in-pl/cp | peak file  | peak order |   plan ms |");
    println!("|----------------------|-----:|------:|-----------:|-----------:|-------:|------------:|-----------:|---------:|-----------:|-----------:|----------:|");
    for q in synth::test_set() {
        row(&q);
    }
}
