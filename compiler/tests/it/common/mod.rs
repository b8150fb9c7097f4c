//! Test support for the lowering tests: a small graph builder over the
//! frontend's format types, a naive float evaluator of checked graphs (plain
//! loops, `[C, H, W]`), and min/max calibration over random images.
#![allow(dead_code)]

use ingot_compiler::calibrate::{MapRange, Ranges};
use ingot_compiler::frontend::{self, GraphFile, InputFile, LayerFile, TensorStore, FORMAT_V1};
use ingot_compiler::graph::{Graph, MapId, Op};
use std::path::Path;

/// Deterministic test data: the zoo's SplitMix64 generator, with the f32
/// Box-Muller normal these tests were calibrated with.
pub struct Rng(ingot_testkit::zoo::Rng);

impl Rng {
    pub fn new(seed: u64) -> Rng {
        Rng(ingot_testkit::zoo::Rng::new(seed))
    }
    pub fn next_u64(&mut self) -> u64 {
        self.0.next_u64()
    }
    pub fn uniform(&mut self) -> f32 {
        self.0.uniform()
    }
    pub fn range(&mut self, lo: f32, hi: f32) -> f32 {
        self.0.range(lo, hi)
    }
    /// Standard normal (Box-Muller in f32; `zoo::Rng::normal` uses f64).
    pub fn normal(&mut self) -> f32 {
        let u1 = self.uniform().max(1e-7);
        let u2 = self.uniform();
        (-2.0 * u1.ln()).sqrt() * (2.0 * std::f32::consts::PI * u2).cos()
    }
}

/// Builds a graph layer by layer with random weights.
pub struct Net {
    pub layers: Vec<LayerFile>,
    pub store: TensorStore,
    pub rng: Rng,
    pub input: InputFile,
}

impl Net {
    pub fn new(c: usize, h: usize, w: usize, seed: u64) -> Self {
        Net {
            layers: Vec::new(),
            store: TensorStore::new("test.safetensors"),
            rng: Rng::new(seed),
            input: InputFile {
                name: "x".into(),
                shape: vec![c, h, w],
                pixel_scale: None,
                mean: None,
                std: None,
                color: None,
            },
        }
    }

    fn normal_vec(&mut self, n: usize, std: f32) -> Vec<f32> {
        (0..n).map(|_| self.rng.normal() * std).collect()
    }

    /// He-initialised convolution, square kernel; returns its name.
    #[allow(clippy::too_many_arguments)]
    pub fn conv(
        &mut self,
        name: &str,
        input: &str,
        cin: usize,
        cout: usize,
        k: usize,
        stride: usize,
        pad: usize,
        groups: usize,
    ) -> String {
        let fan_in = cin / groups * k * k;
        let w = self.normal_vec(cout * fan_in, (2.0 / fan_in as f32).sqrt());
        self.store
            .insert(format!("{name}.weight"), vec![cout, cin / groups, k, k], w);
        let b = self.normal_vec(cout, 0.1);
        self.store.insert(format!("{name}.bias"), vec![cout], b);
        let mut l = LayerFile::conv2d(name, input, true, stride, pad);
        if groups != 1 {
            l = l.attr("groups", groups);
        }
        self.layers.push(l);
        name.into()
    }

    /// Batch norm with random statistics.
    pub fn bn(&mut self, name: &str, input: &str, c: usize) -> String {
        let g: Vec<f32> = (0..c).map(|_| self.rng.range(0.5, 1.5)).collect();
        let b: Vec<f32> = (0..c).map(|_| self.rng.range(-0.5, 0.5)).collect();
        let m: Vec<f32> = (0..c).map(|_| self.rng.range(-0.3, 0.3)).collect();
        let v: Vec<f32> = (0..c).map(|_| self.rng.range(0.5, 2.0)).collect();
        for (s, d) in [
            ("weight", g),
            ("bias", b),
            ("running_mean", m),
            ("running_var", v),
        ] {
            self.store.insert(format!("{name}.{s}"), vec![c], d);
        }
        self.layers.push(LayerFile::batch_norm(name, input));
        name.into()
    }

