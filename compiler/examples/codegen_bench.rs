//! Generated-code benchmark; prints a table.
//!
//! `cargo run --release -p ingot-compiler --example codegen_bench [-- --quick]`
//!
//! * rustc time (release) to compile the generated module of a demo-sized
//!   dense network and of a DenseNet-121-shaped one, weights through
//!   `include_bytes!` + `const fn` vs literal arrays;
//! * host inference images/second of the generated module vs the float
//!   reference executor on the same architecture;
//! * instructions per image under `valgrind --tool=callgrind` (demo only);
//! * flash: weights-file bytes by section, checked against the parameter
//!   counts, and `.text` of the module and kernel objects (host, proxy).

use ingot_compiler::codegen::{generate, GenOptions, Schedule, WeightsMode};
use ingot_compiler::lower::QGraph;
use ingot_testkit::testnets;
use std::path::{Path, PathBuf};
use std::process::Command;
use std::time::Instant;

fn put(path: &Path, bytes: &[u8]) {
    std::fs::create_dir_all(path.parent().unwrap()).unwrap();
    std::fs::write(path, bytes).unwrap();
}

fn cargo(dir: &Path, target: &Path, args: &[&str]) -> std::process::Output {
    let out = Command::new(std::env::var("CARGO").unwrap_or_else(|_| "cargo".into()))
        .args(args)
        .current_dir(dir)
        .env("CARGO_TARGET_DIR", target)
        .output()
        .expect("cargo runs");
    assert!(
        out.status.success(),
        "cargo {args:?} failed:\n{}",
        String::from_utf8_lossy(&out.stderr)
    );
    out
}

const SPEED: &str = r#"use bench_crate::m;
fn main() {
    let n: usize = std::env::args().nth(1).map(|s| s.parse().unwrap()).unwrap_or(10);
    let mut s = Box::new(m::Scratch::new());
    let mut x = 12345u32;
    let input: Vec<i8> = (0..m::INPUT_LEN).map(|_| { x = x.wrapping_mul(1103515245).wrapping_add(12345); (x >> 16) as i8 }).collect();
    let input: &[i8; m::INPUT_LEN] = input.as_slice().try_into().unwrap();
    let mut out = [0i8; m::OUTPUT_LEN];
    let t = std::time::Instant::now();
    for _ in 0..n { m::run(&mut s, std::hint::black_box(input), &mut out); }
    let dt = t.elapsed().as_secs_f64();
    println!("{} {}", n as f64 / dt, m::argmax(&out));
}
"#;

struct Row {
    name: &'static str,
    params: usize,
    rustc_bytes: f64,
    rustc_literal: f64,
    ips: f64,
    float_ips: f64,
    instr: Option<u64>,
    weights: usize,
    sections: String,
    text_module: u64,
    text_rt: u64,
}

fn text_bytes(rlib: &Path) -> u64 {
    let out = Command::new("llvm-size").arg("-A").arg(rlib).output();
    let Ok(out) = out else { return 0 };
    String::from_utf8_lossy(&out.stdout)
        .lines()
        .filter(|l| l.starts_with(".text"))
        .filter_map(|l| l.split_whitespace().nth(1)?.parse::<u64>().ok())
        .sum()
}

fn callgrind(bin: &Path, n: usize) -> Option<u64> {
    let out = Command::new("valgrind")
        .args(["--tool=callgrind", "--callgrind-out-file=/dev/null"])
        .arg(bin)
        .arg(n.to_string())
        .output()
        .ok()?;
    let err = String::from_utf8_lossy(&out.stderr);
    let line = err.lines().find(|l| l.contains("Collected :"))?;
    line.split(':').next_back()?.trim().parse().ok()
}

fn float_ips(g: &ingot_compiler::Graph, input: &[f32], n: usize) -> f64 {
    let r = ingot_compiler::reference::Reference::new(g);
    r.run(input).unwrap();
    let t = Instant::now();
    for _ in 0..n {
        std::hint::black_box(r.run(input).unwrap());
    }
    n as f64 / t.elapsed().as_secs_f64()
}

