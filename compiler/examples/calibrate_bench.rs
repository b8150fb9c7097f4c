//! Calibration throughput and peak memory.
//!
//! `cargo run --release -p ingot-compiler --example calibrate_bench` prints
//! one row per case: images per second (calibration images observed, per
//! wall-clock second, all passes included) and the process's peak resident
//! memory (`VmHWM` from `/proc/self/status`). Each case runs in a child
//! process of its own, so each peak belongs to one case only. Comparing 250
//! and 1,000 images of the same network shows that memory does not grow with
//! the number of images (histograms, not stored maps).
//!
//! Images are written as PNG files into a temporary folder (deterministic
//! pseudo-random pixels), so the figures include decoding.
//!
//! Optional argument: a comma-separated list of case names to run.

use ingot_compiler::calibrate::{CalibOptions, ImageSet, Method};
use ingot_testkit::zoo::{self, DenseConfig, Rng};
use std::path::Path;
use std::time::Instant;

struct Case {
    name: &'static str,
    images: usize,
    method: &'static str,
}

const CASES: &[Case] = &[
    Case {
        name: "dense96",
        images: 250,
        method: "kl",
    },
    Case {
        name: "dense96",
        images: 1000,
        method: "kl",
    },
    Case {
        name: "dense96",
        images: 1000,
        method: "minmax",
    },
    Case {
        name: "densenet121",
        images: 100,
        method: "percentile:99.99",
    },
];

fn net(name: &str) -> zoo::Net {
    match name {
        // The demo network's layout at 96x96.
        "dense96" => zoo::dense(
            &DenseConfig {
                input: [1, 96, 96],
                ..DenseConfig::demo()
            },
            1,
        ),
        "densenet121" => zoo::densenet121(1),
        _ => panic!("unknown network {name}"),
    }
}

fn write_images(dir: &Path, n: usize, c: usize, h: usize, w: usize) {
    let mut rng = Rng::new(42);
    for i in 0..n {
        // Smooth random blobs plus noise: closer to camera images than
        // white noise, cheap to make.
        let (fx, fy, ph) = (
            rng.range(0.02, 0.2),
            rng.range(0.02, 0.2),
            rng.range(0.0, 6.3),
        );
        let mut px = vec![0u8; h * w * c];
        for y in 0..h {
            for x in 0..w {
                for ch in 0..c {
                    let v = 127.0
                        + 100.0 * ((x as f32 * fx + ph + ch as f32).sin() * (y as f32 * fy).cos())
                        + 20.0 * rng.range(-1.0, 1.0);
                    px[(y * w + x) * c + ch] = v.clamp(0.0, 255.0) as u8;
                }
            }
        }
        let path = dir.join(format!("img{i:05}.png"));
        let color = if c == 1 {
            image::ExtendedColorType::L8
        } else {
            image::ExtendedColorType::Rgb8
        };
        image::save_buffer(&path, &px, w as u32, h as u32, color).expect("write image");
    }
}

fn peak_kib() -> u64 {
    let status = std::fs::read_to_string("/proc/self/status").unwrap_or_default();
    status
        .lines()
        .find_map(|l| l.strip_prefix("VmHWM:"))
        .and_then(|v| v.trim().trim_end_matches("kB").trim().parse().ok())
        .unwrap_or(0)
}

/// Runs one case in this process and prints `RESULT name images method ips peak_kib`.
fn child(name: &str, images: usize, method: &str) {
    let tmp = tempfile::tempdir().expect("temporary folder");
    let n = net(name);
    let graph_path = n.write(tmp.path(), name).expect("write net");
    drop(n);
    let graph = ingot_compiler::load(&graph_path).expect("load");
    let s = graph.input().shape;
    let img_dir = tmp.path().join("images");
    std::fs::create_dir(&img_dir).unwrap();
    write_images(&img_dir, images, s.c, s.h, s.w);
    let set = ImageSet::open(&img_dir, &graph).expect("list images");
    let opts = CalibOptions {
        method: method.parse::<Method>().unwrap(),
        ..CalibOptions::default()
    };
    let t = Instant::now();
    let cal = ingot_compiler::agree::run(&graph, &set, &opts).expect("calibrate");
    let secs = t.elapsed().as_secs_f64();
    assert_eq!(cal.ranges.images, images);
    println!(
        "RESULT {name} {images} {method} {:.2} {} {}",
        images as f64 / secs,
        peak_kib(),
        graph.map_count()
    );
}

fn main() {
    let args: Vec<String> = std::env::args().collect();
    if args.len() == 5 && args[1] == "--child" {
        child(&args[2], args[3].parse().unwrap(), &args[4]);
        return;
    }
    let only: Option<Vec<String>> = args
        .get(1)
        .map(|a| a.split(',').map(String::from).collect());
    println!("threads: {}", rayon::current_num_threads());
    println!(
        "{:<12} {:>6} {:>7} {:<17} {:>10} {:>12}",
        "network", "images", "maps", "method", "images/s", "peak MiB"
    );
    for c in CASES {
        if only
            .as_ref()
            .is_some_and(|o| !o.iter().any(|n| n == c.name))
        {
            continue;
        }
        let out = std::process::Command::new(&args[0])
            .args(["--child", c.name, &c.images.to_string(), c.method])
            .output()
            .expect("run child");
        let text = String::from_utf8_lossy(&out.stdout);
        let Some(line) = text.lines().find_map(|l| l.strip_prefix("RESULT ")) else {
            eprintln!(
                "case {} {} failed:\n{}",
                c.name,
                c.images,
                String::from_utf8_lossy(&out.stderr)
            );
            continue;
        };
        let f: Vec<&str> = line.split_whitespace().collect();
        let peak_mib = f[4].parse::<f64>().unwrap() / 1024.0;
        println!(
            "{:<12} {:>6} {:>7} {:<17} {:>10} {:>12.1}",
            f[0], f[1], f[5], f[2], f[3], peak_mib
        );
    }
}
