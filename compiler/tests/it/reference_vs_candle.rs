//! The float reference checked against an independent implementation:
//! candle-core (Hugging Face), CPU backend, version from Cargo.lock.
//!
//! Each test builds a graph, runs it through [`Reference::run_all`] and
//! through a small interpreter below that executes the same layers with
//! candle tensor ops, and compares every map. Tolerance: the largest
//! absolute difference over a map must be at most `1e-4 * max(1, max|map|)`
//! (f32 sums in different orders).
//!
//! candle's `conv2d` takes one symmetric padding and one stride for both
//! axes, and its pooling takes no padding; the interpreter pads the input
//! explicitly (zeros for convolution and average pooling, -inf for max
//! pooling, which is "padded taps are ignored"), so asymmetric padding is
//! covered too.

use candle_core::{Device, Tensor as Ct};
use ingot_compiler::frontend::{validate, GraphFile, InputFile, LayerFile, TensorStore, FORMAT_V1};
use ingot_compiler::graph::{Graph, MapId, Op, Padding};
use ingot_compiler::reference::Reference;
use ingot_testkit::zoo::{self, Rng};
use serde_json::json;
use std::path::Path;

const CPU: Device = Device::Cpu;

fn pad(x: &Ct, p: Padding, value: f32) -> Ct {
    if p.is_zero() {
        return x.clone();
    }
    let (b, c, h, w) = x.dims4().unwrap();
    let full = |rows: usize, cols: usize| Ct::full(value, (b, c, rows, cols), &CPU).unwrap();
    let mut parts = vec![];
    if p.top > 0 {
        parts.push(full(p.top, w));
    }
    parts.push(x.clone());
    if p.bottom > 0 {
        parts.push(full(p.bottom, w));
    }
    let x = Ct::cat(&parts, 2).unwrap();
    let h2 = h + p.top + p.bottom;
    let mut parts = vec![];
    if p.left > 0 {
        parts.push(full(p.left, h2).reshape((b, c, h2, p.left)).unwrap());
    }
    parts.push(x);
    if p.right > 0 {
        parts.push(full(p.right, h2).reshape((b, c, h2, p.right)).unwrap());
    }
    Ct::cat(&parts, 3).unwrap()
}

fn tensor(t: &ingot_compiler::graph::Tensor) -> Ct {
    Ct::from_vec(t.data.clone(), t.shape.clone(), &CPU).unwrap()
}

/// Runs `g` with candle ops, returning every map flattened (CHW), indexed
/// by `MapId`.
fn candle_run_all(g: &Graph, input: &[f32]) -> Vec<Vec<f32>> {
    let s = g.input().shape;
    let mut maps = vec![Ct::from_vec(input.to_vec(), (1, s.c, s.h, s.w), &CPU).unwrap()];
    for layer in g.layers() {
        let x = &maps[layer.inputs[0].index()];
        let y = match &layer.op {
            Op::Conv2d(c) => {
                assert_eq!(c.stride[0], c.stride[1], "candle conv2d has one stride");
                assert_eq!(
                    c.dilation[0], c.dilation[1],
                    "candle conv2d has one dilation"
                );
                let xp = pad(x, c.padding, 0.0);
                let y = xp
                    .conv2d(&tensor(&c.weight), 0, c.stride[0], c.dilation[0], c.groups)
                    .unwrap();
                match &c.bias {
                    Some(b) => y
                        .broadcast_add(&tensor(b).reshape((1, c.out_channels, 1, 1)).unwrap())
                        .unwrap(),
                    None => y,
                }
            }
            Op::BatchNorm(b) => {
                let n = b.gamma.len();
                let r =
                    |t: &ingot_compiler::graph::Tensor| tensor(t).reshape((1, n, 1, 1)).unwrap();
                let denom = (r(&b.var) + b.eps as f64).unwrap().sqrt().unwrap();
                x.broadcast_sub(&r(&b.mean))
                    .unwrap()
                    .broadcast_div(&denom)
                    .unwrap()
                    .broadcast_mul(&r(&b.gamma))
                    .unwrap()
                    .broadcast_add(&r(&b.beta))
                    .unwrap()
            }
            Op::Relu => x.relu().unwrap(),
            Op::Relu6 => x.clamp(0f32, 6f32).unwrap(),
            Op::MaxPool2d(p) => pad(x, p.padding, f32::NEG_INFINITY)
                .max_pool2d_with_stride((p.kernel[0], p.kernel[1]), (p.stride[0], p.stride[1]))
                .unwrap(),
            Op::AvgPool2d(p) => pad(x, p.padding, 0.0)
                .avg_pool2d_with_stride((p.kernel[0], p.kernel[1]), (p.stride[0], p.stride[1]))
                .unwrap(),
            Op::GlobalAvgPool => x.mean_keepdim(3).unwrap().mean_keepdim(2).unwrap(),
            Op::Flatten => x.reshape((1, x.elem_count(), 1, 1)).unwrap(),
            Op::Linear(l) => {
                let v = x.reshape((1, l.in_features)).unwrap();
                let y = v.matmul(&tensor(&l.weight).t().unwrap()).unwrap();
                let y = match &l.bias {
                    Some(b) => y.broadcast_add(&tensor(b)).unwrap(),
                    None => y,
                };
                y.reshape((1, l.out_features, 1, 1)).unwrap()
            }
            Op::Concat => {
                let parts: Vec<Ct> = layer
                    .inputs
                    .iter()
                    .map(|m| maps[m.index()].clone())
                    .collect();
                Ct::cat(&parts, 1).unwrap()
            }
            Op::Add => (x + &maps[layer.inputs[1].index()]).unwrap(),
            Op::Softmax => {
                let m = x.max_keepdim(1).unwrap();
                let e = x.broadcast_sub(&m).unwrap().exp().unwrap();
                e.broadcast_div(&e.sum_keepdim(1).unwrap()).unwrap()
            }
            Op::Dropout => x.clone(),
        };
        maps.push(y);
    }
    maps.iter()
        .enumerate()
        .map(|(i, t)| {
            let s = g.shape(MapId(i as u32));
            assert_eq!(
                t.dims4().unwrap(),
                (1, s.c, s.h, s.w),
                "candle shape of map {i}"
            );
            t.flatten_all().unwrap().to_vec1::<f32>().unwrap()
        })
        .collect()
}

