//! Small lowered networks built directly as [`QGraph`]s, with deterministic
//! pseudo-random weights and valid quantization: they exercise every kernel
//! and schedule feature of the generator (plain stack, dense concatenation
//! with fused input transforms, residual adds, depthwise and grouped
//! convolutions, hostile layer names) without needing calibration or
//! lowering. Also a DenseNet-121-shaped graph for compile-time benchmarks.

use crate::graph::{MapId, Padding, Shape};
use crate::lower::{
    ChannelTransform, Clamp, Multiplier, QAdd, QConv, QGraph, QKernel, QLinear, QMap, QMapId,
    QParams, QPool, QStep,
};

/// Builds a [`QGraph`] step by step.
pub struct QBuilder {
    g: QGraph,
    rng: u64,
}

/// Options of [`QBuilder::conv`].
#[derive(Debug, Clone, Copy)]
pub struct ConvSpec {
    /// Output channels.
    pub out: usize,
    /// Square kernel size.
    pub k: usize,
    /// Stride.
    pub stride: usize,
    /// Padding (top, left, bottom, right).
    pub pad: [usize; 4],
    /// Dilation.
    pub dilation: usize,
    /// Groups.
    pub groups: usize,
    /// Fused ReLU.
    pub relu: bool,
    /// Fused input transform: 0 none, 1 affine, 2 table.
    pub transform: u8,
}

impl ConvSpec {
    /// A `k`×`k` convolution to `out` channels, stride 1, "same" padding, ReLU.
    pub fn new(out: usize, k: usize) -> Self {
        let p = k / 2;
        ConvSpec {
            out,
            k,
            stride: 1,
            pad: [p; 4],
            dilation: 1,
            groups: 1,
            relu: true,
            transform: 0,
        }
    }
    /// With a stride.
    pub fn stride(mut self, s: usize) -> Self {
        self.stride = s;
        self
    }
    /// With explicit padding.
    pub fn pad(mut self, p: [usize; 4]) -> Self {
        self.pad = p;
        self
    }
    /// With groups.
    pub fn groups(mut self, g: usize) -> Self {
        self.groups = g;
        self
    }
    /// With dilation.
    pub fn dilation(mut self, d: usize) -> Self {
        self.dilation = d;
        self
    }
    /// Without ReLU.
    pub fn linear(mut self) -> Self {
        self.relu = false;
        self
    }
    /// With a fused input transform (1 affine, 2 table).
    pub fn transform(mut self, t: u8) -> Self {
        self.transform = t;
        self
    }
}

fn mult(m: f64) -> Multiplier {
    let r = ingot_rt::Requant::from_real(m).expect("multiplier in range");
    Multiplier {
        mult: r.mult,
        shift: r.shift,
    }
}

impl QBuilder {
    /// A graph with one `[c, h, w]` input.
    pub fn new(name: &str, c: usize, h: usize, w: usize, seed: u64) -> (QBuilder, QMapId) {
        let mut b = QBuilder {
            g: QGraph {
                name: name.into(),
                labels: Vec::new(),
                maps: Vec::new(),
                steps: Vec::new(),
                input: QMapId(0),
                pixel_table: Vec::new(),
                output: QMapId(0),
                softmax_dropped: false,
            },
            rng: seed ^ 0x9e37_79b9_7f4a_7c15,
        };
        let qp = b.qp();
        let x = b.map("input", Shape::new(c, h, w), qp);
        b.g.pixel_table = (0..256 * c)
            .map(|i| ((i % 256) as i32 - 128 + (i / 256) as i32).clamp(-128, 127) as i8)
            .collect();
        (b, x)
    }

    fn next(&mut self) -> u64 {
        // splitmix64
        self.rng = self.rng.wrapping_add(0x9e37_79b9_7f4a_7c15);
        let mut z = self.rng;
        z = (z ^ (z >> 30)).wrapping_mul(0xbf58_476d_1ce4_e5b9);
        z = (z ^ (z >> 27)).wrapping_mul(0x94d0_49bb_1331_11eb);
        z ^ (z >> 31)
    }

    /// Uniform in `lo..=hi`.
    pub fn int(&mut self, lo: i64, hi: i64) -> i64 {
        lo + (self.next() % (hi - lo + 1) as u64) as i64
    }

    fn unit(&mut self) -> f64 {
        (self.next() >> 11) as f64 / (1u64 << 53) as f64
    }

