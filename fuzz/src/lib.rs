//! `ingot-fuzz`: structure-aware fuzzing of ingot's frontends on stable
//! Rust, without a fuzzing engine.
//!
//! Cases start from valid seeds (the committed graphs, weights, ranges
//! files and images of the repository) and are mutated as structures
//! ([`mutate`]); each runs in-process under `catch_unwind` ([`run_case`]).
//! Every case is rebuilt from `(seed, index)` ([`generate`]), so the long
//! run's supervisor (`src/main.rs`) can save the exact input of a case that
//! crashed, hung or ran out of memory in its worker. Failing inputs live in
//! `fuzz/regressions/` and are replayed by `cargo test -p ingot-fuzz`.

pub mod alloc;
pub mod case;
pub mod mutate;
pub mod onnx;
pub mod rng;

use case::{Case, Kind};
use ingot_compiler::calibrate::{MapRange, Ranges};
use ingot_compiler::frontend;
use ingot_compiler::graph::{Color, InputSpec, Shape};
use rng::Rng;
use std::path::{Path, PathBuf};

/// A frontend fed by one file, beside the built-in kinds: the ONNX importer
/// ([`onnx`]). Its seeds are the `*.onnx` files its `seeds` function reads.
#[derive(Debug, Clone, Copy)]
pub struct ExtraTarget {
    /// Name in case files (`extra:NAME`).
    pub name: &'static str,
    /// Reads its seed files (a missing seed is an error).
    pub seeds: fn() -> Result<Vec<Vec<u8>>, String>,
    /// Mutates one seed, structure-aware where the target knows its format.
    pub mutate: fn(&[u8], &mut Rng) -> Vec<u8>,
    /// Runs the frontend on one file's bytes; errors are fine, panics are
    /// not.
    pub run: fn(&[u8]),
}

/// The registered extra targets.
pub fn extra_targets() -> &'static [ExtraTarget] {
    &[ExtraTarget {
        name: "onnx",
        seeds: onnx::seeds,
        mutate: onnx::mutate,
        run: onnx::run,
    }]
}

/// The repository root (the fuzz crate's parent folder).
pub fn repo_root() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .parent()
        .expect("fuzz/ has a parent")
        .to_path_buf()
}

/// Folder of saved failing inputs.
pub fn regressions_dir() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("regressions")
}

/// A valid graph with its weights, and names from it for mutations.
#[derive(Debug, Clone)]
pub struct GraphSeed {
    /// Graph JSON.
    pub json: Vec<u8>,
    /// Safetensors bytes.
    pub weights: Vec<u8>,
    /// A valid ranges file for it, if the repository has one.
    pub ranges: Option<Vec<u8>>,
    /// Layer, map and tensor names.
    pub names: Vec<String>,
}

/// The valid inputs every case starts from.
#[derive(Debug, Clone)]
pub struct Seeds {
    /// Graphs.
    pub graphs: Vec<GraphSeed>,
    /// Picture files (PNG, PGM, ...) and their extension.
    pub images: Vec<Vec<u8>>,
    /// Seeds of extra targets, by target index.
    pub extra: Vec<Vec<Vec<u8>>>,
}

const GRAPHS: &[(&str, &str, Option<&str>)] = &[
    (
        "tests/in/plain_stack.graph.json",
        "tests/in/plain_stack.safetensors",
        None,
    ),
    (
        "tests/data/optdigits/model/digits.graph.json",
        "tests/data/optdigits/model/digits.safetensors",
        None,
    ),
    (
        "examples/demo/model/brackets.graph.json",
        "examples/demo/model/brackets.safetensors",
        Some("examples/demo/model/brackets.ranges.json"),
    ),
];

