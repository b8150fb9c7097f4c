//! Checks of the generated modules: compiled as a real `#![no_std]`,
//! `#![forbid(unsafe_code)]` crate with cargo, run on inputs, and compared
//! bit for bit (outputs and every intermediate map, through the trace hook)
//! with the compiler's interpretation of the same schedule through the
//! `ingot-rt` kernels; plus determinism, hostile names, literal mode, an
//! in-place concatenation schedule, the thumbv7em build and a snapshot.
//!
//! The zoo networks are lowered with min/max ranges of the float reference
//! on random inputs, scheduled by the memory planner, and compared with the
//! integer simulator (`lower::sim`) instead.
//!
//! All networks go into one generated crate, built once per test run.

use ingot_compiler::codegen::{
    self, generate, GenOptions, MapView, Schedule, WeightForm, WeightsMode,
};
use ingot_compiler::driver::schedule_of;
use ingot_compiler::lower::{lower, LowerOptions, QGraph, QKernel, SimInput, Simulator};
use ingot_compiler::plan::{plan, PlanOptions};
use ingot_testkit::{testnets, zoo};
use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use std::process::Command;
use std::sync::OnceLock;

const INPUTS: usize = 6;

/// Deterministic pseudo-random inputs of one network.
fn inputs(q: &QGraph, seed: u64) -> Vec<Vec<i8>> {
    let n = q.map(q.input).shape.len();
    let mut s = seed.wrapping_mul(0x9e37_79b9_7f4a_7c15) | 1;
    (0..INPUTS)
        .map(|k| {
            (0..n)
                .map(|_| {
                    s ^= s << 13;
                    s ^= s >> 7;
                    s ^= s << 17;
                    match k {
                        0 => -128,
                        1 => 127,
                        _ => (s >> 24) as u8 as i8,
                    }
                })
                .collect()
        })
        .collect()
}

/// Every map of a step in the schedule: `(step index, map name)` → values.
type Trace = BTreeMap<(usize, usize), Vec<i8>>;

#[derive(Clone)]
struct Net {
    module: String,
    q: QGraph,
    schedule: Schedule,
    weights: WeightsMode,
    /// Convolution weight form.
    form: WeightForm,
    /// Expected values from the integer simulator (else the interpreter).
    sim: bool,
}

impl Net {
    fn new(module: &str, q: QGraph) -> Net {
        let schedule = Schedule::naive(&q);
        Net {
            module: module.into(),
            q,
            schedule,
            weights: WeightsMode::IncludeBytes,
            form: WeightForm::Int8,
            sim: false,
        }
    }

    /// A zoo network: calibrated, lowered, planned; checked against the
    /// simulator.
    fn zoo(module: &str, net: zoo::Net) -> Net {
        let g = net.build();
        let q = lower(&g, &net.minmax_ranges(), &LowerOptions::default()).unwrap();
        let p = plan(&q, &PlanOptions::default()).unwrap();
        let schedule = schedule_of(&q, &p);
        Net {
            module: module.into(),
            q,
            schedule,
            weights: WeightsMode::IncludeBytes,
            form: WeightForm::Int8,
            sim: true,
        }
    }

    /// The simulator's output and every step's map (in schedule order).
    fn simulated(&self) -> Vec<(Vec<i8>, Trace)> {
        let mut sim = Simulator::new(&self.q);
        inputs(&self.q, 7)
            .iter()
            .enumerate()
            .map(|(k, x)| {
                let out = sim.run(SimInput::Codes(x)).unwrap();
                let t = self
                    .schedule
                    .order
                    .iter()
                    .enumerate()
                    .map(|(i, &st)| {
                        // A map stored as a ring is traced empty.
                        let m = self.q.step(st).output;
                        let v = match self.schedule.ring_rows(m) {
                            Some(_) => Vec::new(),
                            None => sim.map_hwc(m),
                        };
                        ((k, i), v)
                    })
                    .collect();
                (out, t)
            })
            .collect()
    }

    /// The expected output and trace for every input.
    fn expected(&self) -> Vec<(Vec<i8>, Trace)> {
        if self.sim {
            return self.simulated();
        }
        inputs(&self.q, 7)
            .iter()
            .enumerate()
            .map(|(k, x)| {
                let mut t = Trace::new();
                let mut i = 0;
                let out = codegen::interpret(&self.q, &self.schedule, x, &mut |_, m| {
                    t.insert((k, i), m.to_vec());
                    i += 1;
                })
                .unwrap();
                (out, t)
            })
            .collect()
    }
}

