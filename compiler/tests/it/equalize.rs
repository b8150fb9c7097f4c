//! Cross-layer equalization (`graph::equalize`; Nagel et al. 2019, §4.1):
//! the float function is unchanged, the paper's scale makes both ranges of
//! every channel equal (checked by hand on a 2-channel pair), and ReLU6
//! pairs are left alone.

use ingot_compiler::graph::equalize::equalize;
use ingot_compiler::graph::Op;
use ingot_compiler::reference::Reference;
use ingot_compiler::Graph;
use ingot_testkit::zoo::{self, DepthwiseConfig};

/// The zoo's depthwise-separable network with every ReLU6 turned into a
/// ReLU (the paper's preparation), loaded from files.
fn relu_net(cfg: &DepthwiseConfig, dir: &std::path::Path) -> (Graph, zoo::Net) {
    let net = zoo::depthwise_separable(cfg, 7);
    let path = net.write(dir, "dws").unwrap();
    let text = std::fs::read_to_string(&path).unwrap();
    assert!(text.contains("\"relu6\""));
    std::fs::write(&path, text.replace("\"relu6\"", "\"relu\"")).unwrap();
    (ingot_compiler::load(&path).unwrap(), net)
}

fn conv(g: &Graph, name: &str) -> ingot_compiler::graph::Conv2d {
    match &g.layer(g.find_layer(name).unwrap()).op {
        Op::Conv2d(c) => c.clone(),
        o => panic!("{name}: {}", o.kind()),
    }
}

fn bn_scale(g: &Graph, name: &str) -> Vec<f32> {
    match &g.layer(g.find_layer(name).unwrap()).op {
        Op::BatchNorm(b) => b.affine().into_iter().map(|(s, _)| s).collect(),
        o => panic!("{name}: {}", o.kind()),
    }
}

#[test]
fn float_outputs_unchanged_on_the_depthwise_separable_network() {
    let dir = tempfile::tempdir().unwrap();
    let (g, net) = relu_net(&DepthwiseConfig::default(), dir.path());
    let mut e = g.clone();
    let report = equalize(&mut e);
    // Three blocks, one depthwise -> pointwise pair each, all with ReLU.
    assert_eq!(report.pairs.len(), 3, "{report}");
    assert_eq!(report.equalized(), 3, "{report}");
    for p in &report.pairs {
        assert_eq!(p.between, "batch_norm, relu");
        // Equal ranges in every channel: both ratios become the same.
        assert!(
            (p.ratio_after[0] - p.ratio_after[1]).abs() <= 1e-3 * p.ratio_after[0],
            "{p:?}"
        );
    }
    let (a, b) = (Reference::new(&g), Reference::new(&e));
    for seed in 0..4 {
        let x = net.random_input(seed);
        let (ya, yb) = (a.run(&x).unwrap(), b.run(&x).unwrap());
        let scale = ya.iter().fold(0f32, |m, v| m.max(v.abs())).max(1e-6);
        for (u, v) in ya.iter().zip(&yb) {
            // float rounding of a rescaled computation: relative 1e-4 of
            // the largest logit (common practice for f32 comparisons).
            assert!((u - v).abs() <= 1e-4 * scale, "{u} vs {v}");
        }
    }
}

