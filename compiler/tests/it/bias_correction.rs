//! Empirical bias correction (`agree::bias`; Nagel et al. 2019, §4.2;
//! Finkelstein et al. 2019): the first layer's shift against a computation
//! by hand, the shifts reaching the lowered int32 biases, and the ranges
//! file keeping them.

use crate::common::minmax_ranges;
use ingot_compiler::agree::bias::shifts_on;
use ingot_compiler::calibrate::Ranges;
use ingot_compiler::graph::Op;
use ingot_compiler::lower::quant::{dequantize, quantize};
use ingot_compiler::lower::{lower, LowerOptions, QKernel};
use ingot_testkit::zoo;
use std::path::Path;

/// The first convolution reads the input, which here lies on the input's
/// int8 grid, so its shift is exactly what rounding its weights and bias
/// moves: `δ[o] = mean over images and pixels of Σ (w − ŵ)·x + (b − b̂)`,
/// computed below with a plain loop over the 3×3 window (zero padding).
#[test]
fn first_layer_shift_by_hand() {
    let net = zoo::plain_stack(&zoo::PlainStackConfig::default(), 7);
    let g = net.build();
    let raw: Vec<Vec<f32>> = (0..6).map(|s| net.random_input(500 + s)).collect();
    let ranges = minmax_ranges(&g, &raw);
    let q = lower(&g, &ranges, &LowerOptions::default()).unwrap();
    let in_qp = q.input_qp();
    let inputs: Vec<Vec<f32>> = raw
        .iter()
        .map(|x| {
            x.iter()
                .map(|&v| dequantize(quantize(v, in_qp), in_qp))
                .collect()
        })
        .collect();
    let shifts = shifts_on(&g, &ranges, &LowerOptions::default(), &inputs).unwrap();

    let step = q.steps.iter().find(|s| s.name == "conv1").unwrap();
    let QKernel::Conv2d(c) = &step.kernel else {
        panic!("conv1 is a convolution")
    };
    let Op::Conv2d(f) = &g.layer(g.find_layer("conv1").unwrap()).op else {
        panic!("conv1 is a convolution")
    };
    let (h, w) = (28usize, 28usize);
    assert_eq!((c.in_channels, c.kernel), (1, [3, 3]));
    let got = &shifts["conv1"];
    assert_eq!(got.len(), c.out_channels);
    for (o, &got_o) in got.iter().enumerate() {
        let s_w = c.weight_scales[o] as f64;
        // One input channel: the stored [O][kH][kW][1] order is [O][1][kH][kW].
        let dw: Vec<f64> = (0..9)
            .map(|k| f.weight.data[o * 9 + k] as f64 - c.weights[o * 9 + k] as f64 * s_w)
            .collect();
        let sum: i64 = c.weights[o * 9..o * 9 + 9].iter().map(|&v| v as i64).sum();
        let bq = (c.bias[o] as f64 + c.input_zp as f64 * sum as f64) * in_qp.scale as f64 * s_w;
        let b = f.bias.as_ref().unwrap().data[o] as f64;
        let mut acc = 0f64;
        for x in &inputs {
            for y in 0..h {
                for xx in 0..w {
                    for ky in 0..3 {
                        for kx in 0..3 {
                            let (iy, ix) = (y + ky, xx + kx);
                            if iy >= 1 && iy <= h && ix >= 1 && ix <= w {
                                acc += dw[ky * 3 + kx] * x[(iy - 1) * w + ix - 1] as f64;
                            }
                        }
                    }
                }
            }
        }
        let want = acc / (inputs.len() * h * w) as f64 + (b - bq);
        let tol = 1e-5 * (1.0 + want.abs()) + 1e-6;
        assert!(
            (got_o as f64 - want).abs() <= tol,
            "channel {o}: {got_o} vs {want} by hand"
        );
    }
    // Every convolution and the linear layer get a shift, nothing else.
    let names: Vec<&str> = shifts.keys().map(String::as_str).collect();
    assert_eq!(names, ["conv1", "conv2", "fc"]);
}