    /// A random quantization.
    pub fn qp(&mut self) -> QParams {
        QParams {
            scale: (0.01 + 0.05 * self.unit()) as f32,
            zero_point: self.int(-20, 20) as i32,
        }
    }

    /// A new map with the given quantization.
    pub fn map(&mut self, name: &str, shape: Shape, qp: QParams) -> QMapId {
        self.g.maps.push(QMap {
            name: name.into(),
            shape,
            qp,
            float_map: MapId(0),
        });
        QMapId(self.g.maps.len() as u32 - 1)
    }

    fn shape(&self, m: QMapId) -> Shape {
        self.g.map(m).shape
    }

    fn zp(&self, m: QMapId) -> i32 {
        self.g.map(m).qp.zero_point
    }

    fn push(&mut self, name: &str, inputs: Vec<QMapId>, output: QMapId, kernel: QKernel) -> QMapId {
        self.g.steps.push(QStep {
            name: name.into(),
            layers: Vec::new(),
            inputs,
            output,
            kernel,
        });
        output
    }

    fn clamp(&self, out: QMapId, relu: bool) -> Clamp {
        Clamp {
            min: if relu { self.zp(out) as i8 } else { -128 },
            max: 127,
        }
    }

    fn transform(&mut self, c: usize, kind: u8, zp_in: i32) -> (Option<ChannelTransform>, i32) {
        match kind {
            1 => {
                let zp_out = self.int(-10, 10) as i32;
                let mul = (0..c)
                    .map(|_| self.int(-(3 << 12), 3 << 12) as i32)
                    .collect();
                let add = (0..c)
                    .map(|_| self.int(-(20 << 12), 20 << 12) as i32)
                    .collect();
                (
                    Some(ChannelTransform::Affine {
                        mul,
                        add,
                        shift: 12,
                        zp_in,
                        zp_out,
                        clamp: Clamp {
                            min: zp_out as i8,
                            max: 127,
                        },
                    }),
                    zp_out,
                )
            }
            2 => {
                let t = (0..256 * c).map(|_| self.int(-128, 127) as i8).collect();
                (Some(ChannelTransform::Table(t)), self.int(-30, 30) as i32)
            }
            _ => (None, zp_in),
        }
    }

    /// A convolution; the output gets `qp` or a fresh quantization.
    pub fn conv_q(&mut self, name: &str, x: QMapId, s: ConvSpec, qp: Option<QParams>) -> QMapId {
        let i = self.shape(x);
        let span = s.dilation * (s.k - 1) + 1;
        let oh = (i.h + s.pad[0] + s.pad[2] - span) / s.stride + 1;
        let ow = (i.w + s.pad[1] + s.pad[3] - span) / s.stride + 1;
        let qp = qp.unwrap_or_else(|| self.qp());
        let out = self.map(name, Shape::new(s.out, oh, ow), qp);
        let per = s.k * s.k * (i.c / s.groups);
        let weights: Vec<i8> = (0..s.out * per)
            .map(|_| self.int(-127, 127) as i8)
            .collect();
        let (transform, input_zp) = self.transform(i.c, s.transform, self.zp(x));
        let scale = 0.0074 / (per as f64).sqrt();
        let bias = (0..s.out)
            .map(|_| self.int(-2000, 2000) as i32 * (per as f64).sqrt() as i32)
            .collect();
        let requant = (0..s.out)
            .map(|_| mult(scale * (0.7 + 0.6 * self.unit())))
            .collect();
        let clamp = self.clamp(out, s.relu);
        let conv = QConv {
            out_channels: s.out,
            in_channels: i.c,
            kernel: [s.k, s.k],
            stride: [s.stride, s.stride],
            dilation: [s.dilation, s.dilation],
            padding: Padding {
                top: s.pad[0],
                left: s.pad[1],
                bottom: s.pad[2],
                right: s.pad[3],
            },
            groups: s.groups,
            weights,
            weight_scales: vec![0.01; s.out],
            bias,
            requant,
            input_zp,
            clamp,
            transform,
        };
        self.push(name, vec![x], out, QKernel::Conv2d(conv))
    }

    /// A convolution with a fresh output quantization.
    pub fn conv(&mut self, name: &str, x: QMapId, s: ConvSpec) -> QMapId {
        self.conv_q(name, x, s, None)
    }