/// A schedule where every concatenation is in place: producers write
/// channel views of the concatenation's region (pixel stride = total
/// channels), nested regions included.
fn inplace_schedule(q: &QGraph) -> Schedule {
    let mut views: Vec<Option<MapView>> = vec![None; q.maps.len()];
    let mut at = 0;
    let mut fresh = |c: usize, len: usize| {
        let v = MapView {
            offset: at,
            stride: c,
        };
        at += len;
        v
    };
    for st in q.steps.iter().rev() {
        if !matches!(st.kernel, QKernel::Concat) {
            continue;
        }
        let o = q.map(st.output).shape;
        let ov = *views[st.output.index()].get_or_insert_with(|| fresh(o.c, o.len()));
        let mut c0 = 0;
        for &m in &st.inputs {
            views[m.index()] = Some(MapView {
                offset: ov.offset + c0,
                stride: ov.stride,
            });
            c0 += q.map(m).shape.c;
        }
    }
    let views: Vec<MapView> = q
        .maps
        .iter()
        .zip(views)
        .map(|(m, v)| v.unwrap_or_else(|| fresh(m.shape.c, m.shape.len())))
        .collect();
    let mut s = Schedule::naive(q);
    s.views = views;
    s.arena_bytes = at;
    s.copy_concats.clear();
    s
}

/// The zoo networks, built once (calibration and planning take a moment).
fn zoo_nets() -> &'static [Net] {
    static Z: OnceLock<Vec<Net>> = OnceLock::new();
    Z.get_or_init(|| {
        let small_dense = zoo::DenseConfig {
            input: [1, 24, 24],
            ..zoo::DenseConfig::demo()
        };
        vec![
            Net::zoo(
                "zoo_plain",
                zoo::plain_stack(&zoo::PlainStackConfig::default(), 11),
            ),
            Net::zoo("zoo_dense", zoo::dense(&small_dense, 12)),
            Net::zoo(
                "zoo_residual",
                zoo::residual(
                    &zoo::ResidualConfig {
                        input: [3, 16, 16],
                        ..zoo::ResidualConfig::default()
                    },
                    13,
                ),
            ),
            Net::zoo(
                "zoo_depthwise",
                zoo::depthwise_separable(
                    &zoo::DepthwiseConfig {
                        input: [3, 16, 16],
                        ..zoo::DepthwiseConfig::default()
                    },
                    14,
                ),
            ),
        ]
    })
}

fn nets() -> Vec<Net> {
    let dense = testnets::dense();
    let mut lit = Net::new("plain_literal", testnets::plain());
    lit.weights = WeightsMode::Literal;
    let mut inplace = Net::new("dense_inplace", dense.clone());
    inplace.schedule = inplace_schedule(&dense);
    // The paired weight form (Cortex-M4/M7 kernels), from the weights file
    // and from literal arrays, beside grouped convolutions that stay int8.
    let paired = |module: &str, q: QGraph, weights: WeightsMode| Net {
        form: WeightForm::Pairs,
        weights,
        ..Net::new(module, q)
    };
    let mut zoo_dense_pairs = zoo_nets()[1].clone();
    zoo_dense_pairs.module = "zoo_dense_pairs".into();
    zoo_dense_pairs.form = WeightForm::Pairs;
    // The word form (int8 weights widened in registers), the same way.
    let words = |module: &str, q: QGraph, weights: WeightsMode| Net {
        form: WeightForm::Words,
        weights,
        ..Net::new(module, q)
    };
    let mut zoo_dense_words = zoo_nets()[1].clone();
    zoo_dense_words.module = "zoo_dense_words".into();
    zoo_dense_words.form = WeightForm::Words;
    vec![
        Net::new("plain", testnets::plain()),
        Net::new("dense", dense),
        Net::new("residual", testnets::residual()),
        Net::new("depthwise", testnets::depthwise()),
        Net::new("hostile", testnets::hostile_names()),
        lit,
        inplace,
        paired("dense_pairs", testnets::dense(), WeightsMode::IncludeBytes),
        paired(
            "plain_pairs_literal",
            testnets::plain(),
            WeightsMode::Literal,
        ),
        paired(
            "depthwise_pairs",
            testnets::depthwise(),
            WeightsMode::IncludeBytes,
        ),
        zoo_dense_pairs,
        words("dense_words", testnets::dense(), WeightsMode::IncludeBytes),
        words(
            "plain_words_literal",
            testnets::plain(),
            WeightsMode::Literal,
        ),
        words(
            "depthwise_words",
            testnets::depthwise(),
            WeightsMode::IncludeBytes,
        ),
        zoo_dense_words,
    ]
    .into_iter()
    .chain(zoo_nets().iter().cloned())
    .collect()
}

