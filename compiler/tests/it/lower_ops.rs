//! Lowering of single ops and patterns: BN folding, flatten + linear in HWC
//! order, add, pooling, accumulator and range errors, per-channel weights,
//! the pixel table and simulator errors.

use crate::common;

use common::{calibrate, eval, random_input, Net, Rng};
use ingot_compiler::calibrate::MapRange;
use ingot_compiler::graph::{MapId, Op};
use ingot_compiler::lower::quant::{activation_qparams, dequantize, quantize};
use ingot_compiler::lower::{
    fold_batch_norm, lower, LowerError, LowerOptions, QGraph, QKernel, SimError, SimInput,
    Simulator,
};

fn images(g: &ingot_compiler::Graph, n: usize, seed: u64) -> Vec<Vec<f32>> {
    let mut rng = Rng::new(seed);
    (0..n).map(|_| random_input(g, &mut rng)).collect()
}

/// Largest error, in output steps, of every stored map against the float
/// map it approximates, over `imgs`. Tests allow 4 steps: besides its own
/// half-step rounding, a map carries its inputs' rounding errors scaled by
/// `Σ|w|·s_in/s_out`, one to two steps for these layers.
fn worst_steps(g: &ingot_compiler::Graph, q: &QGraph, imgs: &[Vec<f32>]) -> Vec<(String, f32)> {
    let mut sim = Simulator::new(q);
    let mut worst = vec![0f32; q.maps.len()];
    for x in imgs {
        sim.run(SimInput::Chw(x)).unwrap();
        let float = eval(g, x);
        for (i, m) in q.maps.iter().enumerate() {
            let got = sim.map_chw_f32(ingot_compiler::lower::QMapId(i as u32));
            let want = &float[m.float_map.index()];
            let hw = m.shape.pixels();
            for (k, (a, b)) in got.iter().zip(want).enumerate() {
                let step = m.qp.channel(k / hw).scale;
                worst[i] = worst[i].max((a - b).abs() / step);
            }
        }
    }
    q.maps.iter().map(|m| m.name.clone()).zip(worst).collect()
}

#[test]
fn batch_norm_folding_is_exact_in_float() {
    let mut n = Net::new(3, 6, 6, 3);
    n.conv("c", "x", 3, 4, 3, 1, 1, 1);
    n.bn("bn", "c", 4);
    let g = n.build("bn");
    let (Op::Conv2d(conv), Op::BatchNorm(bn)) = (&g.layers()[0].op, &g.layers()[1].op) else {
        panic!()
    };
    let (w, b) = fold_batch_norm(conv, bn);
    let mut folded = Net::new(3, 6, 6, 3);
    folded.conv("c", "x", 3, 4, 3, 1, 1, 1);
    folded.store.insert("c.weight", vec![4, 3, 3, 3], w);
    folded.store.insert("c.bias", vec![4], b);
    let gf = folded.build("c");
    for x in images(&g, 3, 5) {
        let a = eval(&g, &x).pop().unwrap();
        let f = eval(&gf, &x).pop().unwrap();
        for (u, v) in a.iter().zip(&f) {
            assert!(
                (u - v).abs() <= 1e-5 * (1.0 + u.abs()),
                "conv+BN {u} vs folded {v}"
            );
        }
    }
    // Lowered, the batch norm and the ReLU disappear into the convolution.
    let mut n2 = Net::new(3, 6, 6, 3);
    n2.conv("c", "x", 3, 4, 3, 1, 1, 1);
    n2.bn("bn", "c", 4);
    n2.op("r", "relu", "bn");
    let g2 = n2.build("r");
    let q = lower(
        &g2,
        &calibrate(&g2, &images(&g2, 4, 1)),
        &LowerOptions::default(),
    )
    .unwrap();
    assert_eq!(q.steps.len(), 1);
    assert_eq!(q.steps[0].layers.len(), 3);
    let QKernel::Conv2d(c) = &q.steps[0].kernel else {
        panic!()
    };
    assert_eq!(c.clamp.min as i32, q.output_qp().zero_point);
}