    /// A fully connected layer to `n` outputs (no activation).
    pub fn linear(&mut self, name: &str, x: QMapId, n: usize) -> QMapId {
        let nin = self.shape(x).len();
        let qp = self.qp();
        let out = self.map(name, Shape::flat(n), qp);
        let weights = (0..n * nin).map(|_| self.int(-127, 127) as i8).collect();
        let scale = 0.0074 / (nin as f64).sqrt();
        let lin = QLinear {
            out_features: n,
            in_features: nin,
            weights,
            weight_scales: vec![0.01; n],
            bias: (0..n).map(|_| self.int(-5000, 5000) as i32).collect(),
            requant: (0..n)
                .map(|_| mult(scale * (0.7 + 0.6 * self.unit())))
                .collect(),
            clamp: Clamp {
                min: -128,
                max: 127,
            },
        };
        self.push(name, vec![x], out, QKernel::Linear(lin))
    }

    fn pool(&mut self, name: &str, x: QMapId, k: usize, s: usize, pad: usize, kind: u8) -> QMapId {
        let i = self.shape(x);
        let (oh, ow) = if kind == 2 {
            (1, 1)
        } else {
            ((i.h + 2 * pad - k) / s + 1, (i.w + 2 * pad - k) / s + 1)
        };
        let (k, s) = if kind == 2 {
            ([i.h, i.w], [1, 1])
        } else {
            ([k, k], [s, s])
        };
        let qp = if kind == 0 {
            self.g.map(x).qp
        } else {
            self.qp()
        };
        let out = self.map(name, Shape::new(i.c, oh, ow), qp);
        let n = (k[0] * k[1]) as f64;
        let requant = if kind == 0 {
            None
        } else {
            Some(mult((0.8 + 0.4 * self.unit()) / n))
        };
        let p = QPool {
            kernel: k,
            stride: s,
            padding: Padding::uniform(pad),
            requant,
            clamp: Clamp {
                min: -128,
                max: 127,
            },
        };
        let kernel = match kind {
            0 => QKernel::MaxPool(p),
            1 => QKernel::AvgPool(p),
            _ => QKernel::GlobalAvgPool(p),
        };
        self.push(name, vec![x], out, kernel)
    }

    /// Max pooling (output quantization = input's).
    pub fn max_pool(&mut self, name: &str, x: QMapId, k: usize, s: usize, pad: usize) -> QMapId {
        self.pool(name, x, k, s, pad, 0)
    }

    /// Average pooling.
    pub fn avg_pool(&mut self, name: &str, x: QMapId, k: usize, s: usize) -> QMapId {
        self.pool(name, x, k, s, 0, 1)
    }

    /// Global average pooling.
    pub fn global_avg_pool(&mut self, name: &str, x: QMapId) -> QMapId {
        self.pool(name, x, 0, 1, 0, 2)
    }

    /// Element-wise add.
    pub fn add(&mut self, name: &str, a: QMapId, b: QMapId, relu: bool) -> QMapId {
        let qp = self.qp();
        let out = self.map(name, self.shape(a), qp);
        let (qa, qb) = (self.g.map(a).qp, self.g.map(b).qp);
        let clamp = self.clamp(out, relu);
        let p = ingot_rt::AddParams::from_scales(
            qa.scale as f64,
            qa.zero_point,
            qb.scale as f64,
            qb.zero_point,
            qp.scale as f64,
            ingot_rt::OutputQuant::clamped(qp.zero_point, clamp.min, clamp.max),
        )
        .expect("add parameters");
        let m = |r: ingot_rt::Requant| Multiplier {
            mult: r.mult,
            shift: r.shift,
        };
        let k = QAdd {
            a: m(p.a_rq),
            b: m(p.b_rq),
            out: m(p.out_rq),
            left_shift: p.left_shift,
            clamp,
        };
        self.push(name, vec![a, b], out, QKernel::Add(k))
    }

    /// Channel concatenation; inputs must share quantization.
    pub fn concat(&mut self, name: &str, xs: &[QMapId]) -> QMapId {
        let s0 = self.shape(xs[0]);
        let c = xs.iter().map(|&x| self.shape(x).c).sum();
        let qp = self.g.map(xs[0]).qp;
        let out = self.map(name, Shape::new(c, s0.h, s0.w), qp);
        self.push(name, xs.to_vec(), out, QKernel::Concat)
    }

    /// A per-channel transform step (1 affine, 2 table).
    pub fn channel(&mut self, name: &str, x: QMapId, kind: u8) -> QMapId {
        let c = self.shape(x).c;
        let (t, zp_out) = self.transform(c, kind, self.zp(x));
        let qp = QParams {
            scale: 0.03,
            zero_point: zp_out,
        };
        let out = self.map(name, self.shape(x), qp);
        self.push(
            name,
            vec![x],
            out,
            QKernel::Channel(t.expect("transform kind 1 or 2")),
        )
    }