/// Compares every map of `g` on `input`; returns the number compared.
fn compare(g: &Graph, input: &[f32]) -> usize {
    let ours = Reference::new(g).run_all(input).unwrap();
    let theirs = candle_run_all(g, input);
    assert_eq!(ours.len(), theirs.len());
    for (i, (a, b)) in ours.iter().zip(&theirs).enumerate() {
        assert_eq!(a.len(), b.len(), "map {i} length");
        let scale = b.iter().fold(1.0f32, |m, v| m.max(v.abs()));
        let diff = a
            .iter()
            .zip(b)
            .fold(0.0f32, |m, (x, y)| m.max((x - y).abs()));
        let name = g.map_name(MapId(i as u32));
        assert!(
            diff <= 1e-4 * scale,
            "{}: map {i} `{name}`: max abs diff {diff} (scale {scale})",
            g.name()
        );
    }
    ours.len()
}

/// A graph reading a `c`-channel map `x` of `h` x `w`. The format takes only
/// 1- or 3-channel inputs, so for other `c` a 3x3 convolution `x` (random
/// weights, pad 1) from a 1-channel image comes first. Returns the graph and
/// an input of the right length.
fn graph(
    c: usize,
    h: usize,
    w: usize,
    mut layers: Vec<LayerFile>,
    mut store: TensorStore,
    seed: u64,
) -> (Graph, Vec<f32>) {
    let mut rng = Rng::new(seed);
    let in_c = if c == 1 || c == 3 {
        c
    } else {
        store.insert(
            "x.weight",
            vec![c, 1, 3, 3],
            rng.uniform_vec(c * 9, -1.0, 1.0),
        );
        store.insert("x.bias", vec![c], rng.uniform_vec(c, -0.5, 0.5));
        layers.insert(0, LayerFile::conv2d("x", "image", true, 1, 1));
        1
    };
    let output = layers.last().unwrap().name.clone();
    let file = GraphFile {
        format: FORMAT_V1.into(),
        name: output.clone(),
        weights: "t.safetensors".into(),
        input: InputFile {
            name: if in_c == c { "x" } else { "image" }.into(),
            shape: vec![in_c, h, w],
            pixel_scale: None,
            mean: None,
            std: None,
            color: None,
        },
        labels: None,
        layers,
        output,
    };
    let g = validate(&file, &store, Path::new("t.graph.json")).unwrap();
    let input = rng.uniform_vec(in_c * h * w, -1.0, 1.0);
    (g, input)
}