#[test]
fn flatten_and_linear_use_hwc_order() {
    // Plain stack: conv -> relu -> max pool -> flatten -> dropout -> linear -> softmax.
    let mut n = Net::new(3, 8, 8, 21);
    n.conv("c1", "x", 3, 4, 3, 1, 1, 1);
    n.op("r1", "relu", "c1");
    n.pool("p1", "max_pool2d", "r1", 2, 2, 0);
    n.op("flat", "flatten", "p1");
    n.op("drop", "dropout", "flat");
    n.linear("fc", "drop", 4 * 4 * 4, 6);
    n.op("prob", "softmax", "fc");
    let g = n.build("prob");
    let imgs = images(&g, 6, 2);
    let q = lower(&g, &calibrate(&g, &imgs), &LowerOptions::default()).unwrap();
    assert!(q.softmax_dropped);
    let kinds: Vec<&str> = q.steps.iter().map(|s| s.kernel.kind()).collect();
    assert_eq!(kinds, ["conv2d", "max_pool", "linear"]);
    // Weight of feature (c, y, x) sits at HWC position (y·W + x)·C + c.
    let Op::Linear(fl) = &g.layers()[5].op else {
        panic!()
    };
    let QKernel::Linear(ql) = &q.steps[2].kernel else {
        panic!()
    };
    for o in 0..6 {
        for c in 0..4 {
            for p in 0..16 {
                let w = fl.weight.data[o * 64 + c * 16 + p];
                let code = ql.weights[o * 64 + p * 4 + c];
                assert!(
                    (code as f32 * ql.weight_scales[o] - w).abs()
                        <= 0.5 * ql.weight_scales[o] + 1e-7
                );
            }
        }
    }
    // Max pool keeps its input's quantization (no rescaling).
    let QKernel::MaxPool(p) = &q.steps[1].kernel else {
        panic!()
    };
    assert!(p.requant.is_none());
    assert_eq!(q.map(q.steps[1].inputs[0]).qp, q.map(q.steps[1].output).qp);
    for (name, w) in worst_steps(&g, &q, &imgs) {
        assert!(w <= 4.0, "map {name}: {w} steps from float");
    }
}

#[test]
fn add_requantizes_inputs_with_different_scales() {
    let mut n = Net::new(3, 5, 5, 8);
    n.conv("a", "x", 3, 4, 3, 1, 1, 1);
    n.conv("b", "x", 3, 4, 1, 1, 0, 1);
    // Make `b` ten times larger than `a`.
    let t = n.store.tensors.get_mut("b.weight").unwrap();
    t.data.iter_mut().for_each(|v| *v *= 10.0);
    n.multi("sum", "add", &["a", "b"]);
    n.op("r", "relu", "sum");
    let g = n.build("r");
    let imgs = images(&g, 6, 4);
    let q = lower(&g, &calibrate(&g, &imgs), &LowerOptions::default()).unwrap();
    let s = q.steps.iter().find(|s| s.name == "sum").unwrap();
    let t = |m: ingot_compiler::lower::QMapId| q.map(m).qp.tensor().unwrap();
    let (sa, sb) = (t(s.inputs[0]).scale, t(s.inputs[1]).scale);
    assert!(sb > 3.0 * sa, "scales {sa} and {sb} should differ");
    let QKernel::Add(a) = &s.kernel else { panic!() };
    assert_eq!(
        a.clamp.min as i32,
        t(s.output).zero_point,
        "ReLU folded into the add"
    );
    assert_ne!(a.a, a.b);
    for (name, w) in worst_steps(&g, &q, &imgs) {
        assert!(w <= 4.0, "map {name}: {w} steps from float");
    }
}

#[test]
fn pooling_max_avg_global_and_depthwise() {
    let mut n = Net::new(3, 8, 8, 12);
    n.conv("c", "x", 3, 6, 3, 1, 1, 1);
    n.op("r", "relu6", "c");
    n.pool("mp", "max_pool2d", "r", 3, 2, 1);
    // Reads the fine-scaled ReLU6 map: `mp` takes the concat group's coarse
    // scale, whose rounding would dominate a comparison with the float map.
    n.conv("dw", "r", 6, 6, 3, 1, 1, 6);
    n.pool("ap", "avg_pool2d", "dw", 2, 2, 0);
    n.conv("wide", "r", 6, 2, 1, 2, 0, 1);
    let t = n.store.tensors.get_mut("wide.weight").unwrap();
    t.data.iter_mut().for_each(|v| *v *= 20.0);
    // The max pool feeds a concat whose other member has a far wider range.
    n.multi("cat", "concat", &["mp", "wide"]);
    n.op("gap", "global_avg_pool", "cat");
    let g = n.build("gap");
    let imgs = images(&g, 6, 6);
    let q = lower(&g, &calibrate(&g, &imgs), &LowerOptions::default()).unwrap();
    let step = |name: &str| q.steps.iter().find(|s| s.name == name).unwrap();
    let QKernel::Conv2d(c) = &step("c").kernel else {
        panic!()
    };
    let out_qp = q.map(step("c").output).qp.tensor().unwrap();
    assert_eq!(
        c.clamp.max as i32,
        (out_qp.zero_point + (6.0 / out_qp.scale).round() as i32).min(127),
        "ReLU6 clamp"
    );
    let QKernel::MaxPool(mp) = &step("mp").kernel else {
        panic!()
    };
    assert!(
        mp.requant.is_some(),
        "max pool joining a concat group with another scale must rescale"
    );
    assert_eq!(q.map(step("mp").output).qp, q.map(step("cat").output).qp);
    assert!(matches!(step("ap").kernel, QKernel::AvgPool(ref p) if p.requant.is_some()));
    assert!(matches!(step("gap").kernel, QKernel::GlobalAvgPool(ref p) if p.kernel == [4, 4]));
    assert_eq!(step("dw").kernel.kind(), "depthwise");
    for (name, w) in worst_steps(&g, &q, &imgs) {
        assert!(w <= 4.0, "map {name}: {w} steps from float");
    }
}