impl Seeds {
    /// Reads the seeds from the repository; a missing seed file is an
    /// error (the harness must not quietly fuzz less).
    pub fn load() -> Result<Seeds, String> {
        let root = repo_root();
        let read = |p: &str| std::fs::read(root.join(p)).map_err(|e| format!("seed {p}: {e}"));
        let mut graphs = Vec::new();
        for (g, w, r) in GRAPHS {
            let json = read(g)?;
            let weights = read(w)?;
            let ranges = r.map(read).transpose()?;
            // Synthesise a ranges file for graphs that have none.
            let loaded = frontend::parse(&String::from_utf8_lossy(&json), Path::new(g))
                .map_err(|e| e.to_string())?;
            let store = frontend::TensorStore::from_bytes(&weights, Path::new(w))
                .map_err(|e| e.to_string())?;
            let graph =
                frontend::validate(&loaded, &store, Path::new(g)).map_err(|e| e.to_string())?;
            let ranges = Some(match ranges {
                Some(r) => r,
                None => synthetic(&graph).to_json(&graph).into_bytes(),
            });
            let mut names: Vec<String> = (0..graph.map_count())
                .map(|i| graph.map_name(ingot_compiler::MapId(i as u32)).to_string())
                .collect();
            names.extend(store.tensors.keys().cloned());
            graphs.push(GraphSeed {
                json,
                weights,
                ranges,
                names,
            });
        }
        let mut images = Vec::new();
        for dir in [
            "tests/data/optdigits/calibration",
            "examples/demo/data/calibration",
        ] {
            let Ok(rd) = std::fs::read_dir(root.join(dir)) else {
                continue;
            };
            let mut files: Vec<PathBuf> = rd.filter_map(|e| e.ok().map(|e| e.path())).collect();
            files.sort();
            for f in files.iter().filter(|f| f.is_file()).take(4) {
                images.push(std::fs::read(f).map_err(|e| format!("{}: {e}", f.display()))?);
            }
        }
        // A PGM and a tiny .npy-free picture so the text-header decoder is
        // reached too.
        images.push(
            b"P5\n4 4\n255\n\x00\x10\x20\x30\x40\x50\x60\x70\x80\x90\xa0\xb0\xc0\xd0\xe0\xf0"
                .to_vec(),
        );
        if images.len() < 2 {
            return Err("no seed images found".into());
        }
        let extra = extra_targets()
            .iter()
            .map(|t| (t.seeds)())
            .collect::<Result<_, _>>()?;
        Ok(Seeds {
            graphs,
            images,
            extra,
        })
    }
}

/// Every map in `[-4, 4]`: the ranges `ingot plan` uses without
/// calibration.
pub fn synthetic(g: &ingot_compiler::Graph) -> Ranges {
    Ranges {
        graph: g.name().into(),
        graph_hash: String::new(),
        method: "synthetic".into(),
        images: 0,
        maps: vec![
            MapRange {
                min: -4.0,
                max: 4.0
            };
            g.map_count()
        ],
        bias_shifts: Default::default(),
        channels: Vec::new(),
    }
}

/// A `.npy` file of float32 zeros of `[c, h, w]`.
fn npy_seed(c: usize, h: usize, w: usize) -> Vec<u8> {
    let header = format!("{{'descr': '<f4', 'fortran_order': False, 'shape': ({c}, {h}, {w}), }}");
    let mut head = header.into_bytes();
    while (10 + head.len() + 1) % 64 != 0 {
        head.push(b' ');
    }
    head.push(b'\n');
    let mut out = b"\x93NUMPY\x01\x00".to_vec();
    out.extend_from_slice(&(head.len() as u16).to_le_bytes());
    out.extend_from_slice(&head);
    out.extend(std::iter::repeat_n(0u8, 4 * c * h * w));
    out
}

/// Case `index` of a run started with `seed`: always the same bytes.
pub fn generate(seeds: &Seeds, seed: u64, index: u64) -> Case {
    let mut r = Rng::for_case(seed, index);
    let g = r.pick(&seeds.graphs);
    let kinds = 6 + seeds.extra.iter().filter(|s| !s.is_empty()).count();
    match r.below(kinds) {
        0 | 1 => {
            // Mostly one part at a time, sometimes both, so a mutation in
            // one is not hidden behind an error in the other.
            let (mut json, mut weights) = (g.json.clone(), g.weights.clone());
            match r.below(3) {
                0 => json = mutate::mutate_json(&json, &mut r, &g.names),
                1 => weights = mutate::mutate_safetensors(&weights, &mut r, &g.names),
                _ => {
                    json = mutate::mutate_json(&json, &mut r, &g.names);
                    weights = mutate::mutate_safetensors(&weights, &mut r, &g.names);
                }
            }
            Case {
                kind: Kind::Graph,
                blobs: vec![json, weights],
            }
        }
        2 => Case {
            kind: Kind::GraphFiles,
            blobs: vec![
                mutate::mutate_json(&g.json, &mut r, &g.names),
                g.weights.clone(),
            ],
        },
        3 => {
            let ranges = g.ranges.clone().unwrap_or_default();
            Case {
                kind: Kind::Ranges,
                blobs: vec![
                    g.json.clone(),
                    g.weights.clone(),
                    mutate::mutate_json(&ranges, &mut r, &g.names),
                ],
            }
        }
        4 => {
            let mut img = r.pick(&seeds.images).clone();
            for _ in 0..1 + r.below(3) {
                mutate::mutate_bytes(&mut img, &mut r);
            }
            let shape = *r.pick(&[(1, 8, 8), (1, 28, 28), (3, 16, 16), (3, 1, 1)]);
            Case {
                kind: Kind::Image,
                blobs: vec![
                    format!("{} {} {}", shape.0, shape.1, shape.2).into_bytes(),
                    img,
                ],
            }
        }
        5 => {
            let shape = *r.pick(&[(1usize, 8usize, 8usize), (3, 4, 4), (1, 1, 1)]);
            let seed_npy = npy_seed(shape.0, shape.1, shape.2);
            let mut b = seed_npy;
            for _ in 0..1 + r.below(3) {
                mutate::mutate_bytes(&mut b, &mut r);
            }
            Case {
                kind: Kind::Npy,
                blobs: vec![
                    format!("{} {} {}", shape.0, shape.1, shape.2).into_bytes(),
                    b,
                ],
            }
        }
        k => {
            let live: Vec<usize> = (0..seeds.extra.len())
                .filter(|&i| !seeds.extra[i].is_empty())
                .collect();
            extra_case(seeds, live[(k - 6) % live.len()], &mut r)
        }
    }
}