/// Two channels by hand: with r1 the largest |folded depthwise weight| of
/// each channel and r2 the largest |pointwise weight| reading it,
/// s = sqrt(r1 r2) / r2, and afterwards both ranges are sqrt(r1 r2).
#[test]
fn two_channel_pair_by_hand() {
    let dir = tempfile::tempdir().unwrap();
    let cfg = DepthwiseConfig {
        input: [1, 8, 8],
        stem: 2,
        blocks: vec![(3, 1)],
        classes: 2,
    };
    let (g, _) = relu_net(&cfg, dir.path());
    let mut e = g.clone();
    let report = equalize(&mut e);
    assert_eq!(report.equalized(), 1, "{report}");
    let (dw, pw) = (conv(&g, "block1.dw"), conv(&g, "block1.pw"));
    let bn = bn_scale(&g, "block1.dw_bn");
    let (dw_e, pw_e) = (conv(&e, "block1.dw"), conv(&e, "block1.pw"));
    let bn_e = bn_scale(&e, "block1.dw_bn");
    // The depthwise weights stay; the batch norm carries the scale.
    assert_eq!(dw.weight.data, dw_e.weight.data);
    for i in 0..2 {
        let absmax = |v: &[f32]| v.iter().fold(0f32, |m, x| m.max(x.abs()));
        let r1 = absmax(&dw.weight.data[i * 9..i * 9 + 9]) * bn[i].abs();
        // pointwise [3, 2, 1, 1]: input channel i is every 2nd value.
        let col = |w: &[f32]| -> Vec<f32> { (0..3).map(|o| w[o * 2 + i]).collect() };
        let r2 = absmax(&col(&pw.weight.data));
        let s = (r1 * r2).sqrt() / r2;
        let r1_after = absmax(&dw_e.weight.data[i * 9..i * 9 + 9]) * bn_e[i].abs();
        let r2_after = absmax(&col(&pw_e.weight.data));
        let want = (r1 * r2).sqrt();
        assert!((r1_after - want).abs() <= 1e-5 * want, "{r1_after} {want}");
        assert!((r2_after - want).abs() <= 1e-5 * want, "{r2_after} {want}");
        assert!((bn_e[i] - bn[i] / s).abs() <= 1e-5 * bn[i].abs());
        for o in 0..3 {
            let (w, we) = (pw.weight.data[o * 2 + i], pw_e.weight.data[o * 2 + i]);
            assert!((we - w * s).abs() <= 1e-5 * (w * s).abs().max(1e-12));
        }
    }
}

#[test]
fn relu6_pairs_are_skipped_and_left_alone() {
    let g = zoo::depthwise_separable(&DepthwiseConfig::default(), 7).build();
    let mut e = g.clone();
    let report = equalize(&mut e);
    assert_eq!(report.pairs.len(), 3);
    assert_eq!(report.equalized(), 0);
    assert!(report.pairs[0]
        .skipped
        .as_deref()
        .unwrap()
        .contains("ReLU6"));
    for (a, b) in g.layers().iter().zip(e.layers()) {
        assert_eq!(a.op, b.op, "{}", a.name);
    }
}

/// Without a batch norm between, the depthwise weights and bias carry the
/// scale: the network of the first test with its depthwise batch norms
/// removed and block 1's depthwise given a bias (the batch norm's `beta`).
#[test]
fn without_batch_norm_the_depthwise_weights_and_bias_are_scaled() {
    let dir = tempfile::tempdir().unwrap();
    let (_, net) = relu_net(&DepthwiseConfig::default(), dir.path());
    let path = dir.path().join("dws.graph.json");
    let mut v: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(&path).unwrap()).unwrap();
    let layers = v["layers"].as_array_mut().unwrap();
    layers.retain(|l| !l["name"].as_str().unwrap().ends_with(".dw_bn"));
    for l in layers.iter_mut() {
        let name = l["name"].as_str().unwrap().to_string();
        if name.ends_with(".dw_relu") {
            l["input"] = serde_json::json!(name.replace(".dw_relu", ".dw"));
        }
        if name == "block1.dw" {
            l["bias"] = serde_json::json!("block1.dw_bn.bias");
        }
    }
    std::fs::write(&path, serde_json::to_string(&v).unwrap()).unwrap();
    let g = ingot_compiler::load(&path).unwrap();
    let mut e = g.clone();
    let report = equalize(&mut e);
    assert_eq!(report.equalized(), 3, "{report}");
    assert_eq!(report.pairs[0].between, "relu");
    let (dw, dw_e) = (conv(&g, "block1.dw"), conv(&e, "block1.dw"));
    assert_ne!(dw.weight.data, dw_e.weight.data);
    // Every channel's weights and bias divided by the same s.
    let (b, b_e) = (dw.bias.unwrap().data, dw_e.bias.unwrap().data);
    for c in 0..dw.out_channels {
        let s = b[c] / b_e[c];
        for k in 0..9 {
            let (w, we) = (dw.weight.data[c * 9 + k], dw_e.weight.data[c * 9 + k]);
            assert!((w / s - we).abs() <= 1e-5 * w.abs().max(1e-12), "{c} {k}");
        }
    }
    let (a, b) = (Reference::new(&g), Reference::new(&e));
    for seed in 0..2 {
        let x = net.random_input(seed);
        let (ya, yb) = (a.run(&x).unwrap(), b.run(&x).unwrap());
        let scale = ya.iter().fold(0f32, |m, v| m.max(v.abs())).max(1e-6);
        for (u, v) in ya.iter().zip(&yb) {
            assert!((u - v).abs() <= 1e-4 * scale, "{u} vs {v}");
        }
    }
}
