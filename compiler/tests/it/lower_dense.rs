//! Lowering of densely connected (pre-activation) networks: the fused
//! BN-ReLU input transform, per-slice concatenation quantization, simulation
//! against the float graph, and the RAM the fusion saves.

use crate::common;

use common::{calibrate, dense_net, eval, flat_ranges, random_input, DenseSpec, Rng};
use ingot_compiler::graph::Op;
use ingot_compiler::lower::quant::{activation_qparams, apply_transform, dequantize, quantize};
use ingot_compiler::lower::{fusion_savings, lower, LowerOptions, QKernel, SimInput, Simulator};

fn small() -> (ingot_compiler::Graph, Vec<Vec<f32>>) {
    let g = dense_net(&DenseSpec::small(), 7);
    let mut rng = Rng::new(11);
    let images: Vec<Vec<f32>> = (0..8).map(|_| random_input(&g, &mut rng)).collect();
    (g, images)
}

#[test]
fn dense_net_simulation_matches_float_within_a_few_steps() {
    let (g, images) = small();
    let ranges = calibrate(&g, &images);
    let q = lower(&g, &ranges, &LowerOptions::default()).unwrap();
    // Every dense layer and the transition read their concatenation through
    // a fused BN-ReLU; the head's BN-ReLU feeds a pool, so it is a step.
    let fused = q
        .steps
        .iter()
        .filter(|s| matches!(&s.kernel, QKernel::Conv2d(c) if c.transform.is_some()))
        .count();
    assert_eq!(fused, 3 + 2 + 1);
    assert_eq!(
        q.steps
            .iter()
            .filter(|s| matches!(s.kernel, QKernel::Channel(_)))
            .count(),
        1
    );
    assert!(!q
        .steps
        .iter()
        .any(|s| s.name.contains("bn") && matches!(s.kernel, QKernel::Conv2d(_))));

    let out = q.output_qp();
    let mut sim = Simulator::new(&q);
    let mut worst = 0f32;
    let mut agree = 0;
    for x in &images {
        let codes = sim.run(SimInput::Chw(x)).unwrap();
        let float = eval(&g, x).pop().unwrap();
        for (c, f) in codes.iter().zip(&float) {
            worst = worst.max((dequantize(*c, out) - f).abs() / out.scale);
        }
        let am = |v: &[f32]| {
            v.iter()
                .enumerate()
                .fold(0, |b, (i, &a)| if a > v[b] { i } else { b })
        };
        let deq: Vec<f32> = codes.iter().map(|&c| dequantize(c, out)).collect();
        agree += usize::from(am(&deq) == am(&float));
    }
    eprintln!(
        "dense small: worst output error {worst:.2} steps of {}, arg-max agreement {agree}/{}",
        out.scale,
        images.len()
    );
    // Fifteen int8 layers deep, each adding at most half a step of rounding
    // at its own scale: the logits stay within a few output steps.
    assert!(worst <= 4.0, "worst output error {worst} steps");
    assert!(agree + 1 >= images.len());
}

#[test]
fn fused_transform_equals_materialised_bn_relu_code_for_code() {
    let (g, images) = small();
    let ranges = calibrate(&g, &images);
    let q = lower(&g, &ranges, &LowerOptions::default()).unwrap();
    let (mut checked, mut exact) = (0usize, 0usize);
    for s in &q.steps {
        let QKernel::Conv2d(c) = &s.kernel else {
            continue;
        };
        let Some(t) = &c.transform else { continue };
        // layers: conv, then the fused batch norm and ReLU.
        let Op::BatchNorm(bn) = &g.layer(s.layers[1]).op else {
            panic!("{}: no fused batch norm", s.name)
        };
        assert!(matches!(g.layer(s.layers[2]).op, Op::Relu));
        let relu_out = s.layers[2].output();
        let dom = activation_qparams(ranges.get(relu_out));
        assert_eq!(
            c.input_zp, dom.zero_point,
            "padding must be the transformed domain's zero"
        );
        let src_q = &q.map(s.inputs[0]).qp;
        for (ch, &(a, b)) in bn.affine().iter().enumerate() {
            // Each channel at its own slice's parameters.
            let src = src_q.channel(ch);
            for code in -128..=127i32 {
                // Materialise: dequantize, BN and ReLU in f32, quantize.
                let y = (a * dequantize(code as i8, src) + b).max(0.0);
                let want = quantize(y, dom) as i32;
                let got = apply_transform(t, ch, code as i8) as i32;
                assert!(
                    (got - want).abs() <= 1,
                    "{} channel {ch} code {code}: fused {got}, materialised {want}",
                    s.name
                );
                exact += usize::from(got == want);
                checked += 1;
            }
        }
    }
    eprintln!("fused transform: {exact}/{checked} codes identical, the rest within 1");
    assert!(checked > 0);
    assert!(exact * 100 >= checked * 99, "only {exact}/{checked} exact");
}

