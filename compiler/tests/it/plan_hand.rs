//! Hand-computed memory plans and the in-place rules.

use ingot_compiler::lower::QGraph;
use ingot_compiler::plan::{plan, verify, MapView, PlanOptions};
use ingot_testkit::qbuild::{Kind, QBuilder};

/// The layouts below are worked out by hand for the unfused plan; row
/// streaming has its own tests (`stream`).
fn opts() -> PlanOptions {
    PlanOptions {
        verify: true,
        stream: false,
        ..PlanOptions::default()
    }
}

fn view(q: &QGraph, p: &ingot_compiler::plan::Plan, name: &str) -> MapView {
    let i = q.maps.iter().position(|m| m.name == name).expect("map");
    p.map_views[i]
}

fn conv(out: usize, k: usize, stride: usize) -> Kind {
    Kind::Conv {
        out,
        k,
        stride,
        groups: 1,
        transform: false,
    }
}

/// input 4×8×8 (256 B) → c1 3x3 to 8×8×8 (512 B) → c2 3x3/2 to 16×4×4
/// (256 B) → c3 1x1 to 10×4×4 (160 B).
///
/// Lifetimes (positions): input [0,0], c1 [0,1], c2 [1,2], c3 [2,2] (the
/// output). Live bytes: t0 = 256 + 512 = 768, t1 = 512 + 256 = 768,
/// t2 = 256 + 160 = 416, so the lower bound is 768.
///
/// Greedy by size: c1 (512) at 0; then the 256-byte buffers, longer
/// lifetime first: c2 [1,2] overlaps c1 in time → on top, 512; input [0,0]
/// overlaps c1 only → 512; c3 overlaps only c2 (512..768): the gap 0..512
/// holds it → 0. Arena 768 = lower bound.
///
/// Patch: the largest `ingot_rt::conv_patch_len(k, k, C_in)`, that of c2
/// (3, 3, 8): 144 bytes with 16-bit widened patches.
/// Naive: 256 + 512 + 256 + 160 = 1184.
#[test]
fn three_layer_chain_by_hand() {
    let mut b = QBuilder::dummy("chain3", [4, 8, 8]);
    b.step("c1", conv(8, 3, 1), &["input"]);
    b.step("c2", conv(16, 3, 2), &["c1"]);
    b.step("c3", conv(10, 1, 1), &["c2"]);
    let q = b.build();
    let p = plan(&q, &opts()).expect("plan");
    assert_eq!(p.lower_bound, 768);
    assert_eq!(p.arena_bytes, 768);
    assert_eq!(p.naive_bytes, 1184);
    assert_eq!(p.patch_bytes, 2 * ingot_rt::conv_patch_len(3, 3, 8));
    assert_eq!(p.heuristic, "greedy-by-size/best-fit");
    assert_eq!(
        view(&q, &p, "c1"),
        MapView {
            offset: 0,
            stride: 8
        }
    );
    assert_eq!(
        view(&q, &p, "c2"),
        MapView {
            offset: 512,
            stride: 16
        }
    );
    assert_eq!(
        view(&q, &p, "input"),
        MapView {
            offset: 512,
            stride: 4
        }
    );
    assert_eq!(
        view(&q, &p, "c3"),
        MapView {
            offset: 0,
            stride: 10
        }
    );
    assert_eq!(p.peak_step, 0);
}

