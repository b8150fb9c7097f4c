//! Link-time proof that a generated module's inference path cannot panic.
//!
//! The demo's module and every zoo network's module are built for
//! `thumbv7em-none-eabihf` (paired weights, as for Cortex-M4/M7) and
//! `thumbv6m-none-eabi` (int8 weights, as for Cortex-M0+), in release, as
//! the panic probe of `check::panic_probe`: one inference, linked with a
//! panic handler that calls a function defined nowhere. Any panic path
//! left in `run`, `quantize_pixels`, `argmax` or the `ingot-rt` kernels
//! they reach keeps that call alive and fails the link (the "panic never"
//! technique, common practice in embedded Rust).
//!
//! Modules with int16 (`--wide`) maps are held to the same
//! (`wide_modules_link_without_panic_paths`).
//!
//! The 121-layer network is left out by default (it reaches no kernel the
//! smaller dense network does not, and its module adds tens of seconds of
//! rustc); `INGOT_PANIC_NEVER_LARGE=1` adds it.
//!
//! Needs the two Rust targets; without them the test prints a notice and
//! passes, unless `INGOT_REQUIRE_EMULATION=1` (set by CI).

use ingot_compiler::check::panic_probe::{build_probe, panic_sites, Handler};
use ingot_compiler::check::runner::{require_rust_target, BuildConfig};
use ingot_compiler::check::ModuleFiles;
use ingot_compiler::codegen::{generate, GenOptions, WeightForm};
use ingot_compiler::driver::{compile, schedule_of, BuildInputs, RangesSource};
use ingot_compiler::lower::QGraph;
use ingot_compiler::lower::{lower, LowerOptions};
use ingot_compiler::plan::{plan, PlanOptions, Schedule};
use ingot_testkit::zoo;
use std::path::{Path, PathBuf};

/// The targets and the weight form their cores use.
const TARGETS: [(&str, WeightForm); 2] = [
    ("thumbv7em-none-eabihf", WeightForm::Words),
    ("thumbv6m-none-eabi", WeightForm::Int8),
];

fn targets_or_skip() -> bool {
    for (t, _) in TARGETS {
        if let Err(e) = require_rust_target(t) {
            if std::env::var("INGOT_REQUIRE_EMULATION").is_ok_and(|v| v == "1") {
                panic!("Rust target required (INGOT_REQUIRE_EMULATION=1): {e}");
            }
            eprintln!("skipping the panic-never check: {e}");
            return false;
        }
    }
    true
}

/// Every zoo network: the one place this test names them.
fn zoo_nets() -> Vec<(&'static str, zoo::Net)> {
    let mut v = vec![
        (
            "zoo_plain",
            zoo::plain_stack(&zoo::PlainStackConfig::default(), 11),
        ),
        ("zoo_dense", zoo::dense_small(12)),
        (
            "zoo_residual",
            zoo::residual(&zoo::ResidualConfig::default(), 13),
        ),
        (
            "zoo_depthwise",
            zoo::depthwise_separable(&zoo::DepthwiseConfig::default(), 14),
        ),
        (
            "zoo_inverted",
            zoo::inverted_residual(&zoo::InvertedResidualConfig::default(), 16),
        ),
    ];
    if std::env::var("INGOT_PANIC_NEVER_LARGE").is_ok_and(|v| v == "1") {
        v.push(("zoo_densenet121", zoo::densenet121(15)));
    }
    v
}

fn write_module(dir: &Path, files: Vec<(String, Vec<u8>)>, name: &str) -> ModuleFiles {
    std::fs::create_dir_all(dir).unwrap();
    for (f, bytes) in files {
        std::fs::write(dir.join(f), bytes).unwrap();
    }
    ModuleFiles::find(dir, Some(name)).unwrap()
}

fn out_dir() -> PathBuf {
    let d = Path::new(env!("CARGO_TARGET_TMPDIR")).join("panic-never");
    std::fs::create_dir_all(&d).unwrap();
    d
}

/// Builds the never-panic probe of `module` for `triple`; on failure also
/// builds the counting probe so the message lists the panic sites left.
fn assert_links(module: &ModuleFiles, triple: &str, cfg: &BuildConfig) {
    if let Err(e) = build_probe(module, triple, Handler::Never, cfg) {
        let sites = build_probe(module, triple, Handler::Count, cfg)
            .and_then(|elf| panic_sites(&elf))
            .map(|s| format!("{:?}", s.by_target))
            .unwrap_or_else(|e| e.to_string());
        panic!(
            "module `{}` for {triple} keeps a panic path: {e}\npanic sites: {sites}",
            module.name
        );
    }
}

/// Generates `name` with weight form `form`, writes it and asserts that it
/// links for `triple` without a panic path.
fn generate_and_link(
    name: &str,
    q: &QGraph,
    s: &Schedule,
    form: WeightForm,
    triple: &str,
    cfg: &BuildConfig,
) {
    let gen = generate(
        q,
        s,
        &GenOptions {
            module: name.into(),
            weight_form: form,
            ..GenOptions::default()
        },
    )
    .unwrap();
    let m = write_module(
        &out_dir().join(format!("{name}-{triple}")),
        gen.files(name),
        name,
    );
    assert_links(&m, triple, cfg);
}

