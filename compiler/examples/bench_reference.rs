//! Throughput of the float reference, printed as a table.
//!
//! ```text
//! cargo run --release -p ingot-compiler --example bench_reference [-- --quick | --profile]
//! ```
//!
//! `--profile` prints the time per op kind instead.
//!
//! For each network: images per second of `Reference::run` on one image at
//! a time, and of `Reference::run_batch` (rayon, one image per task) on a
//! batch. Every figure is the median over several repetitions.

use ingot_compiler::reference::Reference;
use ingot_testkit::zoo::{self, Net};
use std::time::Instant;

fn median(mut v: Vec<f64>) -> f64 {
    v.sort_by(|a, b| a.total_cmp(b));
    let n = v.len();
    if n % 2 == 1 {
        v[n / 2]
    } else {
        (v[n / 2 - 1] + v[n / 2]) / 2.0
    }
}

/// Median images/second of single runs and of batched runs.
fn bench(net: &Net, single_reps: usize, batch: usize, batch_reps: usize) -> (f64, f64) {
    let g = net.build();
    let r = Reference::new(&g);
    let x = net.random_input(1);
    r.run(&x).unwrap(); // warm-up
    let single: Vec<f64> = (0..single_reps)
        .map(|_| {
            let t = Instant::now();
            std::hint::black_box(r.run(std::hint::black_box(&x)).unwrap());
            1.0 / t.elapsed().as_secs_f64()
        })
        .collect();
    let xs: Vec<Vec<f32>> = (0..batch as u64).map(|s| net.random_input(s)).collect();
    r.run_batch(&xs).unwrap(); // warm-up
    let batched: Vec<f64> = (0..batch_reps)
        .map(|_| {
            let t = Instant::now();
            std::hint::black_box(r.run_batch(std::hint::black_box(&xs)).unwrap());
            batch as f64 / t.elapsed().as_secs_f64()
        })
        .collect();
    (median(single), median(batched))
}

/// Median time per op kind over `reps` runs, measured between the
/// visitor's calls (each call follows one layer).
fn profile(net: &Net, reps: usize) {
    let g = net.build();
    let r = Reference::new(&g);
    let x = net.random_input(1);
    let mut per_layer: Vec<Vec<f64>> = vec![Vec::new(); g.layers().len()];
    for _ in 0..reps {
        let mut last = Instant::now();
        r.run_with(&x, |m, _| {
            let now = Instant::now();
            if let Some(l) = m.producer() {
                per_layer[l.index()].push((now - last).as_secs_f64());
            }
            last = now;
        })
        .unwrap();
    }
    let mut by_op: std::collections::BTreeMap<&str, f64> = Default::default();
    for (l, times) in g.layers().iter().zip(per_layer) {
        *by_op.entry(l.op.kind()).or_default() += median(times);
    }
    let total: f64 = by_op.values().sum();
    println!("  {}: {:.2} ms per image", g.name(), total * 1e3);
    for (op, t) in by_op {
        println!(
            "    {op:<16} {:>8.3} ms {:>5.1}%",
            t * 1e3,
            100.0 * t / total
        );
    }
}

fn main() {
    let quick = std::env::args().any(|a| a == "--quick");
    if std::env::args().any(|a| a == "--profile") {
        println!("time per op kind (median per layer, summed):");
        profile(&zoo::dense_small(1), 21);
        profile(&zoo::densenet121(1), 3);
        return;
    }
    let threads = rayon::current_num_threads();
    println!("float reference throughput (median of repetitions), rayon threads: {threads}");
    println!();
    println!(
        "{:<28} {:>12} {:>14} {:>8} {:>16}",
        "network", "GMACs/img", "single img/s", "batch", "batched img/s"
    );
    let cases: Vec<(&str, Net, usize, usize, usize)> = vec![
        (
            "dense_small 1x64x64",
            zoo::dense_small(1),
            if quick { 5 } else { 51 },
            32,
            if quick { 3 } else { 9 },
        ),
        (
            "densenet121 3x224x224",
            zoo::densenet121(1),
            if quick { 1 } else { 5 },
            4,
            if quick { 1 } else { 3 },
        ),
    ];
    for (name, net, reps, batch, batch_reps) in cases {
        let g = net.build();
        let macs = ingot_compiler::graph::cost::total_cost(&g).macs as f64 / 1e9;
        let (single, batched) = bench(&net, reps, batch, batch_reps);
        println!("{name:<28} {macs:>12.3} {single:>14.1} {batch:>8} {batched:>16.1}");
    }
}
