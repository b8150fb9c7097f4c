//! The one hand-built [`QGraph`] builder of the test networks, in two fills:
//!
//! - [`QBuilder::new`]: deterministic pseudo-random weights and valid
//!   quantization (seeded splitmix64, Steele, Lea & Flood 2014), so the
//!   generated code computes something worth comparing bit for bit
//!   ([`crate::testnets`]);
//! - [`QBuilder::dummy`]: zero weights and one fixed quantization, for the
//!   planner, which looks only at shapes, kernel kinds and edges
//!   ([`crate::synth`]); every step also records a layer id and becomes the
//!   output, and maps can be addressed by name ([`QBuilder::step`]).
//!
//! Both fills share the shape arithmetic and the kernel structures.

use ingot_compiler::graph::{LayerId, MapId, Padding, Shape};
use ingot_compiler::lower::{
    ChannelTransform, Clamp, Multiplier, QAdd, QConv, QGraph, QKernel, QLinear, QMap, QMapId,
    QParams, QPool, QStep,
};

/// What a name-addressed step ([`QBuilder::step`]) computes.
#[derive(Debug, Clone, Copy)]
pub enum Kind {
    /// Convolution `k×k`, stride, groups (`0` = depthwise), output channels.
    Conv {
        /// Output channels.
        out: usize,
        /// Kernel size.
        k: usize,
        /// Stride.
        stride: usize,
        /// Groups; 0 means one group per input channel.
        groups: usize,
        /// Fuse a per-channel input transform (pre-activation BN-ReLU).
        transform: bool,
    },
    /// Fully connected to `n` outputs.
    Linear(usize),
    /// Max pooling `k×k` with stride and padding.
    MaxPool(usize, usize, usize),
    /// Average pooling `k×k` with stride.
    AvgPool(usize, usize),
    /// Global average pooling.
    GlobalAvgPool,
    /// Element-wise add.
    Add,
    /// Channel concatenation.
    Concat,
    /// Per-channel transform step.
    Channel,
}

/// The quantization of every map of a dummy graph.
const DUMMY_QP: QParams = QParams {
    scale: 0.05,
    zero_point: 0,
};
/// The multiplier of every requantization of a dummy graph.
const DUMMY_M: Multiplier = Multiplier {
    mult: 1 << 30,
    shift: 0,
};
const FULL: Clamp = Clamp {
    min: -128,
    max: 127,
};

fn dummy_affine(c: usize) -> ChannelTransform {
    ChannelTransform::Affine {
        mul: vec![1; c],
        add: vec![0; c],
        shift: 0,
        zp_in: 0,
        zp_out: 0,
        clamp: FULL,
    }
}

