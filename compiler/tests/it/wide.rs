//! int16 ("wide") layers on the demo network (issue 16 §4): what `--wide`
//! widens, what it refuses, what the integer simulator then measures
//! against the float reference on the demo's evaluation images, and how
//! `auto:N` follows the sensitivity ranking.

use ingot_compiler::agree::mixed::Mixed;
use ingot_compiler::agree::sensitivity::measure_inputs;
use ingot_compiler::calibrate::ImageSet;
use ingot_compiler::codegen::WeightForm;
use ingot_compiler::driver::{self, WideChoice};
use ingot_compiler::graph::Graph;
use ingot_compiler::lower::{lower, LowerError, LowerOptions, QGraph, SimInput, Simulator};
use ingot_compiler::ranges::Ranges;
use ingot_compiler::reference::Reference;
use std::path::PathBuf;

fn demo() -> (Graph, Ranges, PathBuf) {
    let root = PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("../examples/demo");
    let g = ingot_compiler::load(&root.join("model/brackets.graph.json")).unwrap();
    let r = Ranges::load(&g, &root.join("model/brackets.ranges.json"), None).unwrap();
    (g, r, root.join("data"))
}

fn wide(names: &[&str]) -> LowerOptions {
    LowerOptions {
        wide: names.iter().map(|s| s.to_string()).collect(),
        ..LowerOptions::default()
    }
}

fn db(sig: f64, noise: f64) -> f64 {
    10.0 * (sig / noise).log10()
}

/// Per stored map SQNR (dB), logit SQNR, largest logit error and top-1
/// hits against labels, of `q` on every `step`-th evaluation image.
struct Figures {
    maps: Vec<(String, f64)>,
    logit_db: f64,
    max_err: f32,
    hits: usize,
    n: usize,
}

fn figures(g: &Graph, q: &QGraph, dir: &std::path::Path, step: usize) -> Figures {
    let images = ImageSet::open(&dir.join("eval"), g).unwrap();
    let reference = Reference::new(g);
    let mut sim = Simulator::new(q);
    let mut sums = vec![(0f64, 0f64); q.maps.len()];
    let (mut logit, mut max_err, mut hits, mut n) = ((0f64, 0f64), 0f32, 0, 0);
    for i in (0..images.len()).step_by(step) {
        let s = images.load(i).unwrap();
        let mut float = vec![Vec::new(); g.map_count()];
        let out = reference
            .run_with(&s.input, |m, v| float[m.index()] = v.to_vec())
            .unwrap();
        match &s.pixels {
            Some(p) => sim.run(SimInput::Pixels(p)).unwrap(),
            None => sim.run(SimInput::Chw(&s.input)).unwrap(),
        };
        for (k, m) in q.maps.iter().enumerate() {
            let x = &float[m.float_map.index()];
            let y = sim.map_chw_f32(ingot_compiler::lower::QMapId(k as u32));
            for (a, b) in x.iter().zip(&y) {
                sums[k].0 += (*a as f64).powi(2);
                sums[k].1 += (*a as f64 - *b as f64).powi(2);
            }
        }
        let y = sim.map_chw_f32(q.output);
        for (a, b) in out.iter().zip(&y) {
            logit.0 += (*a as f64).powi(2);
            logit.1 += (*a as f64 - *b as f64).powi(2);
            max_err = max_err.max((a - b).abs());
        }
        let top = ingot_compiler::measure::argmax_f32(&y);
        hits += (s.label == Some(top)) as usize;
        n += 1;
    }
    Figures {
        maps: q
            .maps
            .iter()
            .zip(&sums)
            .skip(1)
            .map(|(m, &(s, e))| (m.name.clone(), db(s, e)))
            .collect(),
        logit_db: db(logit.0, logit.1),
        max_err,
        hits,
        n,
    }
}

fn sqnr(f: &Figures, name: &str) -> f64 {
    f.maps.iter().find(|(n, _)| n == name).unwrap().1
}