#[test]
fn conv2d_matches_candle() {
    // (in, out, kernel, stride, dilation, padding [t, l, b, r], groups, bias)
    type Case = (usize, usize, usize, usize, usize, [usize; 4], usize, bool);
    #[rustfmt::skip]
    let cases: &[Case] = &[
        (3, 8, 3, 1, 1, [1, 1, 1, 1], 1, true),
        (4, 6, 3, 2, 1, [1, 1, 1, 1], 1, false),
        (5, 4, 1, 1, 1, [0, 0, 0, 0], 1, true),   // 1x1: the direct GEMM path
        (5, 4, 1, 2, 1, [0, 0, 0, 0], 1, false),  // strided 1x1 goes through im2col
        (4, 8, 3, 1, 2, [2, 2, 2, 2], 2, true),   // grouped and dilated
        (6, 6, 3, 1, 1, [1, 1, 1, 1], 6, true),   // depthwise
        (6, 12, 3, 2, 1, [0, 0, 1, 1], 6, false), // depthwise, multiplier 2, "same"-style asymmetric
        (3, 5, 5, 2, 1, [2, 1, 0, 3], 1, true),   // asymmetric padding
        (1, 4, 7, 3, 1, [3, 3, 3, 3], 1, false),  // a 7x7 stem
        (8, 4, 3, 1, 3, [0, 1, 2, 3], 4, true),
    ];
    for (i, &(ci, co, k, s, d, p, groups, bias)) in cases.iter().enumerate() {
        let mut rng = Rng::new(100 + i as u64);
        let mut store = TensorStore::new("t.safetensors");
        store.insert(
            "c.weight",
            vec![co, ci / groups, k, k],
            rng.uniform_vec(co * ci / groups * k * k, -1.0, 1.0),
        );
        let mut l = LayerFile::new("c", "conv2d", "x")
            .attr("weight", "c.weight")
            .attr("stride", s)
            .attr("dilation", d)
            .attr("padding", json!(p))
            .attr("groups", groups);
        if bias {
            store.insert("c.bias", vec![co], rng.uniform_vec(co, -1.0, 1.0));
            l = l.attr("bias", "c.bias");
        }
        let (g, x) = graph(ci, 11, 9, vec![l], store, i as u64);
        assert!(compare(&g, &x) >= 2, "case {i}");
    }
}

#[test]
fn pooling_matches_candle() {
    // (op, kernel, stride, padding [t, l, b, r])
    let cases: &[(&str, usize, usize, [usize; 4])] = &[
        ("max_pool2d", 2, 2, [0; 4]),
        ("avg_pool2d", 2, 2, [0; 4]),
        ("max_pool2d", 3, 2, [1, 1, 1, 1]),
        ("avg_pool2d", 3, 2, [1, 1, 1, 1]),
        ("max_pool2d", 3, 1, [0, 0, 2, 1]),
        ("avg_pool2d", 3, 1, [2, 1, 0, 0]),
        ("avg_pool2d", 2, 3, [1, 0, 1, 0]),
    ];
    for (i, &(op, k, s, p)) in cases.iter().enumerate() {
        let l = LayerFile::pool("p", op, "x", k, s).attr("padding", json!(p));
        // Negative and positive values, so a padded zero would change a max.
        let (g, x) = graph(
            4,
            10,
            7,
            vec![l],
            TensorStore::new("t.safetensors"),
            7 + i as u64,
        );
        compare(&g, &x);
    }
}

#[test]
fn batch_norm_activations_linear_softmax_match_candle() {
    let mut rng = Rng::new(5);
    let mut store = TensorStore::new("t.safetensors");
    let c = 6;
    store.insert("bn.weight", vec![c], rng.uniform_vec(c, 0.5, 2.0));
    store.insert("bn.bias", vec![c], rng.uniform_vec(c, -1.0, 1.0));
    store.insert("bn.running_mean", vec![c], rng.uniform_vec(c, -1.0, 1.0));
    store.insert("bn.running_var", vec![c], rng.uniform_vec(c, 0.1, 3.0));
    store.insert(
        "fc.weight",
        vec![5, c * 4 * 3],
        rng.uniform_vec(5 * c * 12, -0.5, 0.5),
    );
    store.insert("fc.bias", vec![5], rng.uniform_vec(5, -1.0, 1.0));
    let layers = vec![
        LayerFile::batch_norm("bn", "x").attr("eps", 1e-3),
        LayerFile::new("r6", "relu6", "bn"),
        LayerFile::new("drop", "dropout", "r6"),
        LayerFile::new("flat", "flatten", "drop"),
        LayerFile::linear("fc", "flat", true),
        LayerFile::new("prob", "softmax", "fc"),
    ];
    let (g, x) = graph(c, 4, 3, layers, store, 3);
    assert_eq!(compare(&g, &x), 8);
}

#[test]
fn whole_networks_match_candle_layer_by_layer() {
    let small_dense = zoo::DenseConfig {
        name: "dense_bc_small".into(),
        input: [1, 16, 16],
        stem: zoo::DenseStem::ImageNet { channels: 8 },
        growth: 4,
        blocks: vec![2, 3],
        bottleneck: Some(2),
        compression: 0.5,
        classes: 3,
    };
    let nets = [
        zoo::dense(&small_dense, 1),
        zoo::dense(
            &zoo::DenseConfig {
                input: [1, 16, 16],
                ..zoo::DenseConfig::demo()
            },
            2,
        ),
        zoo::plain_stack(&zoo::PlainStackConfig::default(), 3),
        zoo::residual(
            &zoo::ResidualConfig {
                input: [3, 12, 12],
                channels: 6,
                classes: 4,
            },
            4,
        ),
        zoo::depthwise_separable(&zoo::DepthwiseConfig::default(), 5),
    ];
    for net in &nets {
        let g = net.build();
        let n = compare(&g, &net.random_input(17));
        assert_eq!(n, g.map_count());
    }
}