/// Builds a [`QGraph`] step by step, with random ([`QBuilder::new`]) or
/// dummy ([`QBuilder::dummy`]) weights and quantization.
pub struct QBuilder {
    pub(crate) g: QGraph,
    rng: u64,
    /// Zero weights, [`DUMMY_QP`] everywhere, full-range clamps.
    dummy: bool,
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
                wide: Vec::new(),
            },
            rng: seed ^ 0x9e37_79b9_7f4a_7c15,
            dummy: false,
        };
        let qp = b.qp();
        let x = b.map("input", Shape::new(c, h, w), qp);
        b.g.pixel_table = (0..256 * c)
            .map(|i| ((i % 256) as i32 - 128 + (i / 256) as i32).clamp(-128, 127) as i8)
            .collect();
        (b, x)
    }

    /// A graph named `name` with an input map `[c, h, w]` called `input`,
    /// zero weights and one fixed quantization: the planner's test graphs.
    pub fn dummy(name: &str, input: [usize; 3]) -> Self {
        let mut b = QBuilder {
            g: QGraph {
                name: name.into(),
                labels: Vec::new(),
                maps: Vec::new(),
                steps: Vec::new(),
                input: QMapId(0),
                pixel_table: vec![0; 256 * input[0]],
                output: QMapId(0),
                softmax_dropped: false,
                wide: Vec::new(),
            },
            rng: 0,
            dummy: true,
        };
        b.map("input", Shape::new(input[0], input[1], input[2]), DUMMY_QP);
        b
    }

    /// Id of the latest map called `name`.
    pub fn id(&self, name: &str) -> QMapId {
        let i = self
            .g
            .maps
            .iter()
            .rposition(|m| m.name == name)
            .unwrap_or_else(|| panic!("no map `{name}`"));
        QMapId(i as u32)
    }

    /// Shape of the latest map called `name`.
    pub fn shape_of(&self, name: &str) -> Shape {
        self.shape(self.id(name))
    }

    /// Adds a step `name` reading the maps called `inputs` (convolutions
    /// get "same" padding `k / 2` and ReLU); returns the output's name.
    pub fn step(&mut self, name: &str, kind: Kind, inputs: &[&str]) -> String {
        let ins: Vec<QMapId> = inputs.iter().map(|n| self.id(n)).collect();
        let x = ins[0];
        match kind {
            Kind::Conv {
                out,
                k,
                stride,
                groups,
                transform,
            } => {
                let c = self.shape(x).c;
                let g = if groups == 0 { c } else { groups };
                let out = if groups == 0 && out == 0 { c } else { out };
                let s = ConvSpec::new(out, k)
                    .stride(stride)
                    .groups(g)
                    .transform(u8::from(transform));
                self.conv(name, x, s)
            }
            Kind::Linear(n) => self.linear(name, x, n),
            Kind::MaxPool(k, s, p) => self.max_pool(name, x, k, s, p),
            Kind::AvgPool(k, s) => self.avg_pool(name, x, k, s),
            Kind::GlobalAvgPool => self.global_avg_pool(name, x),
            Kind::Add => self.add(name, x, ins[1], false),
            Kind::Concat => self.concat(name, &ins),
            Kind::Channel => self.channel(name, x, 1),
        };
        name.into()
    }

    /// A `k`×`k` convolution of the map called `x` to `out` channels
    /// ([`QBuilder::step`]).
    pub fn conv_named(
        &mut self,
        name: &str,
        x: &str,
        out: usize,
        k: usize,
        stride: usize,
    ) -> String {
        let conv = Kind::Conv {
            out,
            k,
            stride,
            groups: 1,
            transform: false,
        };
        self.step(name, conv, &[x])
    }

    /// The graph; its output is the last map written.
    pub fn build(self) -> QGraph {
        debug_assert_eq!(self.g.verify(), Ok(()));
        self.g
    }

    /// A fresh quantization: random, or the dummy one.
    fn fresh_qp(&mut self) -> QParams {
        if self.dummy {
            DUMMY_QP
        } else {
            self.qp()
        }
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
            qp: qp.into(),
            // The planner's graphs pair every map with a float map of the
            // same index, as lowering does.
            float_map: MapId(if self.dummy {
                self.g.maps.len() as u32
            } else {
                0
            }),
        });
        QMapId(self.g.maps.len() as u32 - 1)
    }

    fn shape(&self, m: QMapId) -> Shape {
        self.g.map(m).shape
    }

    fn zp(&self, m: QMapId) -> i32 {
        self.qp_of(m).zero_point
    }

    /// The quantization of a map built here (always per tensor).
    pub fn qp_of(&self, m: QMapId) -> QParams {
        self.g
            .map(m)
            .qp
            .tensor()
            .expect("the builder makes per-tensor maps")
    }

    fn push(&mut self, name: &str, inputs: Vec<QMapId>, output: QMapId, kernel: QKernel) -> QMapId {
        let layers = if self.dummy {
            self.g.output = output;
            vec![LayerId(self.g.steps.len() as u32)]
        } else {
            Vec::new()
        };
        self.g.steps.push(QStep {
            name: name.into(),
            layers,
            inputs,
            output,
            kernel,
        });
        output
    }

    fn clamp(&self, out: QMapId, relu: bool) -> Clamp {
        if self.dummy {
            return FULL;
        }
        Clamp {
            min: if relu { self.zp(out) as i8 } else { -128 },
            max: 127,
        }
    }

    fn transform(&mut self, c: usize, kind: u8, zp_in: i32) -> (Option<ChannelTransform>, i32) {
        if self.dummy && kind != 0 {
            return (Some(dummy_affine(c)), 0);
        }
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
        let qp = qp.unwrap_or_else(|| self.fresh_qp());
        let out = self.map(name, Shape::new(s.out, oh, ow), qp);
        let per = s.k * s.k * (i.c / s.groups);
        let (weights, transform, input_zp, bias, requant) = if self.dummy {
            let (transform, input_zp) = self.transform(i.c, s.transform, 0);
            let w = vec![0; s.out * per];
            (w, transform, input_zp, vec![0; s.out], vec![DUMMY_M; s.out])
        } else {
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
            (weights, transform, input_zp, bias, requant)
        };
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
        let qp = self.fresh_qp();
        let out = self.map(name, Shape::flat(n), qp);
        if self.dummy {
            let lin = QLinear {
                out_features: n,
                in_features: nin,
                weights: vec![0; n * nin],
                weight_scales: vec![0.01; n],
                bias: vec![0; n],
                requant: vec![DUMMY_M; n],
                clamp: FULL,
            };
            return self.push(name, vec![x], out, QKernel::Linear(lin));
        }
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
            self.qp_of(x)
        } else {
            self.fresh_qp()
        };
        let out = self.map(name, Shape::new(i.c, oh, ow), qp);
        let n = (k[0] * k[1]) as f64;
        let requant = if kind == 0 || self.dummy {
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
        let qp = self.fresh_qp();
        let out = self.map(name, self.shape(a), qp);
        let (qa, qb) = (self.qp_of(a), self.qp_of(b));
        let clamp = self.clamp(out, relu);
        if self.dummy {
            let k = QAdd {
                a: DUMMY_M,
                b: DUMMY_M,
                out: DUMMY_M,
                left_shift: 0,
                clamp,
            };
            return self.push(name, vec![a, b], out, QKernel::Add(k));
        }
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
        let qp = self.qp_of(xs[0]);
        let out = self.map(name, Shape::new(c, s0.h, s0.w), qp);
        self.push(name, xs.to_vec(), out, QKernel::Concat)
    }

    /// A per-channel transform step (1 affine, 2 table).
    pub fn channel(&mut self, name: &str, x: QMapId, kind: u8) -> QMapId {
        let c = self.shape(x).c;
        let (t, zp_out) = self.transform(c, kind, self.zp(x));
        let qp = if self.dummy {
            DUMMY_QP
        } else {
            QParams {
                scale: 0.03,
                zero_point: zp_out,
            }
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