fn extra_case(seeds: &Seeds, t: usize, r: &mut Rng) -> Case {
    let target = &extra_targets()[t];
    let seed: &Vec<u8> = r.pick(&seeds.extra[t]);
    Case {
        kind: Kind::Extra(target.name.into()),
        blobs: vec![(target.mutate)(seed, r)],
    }
}

/// Case `index` of a run of the extra target `name` alone (`ingot-fuzz
/// --target NAME`): always the same bytes; `None` if no such target.
pub fn generate_extra(seeds: &Seeds, name: &str, seed: u64, index: u64) -> Option<Case> {
    let t = extra_targets().iter().position(|t| t.name == name)?;
    Some(extra_case(seeds, t, &mut Rng::for_case(seed, index)))
}

/// Largest graph (memory estimate) the harness also lowers and plans:
/// keeps one case well under a millisecond to a few milliseconds.
const DEEP_LIMIT_BYTES: u64 = 16 << 20;
/// Largest work (MACs) the harness also lowers and plans.
const DEEP_LIMIT_MACS: u64 = 5_000_000;

fn shape_of(blob: &[u8]) -> Option<Shape> {
    let t = std::str::from_utf8(blob).ok()?;
    let v: Vec<usize> = t
        .split_whitespace()
        .map(|x| x.parse().ok())
        .collect::<Option<_>>()?;
    match v[..] {
        [c, h, w] => Some(Shape::new(c, h, w)),
        _ => None,
    }
}

/// Runs one case. Errors are the expected outcome of most cases and are
/// returned as text; a panic propagates (the caller catches it).
pub fn run_case(case: &Case) -> Result<(), String> {
    let blob = |i: usize| case.blobs.get(i).map(Vec::as_slice).unwrap_or(&[]);
    let gpath = Path::new("fuzz.graph.json");
    let wpath = Path::new("fuzz.safetensors");
    let load_mem = || -> Result<ingot_compiler::Graph, String> {
        let text = std::str::from_utf8(blob(0)).map_err(|e| e.to_string())?;
        let file = frontend::parse(text, gpath).map_err(|e| e.to_string())?;
        let store = frontend::TensorStore::from_bytes(blob(1), wpath).map_err(|e| e.to_string())?;
        let g = frontend::validate(&file, &store, gpath).map_err(|e| e.to_string())?;
        frontend::checks::check_memory(&g, gpath, ingot_compiler::guard::memory_limit())
            .map_err(|e| e.to_string())?;
        Ok(g)
    };
    match &case.kind {
        Kind::Graph => {
            let g = load_mem()?;
            deep(&g)
        }
        Kind::GraphFiles => {
            let dir = tempfile::tempdir().map_err(|e| e.to_string())?;
            let gp = dir.path().join("g.graph.json");
            std::fs::write(&gp, blob(0)).map_err(|e| e.to_string())?;
            // The weights file under the name the seed graph uses; the
            // mutated graph may name another file, or a device.
            for name in [
                "plain_stack.safetensors",
                "digits.safetensors",
                "brackets.safetensors",
            ] {
                std::fs::write(dir.path().join(name), blob(1)).map_err(|e| e.to_string())?;
            }
            let g = ingot_compiler::load(&gp).map_err(|e| e.to_string())?;
            let _ = frontend::checks::warnings(&g);
            Ok(())
        }
        Kind::Ranges => {
            let g = load_mem()?;
            let text = std::str::from_utf8(blob(2)).map_err(|e| e.to_string())?;
            let r = Ranges::parse(&g, text, Path::new("fuzz.ranges.json"), None)
                .map_err(|e| e.to_string())?;
            lower_and_plan(&g, &r)
        }
        Kind::Image => {
            let shape = shape_of(blob(0)).ok_or("bad shape blob")?;
            let spec = InputSpec {
                name: "image".into(),
                shape,
                pixel_scale: 1.0 / 255.0,
                mean: vec![0.0; shape.c],
                std: vec![1.0; shape.c],
                color: if shape.c == 3 {
                    Color::Rgb
                } else {
                    Color::Gray
                },
            };
            let px = ingot_compiler::calibrate::images::decode_pixels(
                blob(1),
                Path::new("fuzz.png"),
                &spec,
            )
            .map_err(|e| e.to_string())?;
            if px.len() != shape.len() {
                panic!("decoded {} bytes for a {shape} input", px.len());
            }
            Ok(())
        }
        Kind::Npy => {
            let shape = shape_of(blob(0)).ok_or("bad shape blob")?;
            let v = ingot_compiler::calibrate::images::parse_npy(blob(1), shape)?;
            if v.len() != shape.len() {
                panic!("parsed {} values for a {shape} input", v.len());
            }
            Ok(())
        }
        Kind::Extra(name) => {
            let t = extra_targets()
                .iter()
                .find(|t| t.name == name)
                .ok_or_else(|| format!("no extra target `{name}` registered"))?;
            (t.run)(blob(0));
            Ok(())
        }
    }
}

