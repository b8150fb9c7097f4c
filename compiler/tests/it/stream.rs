//! Row streaming (`plan::stream`): the planner's choice, the fused
//! bounds against the goals of issue 17, the verifier on every zoo
//! network, and the fused schedule in the simulator against the unfused
//! one, bit for bit.

use ingot_compiler::lower::{lower, LowerOptions, QGraph, SimInput, Simulator};
use ingot_compiler::plan::{self, Plan, PlanOptions, Schedule};
use ingot_compiler::ranges::Ranges;
use ingot_rt::MapRef;
use ingot_testkit::synth;
use std::path::Path;
use std::sync::OnceLock;

fn demo() -> &'static QGraph {
    static Q: OnceLock<QGraph> = OnceLock::new();
    Q.get_or_init(|| {
        let dir = Path::new(env!("CARGO_MANIFEST_DIR")).join("../examples/demo/model");
        let g = ingot_compiler::load(&dir.join("brackets.graph.json")).expect("demo graph");
        let r = Ranges::load(&g, &dir.join("brackets.ranges.json"), None).expect("demo ranges");
        lower(&g, &r, &LowerOptions::default()).expect("lowered")
    })
}

fn zoo() -> &'static [QGraph] {
    static Z: OnceLock<Vec<QGraph>> = OnceLock::new();
    Z.get_or_init(synth::zoo_lowered)
}

fn zoo_net(name: &str) -> &'static QGraph {
    zoo()
        .iter()
        .find(|q| q.name.ends_with(name))
        .unwrap_or_else(|| panic!("zoo has {name}"))
}

fn planned(q: &QGraph, stream: bool) -> Plan {
    let p = plan::plan(
        q,
        &PlanOptions {
            stream,
            verify: true,
            ..PlanOptions::default()
        },
    )
    .unwrap_or_else(|e| panic!("{}: {e}", q.name));
    plan::verify(q, &p).unwrap_or_else(|e| panic!("{}: {e}", q.name));
    p
}

/// The goals of issue 17 (`ingot plan` bytes of the arena, rings
/// included); plans are deterministic, so the figures are exact.
#[test]
fn fused_plans_meet_the_goals() {
    for (q, unfused, goal) in [
        (demo(), 73_728, 64_000),
        (zoo_net("inverted_residual"), 138_240, 65_536),
        (zoo_net("densenet121"), 1_605_632, 1_250_000),
    ] {
        let p = planned(q, true);
        assert_eq!(p.unfused_bound, unfused, "{}", q.name);
        assert!(!p.pipelines.is_empty(), "{}", q.name);
        assert!(
            p.lower_bound <= goal,
            "{}: {} > {goal}",
            q.name,
            p.lower_bound
        );
        assert!(
            p.arena_bytes <= goal,
            "{}: {} > {goal}",
            q.name,
            p.arena_bytes
        );
        assert!(p.arena_bytes >= p.lower_bound, "{}", q.name);
        // Without streaming: today's plan, nothing fused.
        let off = planned(q, false);
        assert!(off.pipelines.is_empty());
        assert_eq!(off.lower_bound, off.unfused_bound);
        assert_eq!(off.arena_bytes, unfused, "{}", q.name);
    }
}

/// Every zoo network and test-set graph plans with streaming and passes
/// the verifier (rings hold the rows their consumers read), and streaming
/// never raises the bound.
#[test]
fn every_fused_plan_verifies() {
    for q in zoo().iter().chain(&synth::test_set()) {
        let p = planned(q, true);
        assert!(p.lower_bound <= p.unfused_bound, "{}", q.name);
        for pl in &p.pipelines {
            assert!(pl.rings.len() < pl.steps.len(), "{}", q.name);
            for r in &pl.rings {
                assert!(r.rows < q.map(r.map).shape.h);
            }
        }
    }
}

/// The verifier refuses a ring one row too small, and calls out of turn.
#[test]
fn verifier_catches_short_rings_and_bad_calls() {
    let q = demo();
    let p = planned(q, true);
    let k = p
        .pipelines
        .iter()
        .position(|pl| pl.rings.iter().any(|r| r.rows > 1))
        .expect("a ring of more than one row");
    let mut bad = p.clone();
    for r in &mut bad.pipelines[k].rings {
        r.rows -= 1;
    }
    assert!(plan::verify(q, &bad).is_err());
    let mut bad = p.clone();
    bad.pipelines[k].calls.swap(0, 1);
    assert!(plan::verify(q, &bad).is_err());
}