/// A shift in the ranges moves the lowered int32 bias by `δ / (s_in·s_w)`
/// (±1 for the two roundings); the generated module and the simulator
/// both take their biases from the lowered graph.
#[test]
fn shifts_reach_the_lowered_biases() {
    let net = zoo::plain_stack(&zoo::PlainStackConfig::default(), 7);
    let g = net.build();
    let inputs: Vec<Vec<f32>> = (0..4).map(|s| net.random_input(600 + s)).collect();
    let mut ranges = minmax_ranges(&g, &inputs);
    let plain = lower(&g, &ranges, &LowerOptions::default()).unwrap();
    let o = 10; // output features of fc
    let delta: Vec<f32> = (0..o).map(|i| 0.05 * i as f32 - 0.2).collect();
    ranges.bias_shifts.insert("fc".into(), delta.clone());
    let shifted = lower(&g, &ranges, &LowerOptions::default()).unwrap();
    let lin = |q: &ingot_compiler::lower::QGraph| {
        let s = q.steps.iter().find(|s| s.name == "fc").unwrap();
        let QKernel::Linear(l) = &s.kernel else {
            panic!()
        };
        (l.clone(), q.map(s.inputs[0]).qp.tensor().unwrap().scale)
    };
    let ((a, s_in), (b, _)) = (lin(&plain), lin(&shifted));
    assert_eq!(a.weights, b.weights);
    for (i, d) in delta.iter().enumerate() {
        let want = *d as f64 / (s_in as f64 * a.weight_scales[i] as f64);
        let moved = (b.bias[i] - a.bias[i]) as f64;
        assert!(
            (moved - want).abs() <= 1.0,
            "feature {i}: {moved} vs {want}"
        );
    }
    // A shift that does not fit its layer is refused, not ignored.
    for (layer, v) in [
        ("fc", vec![0.0; 9]),
        ("pool1", vec![0.0; 8]),
        ("fc", vec![f32::NAN; 10]),
    ] {
        let mut bad = ranges.clone();
        bad.bias_shifts.clear();
        bad.bias_shifts.insert(layer.into(), v);
        let err = lower(&g, &bad, &LowerOptions::default()).unwrap_err();
        assert!(
            matches!(err, ingot_compiler::lower::LowerError::BadBiasShift { .. }),
            "{err}"
        );
    }
    // Other layers are untouched.
    for (x, y) in plain.steps.iter().zip(&shifted.steps) {
        if x.name != "fc" {
            assert_eq!(x, y);
        }
    }
}

#[test]
fn ranges_file_keeps_and_checks_bias_shifts() {
    let net = zoo::plain_stack(&zoo::PlainStackConfig::default(), 7);
    let g = net.build();
    let mut ranges = minmax_ranges(&g, &[net.random_input(1)]);
    ranges.bias_shifts.insert("conv1".into(), vec![0.25; 8]);
    let text = ranges.to_json(&g);
    let back = Ranges::parse(&g, &text, Path::new("r.json"), None).unwrap();
    assert_eq!(back.bias_shifts, ranges.bias_shifts);
    // A file with shifts is v2, so a reader of v1 refuses it instead of
    // building the network without them; v1 with shifts is malformed.
    assert!(text.contains("\"ingot.ranges.v2\""));
    let v1 = text.replace("ingot.ranges.v2", "ingot.ranges.v1");
    let err = Ranges::parse(&g, &v1, Path::new("r.json"), None).unwrap_err();
    assert!(err.to_string().contains("bias_shifts"), "{err}");
    // Without shifts the file has no `bias_shifts` key (files written
    // before bias correction read the same).
    let mut none = ranges.clone();
    none.bias_shifts.clear();
    let plain = none.to_json(&g);
    assert!(!plain.contains("bias_shifts") && plain.contains("\"ingot.ranges.v1\""));
    for (layer, v) in [
        ("conv1", vec![0.25; 7]),
        ("pool1", vec![0.0; 8]),
        ("nope", vec![]),
    ] {
        let mut bad = ranges.clone();
        bad.bias_shifts.clear();
        bad.bias_shifts.insert(layer.into(), v);
        let err = Ranges::parse(&g, &bad.to_json(&g), Path::new("r.json"), None).unwrap_err();
        assert!(err.to_string().contains(layer), "{err}");
    }
    let mut inf = ranges.clone();
    inf.bias_shifts
        .insert("conv1".into(), vec![f32::INFINITY; 8]);
    // serde_json writes a non-finite float as null, which does not parse
    // as a number: refused either way.
    assert!(Ranges::parse(&g, &inf.to_json(&g), Path::new("r.json"), None).is_err());
}
