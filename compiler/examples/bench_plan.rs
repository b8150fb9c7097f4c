//! Memory-planner benchmark: one row per network of the test set.
//!
//! `cargo run --release -p ingot-compiler --example bench_plan [SVG_DIR]`
//!
//! With `SVG_DIR`, also writes `<network>.svg` pictures of every plan.
//!
//! `unfused bd.` is the lower bound with every map stored whole (the plan
//! without row streaming); `arena` and `lower bd.` are the fused plan's,
//! `pipes`/`rings` what it streams.

use ingot_compiler::lower::QGraph;
use ingot_compiler::plan::{self, PlanOptions};
use ingot_testkit::synth;
use std::time::Instant;

fn row(q: &QGraph, svg: Option<&std::path::Path>) {
    let opts = PlanOptions {
        verify: false,
        ..PlanOptions::default()
    };
    let mut times = Vec::new();
    let mut p = None;
    for _ in 0..5 {
        let t = Instant::now();
        p = Some(plan::plan(q, &opts).expect("plan"));
        times.push(t.elapsed().as_secs_f64());
    }
    times.sort_by(f64::total_cmp);
    let p = p.expect("ran");
    plan::verify(q, &p).expect("verified");
    if let Some(dir) = svg {
        let picture = plan::render_svg(q, &p).expect("svg");
        std::fs::write(
            dir.join(format!("{}.svg", q.name.replace('/', "_"))),
            picture,
        )
        .expect("svg written");
    }
    println!(
        "| {:<25} | {:>4} | {:>5} | {:>11} | {:>10} | {:>10} | {:>5} | {:>5} | {:>6.4} | {:>11} | {:>10} | {:>6.1}% | {:>10} | {:>10} | {:>9.2} |",
        q.name,
        q.maps.len(),
        q.steps.len(),
        p.unfused_bound,
        p.arena_bytes,
        p.lower_bound,
        p.pipelines.len(),
        p.pipelines.iter().map(|x| x.rings.len()).sum::<usize>(),
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
    println!("| network                   | maps | steps | unfused bd. |      arena |  lower bd. | pipes | rings |  ratio |       naive |    copying | in-pl/cp | peak file  | peak order |   plan ms |");
    println!("|---------------------------|-----:|------:|------------:|-----------:|-----------:|------:|------:|-------:|------------:|-----------:|---------:|-----------:|-----------:|----------:|");
    let svg = std::env::args().nth(1).map(std::path::PathBuf::from);
    for q in synth::zoo_lowered().iter().chain(&synth::test_set()) {
        row(q, svg.as_deref());
    }
}
