//! The mixed float/int8 runner and the per-layer sensitivity report
//! (`agree::mixed`, `agree::sensitivity`): the runner with every layer in
//! int8 against the integer simulator, one layer's figures against a
//! computation by hand, and the ranking of a deliberately broken layer.

use crate::common::minmax_ranges;
use ingot_compiler::agree::mixed::Mixed;
use ingot_compiler::agree::sensitivity::measure_inputs;
use ingot_compiler::calibrate::MapRange;
use ingot_compiler::lower::quant::{dequantize, quantize};
use ingot_compiler::lower::{lower, LowerOptions, QKernel, SimInput, Simulator};
use ingot_compiler::reference::Reference;
use ingot_testkit::zoo;

fn argmax(v: &[f32]) -> usize {
    ingot_compiler::measure::argmax_f32(v)
}

/// `(Σ x², Σ (x − y)²)` of two equally long vectors.
fn sums(x: &[f32], y: &[f32]) -> (f64, f64) {
    x.iter().zip(y).fold((0.0, 0.0), |(s, e), (&a, &b)| {
        let d = a as f64 - b as f64;
        (s + a as f64 * a as f64, e + d * d)
    })
}

fn db(sig: f64, noise: f64) -> f64 {
    10.0 * (sig / noise).log10()
}

fn nets() -> Vec<zoo::Net> {
    vec![
        zoo::plain_stack(&zoo::PlainStackConfig::default(), 3),
        zoo::dense_small(4),
        zoo::residual(&Default::default(), 5),
        zoo::depthwise_separable(&Default::default(), 6),
    ]
}

/// With every unit on, the fake-quantized float network computes what the
/// integer simulator computes up to the kernels' own rounding (fixed-point
/// multipliers, averages): its logits are far closer to the simulator's
/// than either is to float, and the top-1 classes match.
#[test]
fn every_layer_in_int8_tracks_the_integer_simulator() {
    for net in nets() {
        let g = net.build();
        let inputs: Vec<Vec<f32>> = (0..12).map(|s| net.random_input(200 + s)).collect();
        let ranges = minmax_ranges(&g, &inputs);
        let q = lower(&g, &ranges, &LowerOptions::default()).unwrap();
        let mixed = Mixed::new(&g, &q, &ranges);
        let mut sim = Simulator::new(&q);
        let reference = Reference::new(&g);
        let (mut same_top1, mut to_sim, mut to_float) = (0, (0.0, 0.0), (0.0, 0.0));
        for x in &inputs {
            sim.run(SimInput::Chw(x)).unwrap();
            let int8 = sim.map_chw_f32(q.output);
            let fake = mixed.run(x, &|_| true, |_, _| {});
            let mut float = Vec::new();
            reference
                .run_with(x, |m, v| {
                    if m == mixed.logits_map() {
                        float = v.to_vec();
                    }
                })
                .unwrap();
            same_top1 += (argmax(&int8) == argmax(&fake)) as usize;
            let (s, e) = sums(&int8, &fake);
            to_sim = (to_sim.0 + s, to_sim.1 + e);
            let (s, e) = sums(&float, &int8);
            to_float = (to_float.0 + s, to_float.1 + e);
        }
        let (sim_db, float_db) = (db(to_sim.0, to_sim.1), db(to_float.0, to_float.1));
        eprintln!(
            "{}: fake-quantized vs simulator {sim_db:.1} dB, float vs simulator {float_db:.1} dB, top-1 {same_top1}/12",
            g.name()
        );
        assert!(same_top1 >= 11, "{}: top-1 {same_top1}/12", g.name());
        assert!(
            sim_db >= float_db + 6.0,
            "{}: the fake-quantized network is {sim_db:.1} dB from the simulator, float {float_db:.1} dB",
            g.name()
        );
    }
}