    pub fn op(&mut self, name: &str, op: &str, input: &str) -> String {
        self.layers.push(LayerFile::new(name, op, input));
        name.into()
    }

    pub fn pool(
        &mut self,
        name: &str,
        op: &str,
        input: &str,
        k: usize,
        s: usize,
        pad: usize,
    ) -> String {
        let mut l = LayerFile::pool(name, op, input, k, s);
        if pad > 0 {
            l = l.attr("padding", pad);
        }
        self.layers.push(l);
        name.into()
    }

    pub fn linear(&mut self, name: &str, input: &str, inf: usize, outf: usize) -> String {
        let w = self.normal_vec(outf * inf, (1.0 / inf as f32).sqrt());
        self.store
            .insert(format!("{name}.weight"), vec![outf, inf], w);
        let b = self.normal_vec(outf, 0.1);
        self.store.insert(format!("{name}.bias"), vec![outf], b);
        self.layers.push(LayerFile::linear(name, input, true));
        name.into()
    }

    pub fn multi(&mut self, name: &str, op: &str, inputs: &[&str]) -> String {
        self.layers.push(LayerFile::multi(name, op, inputs));
        name.into()
    }

    pub fn build(&self, output: &str) -> Graph {
        let file = GraphFile {
            format: FORMAT_V1.into(),
            name: "test".into(),
            weights: "test.safetensors".into(),
            input: self.input.clone(),
            labels: None,
            layers: self.layers.clone(),
            output: output.into(),
        };
        frontend::validate(&file, &self.store, Path::new("test.json"))
            .expect("test graph validates")
    }
}

/// A densely connected network in the frameworks' style: block `b` layer `k`
/// reads `concat[x0, …, x_{k-1}]` through BN → ReLU → 1×1 conv (bottleneck,
/// if any) → BN → ReLU → 3×3 conv; transitions are BN → ReLU → 1×1 conv →
/// 2×2 average pool; the head is BN → ReLU → global average → linear.
pub struct DenseSpec {
    pub input: [usize; 3],
    pub stem: usize,
    pub stem_k: usize,
    pub stem_stride: usize,
    pub stem_pool: bool,
    pub blocks: Vec<usize>,
    pub growth: usize,
    pub bottleneck: Option<usize>,
    pub classes: usize,
}

impl DenseSpec {
    /// A small two-block version for simulation tests.
    pub fn small() -> Self {
        DenseSpec {
            input: [3, 12, 12],
            stem: 8,
            stem_k: 3,
            stem_stride: 1,
            stem_pool: false,
            blocks: vec![3, 2],
            growth: 4,
            bottleneck: Some(8),
            classes: 5,
        }
    }
}

pub fn dense_net(spec: &DenseSpec, seed: u64) -> Graph {
    let [c, h, w] = spec.input;
    let mut n = Net::new(c, h, w, seed);
    let mut x = n.conv(
        "stem",
        "x",
        c,
        spec.stem,
        spec.stem_k,
        spec.stem_stride,
        spec.stem_k / 2,
        1,
    );
    x = n.bn("stem.bn", &x, spec.stem);
    x = n.op("stem.relu", "relu", &x);
    if spec.stem_pool {
        x = n.pool("stem.pool", "max_pool2d", &x, 3, 2, 1);
    }
    let mut ch = spec.stem;
    for (bi, &layers) in spec.blocks.iter().enumerate() {
        let mut feats = vec![x.clone()];
        let mut cat_c = ch;
        for li in 0..layers {
            let p = format!("b{bi}.l{li}");
            let refs: Vec<&str> = feats.iter().map(|s| s.as_str()).collect();
            let cat = n.multi(&format!("{p}.cat"), "concat", &refs);
            let mut y = n.bn(&format!("{p}.bn1"), &cat, cat_c);
            y = n.op(&format!("{p}.relu1"), "relu", &y);
            let mut yc = cat_c;
            if let Some(bw) = spec.bottleneck {
                y = n.conv(&format!("{p}.conv1"), &y, cat_c, bw, 1, 1, 0, 1);
                y = n.bn(&format!("{p}.bn2"), &y, bw);
                y = n.op(&format!("{p}.relu2"), "relu", &y);
                yc = bw;
            }
            y = n.conv(&format!("{p}.conv2"), &y, yc, spec.growth, 3, 1, 1, 1);
            feats.push(y);
            cat_c += spec.growth;
        }
        let refs: Vec<&str> = feats.iter().map(|s| s.as_str()).collect();
        x = n.multi(&format!("b{bi}.out"), "concat", &refs);
        ch = cat_c;
        let t = format!("t{bi}");
        let mut y = n.bn(&format!("{t}.bn"), &x, ch);
        y = n.op(&format!("{t}.relu"), "relu", &y);
        if bi + 1 < spec.blocks.len() {
            y = n.conv(&format!("{t}.conv"), &y, ch, ch / 2, 1, 1, 0, 1);
            x = n.pool(&format!("{t}.pool"), "avg_pool2d", &y, 2, 2, 0);
            ch /= 2;
        } else {
            y = n.op("head.gap", "global_avg_pool", &y);
            x = n.linear("head.fc", &y, ch, spec.classes);
        }
    }
    n.build(&x)
}