fn bench(
    name: &'static str,
    q: &QGraph,
    float: &ingot_testkit::zoo::Net,
    runs: usize,
    root: &Path,
    grind: bool,
) -> Row {
    let dir = root.join("crate");
    let target = root.join("target");
    let rt = Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("../runtime-nostd")
        .canonicalize()
        .unwrap();
    put(
        &dir.join("Cargo.toml"),
        format!(
            "[package]\nname = \"bench-crate\"\nversion = \"0.0.0\"\nedition = \"2021\"\npublish = false\n\n[dependencies]\ningot-rt = {{ path = {:?} }}\n\n[workspace]\n\n[profile.release]\ndebug = false\n",
            rt.display().to_string()
        )
        .as_bytes(),
    );
    put(
        &dir.join("src/lib.rs"),
        b"#![no_std]\n#![forbid(unsafe_code)]\npub mod m {\n    include!(\"m.rs\");\n}\n",
    );
    put(&dir.join("src/bin/speed.rs"), SPEED.as_bytes());
    let s = Schedule::naive(q);
    let mut times = [0.0; 2];
    let mut generated = None;
    for (k, mode) in [WeightsMode::Literal, WeightsMode::IncludeBytes]
        .into_iter()
        .enumerate()
    {
        let g = generate(
            q,
            &s,
            &GenOptions {
                module: "m".into(),
                weights: mode,
                ..GenOptions::default()
            },
        )
        .unwrap();
        put(&dir.join("src/m.rs"), g.module.as_bytes());
        put(&dir.join("src/m.weights.bin"), &g.weights);
        // Warm: dependencies built, then time the module crate alone.
        cargo(
            &dir,
            &target,
            &["build", "--release", "--offline", "--lib", "-p", "ingot-rt"],
        );
        let t = Instant::now();
        cargo(&dir, &target, &["build", "--release", "--offline", "--lib"]);
        times[k] = t.elapsed().as_secs_f64();
        generated = Some(g);
    }
    let g = generated.unwrap();
    cargo(
        &dir,
        &target,
        &["build", "--release", "--offline", "--bin", "speed"],
    );
    let bin = target.join("release/speed");
    let out = Command::new(&bin).arg(runs.to_string()).output().unwrap();
    let ips: f64 = String::from_utf8_lossy(&out.stdout)
        .split_whitespace()
        .next()
        .unwrap()
        .parse()
        .unwrap();
    let instr = if grind {
        Some(
            callgrind(&bin, 3)
                .unwrap_or(0)
                .saturating_sub(callgrind(&bin, 1).unwrap_or(0))
                / 2,
        )
    } else {
        None
    };
    let fg = float.build();
    let fin = float.random_input(1);
    let sections = g
        .report
        .weights_sections
        .iter()
        .map(|(s, n)| format!("{s:?} {n}"))
        .collect::<Vec<_>>()
        .join(", ");
    Row {
        name,
        params: g.report.params,
        rustc_bytes: times[1],
        rustc_literal: times[0],
        ips,
        float_ips: float_ips(&fg, &fin, runs.clamp(1, 200)),
        instr,
        weights: g.weights.len(),
        sections,
        text_module: text_bytes(&target.join("release/libbench_crate.rlib")),
        text_rt: text_bytes(&target.join("release/libingot_rt.rlib")),
    }
}

fn main() {
    let quick = std::env::args().any(|a| a == "--quick");
    let root: PathBuf = std::env::var_os("CARGO_TARGET_DIR")
        .map(PathBuf::from)
        .unwrap_or_else(|| "target".into())
        .join("codegen-bench");
    // Absolute: the nested cargo runs in the bench crate's folder, where a
    // relative target directory would point somewhere else.
    let root = std::env::current_dir().expect("current dir").join(root);
    let mut rows = vec![bench(
        "demo-sized dense (1x64x64)",
        &testnets::demo_sized(),
        &ingot_testkit::zoo::dense_small(1),
        300,
        &root,
        true,
    )];
    if !quick {
        rows.push(bench(
            "densenet121 (3x224x224)",
            &testnets::densenet121(224),
            &ingot_testkit::zoo::densenet121(1),
            2,
            &root,
            false,
        ));
    }
    println!("| network | params | rustc include_bytes (s) | rustc literal (s) | int8 img/s | f32 ref img/s | ratio | instr/img | weights bytes | .text module | .text ingot-rt |");
    println!("|---|---:|---:|---:|---:|---:|---:|---:|---:|---:|---:|");
    for r in &rows {
        println!(
            "| {} | {} | {:.2} | {:.2} | {:.1} | {:.1} | {:.2} | {} | {} | {} | {} |",
            r.name,
            r.params,
            r.rustc_bytes,
            r.rustc_literal,
            r.ips,
            r.float_ips,
            r.ips / r.float_ips,
            r.instr.map(|i| i.to_string()).unwrap_or_else(|| "-".into()),
            r.weights,
            r.text_module,
            r.text_rt
        );
    }
    for r in &rows {
        println!("{}: weights file sections (bytes): {}", r.name, r.sections);
    }
}