/// A small dense block exported framework-style:
///
/// ```text
/// pos 0  x0   = conv(input)       4×4×4   (64 B)
///     1  cat1 = concat[x0]        4 ch
///     2  x1   = conv(cat1)        2×4×4   (32 B)
///     3  cat2 = concat[x0,x1]     6 ch
///     4  x2   = conv(cat2)        2×4×4   (32 B)
///     5  cat3 = concat[x0,x1,x2]  8×4×4   (128 B, the region)
///     6  t    = conv1x1(cat3)     4×4×4   (64 B)
///     7  g    = global_avg(t)     4 B
/// ```
///
/// In place, x0, x1, x2 are channels [0,4), [4,6), [6,8) of one region of
/// 8 channels (stride 8) and the three concats are its prefixes. Buffers:
/// input 32 B [0,0], region 128 B [0,6], t 64 B [6,7], g 4 B [7,7].
/// Live: t0 = 32 + 128 = 160, t1..t5 = 128, t6 = 128 + 64 = 192, t7 = 68:
/// lower bound 192. Greedy by size: region at 0, t on top at 128, input at
/// 128 (overlaps only the region), g in the gap 0..128 below t → 0.
///
/// Copying every concat instead: x0 [0,5], cat1 [1,2], x1 [2,5], cat2
/// (96 B) [3,4], x2 [4,5], cat3 [5,6], t [6,7]. At t5, x0, x1, x2 and cat3
/// are alive: 64 + 32 + 32 + 128 = 256, the peak. In place is
/// 192 / 256 = 75 % of it.
///
/// Naive: 32 + 64 + 64 + 32 + 96 + 32 + 128 + 64 + 4 = 516.
#[test]
fn dense_block_by_hand() {
    let mut b = QBuilder::dummy("block", [2, 4, 4]);
    b.step("x0", conv(4, 3, 1), &["input"]);
    b.step("cat1", Kind::Concat, &["x0"]);
    b.step("x1", conv(2, 3, 1), &["cat1"]);
    b.step("cat2", Kind::Concat, &["x0", "x1"]);
    b.step("x2", conv(2, 3, 1), &["cat2"]);
    b.step("cat3", Kind::Concat, &["x0", "x1", "x2"]);
    b.step("t", conv(4, 1, 1), &["cat3"]);
    b.step("g", Kind::GlobalAvgPool, &["t"]);
    let q = b.build();
    let p = plan(&q, &opts()).expect("plan");
    assert!(p.copy_concat.is_empty(), "all three concats run in place");
    for (name, offset) in [
        ("x0", 0),
        ("x1", 4),
        ("x2", 6),
        ("cat1", 0),
        ("cat2", 0),
        ("cat3", 0),
    ] {
        assert_eq!(view(&q, &p, name), MapView { offset, stride: 8 }, "{name}");
    }
    assert_eq!(
        view(&q, &p, "t"),
        MapView {
            offset: 128,
            stride: 4
        }
    );
    assert_eq!(
        view(&q, &p, "input"),
        MapView {
            offset: 128,
            stride: 2
        }
    );
    assert_eq!(
        view(&q, &p, "g"),
        MapView {
            offset: 0,
            stride: 4
        }
    );
    assert_eq!(p.lower_bound, 192);
    assert_eq!(p.arena_bytes, 192);
    assert_eq!(p.copying_bytes, 256);
    assert_eq!(p.naive_bytes, 516);
    // Every map stored once: one region buffer holds x0, x1, x2 and the concats.
    let region: Vec<_> = p.buffers.iter().filter(|b| b.region).collect();
    assert_eq!(region.len(), 1);
    assert_eq!(region[0].bytes, 128);
    assert_eq!((region[0].first, region[0].last), (0, 6));
    assert_eq!(region[0].maps.len(), 6);
    assert_eq!(
        p.buffers.iter().map(|b| b.bytes).sum::<usize>(),
        32 + 128 + 64 + 4
    );
}