fn cfg() -> BuildConfig {
    BuildConfig {
        build_dir: out_dir().join("build"),
        ..BuildConfig::default()
    }
}

#[test]
fn demo_module_links_without_panic_paths() {
    if !targets_or_skip() {
        return;
    }
    let root = Path::new(env!("CARGO_MANIFEST_DIR")).join("..");
    let model = root.join("examples/demo/model");
    let cfg = cfg();
    for (triple, form) in TARGETS {
        let mut req = BuildInputs::new(
            model.join("brackets.graph.json"),
            RangesSource::File(model.join("brackets.ranges.json")),
        );
        req.module = "brackets".into();
        req.weight_form = Some(form);
        let c = compile(&req).unwrap();
        let m = write_module(
            &out_dir().join(format!("demo-{triple}")),
            c.files("brackets"),
            "brackets",
        );
        assert_links(&m, triple, &cfg);
    }
}

#[test]
fn zoo_modules_link_without_panic_paths() {
    if !targets_or_skip() {
        return;
    }
    let cfg = cfg();
    for (name, net) in zoo_nets() {
        let g = net.build();
        let q = lower(&g, &net.minmax_ranges(), &LowerOptions::default()).unwrap();
        let p = plan(&q, &PlanOptions::default()).unwrap();
        let s = schedule_of(&q, &p);
        for (triple, form) in TARGETS {
            generate_and_link(name, &q, &s, form, triple, &cfg);
        }
    }
}

/// Modules with int16 (`--wide`) maps: the demo with both dense blocks
/// and the transition layer widened (int16 convolution, pooling, channel
/// transform, in-place concatenation), the residual network with an int16
/// addition and projection, the depthwise network with an int16
/// depthwise convolution and a pooling read by the linear layer.
#[test]
fn wide_modules_link_without_panic_paths() {
    if !targets_or_skip() {
        return;
    }
    let cfg = cfg();
    let root = Path::new(env!("CARGO_MANIFEST_DIR")).join("..");
    let model = root.join("examples/demo/model");
    let demo = ingot_compiler::load(&model.join("brackets.graph.json")).unwrap();
    let demo_ranges =
        ingot_compiler::ranges::Ranges::load(&demo, &model.join("brackets.ranges.json"), None)
            .unwrap();
    let residual = zoo::residual(&zoo::ResidualConfig::default(), 13);
    let depthwise = zoo::depthwise_separable(&zoo::DepthwiseConfig::default(), 14);
    let nets = [
        (
            "wide_demo",
            demo,
            demo_ranges,
            &["stem", "t1.conv", "t1.pool"][..],
        ),
        (
            "wide_residual",
            residual.build(),
            residual.minmax_ranges(),
            &["block1.add", "block2.shortcut.conv"][..],
        ),
        (
            "wide_depthwise",
            depthwise.build(),
            depthwise.minmax_ranges(),
            &["block2.dw", "pool"][..],
        ),
    ];
    for (name, g, r, wide) in nets {
        let opts = LowerOptions {
            wide: wide.iter().map(|s| s.to_string()).collect(),
            ..LowerOptions::default()
        };
        let q = lower(&g, &r, &opts).unwrap();
        assert!(!q.wide.is_empty());
        for (triple, form) in TARGETS {
            let p = plan(
                &q,
                &PlanOptions {
                    weight_form: form,
                    ..PlanOptions::default()
                },
            )
            .unwrap();
            generate_and_link(name, &q, &schedule_of(&q, &p), form, triple, &cfg);
        }
    }
}

#[test]
fn counting_probe_finds_a_planted_panic() {
    // The check must be able to fail: a module whose `argmax` indexes out
    // of the output (`OUTPUT_LEN + k` with `k` opaque) keeps a bounds check.
    if !targets_or_skip() {
        return;
    }
    let dir = out_dir().join("planted");
    std::fs::create_dir_all(&dir).unwrap();
    std::fs::write(
        dir.join("planted.rs"),
        "pub const INPUT_LEN: usize = 4;\npub const OUTPUT_LEN: usize = 2;\n\
         pub struct Scratch;\nimpl Scratch { pub const fn new() -> Self { Scratch } }\n\
         pub fn quantize_pixels(_: &[u8; INPUT_LEN], _: &mut [i8; INPUT_LEN]) {}\n\
         pub fn run(_: &mut Scratch, i: &[i8; INPUT_LEN], o: &mut [i8; OUTPUT_LEN]) { o[0] = i[0]; }\n\
         pub fn argmax(o: &[i8; OUTPUT_LEN]) -> usize { o[core::hint::black_box(5)] as usize }\n",
    )
    .unwrap();
    let m = ModuleFiles::find(&dir, Some("planted")).unwrap();
    let cfg = cfg();
    let (triple, _) = TARGETS[0];
    assert!(build_probe(&m, triple, Handler::Never, &cfg).is_err());
    let sites = panic_sites(&build_probe(&m, triple, Handler::Count, &cfg).unwrap()).unwrap();
    assert!(sites.total >= 1, "{sites:?}");
}