/// Runs the float graph on one `[C, H, W]` input; returns every map.
pub fn eval(g: &Graph, x: &[f32]) -> Vec<Vec<f32>> {
    let mut maps: Vec<Vec<f32>> = vec![x.to_vec()];
    for l in g.layers() {
        let ins: Vec<&Vec<f32>> = l.inputs.iter().map(|m| &maps[m.index()]).collect();
        let s_in = g.shape(l.inputs[0]);
        let out_id = MapId(maps.len() as u32);
        let s_out = g.shape(out_id);
        let x = ins[0];
        let y: Vec<f32> = match &l.op {
            Op::Conv2d(c) => {
                let [kh, kw] = c.kernel;
                let cpg = c.in_channels / c.groups;
                let opg = c.out_channels / c.groups;
                let mut y = vec![0f32; s_out.len()];
                for o in 0..c.out_channels {
                    let g0 = (o / opg) * cpg;
                    for oy in 0..s_out.h {
                        for ox in 0..s_out.w {
                            let mut acc = c.bias.as_ref().map_or(0.0, |b| b.data[o]);
                            for i in 0..cpg {
                                for ky in 0..kh {
                                    for kx in 0..kw {
                                        let yy = (oy * c.stride[0] + ky * c.dilation[0]) as isize
                                            - c.padding.top as isize;
                                        let xx = (ox * c.stride[1] + kx * c.dilation[1]) as isize
                                            - c.padding.left as isize;
                                        if yy < 0
                                            || xx < 0
                                            || yy >= s_in.h as isize
                                            || xx >= s_in.w as isize
                                        {
                                            continue;
                                        }
                                        let v = x[((g0 + i) * s_in.h + yy as usize) * s_in.w
                                            + xx as usize];
                                        acc +=
                                            c.weight.data[((o * cpg + i) * kh + ky) * kw + kx] * v;
                                    }
                                }
                            }
                            y[(o * s_out.h + oy) * s_out.w + ox] = acc;
                        }
                    }
                }
                y
            }
            Op::BatchNorm(b) => {
                let aff = b.affine();
                let hw = s_in.pixels();
                x.iter()
                    .enumerate()
                    .map(|(i, &v)| aff[i / hw].0 * v + aff[i / hw].1)
                    .collect()
            }
            Op::Relu => x.iter().map(|&v| v.max(0.0)).collect(),
            Op::Relu6 => x.iter().map(|&v| v.clamp(0.0, 6.0)).collect(),
            Op::MaxPool2d(p) | Op::AvgPool2d(p) => {
                let max = matches!(l.op, Op::MaxPool2d(_));
                let mut y = vec![0f32; s_out.len()];
                for ch in 0..s_out.c {
                    for oy in 0..s_out.h {
                        for ox in 0..s_out.w {
                            let mut m = f32::NEG_INFINITY;
                            let mut s = 0f32;
                            for ky in 0..p.kernel[0] {
                                for kx in 0..p.kernel[1] {
                                    let yy =
                                        (oy * p.stride[0] + ky) as isize - p.padding.top as isize;
                                    let xx =
                                        (ox * p.stride[1] + kx) as isize - p.padding.left as isize;
                                    if yy < 0
                                        || xx < 0
                                        || yy >= s_in.h as isize
                                        || xx >= s_in.w as isize
                                    {
                                        continue;
                                    }
                                    let v = x[(ch * s_in.h + yy as usize) * s_in.w + xx as usize];
                                    m = m.max(v);
                                    s += v;
                                }
                            }
                            y[(ch * s_out.h + oy) * s_out.w + ox] = if max {
                                m
                            } else {
                                s / (p.kernel[0] * p.kernel[1]) as f32
                            };
                        }
                    }
                }
                y
            }
            Op::GlobalAvgPool => x
                .chunks(s_in.pixels())
                .map(|c| c.iter().sum::<f32>() / c.len() as f32)
                .collect(),
            Op::Flatten | Op::Dropout => x.clone(),
            Op::Linear(lin) => (0..lin.out_features)
                .map(|o| {
                    let row = &lin.weight.data[o * lin.in_features..(o + 1) * lin.in_features];
                    lin.bias.as_ref().map_or(0.0, |b| b.data[o])
                        + row.iter().zip(x.iter()).map(|(a, b)| a * b).sum::<f32>()
                })
                .collect(),
            Op::Concat => ins.iter().flat_map(|v| v.iter().copied()).collect(),
            Op::Add => x.iter().zip(ins[1].iter()).map(|(a, b)| a + b).collect(),
            Op::Softmax => {
                let m = x.iter().fold(f32::NEG_INFINITY, |a, &b| a.max(b));
                let e: Vec<f32> = x.iter().map(|v| (v - m).exp()).collect();
                let s: f32 = e.iter().sum();
                e.iter().map(|v| v / s).collect()
            }
        };
        assert_eq!(y.len(), s_out.len(), "layer {}", l.name);
        maps.push(y);
    }
    maps
}