/// input → c1 → c2 → add(c2, c1): both inputs die at the add, so it writes
/// over c2 (its first whole, dying input), same offset and stride. A max
/// pool and a convolution never overwrite their own input.
#[test]
fn elementwise_in_place_pool_and_conv_not() {
    let mut b = QBuilder::dummy("res", [4, 8, 8]);
    b.step("c1", conv(4, 3, 1), &["input"]);
    b.step("c2", conv(4, 3, 1), &["c1"]);
    b.step("sum", Kind::Add, &["c2", "c1"]);
    b.step("bn", Kind::Channel, &["sum"]);
    b.step("pool", Kind::MaxPool(1, 1, 0), &["bn"]);
    b.step("c3", conv(4, 1, 1), &["pool"]);
    let q = b.build();
    let p = plan(&q, &opts()).expect("plan");
    let id = |n: &str| q.maps.iter().position(|m| m.name == n).expect("map");
    let step = |n: &str| q.steps.iter().position(|s| s.name == n).expect("step") as u32;
    assert!(p.in_place.iter().any(|s| s.0 == step("sum")));
    assert!(p.in_place.iter().any(|s| s.0 == step("bn")));
    assert_eq!(view(&q, &p, "sum"), view(&q, &p, "c2"));
    assert_eq!(view(&q, &p, "bn"), view(&q, &p, "c2"));
    assert!(!p
        .in_place
        .iter()
        .any(|s| s.0 == step("pool") || s.0 == step("c3")));
    let (a, c) = (p.map_views[id("bn")].offset, p.map_views[id("pool")].offset);
    assert!(
        a + 256 <= c || c + 256 <= a,
        "pool output must not overlap its input"
    );
    let (a, c) = (p.map_views[id("pool")].offset, p.map_views[id("c3")].offset);
    assert!(
        a + 256 <= c || c + 256 <= a,
        "conv output must not overlap its input"
    );
    // Lower bound: c1 + c2 (+ sum merged) = 512 at the add.
    assert_eq!(p.lower_bound, 512);
    assert_eq!(p.arena_bytes, 512);
}

fn fallback(
    build: impl FnOnce(&mut QBuilder),
    o: &PlanOptions,
) -> (QGraph, ingot_compiler::plan::Plan) {
    let mut b = QBuilder::dummy("fb", [4, 4, 4]);
    build(&mut b);
    let q = b.build();
    let p = plan(&q, o).expect("plan");
    (q, p)
}

fn copies(q: &QGraph, p: &ingot_compiler::plan::Plan, name: &str) -> bool {
    p.copy_concat.iter().any(|s| q.step(*s).name == name)
}

/// The graph input is written densely before step 0: never a member.
#[test]
fn concat_of_graph_input_copies() {
    let (q, p) = fallback(
        |b| {
            b.step("a", conv(4, 1, 1), &["input"]);
            b.step("cat", Kind::Concat, &["input", "a"]);
        },
        &opts(),
    );
    assert!(copies(&q, &p, "cat"));
    assert_eq!(view(&q, &p, "a").stride, 4, "a stays dense");
}

/// `a` in two unrelated concats: only one of them can hold it in place.
#[test]
fn unrelated_concats_sharing_a_map_copy_one() {
    let (q, p) = fallback(
        |b| {
            b.step("a", conv(4, 1, 1), &["input"]);
            b.step("x", conv(2, 1, 1), &["input"]);
            b.step("y", conv(3, 1, 1), &["input"]);
            b.step("cat1", Kind::Concat, &["a", "x"]);
            b.step("cat2", Kind::Concat, &["a", "y"]);
            b.step("g1", Kind::GlobalAvgPool, &["cat1"]);
            b.step("g2", Kind::GlobalAvgPool, &["cat2"]);
        },
        &opts(),
    );
    // cat2 has more channels, so it keeps `a` in its region; cat1 copies.
    assert!(copies(&q, &p, "cat1"));
    assert_eq!(view(&q, &p, "a").stride, 7);
    assert_eq!(
        p.copy_concat.len(),
        1,
        "exactly one of the conflicting concats copies: {:?}",
        p.copy_concat
    );
}