/// What a loaded graph reaches next: warnings, the inspect report, and for
/// small graphs lowering with synthetic ranges and planning.
fn deep(g: &ingot_compiler::Graph) -> Result<(), String> {
    let _ = frontend::checks::warnings(g);
    let report = ingot_compiler::inspect::report(g);
    let _ = report.to_text();
    lower_and_plan(g, &synthetic(g))
}

fn lower_and_plan(g: &ingot_compiler::Graph, r: &Ranges) -> Result<(), String> {
    let cost = ingot_compiler::graph::cost::total_cost(g);
    if frontend::checks::memory_estimate(g) > DEEP_LIMIT_BYTES || cost.macs > DEEP_LIMIT_MACS {
        return Ok(());
    }
    let q = ingot_compiler::lower::lower(g, r, &Default::default()).map_err(|e| e.to_string())?;
    let p = ingot_compiler::plan::plan(&q, &Default::default()).map_err(|e| e.to_string())?;
    let _ = p;
    Ok(())
}

/// How one case ended.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum Outcome {
    /// Accepted or refused with an error: both fine.
    Handled,
    /// A panic, with its message.
    Panic(String),
}

/// Runs a case under `catch_unwind`.
pub fn run_caught(case: &Case) -> Outcome {
    match std::panic::catch_unwind(std::panic::AssertUnwindSafe(|| run_case(case))) {
        Ok(_) => Outcome::Handled,
        Err(p) => Outcome::Panic(
            p.downcast_ref::<String>()
                .cloned()
                .or_else(|| p.downcast_ref::<&str>().map(|s| s.to_string()))
                .unwrap_or_else(|| "non-string panic".into()),
        ),
    }
}

/// Saves a failing case under `fuzz/regressions/` (once per content).
pub fn save_regression(case: &Case, why: &str) -> std::io::Result<PathBuf> {
    let dir = regressions_dir();
    std::fs::create_dir_all(&dir)?;
    let p = dir.join(case.file_name());
    if !p.exists() {
        std::fs::write(&p, case.encode())?;
        std::fs::write(p.with_extension("txt"), format!("{why}\n"))?;
    }
    Ok(p)
}

/// Every saved regression case.
pub fn regressions() -> Vec<(PathBuf, Case)> {
    let mut out = Vec::new();
    if let Ok(rd) = std::fs::read_dir(regressions_dir()) {
        let mut files: Vec<PathBuf> = rd
            .filter_map(|e| e.ok().map(|e| e.path()))
            .filter(|p| p.extension().is_some_and(|e| e == "case"))
            .collect();
        files.sort();
        for f in files {
            let bytes = std::fs::read(&f).expect("regression file readable");
            let c = Case::decode(&bytes).unwrap_or_else(|e| panic!("{}: {e}", f.display()));
            out.push((f, c));
        }
    }
    out
}