/// `--wide t1.conv` (the demo's lowest layer in the README's fidelity
/// table): only that map becomes int16, symmetric per tensor with
/// `scale = max|range| / 32767` (Jacob et al. 2018, §2.1 with zero point
/// 0); its SQNR against float rises, and the top-1 accuracy on the
/// labelled evaluation images stays within 0.5 points (the goal of issue
/// 16; on all 400 images one image changes class, 100% → 99.75%).
#[test]
fn widening_the_weakest_layer_raises_its_sqnr_and_keeps_accuracy() {
    let (g, r, data) = demo();
    let q8 = lower(&g, &r, &LowerOptions::default()).unwrap();
    let q16 = lower(&g, &r, &wide(&["t1.conv"])).unwrap();
    assert!(q8.wide.is_empty());
    assert_eq!(q16.verify(), Ok(()));
    assert_eq!(q16.wide.len(), 1);
    let w = &q16.wide[0];
    let m = q16.map(w.map);
    assert_eq!(
        (m.name.as_str(), w.because.as_str()),
        ("t1.conv", "t1.conv")
    );
    let qp = m.qp.tensor().unwrap();
    let range = r.maps[m.float_map.index()];
    assert_eq!(qp.zero_point, 0);
    let want = range.min.abs().max(range.max.abs()) / 32767.0;
    assert!(
        (qp.scale - want).abs() <= want * 1e-6,
        "{} vs {want}",
        qp.scale
    );
    // No activation after t1.conv: the whole int16 range.
    assert_eq!((w.min, w.max), (-32768, 32767));

    let (a, b) = (figures(&g, &q8, &data, 2), figures(&g, &q16, &data, 2));
    let (s8, s16) = (sqnr(&a, "t1.conv"), sqnr(&b, "t1.conv"));
    eprintln!(
        "t1.conv {s8:.1} -> {s16:.1} dB; logits {:.1} -> {:.1} dB, max error {:.3} -> {:.3}; top-1 {}/{} -> {}/{}",
        a.logit_db, b.logit_db, a.max_err, b.max_err, a.hits, a.n, b.hits, b.n
    );
    assert!(s16 >= s8 + 1.0, "t1.conv: {s8:.2} -> {s16:.2} dB");
    assert!(b.logit_db >= a.logit_db - 0.5);
    let drop = (a.hits as f64 - b.hits as f64) / a.n as f64;
    assert!(drop <= 0.005, "{} -> {} of {}", a.hits, b.hits, a.n);
}

/// A member of a concatenation region widens the whole region (members and
/// concatenation outputs), each reported with the layer that caused it; the
/// graph verifies, the simulator runs it, and the plan sizes the int16
/// buffers at two bytes a value.
#[test]
fn a_region_member_widens_its_region() {
    let (g, r, data) = demo();
    let q = lower(&g, &r, &wide(&["b2.l0.conv"])).unwrap();
    assert_eq!(q.verify(), Ok(()));
    let names: Vec<&str> = q.wide.iter().map(|w| q.map(w.map).name.as_str()).collect();
    assert_eq!(
        names,
        [
            "t1.pool",
            "b2.l0.conv",
            "b2.cat1",
            "b2.l1.conv",
            "b2.cat2",
            "b2.l2.conv",
            "b2.cat3",
            "b2.l3.conv",
            "b2.cat4"
        ]
    );
    assert!(q.wide.iter().all(|w| w.because == "b2.l0.conv"));
    // One parameter set for the region (copy-free concatenation).
    let qps: Vec<_> = q.wide.iter().map(|w| q.map(w.map).qp.clone()).collect();
    assert!(qps.windows(2).all(|p| p[0] == p[1]));
    let f = figures(&g, &q, &data, 8);
    let f8 = figures(
        &g,
        &lower(&g, &r, &LowerOptions::default()).unwrap(),
        &data,
        8,
    );
    for m in ["b2.l0.conv", "b2.l3.conv", "b2.cat4"] {
        assert!(
            sqnr(&f, m) > sqnr(&f8, m),
            "{m}: {} vs {}",
            sqnr(&f, m),
            sqnr(&f8, m)
        );
    }
    let (_, p8) =
        driver::lower_and_plan(&g, &r, &LowerOptions::default(), WeightForm::Int8, true).unwrap();
    let (q16, p16) =
        driver::lower_and_plan(&g, &r, &wide(&["b2.l0.conv"]), WeightForm::Int8, true).unwrap();
    assert_eq!(q16.wide.len(), 9);
    // The region's buffer (56 × 16 × 16 values) doubles to 28,672 B, which
    // stays below the peak of the first block (73,728 B unstreamed; the
    // region takes in `t1.pool`, so the transition no longer streams).
    assert!(
        p16.arena_bytes >= p8.arena_bytes,
        "{} vs {}",
        p16.arena_bytes,
        p8.arena_bytes
    );
    // t1.conv at int16 (24 × 32 × 32 × 2 = 49,152 B) is live with its
    // input, the first block's region (48 × 32 × 32 = 49,152 B).
    let (_, pt) =
        driver::lower_and_plan(&g, &r, &wide(&["t1.conv"]), WeightForm::Int8, true).unwrap();
    assert!(pt.arena_bytes >= 2 * 49_152, "{}", pt.arena_bytes);
}

