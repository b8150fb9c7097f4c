use super::*;
use crate::frontend::{validate, GraphFile, InputFile, LayerFile, TensorStore, FORMAT_V1};
use crate::util::test_rng::Rng;
use proptest::prelude::*;
use std::path::Path;

/// A graph of `layers` on an input `x` of `shape`, output = last layer.
/// The graph format only takes gray (1 channel) or RGB (3 channels) inputs,
/// so other channel counts get a leading 3x3 convolution `x` (random weights,
/// pad 1) from a 1-channel input `image`; tests read map `x` from `run_all`.
fn graph(shape: [usize; 3], mut layers: Vec<LayerFile>, store: &TensorStore) -> Graph {
    let mut store = store.clone();
    let in_name = if shape[0] == 1 || shape[0] == 3 {
        "x"
    } else {
        let c = shape[0];
        store.insert(
            "x.weight",
            vec![c, 1, 3, 3],
            Rng::new(99).uniform_vec(c * 9, -1.0, 1.0),
        );
        store.insert("x.bias", vec![c], Rng::new(98).uniform_vec(c, -0.5, 0.5));
        layers.insert(0, LayerFile::conv2d("x", "image", true, 1, 1));
        "image"
    };
    let output = layers.last().unwrap().name.clone();
    let file = GraphFile {
        format: FORMAT_V1.into(),
        name: "t".into(),
        weights: "t.safetensors".into(),
        input: InputFile {
            name: in_name.into(),
            shape: if in_name == "x" {
                shape.to_vec()
            } else {
                vec![1, shape[1], shape[2]]
            },
            pixel_scale: None,
            mean: None,
            std: None,
            color: None,
        },
        labels: None,
        layers,
        output,
    };
    validate(&file, &store, Path::new("t.graph.json")).unwrap()
}

/// The map named `x` and the final output, for an input image of `x`'s
/// height and width.
fn run_x(g: &Graph, image: &[f32]) -> (Vec<f32>, Vec<f32>) {
    let maps = Reference::new(g).run_all(image).unwrap();
    let x = g.find_layer("x").map_or(MapId::INPUT, |l| l.output());
    (maps[x.index()].clone(), maps[g.output().index()].clone())
}

/// Straight-from-the-definition convolution, written independently of the
/// im2col kernel: out[o][y][x] = b[o] + sum over the group's input channels
/// and taps, skipping taps that fall into the padding.
#[allow(clippy::too_many_arguments)]
fn naive_conv(
    x: &[f32],
    xs: [usize; 3],
    w: &[f32],
    ws: [usize; 4],
    bias: &[f32],
    stride: [usize; 2],
    pad: [usize; 4],
    dil: [usize; 2],
    groups: usize,
) -> (Vec<f32>, [usize; 3]) {
    let [c, h, wd] = xs;
    let [o, ig, kh, kw] = ws;
    let oh = (h + pad[0] + pad[2] - dil[0] * (kh - 1) - 1) / stride[0] + 1;
    let ow = (wd + pad[1] + pad[3] - dil[1] * (kw - 1) - 1) / stride[1] + 1;
    let og = o / groups;
    assert_eq!(ig * groups, c);
    let mut out = vec![0.0f32; o * oh * ow];
    for oc in 0..o {
        let g = oc / og;
        for y in 0..oh {
            for xx in 0..ow {
                let mut acc = bias[oc] as f64;
                for i in 0..ig {
                    for ky in 0..kh {
                        for kx in 0..kw {
                            let iy = (y * stride[0] + ky * dil[0]) as isize - pad[0] as isize;
                            let ix = (xx * stride[1] + kx * dil[1]) as isize - pad[1] as isize;
                            if iy < 0 || ix < 0 || iy >= h as isize || ix >= wd as isize {
                                continue;
                            }
                            let xv = x[((g * ig + i) * h + iy as usize) * wd + ix as usize];
                            let wv = w[((oc * ig + i) * kh + ky) * kw + kx];
                            acc += (xv * wv) as f64;
                        }
                    }
                }
                out[(oc * oh + y) * ow + xx] = acc as f32;
            }
        }
    }
    (out, [o, oh, ow])
}