    /// The graph with `out` as output and `labels`.
    pub fn finish(mut self, out: QMapId, labels: &[&str]) -> QGraph {
        self.g.output = out;
        self.g.labels = labels.iter().map(|s| s.to_string()).collect();
        self.g
    }
}

/// conv → max pool → strided conv → global average → linear.
pub fn plain() -> QGraph {
    let (mut b, x) = QBuilder::new("plain", 3, 12, 12, 1);
    let c1 = b.conv("conv1", x, ConvSpec::new(8, 3));
    let p1 = b.max_pool("pool1", c1, 2, 2, 0);
    let c2 = b.conv("conv2", p1, ConvSpec::new(16, 3).stride(2));
    let c3 = b.conv("conv3", c2, ConvSpec::new(12, 1).linear());
    let g = b.global_avg_pool("gap", c3);
    let y = b.linear("fc", g, 5);
    b.finish(y, &["zero", "one", "two", "three", "four"])
}

/// A densely connected block: concatenations, fused affine and table input
/// transforms, a transform step, average pooling, and a linear layer over a
/// spatial map.
pub fn dense() -> QGraph {
    let (mut b, x) = QBuilder::new("dense", 3, 10, 10, 2);
    let q = b.qp();
    let x0 = b.conv_q("stem", x, ConvSpec::new(16, 3), Some(q));
    let y1 = b.conv_q("block.1", x0, ConvSpec::new(8, 3).transform(1), Some(q));
    let c1 = b.concat("cat1", &[x0, y1]);
    let y2 = b.conv_q("block.2", c1, ConvSpec::new(8, 3).transform(2), Some(q));
    let c2 = b.concat("cat2", &[c1, y2]);
    let t = b.channel("bn_relu", c2, 1);
    let a = b.avg_pool("pool", t, 2, 2);
    let z = b.conv("transition", a, ConvSpec::new(6, 1).transform(1));
    let y = b.linear("classifier", z, 4);
    b.finish(y, &["a", "b", "c", "d"])
}

/// Residual connections with add, a dilated convolution and padded max pooling.
pub fn residual() -> QGraph {
    let (mut b, x) = QBuilder::new("residual", 2, 9, 9, 3);
    let s = b.conv("stem", x, ConvSpec::new(8, 3));
    let r1 = b.conv("res1.a", s, ConvSpec::new(8, 3));
    let r2 = b.conv("res1.b", r1, ConvSpec::new(8, 3).linear());
    let a1 = b.add("res1.add", s, r2, true);
    let p = b.max_pool("pool", a1, 3, 2, 1);
    let d = b.conv(
        "dilated",
        p,
        ConvSpec::new(8, 3).dilation(2).pad([2; 4]).linear(),
    );
    let a2 = b.add("res2.add", p, d, false);
    let t = b.channel("table", a2, 2);
    let g = b.global_avg_pool("gap", t);
    let y = b.linear("fc", g, 3);
    b.finish(y, &["x", "y", "z"])
}

/// Depthwise, pointwise, grouped and asymmetrically padded convolutions.
pub fn depthwise() -> QGraph {
    let (mut b, x) = QBuilder::new("depthwise", 3, 11, 11, 4);
    let s = b.conv("stem", x, ConvSpec::new(12, 3).stride(2));
    let d1 = b.conv("dw1", s, ConvSpec::new(12, 3).groups(12));
    let p1 = b.conv("pw1", d1, ConvSpec::new(16, 1));
    let d2 = b.conv(
        "dw2",
        p1,
        ConvSpec::new(16, 3).groups(16).stride(2).pad([0, 0, 1, 1]),
    );
    let g2 = b.conv("grouped", d2, ConvSpec::new(8, 3).groups(4).linear());
    let d3 = b.conv("dw3", g2, ConvSpec::new(8, 3).groups(8).transform(1));
    let gp = b.global_avg_pool("gap", d3);
    let y = b.linear("fc", gp, 6);
    b.finish(y, &["0", "1", "2", "3", "4", "5"])
}