fn rt_path() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("../runtime-nostd")
        .canonicalize()
        .unwrap()
}

/// Writes `bytes` only when they differ, keeping mtimes (and cargo's cache)
/// for unchanged files.
fn put(path: &Path, bytes: &[u8]) {
    if std::fs::read(path).ok().as_deref() != Some(bytes) {
        std::fs::create_dir_all(path.parent().unwrap()).unwrap();
        std::fs::write(path, bytes).unwrap();
    }
}

struct Built {
    dir: PathBuf,
    target: PathBuf,
    /// module → per input: (output, trace from run_traced, argmax)
    runs: BTreeMap<String, Vec<(Vec<i8>, Trace, usize)>>,
    /// module → quantized pixels of the pixel input
    pixels: BTreeMap<String, Vec<i8>>,
}

fn hex_decode(s: &str) -> Vec<i8> {
    (0..s.len() / 2)
        .map(|i| u8::from_str_radix(&s[2 * i..2 * i + 2], 16).unwrap() as i8)
        .collect()
}

fn build() -> &'static Result<Built, String> {
    static B: OnceLock<Result<Built, String>> = OnceLock::new();
    B.get_or_init(|| {
        let root = Path::new(env!("CARGO_TARGET_TMPDIR")).join("ingot-codegen-check");
        let dir = root.join("crate");
        let target = root.join("target");
        let nets = nets();
        let mut lib = String::from("#![no_std]\n#![forbid(unsafe_code)]\n#![deny(warnings)]\n");
        let mut runner = String::from(RUNNER_HEAD);
        for n in &nets {
            let opt = GenOptions { module: n.module.clone(), weights: n.weights, weight_form: n.form, ..GenOptions::default() };
            let g = generate(&n.q, &n.schedule, &opt).map_err(|e| format!("{}: {e}", n.module))?;
            for (name, bytes) in g.files(&n.module) {
                put(&dir.join("src").join(name), &bytes);
            }
            lib.push_str(&format!("pub mod {m} {{\n    include!(\"{m}.rs\");\n}}\n", m = n.module));
            let data: Vec<u8> = inputs(&n.q, 7).concat().iter().map(|&v| v as u8).collect();
            put(&dir.join("inputs").join(format!("{}.bin", n.module)), &data);
            runner.push_str(&format!("    check!({});\n", n.module));
        }
        runner.push_str("}\n");
        put(&dir.join("src/lib.rs"), lib.as_bytes());
        put(&dir.join("src/bin/runner.rs"), runner.as_bytes());
        let manifest = format!(
            "[package]\nname = \"ingot-gen-check\"\nversion = \"0.0.0\"\nedition = \"2021\"\npublish = false\n\n\
             [dependencies]\ningot-rt = {{ path = {:?} }}\n\n[features]\ningot-trace = []\n\n[workspace]\n",
            rt_path().display().to_string()
        );
        put(&dir.join("Cargo.toml"), manifest.as_bytes());
        let out = Command::new(env!("CARGO"))
            .args(["run", "--quiet", "--offline", "--features", "ingot-trace", "--bin", "runner"])
            .current_dir(&dir)
            .env("CARGO_TARGET_DIR", &target)
            .env_remove("RUSTFLAGS")
            .output()
            .map_err(|e| e.to_string())?;
        if !out.status.success() {
            return Err(format!("generated crate failed:\n{}", String::from_utf8_lossy(&out.stderr)));
        }
        let mut runs: BTreeMap<String, Vec<(Vec<i8>, Trace, usize)>> = BTreeMap::new();
        let mut pixels = BTreeMap::new();
        for line in String::from_utf8_lossy(&out.stdout).lines() {
            let f: Vec<&str> = line.split(' ').collect();
            let m = f[1].to_string();
            match f[0] {
                "T" => {
                    let (k, s): (usize, usize) = (f[2].parse().unwrap(), f[3].parse().unwrap());
                    let e = runs.entry(m).or_default();
                    while e.len() <= k {
                        e.push((Vec::new(), Trace::new(), 0));
                    }
                    e[k].1.insert((k, s), hex_decode(f[5]));
                }
                "O" => {
                    let k: usize = f[2].parse().unwrap();
                    let e = runs.entry(m).or_default();
                    while e.len() <= k {
                        e.push((Vec::new(), Trace::new(), 0));
                    }
                    e[k].0 = hex_decode(f[3]);
                    e[k].2 = f[4].parse().unwrap();
                }
                "P" => {
                    pixels.insert(m, hex_decode(f[2]));
                }
                _ => return Err(format!("bad runner line {line}")),
            }
        }
        Ok(Built { dir, target, runs, pixels })
    })
}