/// Names that cannot be widened are refused, naming the layer.
#[test]
fn refusals_name_the_layer() {
    let (g, r, _) = demo();
    for (name, says) in [
        ("no.such", "no layer of that name"),
        ("b1.l0.bn", "no output map of its own"),
        ("t1.relu", "no output map of its own"),
        ("fc", "network's output"),
    ] {
        let e = lower(&g, &r, &wide(&[name])).unwrap_err();
        assert!(matches!(e, LowerError::Wide { .. }), "{name}: {e}");
        let msg = e.to_string();
        assert!(msg.contains(name) && msg.contains(says), "{name}: {msg}");
    }
    assert!("auto:0".parse::<WideChoice>().is_err());
    assert_eq!("auto:2".parse::<WideChoice>(), Ok(WideChoice::Auto(2)));
    assert_eq!(
        "a, b".parse::<WideChoice>(),
        Ok(WideChoice::Layers(vec!["a".into(), "b".into()]))
    );
}

/// `auto:N` takes the first N rows of the sensitivity ranking (lowest
/// logit SQNR with only that layer in int8), measured on the all-int8
/// network; the fake-quantized runner with a wide map still tracks the
/// integer simulator.
#[test]
fn auto_takes_the_head_of_the_sensitivity_ranking() {
    let (g, r, data) = demo();
    let images = ImageSet::open(&data.join("eval"), &g).unwrap();
    let inputs: Vec<Vec<f32>> = (0..images.len())
        .step_by(16)
        .map(|i| images.load(i).unwrap().input)
        .collect();
    let q8 = lower(&g, &r, &LowerOptions::default()).unwrap();
    let s = measure_inputs(&Mixed::new(&g, &q8, &r), &inputs);
    let picked = driver::wide_layers(&WideChoice::Auto(2), Some(&s), &q8).unwrap();
    let head: Vec<String> = s
        .rows
        .iter()
        // The input's quantization and the network's output stay int8.
        .filter(|r| r.name != "input" && r.name != "fc")
        .take(2)
        .map(|r| r.name.clone())
        .collect();
    assert_eq!(picked, head, "ranking {:?}", s.rows);
    let too_many = driver::wide_layers(&WideChoice::Auto(1000), Some(&s), &q8);
    assert!(too_many.unwrap_err().to_string().contains("auto:1000"));
    assert!(driver::wide_layers(&WideChoice::Auto(1), None, &q8).is_err());

    let q = lower(&g, &r, &wide(&["t1.conv"])).unwrap();
    let mixed = Mixed::new(&g, &q, &r);
    let mut sim = Simulator::new(&q);
    let (mut to_sim, mut to_float) = ((0f64, 0f64), (0f64, 0f64));
    let reference = Reference::new(&g);
    for x in &inputs {
        sim.run(SimInput::Chw(x)).unwrap();
        let int = sim.map_chw_f32(q.output);
        let fake = mixed.run(x, &|_| true, |_, _| {});
        let float = reference.run_with(x, |_, _| {}).unwrap();
        for ((a, b), f) in int.iter().zip(&fake).zip(&float) {
            to_sim = (
                to_sim.0 + (*a as f64).powi(2),
                to_sim.1 + (*a as f64 - *b as f64).powi(2),
            );
            to_float = (
                to_float.0 + (*f as f64).powi(2),
                to_float.1 + (*f as f64 - *a as f64).powi(2),
            );
        }
    }
    let (sim_db, float_db) = (db(to_sim.0, to_sim.1), db(to_float.0, to_float.1));
    assert!(sim_db >= float_db + 6.0, "{sim_db:.1} vs {float_db:.1}");
}