#[test]
fn concatenation_chain_is_quantized_per_slice() {
    let (g, images) = small();
    let ranges = calibrate(&g, &images);
    let q = lower(&g, &ranges, &LowerOptions::default()).unwrap();
    let map = |name: &str| {
        q.maps
            .iter()
            .find(|m| m.name == name)
            .unwrap_or_else(|| panic!("no map {name}"))
    };
    // Every reader of block 0's concatenations is a fused BN-ReLU or the
    // next concatenation, so each member keeps its own range's parameters.
    let members = ["stem.relu", "b0.l0.conv2", "b0.l1.conv2", "b0.l2.conv2"];
    let mut joined = Vec::new();
    for m in members {
        let own = activation_qparams(ranges.get(g.find_layer(m).unwrap().output()));
        assert_eq!(map(m).qp.tensor(), Some(own), "{m}");
        joined.extend(vec![own; map(m).shape.c]);
    }
    // The block's output carries them side by side, in concatenation order.
    let out = map("b0.out");
    assert!(out.qp.is_sliced());
    assert_eq!(out.qp.per_channel(out.shape.c), joined);
    // The members' scales differ: the stem is not given the block's widest.
    let scales: Vec<f32> = members
        .iter()
        .map(|m| map(m).qp.tensor().unwrap().scale)
        .collect();
    assert!(scales.iter().any(|&s| s != scales[0]), "{scales:?}");
    // Producers write their own slice: the concat copies codes unchanged.
    for s in q
        .steps
        .iter()
        .filter(|s| matches!(s.kernel, QKernel::Concat))
    {
        let ins: Vec<_> = s
            .inputs
            .iter()
            .flat_map(|&m| q.map(m).qp.per_channel(q.map(m).shape.c))
            .collect();
        let o = q.map(s.output);
        assert_eq!(ins, o.qp.per_channel(o.shape.c), "{}", s.name);
    }
    q.verify().unwrap();
}

#[test]
fn lowering_is_deterministic() {
    let (g, images) = small();
    let ranges = calibrate(&g, &images);
    let a = lower(&g, &ranges, &LowerOptions::default()).unwrap();
    let b = lower(&g, &ranges, &LowerOptions::default()).unwrap();
    assert_eq!(a, b);
    assert_eq!(
        serde_json::to_string(&a).unwrap(),
        serde_json::to_string(&b).unwrap()
    );
}

#[test]
fn input_transform_fusion_ram_saved_on_bottleneck_dense_network() {
    let small = dense_net(&DenseSpec::small(), 7);
    let q = lower(
        &small,
        &flat_ranges(&small, -2.0, 2.0),
        &LowerOptions::default(),
    )
    .unwrap();
    let s = fusion_savings(&q);
    eprintln!(
        "dense small [3,12,12]: {} fused convolutions, largest avoided map {} B, total {} B",
        s.fused, s.largest, s.total
    );
    // Largest: the transition's input, 8 + 3·4 = 20 channels at 12×12.
    assert_eq!((s.fused, s.largest), (6, 20 * 12 * 12));
}