proptest! {
    #![proptest_config(ProptestConfig { cases: 64, .. ProptestConfig::default() })]

    #[test]
    fn conv_matches_direct_definition(
        groups in 1usize..4, cig in 1usize..4, cog in 1usize..4,
        h in 3usize..10, w in 3usize..10, kh in 1usize..4, kw in 1usize..4,
        sh in 1usize..3, sw in 1usize..3, dh in 1usize..3, dw in 1usize..3,
        pad in proptest::array::uniform4(0usize..3), bias in any::<bool>(), seed in any::<u64>(),
    ) {
        let c = groups * cig;
        let o = groups * cog;
        prop_assume!(h + pad[0] + pad[2] > dh * (kh - 1) && w + pad[1] + pad[3] > dw * (kw - 1));
        let mut rng = Rng::new(seed);
        let image = rng.uniform_vec(g_in_len(c, h, w), -1.0, 1.0);
        let wt = rng.uniform_vec(o * cig * kh * kw, -1.0, 1.0);
        let b = if bias { rng.uniform_vec(o, -1.0, 1.0) } else { vec![0.0; o] };
        let mut store = TensorStore::new("t.safetensors");
        store.insert("c.weight", vec![o, cig, kh, kw], wt.clone());
        let mut l = LayerFile::new("c", "conv2d", "x")
            .attr("weight", "c.weight")
            .attr("stride", serde_json::json!([sh, sw]))
            .attr("dilation", serde_json::json!([dh, dw]))
            .attr("padding", serde_json::json!(pad))
            .attr("groups", groups);
        if bias {
            store.insert("c.bias", vec![o], b.clone());
            l = l.attr("bias", "c.bias");
        }
        let g = graph([c, h, w], vec![l], &store);
        let (x, got) = run_x(&g, &image);
        let (want, ws) = naive_conv(&x, [c, h, w], &wt, [o, cig, kh, kw], &b, [sh, sw], pad, [dh, dw], groups);
        prop_assert_eq!(g.shape(g.output()), Shape::new(ws[0], ws[1], ws[2]));
        for (a, b) in got.iter().zip(&want) {
            prop_assert!((a - b).abs() <= 1e-5 * (1.0 + b.abs()), "{} vs {}", a, b);
        }
    }
}

/// Length of the test graph's input image for an `x` of `[c, h, w]`.
fn g_in_len(c: usize, h: usize, w: usize) -> usize {
    if c == 1 || c == 3 {
        c * h * w
    } else {
        h * w
    }
}

#[test]
fn avg_pool_counts_padding_as_zero_and_max_pool_ignores_it() {
    let store = TensorStore::new("t.safetensors");
    let pool = |op: &str| LayerFile::pool("p", op, "x", 3, 1).attr("padding", 1);
    // All-ones 2x2 input, 3x3 window, pad 1: every window sees 4 real taps.
    let g = graph([1, 2, 2], vec![pool("avg_pool2d")], &store);
    let got = Reference::new(&g).run(&[1.0; 4]).unwrap();
    assert_eq!(got, vec![4.0 / 9.0; 4]);
    // Negative input: a padded zero must not win the maximum.
    let g = graph([1, 2, 2], vec![pool("max_pool2d")], &store);
    let got = Reference::new(&g).run(&[-1.0, -2.0, -3.0, -4.0]).unwrap();
    assert_eq!(got, vec![-1.0; 4]);
}

#[test]
fn pooling_with_stride_and_asymmetric_padding() {
    let store = TensorStore::new("t.safetensors");
    // 1x3x3 input 1..9, 2x2 window stride 2, padding bottom/right 1.
    let x: Vec<f32> = (1..=9).map(|v| v as f32).collect();
    let mk = |op: &str| {
        LayerFile::pool("p", op, "x", 2, 2).attr("padding", serde_json::json!([0, 0, 1, 1]))
    };
    let g = graph([1, 3, 3], vec![mk("max_pool2d")], &store);
    assert_eq!(
        Reference::new(&g).run(&x).unwrap(),
        vec![5.0, 6.0, 8.0, 9.0]
    );
    let g = graph([1, 3, 3], vec![mk("avg_pool2d")], &store);
    // Windows: {1,2,4,5}, {3,6,pad,pad}, {7,8,pad,pad}, {9,pad,pad,pad}; divisor 4.
    assert_eq!(
        Reference::new(&g).run(&x).unwrap(),
        vec![3.0, 9.0 / 4.0, 15.0 / 4.0, 9.0 / 4.0]
    );
}