const RUNNER_HEAD: &str = r#"//! Runs every generated module on its inputs and prints outputs and traces.
use ingot_gen_check as g;

fn hex(v: &[i8]) -> String {
    v.iter().map(|b| format!("{:02x}", *b as u8)).collect()
}

macro_rules! check {
    ($m:ident) => {{
        let path = concat!(env!("CARGO_MANIFEST_DIR"), "/inputs/", stringify!($m), ".bin");
        let data = std::fs::read(path).unwrap();
        let mut scratch = Box::new(g::$m::Scratch::new());
        for (k, chunk) in data.chunks_exact(g::$m::INPUT_LEN).enumerate() {
            let input: [i8; g::$m::INPUT_LEN] = core::array::from_fn(|i| chunk[i] as i8);
            let mut out = [0i8; g::$m::OUTPUT_LEN];
            let mut steps = 0;
            g::$m::run_traced(&mut scratch, &input, &mut out, &mut |s, name, m| {
                assert_eq!(s, steps);
                assert_eq!(name, g::$m::STEP_MAP_NAMES[s]);
                steps += 1;
                println!("T {} {} {} - {}", stringify!($m), k, s, hex(m));
            });
            assert_eq!(steps, g::$m::STEP_COUNT);
            let mut plain = [0i8; g::$m::OUTPUT_LEN];
            g::$m::run(&mut scratch, &input, &mut plain);
            assert_eq!(out, plain, "run and run_traced differ");
            let mut real = [0f32; g::$m::OUTPUT_LEN];
            g::$m::dequantize(&out, &mut real);
            for (r, &q) in real.iter().zip(out.iter()) {
                assert_eq!(*r, g::$m::OUTPUT_SCALE * (q as i32 - g::$m::OUTPUT_ZERO_POINT) as f32);
            }
            println!("O {} {} {} {}", stringify!($m), k, hex(&out), g::$m::argmax(&out));
        }
        let px: [u8; g::$m::INPUT_LEN] = core::array::from_fn(|i| (i * 7 % 256) as u8);
        let mut q = [0i8; g::$m::INPUT_LEN];
        g::$m::quantize_pixels(&px, &mut q);
        println!("P {} {}", stringify!($m), hex(&q));
        assert_eq!(g::$m::SCRATCH_BYTES, g::$m::ARENA_BYTES + g::$m::PATCH_BYTES);
        assert_eq!(g::$m::INPUT_LEN, g::$m::INPUT_SHAPE.iter().product::<usize>());
    }};
}

fn main() {
"#;

fn built() -> &'static Built {
    match build() {
        Ok(b) => b,
        Err(e) => panic!("{e}"),
    }
}

fn check_net(module: &str) {
    let b = built();
    let net = nets().into_iter().find(|n| n.module == module).unwrap();
    let got = &b.runs[module];
    let want = net.expected();
    assert_eq!(got.len(), want.len());
    for (k, ((out, trace, am), (wout, wtrace))) in got.iter().zip(&want).enumerate() {
        assert_eq!(trace.len(), wtrace.len(), "{module} input {k}: step count");
        for (key, m) in wtrace {
            assert_eq!(
                &trace[key], m,
                "{module} input {k}: map of step {} differs",
                key.1
            );
        }
        assert_eq!(out, wout, "{module} input {k}: output differs");
        assert_eq!(*am, ingot_rt::argmax(wout));
    }
    // The maps are not degenerate: some step output varies across inputs.
    let varied = (0..want[0].1.len()).any(|s| want[2].1[&(2, s)] != want[3].1[&(3, s)]);
    assert!(varied, "{module}: all inputs give identical maps");
    // The pixel helper applies the table.
    let px: Vec<u8> = (0..net.q.map(net.q.input).shape.len())
        .map(|i| (i * 7 % 256) as u8)
        .collect();
    let mut q = vec![0i8; px.len()];
    let s = net.q.map(net.q.input).shape;
    ingot_rt::quantize_pixels(
        &px,
        &mut q,
        ingot_rt::MapRef::new(0, s.h, s.w, s.c),
        &net.q.pixel_table,
    )
    .unwrap();
    assert_eq!(b.pixels[module], q);
}