/// A random `[C, H, W]` input in `[-1, 1]`.
pub fn random_input(g: &Graph, rng: &mut Rng) -> Vec<f32> {
    (0..g.shape(MapId::INPUT).len())
        .map(|_| rng.range(-1.0, 1.0))
        .collect()
}

/// Min/max ranges of every map over `images`.
pub fn calibrate(g: &Graph, images: &[Vec<f32>]) -> Ranges {
    let mut r = vec![
        MapRange {
            min: f32::INFINITY,
            max: f32::NEG_INFINITY
        };
        g.map_count()
    ];
    for x in images {
        for (m, v) in eval(g, x).iter().enumerate() {
            for &a in v {
                r[m].min = r[m].min.min(a);
                r[m].max = r[m].max.max(a);
            }
        }
    }
    Ranges {
        graph: g.name().into(),
        graph_hash: String::new(),
        method: "minmax".into(),
        images: images.len(),
        maps: r,
        bias_shifts: Default::default(),
        channels: Vec::new(),
    }
}

/// Min/max ranges of every map over `inputs`, observed through the float
/// reference (`Reference::run_with`) as the calibration stage observes them.
pub fn minmax_ranges(g: &Graph, inputs: &[Vec<f32>]) -> Ranges {
    let r = ingot_compiler::reference::Reference::new(g);
    let mut maps = vec![
        MapRange {
            min: f32::INFINITY,
            max: f32::NEG_INFINITY
        };
        g.map_count()
    ];
    for x in inputs {
        r.run_with(x, |m, v| {
            let e = &mut maps[m.index()];
            for &a in v {
                e.min = e.min.min(a);
                e.max = e.max.max(a);
            }
        })
        .unwrap();
    }
    Ranges {
        graph: g.name().into(),
        graph_hash: String::new(),
        method: "minmax".into(),
        images: inputs.len(),
        maps,
        bias_shifts: Default::default(),
        channels: Vec::new(),
    }
}

/// Every map with the same synthetic range (for tests that need only shapes).
pub fn flat_ranges(g: &Graph, min: f32, max: f32) -> Ranges {
    Ranges {
        graph: g.name().into(),
        graph_hash: String::new(),
        method: "synthetic".into(),
        images: 0,
        maps: vec![MapRange { min, max }; g.map_count()],
        bias_shifts: Default::default(),
        channels: Vec::new(),
    }
}