#[test]
fn accumulator_overflow_is_refused_naming_the_layer() {
    // 70 000 inputs, every weight at full scale: 255 · 127 · 70 000 > 2^31.
    let n_in = 70_000;
    let mut n = Net::new(1, 1, n_in, 1);
    n.op("flat", "flatten", "x");
    n.linear("huge_fc", "flat", n_in, 2);
    n.store
        .insert("huge_fc.weight", vec![2, n_in], vec![0.01; 2 * n_in]);
    let g = n.build("huge_fc");
    let r = common::flat_ranges(&g, -1.0, 1.0);
    let e = lower(&g, &r, &LowerOptions::default()).unwrap_err();
    assert!(matches!(e, LowerError::AccumulatorOverflow { .. }), "{e:?}");
    let msg = e.to_string();
    assert!(
        msg.contains("huge_fc") && msg.contains("linear") && msg.contains("[1, 1, 70000]"),
        "{msg}"
    );
    // A fan-in of 60 000 fits (255 · 127 · 60 000 < 2^31).
    let mut n = Net::new(1, 1, 60_000, 1);
    n.op("flat", "flatten", "x");
    n.linear("ok_fc", "flat", 60_000, 2);
    n.store.insert("ok_fc.bias", vec![2], vec![0.0; 2]);
    let g = n.build("ok_fc");
    lower(
        &g,
        &common::flat_ranges(&g, -1.0, 1.0),
        &LowerOptions::default(),
    )
    .unwrap();
}

#[test]
fn missing_or_bad_ranges_are_refused() {
    let mut n = Net::new(1, 4, 4, 1);
    n.conv("c", "x", 1, 2, 3, 1, 1, 1);
    n.op("r", "relu", "c");
    let g = n.build("r");
    let mut r = common::flat_ranges(&g, -1.0, 1.0);
    r.maps.pop();
    let e = lower(&g, &r, &LowerOptions::default()).unwrap_err();
    assert!(
        matches!(&e, LowerError::MissingRange { map, .. } if map == "r"),
        "{e}"
    );
    let mut r = common::flat_ranges(&g, -1.0, 1.0);
    r.maps[1] = MapRange {
        min: 1.0,
        max: f32::NAN,
    };
    assert!(matches!(
        lower(&g, &r, &LowerOptions::default()),
        Err(LowerError::BadRange { .. })
    ));
}

/// Signal-to-quantization-noise ratio of dequantized weights, in dB, of the
/// worst output channel (every channel drives its own output, so a crushed
/// small channel matters however small it is).
fn worst_channel_sqnr(float: &[f32], codes: &[i8], scales: &[f32]) -> f64 {
    let per = float.len() / scales.len();
    (0..scales.len())
        .map(|o| {
            let (mut s, mut e) = (0f64, 0f64);
            for i in o * per..(o + 1) * per {
                let d = codes[i] as f64 * scales[o] as f64;
                s += (float[i] as f64).powi(2);
                e += (float[i] as f64 - d).powi(2);
            }
            10.0 * (s / e.max(1e-300)).log10()
        })
        .fold(f64::INFINITY, f64::min)
}