/// A zoo network with the planner's schedule: the generated module equals
/// the integer simulator on every map, and the plan is smaller than naive.
fn check_zoo(module: &str) {
    check_net(module);
    let n = zoo_nets().iter().find(|n| n.module == module).unwrap();
    let naive = Schedule::naive(&n.q);
    assert!(
        n.schedule.arena_bytes < naive.arena_bytes,
        "{module}: planned arena {} not below naive {}",
        n.schedule.arena_bytes,
        naive.arena_bytes
    );
}

#[test]
fn zoo_plain_stack_matches_simulator_with_planned_schedule() {
    check_zoo("zoo_plain");
}

#[test]
fn zoo_dense_matches_simulator_with_planned_schedule() {
    check_zoo("zoo_dense");
    // The planner put at least one concatenation in place.
    let n = zoo_nets().iter().find(|n| n.module == "zoo_dense").unwrap();
    let concats =
        n.q.steps
            .iter()
            .filter(|s| matches!(s.kernel, QKernel::Concat))
            .count();
    assert!(n.schedule.copy_concats.len() < concats);
}

#[test]
fn zoo_residual_matches_simulator_with_planned_schedule() {
    check_zoo("zoo_residual");
}

#[test]
fn zoo_depthwise_matches_simulator_with_planned_schedule() {
    check_zoo("zoo_depthwise");
}

#[test]
fn plain_stack_matches_interpreter_bit_for_bit() {
    check_net("plain");
}

#[test]
fn dense_concat_and_transforms_match_interpreter() {
    check_net("dense");
}

#[test]
fn residual_adds_match_interpreter() {
    check_net("residual");
}

#[test]
fn depthwise_and_grouped_match_interpreter() {
    check_net("depthwise");
}

#[test]
fn inplace_concat_schedule_matches_interpreter_and_naive() {
    check_net("dense_inplace");
    let b = built();
    // The same network under the naive schedule gives the same bits.
    for (a, n) in b.runs["dense_inplace"].iter().zip(&b.runs["dense"]) {
        assert_eq!(a.0, n.0);
    }
    // And the in-place module emits no copy for its concatenations.
    let text = std::fs::read_to_string(b.dir.join("src/dense_inplace.rs")).unwrap();
    assert!(!text.contains("CopyChannels"));
    assert!(std::fs::read_to_string(b.dir.join("src/dense.rs"))
        .unwrap()
        .contains("CopyChannels"));
}