/// The row of the linear layer, recomputed by hand: the float network up
/// to the classifier, then the classifier with the int8 weights and bias
/// of the lowered step (codes times scales, HWC order undone, zero point
/// unfolded) and its output rounded to the output map's parameters.
#[test]
fn one_layer_checked_by_hand() {
    let net = zoo::plain_stack(&zoo::PlainStackConfig::default(), 3);
    let g = net.build();
    let inputs: Vec<Vec<f32>> = (0..16).map(|s| net.random_input(300 + s)).collect();
    let ranges = minmax_ranges(&g, &inputs);
    let q = lower(&g, &ranges, &LowerOptions::default()).unwrap();
    let step = q.steps.iter().find(|s| s.name == "fc").unwrap();
    let QKernel::Linear(l) = &step.kernel else {
        panic!("fc is not linear")
    };
    let src = q.map(step.inputs[0]);
    let (c, hw) = (src.shape.c, src.shape.pixels());
    let out_qp = q.output_qp();
    // Real weights in the float CHW order and real biases.
    let mut w = vec![0f64; l.weights.len()];
    let mut b = vec![0f64; l.out_features];
    for o in 0..l.out_features {
        let row = &l.weights[o * l.in_features..(o + 1) * l.in_features];
        for ch in 0..c {
            for p in 0..hw {
                w[o * l.in_features + ch * hw + p] =
                    row[p * c + ch] as f64 * l.weight_scales[o] as f64;
            }
        }
        let sum: i64 = row.iter().map(|&v| v as i64).sum();
        let src_qp = src.qp.tensor().unwrap();
        let bq = l.bias[o] as f64 + src_qp.zero_point as f64 * sum as f64;
        b[o] = bq * src_qp.scale as f64 * l.weight_scales[o] as f64;
    }
    let reference = Reference::new(&g);
    let fc_input = g.layer(g.find_layer("fc").unwrap()).inputs[0];
    let mixed = Mixed::new(&g, &q, &ranges);
    let unit = mixed.units().iter().position(|u| u.name == "fc").unwrap();
    let (mut agree, mut sig, mut noise) = (0usize, 0.0, 0.0);
    for x in &inputs {
        let mut feats = Vec::new();
        let float = reference
            .run_with(x, |m, v| {
                if m == fc_input {
                    feats = v.to_vec();
                }
            })
            .unwrap();
        let hand: Vec<f32> = (0..l.out_features)
            .map(|o| {
                let y = b[o]
                    + (0..l.in_features)
                        .map(|i| w[o * l.in_features + i] * feats[i] as f64)
                        .sum::<f64>();
                dequantize(quantize(y as f32, out_qp), out_qp)
            })
            .collect();
        let fake = mixed.run(x, &|u| u == unit, |_, _| {});
        for (a, h) in fake.iter().zip(&hand) {
            // One output step at most: the float sums run in another order
            // and may round the other way.
            assert!((a - h).abs() <= out_qp.scale * 1.001, "{a} vs {h}");
        }
        agree += (argmax(&hand) == argmax(&float)) as usize;
        let (s, e) = sums(&float, &hand);
        sig += s;
        noise += e;
    }
    let report = measure_inputs(&mixed, &inputs);
    let row = report.rows.iter().find(|r| r.name == "fc").unwrap();
    assert_eq!(row.kind, "linear");
    assert_eq!(row.only.agreement, agree as f64 / inputs.len() as f64);
    let want = db(sig, noise);
    let got = row.only.sqnr_db.unwrap();
    assert!((got - want).abs() < 0.05, "{got} dB vs {want} dB by hand");
}

/// A layer whose output range is shrunk 100× clips almost every value: it
/// must come first in the ranking, and leaving it alone (all but it in
/// int8) must be better than the network with every layer in int8.
#[test]
fn a_broken_layer_ranks_first() {
    let net = zoo::dense_small(4);
    let g = net.build();
    let inputs: Vec<Vec<f32>> = (0..12).map(|s| net.random_input(400 + s)).collect();
    let mut ranges = minmax_ranges(&g, &inputs);
    let q0 = lower(&g, &ranges, &LowerOptions::default()).unwrap();
    // The transition convolution's output feeds an average pool, not a
    // concatenation, so its parameters are its own.
    let name = "features.transition1.conv";
    let step = q0.steps.iter().find(|s| s.name == name).unwrap();
    let m = q0.map(step.output).float_map;
    let r = ranges.maps[m.index()];
    ranges.maps[m.index()] = MapRange {
        min: r.min / 100.0,
        max: r.max / 100.0,
    };
    let q = lower(&g, &ranges, &LowerOptions::default()).unwrap();
    let mixed = Mixed::new(&g, &q, &ranges);
    let report = measure_inputs(&mixed, &inputs);
    eprintln!("{report}");
    assert_eq!(report.rows[0].name, name);
    assert_eq!(report.rows[0].rank, 1);
    let broken = &report.rows[0];
    assert!(broken.all_but.sqnr_db.unwrap() > report.all.sqnr_db.unwrap());
    // The other rows are unaffected by the broken layer when it is float.
    assert!(broken.only.sqnr_db.unwrap() < report.rows[1].only.sqnr_db.unwrap() - 10.0);
}