/// The generator's calls for a graph with int16 maps, run by
/// `codegen::interpret` in the planned arena, give the simulator's codes:
/// the output bit for bit, and every traced map (an int16 map as its
/// little-endian byte pairs). The simulator run with the planned layout
/// (`codegen::arena_refs`, the generator's byte offsets) agrees too. For
/// one widened layer and for a widened concatenation region, with int8
/// and word weights (a wide layer keeps int8 rows).
#[test]
fn generated_calls_match_the_simulator_bit_for_bit() {
    let (g, r, dir) = demo();
    let images = ImageSet::open(&dir.join("eval"), &g).unwrap();
    for names in [&["t1.conv"][..], &["b2.l0.conv"][..]] {
        for form in [WeightForm::Int8, WeightForm::Words] {
            let (q, p) = driver::lower_and_plan(&g, &r, &wide(names), form, true).unwrap();
            assert!(!q.wide.is_empty());
            let s = driver::schedule_of(&q, &p);
            let opts = driver::gen_options("demo", None, form, None, String::new());
            let gen = ingot_compiler::codegen::generate(&q, &s, &opts).unwrap();
            assert!(gen.module.contains("ingot_rt::wide::checked::Conv2d"));
            // The naive schedule (every map its own bytes, every
            // concatenation copying) gives the same codes.
            let naive = ingot_compiler::codegen::Schedule::naive(&q);
            ingot_compiler::codegen::generate(&q, &naive, &opts).unwrap();
            let mut sim = Simulator::new(&q);
            let mut planned = Simulator::with_layout(
                &q,
                ingot_compiler::codegen::arena_refs(&q, &s),
                s.arena_bytes,
            )
            .unwrap();
            for i in (0..images.len()).step_by(40) {
                let sample = images.load(i).unwrap();
                let codes = ingot_compiler::check::prepare::input_codes(&q, &sample);
                let want = sim.run(SimInput::Codes(&codes)).unwrap();
                let mut traced = Vec::new();
                let got = ingot_compiler::codegen::interpret(&q, &s, &codes, &mut |st, m| {
                    traced.push((st, m.to_vec()))
                })
                .unwrap();
                assert_eq!(got, want, "{names:?} {form:?} image {i}");
                let naive_out =
                    ingot_compiler::codegen::interpret(&q, &naive, &codes, &mut |_, _| {}).unwrap();
                assert_eq!(naive_out, want, "naive {names:?} {form:?} image {i}");
                assert_eq!(planned.run(SimInput::Codes(&codes)).unwrap(), want);
                for (st, bytes) in traced {
                    let m = q.step(st).output;
                    // The byte pairs by hand, for a wide map.
                    let expect: Vec<i8> = if q.is_wide(m) {
                        sim.map_values(m)
                            .into_iter()
                            .flat_map(|v| [(v & 0xff) as u8 as i8, (v >> 8) as i8])
                            .collect()
                    } else {
                        sim.map_hwc(m)
                    };
                    assert_eq!(sim.map_trace(m), expect);
                    assert_eq!(bytes, expect, "{names:?} {form:?} step {}", q.step(st).name);
                }
            }
        }
    }
}

