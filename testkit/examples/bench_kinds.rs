//! Instructions per MAC by layer kind for the two zoo networks of the
//! kernel work, on emulated Cortex-M cores:
//!
//! ```text
//! cargo run --release -p ingot-testkit --example bench_kinds -- \
//!     [--on m4,m7,m33,m33+dsp,m0plus] [--all] [--weight-form int8|words|pairs] [--no-stream] [--images N] [--out DIR]
//! ```
//!
//! The networks are `depthwise_separable(&DepthwiseConfig::howard2017(0.25))`
//! (Howard et al. 2017 layout) and
//! `inverted_residual(&InvertedResidualConfig::sandler2018(0.35))` (Sandler
//! et al. 2018 layout), both 96×96 gray with deterministic weights, written
//! with deterministic gray pictures into `--out` (default
//! `target/bench-kinds`). Each is calibrated on those pictures (min/max)
//! and run through `ingot check --on CORE` by the library, the way the
//! command line does it (weight form of the core, no target profile, no
//! accuracy gates); the table is the check report's own instruction counts
//! by kind (`report.md`, "Instruction counts"), with the stem told apart.
//!
//! Cores: `m0plus`, `m3`, `m4`, `m7`, `m33` (plain `thumbv8m.main`, the
//! portable twins of the DSP wrappers), `m33+dsp` (the same with
//! `-C target-feature=+dsp` for the runner's whole build, so `ingot-dsp`
//! emits the instructions; rustc warns that the feature is unstable), and
//! `host` (no instruction counts; a quick look that everything builds).
//! Default `m4`; `--all` is `m4,m7,m33,m33+dsp,m0plus`. `--weight-form`
//! forces one convolution weight form on every core (default: each
//! core's, as `ingot check --on CORE` chooses: words on M4/M7, int8
//! elsewhere); `--no-stream` turns row streaming off, as `check
//! --no-stream` (a row pipeline's instructions count against its first
//! step, so the per-kind columns are per kind only without streaming;
//! the whole-inference figure is right either way); `--images` sets how many pictures are checked (default 2;
//! instruction counts vary little between pictures). Needs the Rust
//! toolchain, the thumb targets and `qemu-system-arm`
//! (`.ci/install-emulation.sh`). A bench, not a test: nothing is asserted
//! about the figures.

use ingot_compiler::check::runner::{default_build_dir, BuildConfig};
use ingot_compiler::check::RunOn;
use ingot_testkit::kinds::{self, KindRow, Setup};
use ingot_testkit::zoo::{
    depthwise_separable, inverted_residual, write_gray_pictures, DepthwiseConfig,
    InvertedResidualConfig, Net,
};
use std::path::{Path, PathBuf};

/// The variable cargo reads the Cortex-M33 runner's rustflags from; the
/// check harness clears `RUSTFLAGS` for its nested builds but not this.
const M33_FLAGS: &str = "CARGO_TARGET_THUMBV8M_MAIN_NONE_EABIHF_RUSTFLAGS";

struct Options {
    cores: Vec<String>,
    setup: Setup,
    images: usize,
    out: PathBuf,
}

fn usage() -> ! {
    eprintln!(
        "usage: bench_kinds [--on CORE[,CORE...]] [--all] [--weight-form int8|words|pairs] [--no-stream] [--images N] [--out DIR]\n\
         cores: host, m0plus, m3, m4, m7, m33, m33+dsp"
    );
    std::process::exit(2)
}