/// `cat[a, a]` and `a` at two different channel positions must copy.
#[test]
fn repeated_member_and_reversed_positions_copy() {
    let (q, p) = fallback(
        |b| {
            b.step("a", conv(4, 1, 1), &["input"]);
            b.step("x", conv(2, 1, 1), &["input"]);
            b.step("twice", Kind::Concat, &["a", "a"]);
            b.step("ax", Kind::Concat, &["a", "x"]);
            b.step("xa", Kind::Concat, &["x", "a"]);
            b.step("end", Kind::Concat, &["twice", "ax", "xa"]);
        },
        &opts(),
    );
    assert!(copies(&q, &p, "twice"));
    assert!(
        copies(&q, &p, "ax") || copies(&q, &p, "xa"),
        "a and x cannot be at both positions"
    );
}

#[test]
fn nested_concat_in_place() {
    let (q, p) = fallback(
        |b| {
            b.step("a", conv(4, 1, 1), &["input"]);
            b.step("x", conv(2, 1, 1), &["input"]);
            b.step("y", conv(3, 1, 1), &["input"]);
            b.step("ax", Kind::Concat, &["a", "x"]);
            b.step("axy", Kind::Concat, &["ax", "y"]);
            b.step("g", Kind::GlobalAvgPool, &["axy"]);
        },
        &opts(),
    );
    assert!(p.copy_concat.is_empty());
    let r = view(&q, &p, "axy");
    assert_eq!(view(&q, &p, "ax"), r);
    assert_eq!(
        view(&q, &p, "x"),
        MapView {
            offset: r.offset + 4,
            stride: 9
        }
    );
    assert_eq!(
        view(&q, &p, "y"),
        MapView {
            offset: r.offset + 6,
            stride: 9
        }
    );
}

/// With `linear` declared as needing a dense input, a strided member read
/// by a linear layer forces its concat to copy; by default (every ingot-rt
/// kernel takes a stride) it stays in place.
#[test]
fn contiguous_consumer_forces_copy() {
    let graph = |b: &mut QBuilder| {
        b.step("a", conv(4, 1, 1), &["input"]);
        b.step("x", conv(2, 1, 1), &["input"]);
        b.step("cat", Kind::Concat, &["a", "x"]);
        b.step("head", Kind::Linear(3), &["a"]);
        b.step("g", Kind::GlobalAvgPool, &["cat"]);
    };
    let (q, p) = fallback(graph, &opts());
    assert!(!copies(&q, &p, "cat"));
    assert_eq!(view(&q, &p, "a").stride, 6);
    let strict = PlanOptions {
        contiguous_kinds: vec!["linear".into()],
        ..opts()
    };
    let (q, p) = fallback(graph, &strict);
    assert!(copies(&q, &p, "cat"));
    assert_eq!(view(&q, &p, "a").stride, 4);
}

#[test]
fn verifier_rejects_broken_plans() {
    let mut b = QBuilder::dummy("chain3", [4, 8, 8]);
    b.step("c1", conv(8, 3, 1), &["input"]);
    b.step("cat", Kind::Concat, &["c1"]);
    b.step("c2", conv(16, 3, 2), &["cat"]);
    b.step("c3", conv(10, 1, 1), &["c2"]);
    let q = b.build();
    let good = plan(&q, &opts()).expect("plan");
    verify(&q, &good).expect("good plan verifies");
    let id = |n: &str| q.maps.iter().position(|m| m.name == n).expect("map");
    // Overlap two maps alive together.
    let mut p = good.clone();
    p.map_views[id("c2")].offset = p.map_views[id("c1")].offset;
    assert!(verify(&q, &p)
        .unwrap_err()
        .to_string()
        .contains("share arena bytes"));
    // A map beyond the arena.
    let mut p = good.clone();
    p.arena_bytes -= 4;
    assert!(verify(&q, &p).is_err());
    // A member not at its channel slice.
    let mut p = good.clone();
    p.map_views[id("cat")].offset += 4;
    assert!(verify(&q, &p)
        .unwrap_err()
        .to_string()
        .contains("channel 0"));
    // An order that reads before writing.
    let mut p = good.clone();
    p.order.swap(0, 1);
    assert!(verify(&q, &p).is_err());
}