#[test]
fn hostile_names_compile_and_behave_like_plain() {
    check_net("hostile");
    let b = built();
    for (h, p) in b.runs["hostile"].iter().zip(&b.runs["plain"]) {
        assert_eq!(h.0, p.0);
    }
    let text = std::fs::read_to_string(b.dir.join("src/hostile.rs")).unwrap();
    // Names only appear escaped in strings or docs: parsing the file finds
    // no item other than the ones the generator writes.
    let file = syn::parse_file(&text).unwrap();
    let allowed = [
        "MODEL_NAME",
        "INPUT_SHAPE",
        "INPUT_LEN",
        "OUTPUT_LEN",
        "ARENA_BYTES",
        "PATCH_LEN",
        "PATCH_BYTES",
        "SCRATCH_BYTES",
        "INPUT_SCALE",
        "INPUT_ZERO_POINT",
        "OUTPUT_SCALE",
        "OUTPUT_ZERO_POINT",
        "SOFTMAX_DROPPED",
        "LABELS",
        "MODEL_HASH",
        "INGOT_VERSION",
        "STEP_COUNT",
        "STEP_NAMES",
        "STEP_MAP_NAMES",
        "Scratch",
        "run",
        "TRACE_BYTES",
        "run_traced",
        "quantize_pixels",
        "argmax",
        "dequantize",
        "ok",
        "forward",
        "ingot_data",
    ];
    for item in &file.items {
        let name = match item {
            syn::Item::Const(i) => i.ident.to_string(),
            syn::Item::Struct(i) => i.ident.to_string(),
            syn::Item::Fn(i) => i.sig.ident.to_string(),
            syn::Item::Mod(i) => i.ident.to_string(),
            syn::Item::Impl(_) => continue,
            other => panic!(
                "unexpected item {:?}",
                quote::ToTokens::to_token_stream(other).to_string()
            ),
        };
        assert!(allowed.contains(&name.as_str()), "unexpected item `{name}`");
    }
    for line in text.lines().filter(|l| l.contains("panic!(\"boom\")")) {
        assert!(
            line.trim_start().starts_with("///"),
            "a name reached the code unescaped: {line}"
        );
    }
    assert!(
        text.contains(r#"panic!(\"boom\")"#),
        "the name should appear escaped"
    );
}

/// The paired weight form gives the same maps as int8 on every network
/// (the expected values come from the int8 interpreter or the simulator),
/// and only one-group convolutions take it.
#[test]
fn paired_weights_match_int8_bit_for_bit() {
    for (paired, int8) in [
        ("dense_pairs", "dense"),
        ("plain_pairs_literal", "plain"),
        ("depthwise_pairs", "depthwise"),
        ("zoo_dense_pairs", "zoo_dense"),
    ] {
        check_net(paired);
        let b = built();
        for (p, i) in b.runs[paired].iter().zip(&b.runs[int8]) {
            assert_eq!(p.0, i.0, "{paired} vs {int8}");
        }
        let text = std::fs::read_to_string(b.dir.join(format!("src/{paired}.rs"))).unwrap();
        assert!(
            text.contains("ingot_rt::checked::Conv2dPaired::new("),
            "{paired}"
        );
        assert!(text.contains("ingot_rt::pair_rows::<"), "{paired}");
    }
    // Grouped and depthwise convolutions keep int8 weights.
    let text = std::fs::read_to_string(built().dir.join("src/depthwise_pairs.rs")).unwrap();
    assert!(
        text.contains("ingot_rt::checked::Conv2d::new_bytes("),
        "depthwise layers stay int8"
    );
}

/// The word form (int8 weights in flash, widened in registers) gives the
/// same maps as int8 on every network, reads the weights file's bytes with
/// no conversion (a sub-array of the included file, 4-byte aligned), and
/// only one-group convolutions take it.
#[test]
fn word_weights_match_int8_bit_for_bit() {
    for (words, int8) in [
        ("dense_words", "dense"),
        ("plain_words_literal", "plain"),
        ("depthwise_words", "depthwise"),
        ("zoo_dense_words", "zoo_dense"),
    ] {
        check_net(words);
        let b = built();
        for (w, i) in b.runs[words].iter().zip(&b.runs[int8]) {
            assert_eq!(w.0, i.0, "{words} vs {int8}");
        }
        let text = std::fs::read_to_string(b.dir.join(format!("src/{words}.rs"))).unwrap();
        assert!(
            text.contains("ingot_rt::checked::Conv2dWords::new("),
            "{words}"
        );
        assert!(text.contains("#[repr(align(4))]"), "{words}");
        if !words.ends_with("literal") {
            assert!(text.contains("*bytes::<"), "{words}");
        }
    }
    let text = std::fs::read_to_string(built().dir.join("src/depthwise_words.rs")).unwrap();
    assert!(
        text.contains("ingot_rt::checked::Conv2d::new_bytes("),
        "depthwise layers stay int8"
    );
    // The weights file holds the word layout: the same size as int8 up to
    // the zero weights that pad each row to whole words.
    let q = testnets::dense();
    let s = Schedule::naive(&q);
    let int8 = generate(&q, &s, &GenOptions::default()).unwrap();
    let opt = GenOptions {
        weight_form: WeightForm::Words,
        ..GenOptions::default()
    };
    let words = generate(&q, &s, &opt).unwrap();
    let pad: usize = q
        .steps
        .iter()
        .filter_map(|st| match &st.kernel {
            QKernel::Conv2d(c) if c.groups == 1 => {
                let k = c.weights.len() / c.out_channels;
                Some(c.out_channels * (k.div_ceil(4) * 4 - k))
            }
            _ => None,
        })
        .sum();
    assert_eq!(words.weights.len(), int8.weights.len() + pad);
    // The build report names each convolution's form.
    let forms: Vec<_> = words
        .report
        .layers
        .iter()
        .filter_map(|l| l.weight_form)
        .collect();
    assert!(!forms.is_empty() && forms.iter().all(|&f| f == "words"));
    assert!(words.report_md.contains("conv2d (words)"));
}

#[test]
fn literal_arrays_behave_like_include_bytes() {
    check_net("plain_literal");
    let b = built();
    for (l, p) in b.runs["plain_literal"].iter().zip(&b.runs["plain"]) {
        assert_eq!(l.0, p.0);
    }
    let text = std::fs::read_to_string(b.dir.join("src/plain_literal.rs")).unwrap();
    assert!(!text.contains("include_bytes!"));
}

/// A missing tool skips this test, except under `INGOT_REQUIRE_EMULATION=1`
/// (set by CI), where it is a failure: a broken install must not pass.
fn skip_unless_required(why: &str) {
    if std::env::var("INGOT_REQUIRE_EMULATION").is_ok_and(|v| v == "1") {
        panic!("INGOT_REQUIRE_EMULATION=1, but {why}");
    }
    eprintln!("skipping: {why}");
}

#[test]
fn generated_crate_builds_for_thumbv7em_without_std() {
    let b = built();
    let sysroot = Command::new("rustc")
        .args(["--print", "sysroot"])
        .output()
        .unwrap();
    let sysroot = String::from_utf8_lossy(&sysroot.stdout).trim().to_string();
    if !Path::new(&sysroot)
        .join("lib/rustlib/thumbv7em-none-eabihf")
        .exists()
    {
        skip_unless_required("thumbv7em-none-eabihf is not installed");
        return;
    }
    let out = Command::new(env!("CARGO"))
        .args([
            "build",
            "--quiet",
            "--offline",
            "--lib",
            "--release",
            "--target",
            "thumbv7em-none-eabihf",
        ])
        .current_dir(&b.dir)
        .env("CARGO_TARGET_DIR", &b.target)
        .output()
        .unwrap();
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
}

#[test]
fn generation_is_deterministic() {
    for q in testnets::all() {
        let s = Schedule::naive(&q);
        let a = generate(&q, &s, &GenOptions::default()).unwrap();
        let b = generate(&q.clone(), &s.clone(), &GenOptions::default()).unwrap();
        assert_eq!(a.module, b.module);
        assert_eq!(a.weights, b.weights);
        assert_eq!(a.report_md, b.report_md);
        assert_eq!(a.report_json, b.report_json);
    }
    // The hash follows the model: one changed weight changes it.
    let q = testnets::plain();
    let mut q2 = q.clone();
    if let QKernel::Conv2d(c) = &mut q2.steps[0].kernel {
        c.weights[0] = c.weights[0].wrapping_add(1);
    }
    let h = |q: &QGraph| {
        generate(q, &Schedule::naive(q), &GenOptions::default())
            .unwrap()
            .report
            .model_hash
    };
    assert_ne!(h(&q), h(&q2));
}

#[test]
fn weights_file_holds_exactly_the_parameters() {
    for q in testnets::all() {
        let g = generate(&q, &Schedule::naive(&q), &GenOptions::default()).unwrap();
        let mut want = 0;
        for st in &q.steps {
            want += match &st.kernel {
                QKernel::Conv2d(c) => {
                    c.weights.len()
                        + 4 * c.bias.len()
                        + 8 * c.requant.len()
                        + match &c.transform {
                            Some(ingot_compiler::lower::ChannelTransform::Affine {
                                mul,
                                add,
                                ..
                            }) => 4 * (mul.len() + add.len()),
                            Some(ingot_compiler::lower::ChannelTransform::Table(t)) => t.len(),
                            None => 0,
                        }
                }
                QKernel::Linear(l) => l.weights.len() + 4 * l.bias.len() + 8 * l.requant.len(),
                QKernel::Channel(ingot_compiler::lower::ChannelTransform::Affine {
                    mul,
                    add,
                    ..
                }) => 4 * (mul.len() + add.len()),
                QKernel::Channel(ingot_compiler::lower::ChannelTransform::Table(t)) => t.len(),
                _ => 0,
            };
        }
        want += q.pixel_table.len();
        assert_eq!(g.weights.len(), want, "{}", q.name);
        assert_eq!(
            g.report.weights_sections.iter().map(|s| s.1).sum::<usize>(),
            want
        );
    }
}

#[test]
fn invalid_parameters_are_refused_at_generation() {
    // A requantization multiplier the kernels reject.
    let mut q = testnets::plain();
    if let QKernel::Conv2d(c) = &mut q.steps[2].kernel {
        c.requant[3].shift = 40;
    }
    let e = generate(&q, &Schedule::naive(&q), &GenOptions::default()).unwrap_err();
    assert!(e.to_string().contains("conv2"), "{e}");
    // A schedule whose views overlap where the kernel forbids it.
    let q = testnets::plain();
    let mut s = Schedule::naive(&q);
    s.views[1] = s.views[0];
    assert!(generate(&q, &s, &GenOptions::default()).is_err());
    // A bad module name.
    let opt = GenOptions {
        module: "a-b".into(),
        ..GenOptions::default()
    };
    assert!(generate(&q, &Schedule::naive(&q), &opt).is_err());
}

/// A lowered graph from a build script is judged by the planner's budget
/// (`plan::target::budget_for`), the same verdict as a compiled graph: a
/// target with exactly the scratch, weights, code estimate and reserves
/// fits; one byte less RAM does not.
#[test]
fn budget_is_checked_against_the_target() {
    use ingot_compiler::build::Builder;
    let q = testnets::plain();
    let dir = tempfile::tempdir().unwrap();
    let fit = generate(&q, &Schedule::naive(&q), &GenOptions::default()).unwrap();
    let r = &fit.report;
    let need = ingot_compiler::plan::target::budget_for(
        &q,
        r.arena_bytes as u64,
        r.patch_bytes as u64,
        ingot_compiler::plan::WeightForm::Int8,
        &ingot_compiler::plan::Target::parse(&profile(1 << 30, 1 << 30), Path::new("t.toml"))
            .unwrap(),
        Some(r.weights_flash_bytes as u64),
    );
    let build = |ram: u64| {
        let t = dir.path().join(format!("tiny{ram}.toml"));
        std::fs::write(&t, profile(ram, need.flash_used)).unwrap();
        Builder::lowered(q.clone())
            .target(&t)
            .weight_form(ingot_compiler::plan::WeightForm::Int8)
            .out_dir(dir.path().join(format!("out{ram}")))
            .generate()
    };
    assert!(build(need.ram_used).is_ok());
    let e = build(need.ram_used - 1).unwrap_err();
    assert!(e.is_budget(), "{e}");
    assert!(e.to_string().contains("does not fit target `tiny`"), "{e}");
    assert!(e.to_string().contains("RAM over by 1 bytes"), "{e}");
}

/// A target profile named `tiny` with these memories and no reserves.
fn profile(ram: u64, flash: u64) -> String {
    format!(
        "name = \"tiny\"\ncore = \"cortex-m4f\"\ntriple = \"thumbv7em-none-eabihf\"\nclock_hz = 1\n\
         [ram]\nbytes = {ram}\nreserve = 0\n[flash]\nbytes = {flash}\nreserve = 0\n\
         [datasheet]\ntitle = \"none\"\nrevision = \"n/a\"\n"
    )
}

/// The generated module of `plain` is kept in `tests/out/` (its input, the
/// lowered graph as JSON, in `tests/in/`). `INGOT_BLESS=1` rewrites both.
#[test]
fn snapshot_of_plain_module() {
    let here = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests");
    let q = testnets::plain();
    let input = serde_json::to_string_pretty(&q).unwrap() + "\n";
    let g = generate(
        &q,
        &Schedule::naive(&q),
        &GenOptions {
            module: "plain".into(),
            ..GenOptions::default()
        },
    )
    .unwrap();
    let files = [
        (here.join("in/plain.qgraph.json"), input.into_bytes()),
        (here.join("out/plain.rs"), g.module.into_bytes()),
        (here.join("out/plain.report.md"), g.report_md.into_bytes()),
    ];
    if std::env::var("INGOT_BLESS").is_ok_and(|v| v == "1") {
        for (p, b) in &files {
            std::fs::create_dir_all(p.parent().unwrap()).unwrap();
            std::fs::write(p, b).unwrap();
        }
    }
    for (p, b) in &files {
        let have = std::fs::read(p)
            .unwrap_or_else(|_| panic!("{} missing; run with INGOT_BLESS=1", p.display()));
        assert!(
            have == *b,
            "{} differs from the generator's output; rerun with INGOT_BLESS=1 if intended",
            p.display()
        );
    }
}