fn options() -> Options {
    let mut o = Options {
        cores: vec!["m4".into()],
        setup: Setup::default(),
        images: 2,
        out: PathBuf::from(env!("CARGO_MANIFEST_DIR"))
            .join("..")
            .join("target")
            .join("bench-kinds"),
    };
    let mut args = std::env::args().skip(1);
    while let Some(a) = args.next() {
        match a.as_str() {
            "--on" => {
                let v = args.next().unwrap_or_else(|| usage());
                o.cores = v.split(',').map(str::to_string).collect();
            }
            "--all" => {
                o.cores = ["m4", "m7", "m33", "m33+dsp", "m0plus"]
                    .map(String::from)
                    .to_vec()
            }
            "--weight-form" => {
                o.setup.weight_form = Some(
                    args.next()
                        .and_then(|v| v.parse().ok())
                        .unwrap_or_else(|| usage()),
                )
            }
            "--no-stream" => o.setup.stream = false,
            "--images" => {
                o.images = args
                    .next()
                    .and_then(|v| v.parse().ok())
                    .filter(|&n| n > 0)
                    .unwrap_or_else(|| usage())
            }
            "--out" => o.out = args.next().map(PathBuf::from).unwrap_or_else(|| usage()),
            _ => usage(),
        }
    }
    for c in &o.cores {
        if c != "m33+dsp" && RunOn::parse(c).is_none() {
            eprintln!("unknown core `{c}`");
            usage();
        }
    }
    o
}

/// Writes the network and its pictures into `dir`; returns the graph file.
fn write(net: &Net, dir: &Path, stem: &str, images: usize) -> PathBuf {
    std::fs::create_dir_all(dir).expect("create the bench folder");
    let graph = net.write(dir, stem).expect("write the network");
    let [_, h, w] = net.file.input.shape[..] else {
        panic!("zoo input is [C, H, W]")
    };
    write_gray_pictures(&dir.join("images"), w, h, images, 7).expect("write the pictures");
    graph
}

/// One network on one core; `m33+dsp` builds with the DSP extension in a
/// build folder of its own, so the plain M33 build stays cached.
fn run(graph: &Path, dir: &Path, core: &str, form: Setup) -> Result<KindRow, kinds::BenchError> {
    let images = dir.join("images");
    if core == "m33+dsp" {
        let before = std::env::var_os(M33_FLAGS);
        std::env::set_var(M33_FLAGS, "-C target-feature=+dsp");
        let build = BuildConfig {
            build_dir: default_build_dir().join("m33-dsp"),
            ..BuildConfig::default()
        };
        let r = kinds::measure(graph, &images, RunOn::M33, core, form, build, dir);
        match before {
            Some(v) => std::env::set_var(M33_FLAGS, v),
            None => std::env::remove_var(M33_FLAGS),
        }
        return r;
    }
    let on = RunOn::parse(core).expect("checked in options()");
    kinds::measure(graph, &images, on, core, form, BuildConfig::default(), dir)
}

fn main() {
    let o = options();
    let nets = [
        (
            "howard2017",
            "depthwise-separable, Howard et al. (2017) layout, width 0.25, 96×96 gray",
            depthwise_separable(&DepthwiseConfig::howard2017(0.25), 1),
        ),
        (
            "sandler2018",
            "inverted residual, Sandler et al. (2018) layout, width 0.35, 96×96 gray",
            inverted_residual(&InvertedResidualConfig::sandler2018(0.35), 1),
        ),
    ];
    let mut failed = false;
    for (stem, title, net) in &nets {
        let dir = o.out.join(stem);
        let graph = write(net, &dir, stem, o.images);
        let mut rows = Vec::new();
        for core in &o.cores {
            eprintln!("{stem} on {core} ...");
            match run(&graph, &dir, core, o.setup) {
                Ok(r) => rows.push(r),
                Err(e) => {
                    eprintln!("{stem} on {core}: {e}");
                    failed = true;
                }
            }
        }
        println!("{}", kinds::table(title, &rows));
    }
    println!(
        "Instructions executed on the emulated core (QEMU `-icount shift=0`), not cycles; \
         kinds without MACs (add, pool, other) as their share of the traced instructions; \
         flash and RAM of the check's firmware ELF (runner included)."
    );
    if failed {
        std::process::exit(1);
    }
}