/// The simulator's map refs of a plan: rings where it streams.
fn refs(q: &QGraph, s: &Schedule) -> Vec<MapRef> {
    q.maps
        .iter()
        .enumerate()
        .map(|(m, map)| {
            let v = s.views[m];
            let sh = map.shape;
            let rows = s
                .ring_rows(ingot_compiler::lower::QMapId(m as u32))
                .unwrap_or(sh.h);
            MapRef::ring(v.offset, sh.h, sh.w, sh.c, v.stride, rows)
        })
        .collect()
}

fn codes(q: &QGraph, seed: u64) -> Vec<i8> {
    let mut s = seed | 1;
    (0..q.map(q.input).shape.len())
        .map(|_| {
            s ^= s << 13;
            s ^= s >> 7;
            s ^= s << 17;
            (s >> 32) as i8
        })
        .collect()
}

/// Fused = unfused, bit for bit, in the simulator (the `ingot-rt` kernels
/// themselves), on the demo and every zoo network.
#[test]
fn fused_schedule_simulates_bit_identically() {
    for q in std::iter::once(demo()).chain(zoo()) {
        let p = planned(q, true);
        assert!(!p.pipelines.is_empty(), "{} streams nothing", q.name);
        let s = Schedule::from(&p);
        let mut fused = Simulator::with_layout(q, refs(q, &s), s.arena_bytes)
            .expect("layout")
            .with_program(s.program())
            .expect("program");
        let mut plain = Simulator::new(q);
        let images = if q.name.contains("densenet") { 1 } else { 3 };
        for seed in 0..images {
            let x = codes(q, seed + 1);
            let want = plain.run(SimInput::Codes(&x)).expect("unfused");
            let got = fused.run(SimInput::Codes(&x)).expect("fused");
            assert_eq!(got, want, "{} image {seed}", q.name);
        }
    }
}

/// The picture draws the demo's ring as a ring, the report prints both
/// bounds, and JSON carries them.
#[test]
fn svg_and_report_show_rings_and_both_bounds() {
    let q = demo();
    let p = planned(q, true);
    let svg = plan::render_svg(q, &p).expect("svg");
    assert!(svg.contains("ring 2/32 rows"), "ring label");
    assert!(svg.contains("unfused 72.0 KiB"), "title");
    let r = plan::report(q, &p, None);
    let text = r.to_string();
    assert!(text.contains("unfused           73728 B"), "{text}");
    assert!(
        text.contains("`t1.conv` ring 2/32 rows (1536 of 24576 B)"),
        "{text}"
    );
    let json = serde_json::to_value(&r).expect("json");
    assert_eq!(json["unfused_bound"], 73_728);
    assert_eq!(json["lower_bound"], p.lower_bound);
    assert_eq!(json["pipelines"][0]["rings"][0]["rows"], 2);
}

/// Prints the pipelines of the 121-layer network (`--nocapture`), for the
/// documentation; asserts the pipelines the docs name: the stem, two of
/// the three transitions (the second one's does not lower the live bytes
/// at its time, so the planner leaves it), and every dense layer's 1×1
/// bottleneck into its 3×3 convolution (58 layers, Huang et al. 2017,
/// table 1: 6 + 12 + 24 + 16).
#[test]
fn densenet121_streams_its_stem_and_transitions() {
    let q = zoo_net("densenet121");
    let p = planned(q, true);
    let mut stem = false;
    let mut pools = 0;
    let mut bottlenecks = 0;
    for pl in &p.pipelines {
        let names: Vec<&str> = pl.steps.iter().map(|&s| q.step(s).name.as_str()).collect();
        let rings: Vec<String> = pl
            .rings
            .iter()
            .map(|r| format!("{}/{}", r.rows, q.map(r.map).shape.h))
            .collect();
        println!("{names:?} {rings:?}");
        let kinds: Vec<&str> = pl.steps.iter().map(|&s| q.step(s).kernel.kind()).collect();
        if kinds == ["conv2d", "max_pool"] && pl.rings[0].rows == 3 {
            stem = true;
        }
        if kinds.last() == Some(&"avg_pool") {
            pools += 1;
        }
        if kinds == ["pointwise", "conv2d"] && pl.rings[0].rows == 3 {
            bottlenecks += 1;
        }
    }
    assert!(
        stem,
        "the stem's 7×7/2 conv streams into the 3×3/2 max pool"
    );
    assert_eq!(pools, 2, "transitions streamed into their average pooling");
    assert_eq!(bottlenecks, 58);
    assert_eq!(p.pipelines.len(), 61);
}