/// `QGraph::verify` holds the wide maps to their rules, and a graph
/// without them serializes as before (no `wide` key).
#[test]
fn verify_checks_wide_maps_and_int8_graphs_serialize_as_before() {
    let (g, r, _) = demo();
    let q8 = lower(&g, &r, &LowerOptions::default()).unwrap();
    let json = serde_json::to_value(&q8).unwrap();
    assert!(json.get("wide").is_none());
    let q = lower(&g, &r, &wide(&["b2.l0.conv"])).unwrap();
    assert!(serde_json::to_value(&q).unwrap()["wide"].is_array());

    // The whole region moved to zero point 3 (so the concatenations still
    // agree): not symmetric.
    let mut bad = q.clone();
    for w in q.wide.iter() {
        if let ingot_compiler::lower::MapQuant::Tensor(p) = &mut bad.maps[w.map.index()].qp {
            p.zero_point = 3;
        }
    }
    assert!(bad
        .verify()
        .unwrap_err()
        .to_string()
        .contains("zero point 0"));

    let mut bad = q.clone();
    let first = bad.wide[0].clone();
    bad.wide.push(first);
    assert!(bad.verify().unwrap_err().to_string().contains("twice"));

    let mut bad = q.clone();
    bad.wide[1].max = 40_000;
    assert!(bad.verify().unwrap_err().to_string().contains("int16"));

    // A concatenation with an int8 input and an int16 output would copy
    // codes of two widths.
    let mut bad = q.clone();
    bad.wide.retain(|w| bad_name(&q, w.map) != "b2.l1.conv");
    assert!(bad
        .verify()
        .unwrap_err()
        .to_string()
        .contains("cannot handle"));
}

fn bad_name(q: &QGraph, m: ingot_compiler::lower::QMapId) -> String {
    q.map(m).name.clone()
}

/// Generated calls = simulator on the zoo's residual and depthwise
/// networks with int16 maps at an addition, a projection, a depthwise
/// convolution and a global pooling (kernels the demo does not widen),
/// planned and naive, on seeded random inputs.
#[test]
fn zoo_networks_with_int16_maps_generate_what_the_simulator_computes() {
    use ingot_testkit::zoo;
    let nets = [
        (
            zoo::residual(&zoo::ResidualConfig::default(), 7),
            &["block1.add", "block2.shortcut.conv", "pool"][..],
        ),
        (
            zoo::depthwise_separable(&zoo::DepthwiseConfig::default(), 8),
            &["block2.dw", "block3.pw", "pool"][..],
        ),
    ];
    for (net, names) in nets {
        let g = net.build();
        let r = net.minmax_ranges();
        let (q, p) = match driver::lower_and_plan(&g, &r, &wide(names), WeightForm::Words, true) {
            Ok(x) => x,
            Err(e) => panic!("{}: {e}", g.name()),
        };
        assert!(!q.wide.is_empty());
        let opts = driver::gen_options("zoo", None, WeightForm::Words, None, String::new());
        let mut sim = Simulator::new(&q);
        for s in [
            driver::schedule_of(&q, &p),
            ingot_compiler::codegen::Schedule::naive(&q),
        ] {
            ingot_compiler::codegen::generate(&q, &s, &opts).unwrap();
            for seed in 0..3 {
                let x = net.random_input(100 + seed);
                let want = sim.run(SimInput::Chw(&x)).unwrap();
                let codes = sim.map_hwc(q.input);
                let got =
                    ingot_compiler::codegen::interpret(&q, &s, &codes, &mut |_, _| {}).unwrap();
                assert_eq!(got, want, "{} seed {seed}", g.name());
            }
        }
    }
}

/// The build script's `Builder::wide` reaches the generator: the module
/// it writes calls the int16 kernels, and its hash differs from the
/// all-int8 module's.
#[test]
fn builder_wide_writes_int16_calls() {
    let root = PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("../examples/demo/model");
    let tmp = tempfile::tempdir().unwrap();
    let build = |dir: &str, wide: &str| {
        let out = tmp.path().join(dir);
        let b = ingot_compiler::build::Builder::new(root.join("brackets.graph.json"))
            .ranges(root.join("brackets.ranges.json"))
            .out_dir(&out);
        let b = if wide.is_empty() {
            b
        } else {
            b.wide(wide.parse::<WideChoice>().unwrap())
        };
        b.generate().unwrap();
        std::fs::read_to_string(out.join("model.rs")).unwrap()
    };
    let (plain, wide) = (build("plain", ""), build("wide", "t1.conv"));
    assert!(!plain.contains("ingot_rt::wide::"));
    assert!(wide.contains("ingot_rt::wide::checked::Conv2d"));
    let hash = |s: &str| {
        s.lines()
            .find(|l| l.contains("MODEL_HASH"))
            .unwrap()
            .to_string()
    };
    assert_ne!(hash(&plain), hash(&wide));
}