#[test]
fn batch_norm_relu6_global_pool_linear_softmax_by_hand() {
    let mut store = TensorStore::new("t.safetensors");
    store.insert("bn.weight", vec![3], vec![2.0, 1.0, 1.0]);
    store.insert("bn.bias", vec![3], vec![0.5, -1.0, 0.0]);
    store.insert("bn.running_mean", vec![3], vec![1.0, 0.0, 0.0]);
    store.insert("bn.running_var", vec![3], vec![4.0, 1.0, 1.0]);
    store.insert(
        "fc.weight",
        vec![3, 3],
        vec![1.0, 0.0, 0.0, 0.0, 1.0, 0.0, 1.0, 1.0, -1.0],
    );
    store.insert("fc.bias", vec![3], vec![0.0, 0.0, -1.0]);
    let layers = vec![
        LayerFile::batch_norm("bn", "x").attr("eps", 0.0),
        LayerFile::new("r6", "relu6", "bn"),
        LayerFile::new("gap", "global_avg_pool", "r6"),
        LayerFile::linear("fc", "gap", true),
        LayerFile::new("sm", "softmax", "fc"),
    ];
    let g = graph([3, 1, 2], layers, &store);
    // Channel 0: 2*(x-1)/2 + 0.5 = x - 0.5; channel 1: x - 1; channel 2: x.
    let x = [3.0, 10.0, 0.5, 2.0, -1.0, 7.0];
    let maps = Reference::new(&g).run_all(&x).unwrap();
    assert_eq!(maps[1], vec![2.5, 9.5, -0.5, 1.0, -1.0, 7.0]);
    assert_eq!(maps[2], vec![2.5, 6.0, 0.0, 1.0, 0.0, 6.0]);
    assert_eq!(maps[3], vec![4.25, 0.5, 3.0]);
    assert_eq!(maps[4], vec![4.25, 0.5, 0.75]);
    let e: Vec<f64> = [4.25f64, 0.5, 0.75].iter().map(|v| v.exp()).collect();
    let s: f64 = e.iter().sum();
    for (got, want) in maps[5].iter().zip(e.iter().map(|v| v / s)) {
        assert!((*got as f64 - want).abs() < 1e-6);
    }
}

#[test]
fn softmax_of_one_two_three() {
    // softmax([1, 2, 3]) = [0.09003057, 0.24472847, 0.66524096] (from memory;
    // any numerics library reproduces it).
    let store = TensorStore::new("t.safetensors");
    let g = graph(
        [3, 1, 1],
        vec![LayerFile::new("sm", "softmax", "x")],
        &store,
    );
    let got = Reference::new(&g).run(&[1.0, 2.0, 3.0]).unwrap();
    for (a, b) in got.iter().zip([0.090_030_57, 0.244_728_47, 0.665_240_96]) {
        assert!((a - b).abs() < 1e-6, "{a} vs {b}");
    }
}

#[test]
fn concat_add_flatten_keep_chw_order() {
    let store = TensorStore::new("t.safetensors");
    let layers = vec![
        LayerFile::new("r", "relu", "x"),
        LayerFile::multi("cat", "concat", &["x", "r"]),
        LayerFile::multi("sum", "add", &["cat", "cat"]),
        LayerFile::new("f", "flatten", "sum"),
    ];
    let g = graph([1, 1, 3], layers, &store);
    let got = Reference::new(&g).run(&[-1.0, 2.0, -3.0]).unwrap();
    assert_eq!(got, vec![-2.0, 4.0, -6.0, 0.0, 4.0, 0.0]);
}