#[test]
fn per_channel_weights_are_no_worse_than_per_tensor() {
    // Output channels with magnitudes spanning 1e-3..1: per-tensor scales
    // crush the small channels. Krishnamoorthi (2018), §3.1 and Table 2:
    // per-channel int8 weights close most of the post-training gap that
    // per-tensor quantization leaves on networks with such spreads.
    let mut n = Net::new(3, 4, 4, 9);
    n.conv("c", "x", 3, 4, 1, 1, 0, 1);
    let t = n.store.tensors.get_mut("c.weight").unwrap();
    for (i, v) in t.data.iter_mut().enumerate() {
        *v *= [1.0, 0.1, 0.01, 0.001][i / 3];
    }
    let g = n.build("c");
    let Op::Conv2d(fc) = &g.layers()[0].op else {
        panic!()
    };
    let r = common::flat_ranges(&g, -1.0, 1.0);
    let get = |per_channel| {
        let q = lower(
            &g,
            &r,
            &LowerOptions {
                per_channel,
                ..Default::default()
            },
        )
        .unwrap();
        let QKernel::Conv2d(c) = &q.steps[0].kernel else {
            panic!()
        };
        worst_channel_sqnr(&fc.weight.data, &c.weights, &c.weight_scales)
    };
    let (pc, pt) = (get(true), get(false));
    eprintln!("worst-channel weight SQNR: per-channel {pc:.1} dB, per-tensor {pt:.1} dB");
    assert!(pc >= pt);
    // 7-bit symmetric codes of a 12-weight channel: about 6 dB per bit.
    assert!(
        pc > 30.0,
        "per-channel int8 weights should keep every channel, got {pc} dB"
    );
    assert!(
        pt < 20.0,
        "per-tensor scales should crush the 1e-3 channel, got {pt} dB"
    );
}

#[test]
fn pixel_table_folds_preprocessing_and_input_quantization() {
    let mut n = Net::new(3, 2, 2, 1);
    n.input.mean = Some(vec![0.485, 0.456, 0.406]);
    n.input.std = Some(vec![0.229, 0.224, 0.225]);
    n.conv("c", "x", 3, 2, 1, 1, 0, 1);
    let g = n.build("c");
    let mut r = common::flat_ranges(&g, -1.0, 1.0);
    r.maps[0] = MapRange {
        min: -2.2,
        max: 2.7,
    };
    let q = lower(&g, &r, &LowerOptions::default()).unwrap();
    let qp = activation_qparams(r.maps[0]);
    assert_eq!(q.map(q.input).qp.tensor(), Some(qp));
    for c in 0..3 {
        for p in [0u8, 1, 77, 128, 200, 255] {
            let real = (p as f32 / 255.0 - [0.485, 0.456, 0.406][c]) / [0.229, 0.224, 0.225][c];
            let want = ((real as f64 / qp.scale as f64 + 0.5).floor() + qp.zero_point as f64)
                .clamp(-128.0, 127.0) as i8;
            assert_eq!(
                q.pixel_table[c * 256 + p as usize],
                want,
                "channel {c} pixel {p}"
            );
        }
    }
    // Pixels through the table and the preprocessed floats give the same codes.
    let pixels: Vec<u8> = (0..12).map(|i| (i * 23 % 256) as u8).collect();
    let chw: Vec<f32> = (0..12)
        .map(|i| g.input().preprocess(i / 4, pixels[(i % 4) * 3 + i / 4]))
        .collect();
    let mut sim = Simulator::new(&q);
    let a = sim.run(SimInput::Pixels(&pixels)).unwrap();
    let in_a = sim.map_hwc(q.input);
    let b = sim.run(SimInput::Chw(&chw)).unwrap();
    assert_eq!(in_a, sim.map_hwc(q.input));
    assert_eq!(a, b);
    assert_eq!(in_a[1], quantize(chw[4], qp));
}

#[test]
fn simulator_reports_kernel_errors_with_the_step() {
    let mut n = Net::new(3, 4, 4, 1);
    n.conv("broken", "x", 3, 3, 3, 1, 1, 1);
    let g = n.build("broken");
    let mut q = lower(
        &g,
        &common::flat_ranges(&g, -1.0, 1.0),
        &LowerOptions::default(),
    )
    .unwrap();
    if let QKernel::Conv2d(c) = &mut q.steps[0].kernel {
        c.bias.truncate(1);
    }
    let e = Simulator::new(&q)
        .run(SimInput::Codes(&[0; 48]))
        .unwrap_err();
    assert!(
        matches!(&e, SimError::Kernel { name, .. } if name == "broken"),
        "{e}"
    );
    assert!(e.to_string().contains("internal error"));
    let e = Simulator::new(&q)
        .run(SimInput::Codes(&[0; 47]))
        .unwrap_err();
    assert!(matches!(
        e,
        SimError::InputLength {
            got: 47,
            expected: 48,
            ..
        }
    ));
    let _ = dequantize(0, q.input_qp());
    let _ = MapId::INPUT;
}