/// [`plain`] with hostile layer and label names: quotes, comment ends,
/// newlines, keywords, raw identifiers, non-ASCII, duplicates.
pub fn hostile_names() -> QGraph {
    let mut g = plain();
    let names = [
        "\"; panic!(\"boom\"); \"",
        "*/ fn main() {} /*",
        "r#fn",
        "line\nbreak\r\n// x",
        "größe_ß→λ",
        // Bidi overrides and isolates (issue 14, defect 6): rustc refuses
        // them unescaped in comments and docs.
        "fc\u{202e}txt.exe\u{2066}",
    ];
    for (s, n) in g.steps.iter_mut().zip(names) {
        s.name = n.to_string();
    }
    let maps = [
        "input",
        "\"; panic!()",
        "*/",
        "fn",
        "self",
        "\u{0}nul",
        "a\"b",
    ];
    for (m, n) in g.maps.iter_mut().zip(maps) {
        m.name = n.to_string();
    }
    g.name = "evil */ \"name\"\nnext\u{202e}\u{2069}\u{200b}".into();
    g.labels = vec![
        "\"quoted\"".into(),
        "*/".into(),
        "new\nline".into(),
        "ünï\u{2067}".into(),
        "\\".into(),
    ];
    g
}

/// A DenseNet-121-shaped graph (224×224×3, growth 32, blocks 6-12-24-16,
/// pre-activation batch norm + ReLU fused as affine input transforms,
/// about 8 M parameters) with random weights: for compile-time benchmarks.
pub fn densenet121(input: usize) -> QGraph {
    let (mut b, x) = QBuilder::new("densenet121", 3, input, input, 121);
    let c0 = b.conv(
        "features.conv0",
        x,
        ConvSpec::new(64, 7).stride(2).pad([3; 4]),
    );
    let mut h = b.max_pool("features.pool0", c0, 3, 2, 1);
    for (bi, &n) in [6usize, 12, 24, 16].iter().enumerate() {
        let q = b.g.map(h).qp;
        let mut cat = h;
        for l in 0..n {
            let name = format!("features.denseblock{}.denselayer{}", bi + 1, l + 1);
            let b1 = b.conv(
                &format!("{name}.conv1"),
                cat,
                ConvSpec::new(128, 1).transform(1),
            );
            let g = b.conv_q(
                &format!("{name}.conv2"),
                b1,
                ConvSpec::new(32, 3).transform(1).linear(),
                Some(q),
            );
            cat = b.concat(&format!("{name}.cat"), &[cat, g]);
        }
        if bi < 3 {
            let c = b.g.map(cat).shape.c;
            let t = b.conv(
                &format!("features.transition{}.conv", bi + 1),
                cat,
                ConvSpec::new(c / 2, 1).transform(1).linear(),
            );
            h = b.avg_pool(&format!("features.transition{}.pool", bi + 1), t, 2, 2);
        } else {
            h = b.channel("features.norm5", cat, 1);
        }
    }
    let g = b.global_avg_pool("gap", h);
    let y = b.linear("classifier", g, 1000);
    let labels: Vec<String> = (0..1000).map(|i| format!("class{i}")).collect();
    let labels: Vec<&str> = labels.iter().map(String::as_str).collect();
    b.finish(y, &labels)
}

/// A network shaped like the demo (the zoo's `dense_small`: 1×64×64 input,
/// 3×3 stem to 16 channels, two dense blocks of four BN-ReLU-conv3×3 layers
/// with growth 8, a halving transition, 4 classes), with random weights.
pub fn demo_sized() -> QGraph {
    let (mut b, x) = QBuilder::new("demo_sized", 1, 64, 64, 5);
    let mut h = b.conv("features.conv0", x, ConvSpec::new(16, 3).linear());
    for block in 1..=2 {
        let q = b.g.map(h).qp;
        let mut cat = h;
        for l in 1..=4 {
            let name = format!("features.denseblock{block}.denselayer{l}");
            let y = b.conv_q(
                &format!("{name}.conv"),
                cat,
                ConvSpec::new(8, 3).transform(1).linear(),
                Some(q),
            );
            cat = b.concat(&format!("{name}.cat"), &[cat, y]);
        }
        if block == 1 {
            let c = b.g.map(cat).shape.c;
            let t = b.conv(
                "features.transition1.conv",
                cat,
                ConvSpec::new(c / 2, 1).transform(1).linear(),
            );
            h = b.avg_pool("features.transition1.pool", t, 2, 2);
        } else {
            h = b.channel("features.norm5", cat, 1);
        }
    }
    let g = b.global_avg_pool("gap", h);
    let y = b.linear("classifier", g, 4);
    b.finish(y, &["round", "square", "curly", "angle"])
}

/// The test networks by name.
pub fn all() -> Vec<QGraph> {
    vec![plain(), dense(), residual(), depthwise()]
}
