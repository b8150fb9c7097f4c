//! Hand-built [`QGraph`]s with the structure of the project's test networks
//! (plain stack, dense blocks exported as a chain of concatenations,
//! residual, depthwise-separable, DenseNet-121) and dummy quantization data.
//! The planner only looks at shapes, kernel kinds and edges; the tensors are
//! sized consistently so that flash estimates are meaningful.

use crate::graph::{LayerId, MapId, Padding, Shape};
use crate::lower::{
    ChannelTransform, Clamp, Multiplier, QAdd, QConv, QGraph, QKernel, QLinear, QMap, QMapId,
    QParams, QPool, QStep,
};

/// What a layer of [`Builder`] computes.
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

/// Builds a [`QGraph`] layer by layer; layers refer to earlier maps by name.
#[derive(Debug, Clone)]
pub struct Builder {
    q: QGraph,
}

const QP: QParams = QParams {
    scale: 0.05,
    zero_point: 0,
};
const M: Multiplier = Multiplier {
    mult: 1 << 30,
    shift: 0,
};
const CLAMP: Clamp = Clamp {
    min: -128,
    max: 127,
};

fn pool(k: usize, s: usize, p: usize) -> QPool {
    QPool {
        kernel: [k, k],
        stride: [s, s],
        padding: Padding {
            top: p,
            left: p,
            bottom: p,
            right: p,
        },
        requant: None,
        clamp: CLAMP,
    }
}

fn affine(c: usize) -> ChannelTransform {
    ChannelTransform::Affine {
        mul: vec![1; c],
        add: vec![0; c],
        shift: 0,
        zp_in: 0,
        zp_out: 0,
        clamp: CLAMP,
    }
}

impl Builder {
    /// A graph named `name` with an input map `[c, h, w]` called `input`.
    pub fn new(name: &str, input: [usize; 3]) -> Self {
        let shape = Shape::new(input[0], input[1], input[2]);
        let q = QGraph {
            name: name.into(),
            labels: Vec::new(),
            maps: vec![QMap {
                name: "input".into(),
                shape,
                qp: QP,
                float_map: MapId(0),
            }],
            steps: Vec::new(),
            input: QMapId(0),
            pixel_table: vec![0; 256 * input[0]],
            output: QMapId(0),
            softmax_dropped: false,
        };
        Builder { q }
    }

    /// Id of the map called `name`.
    pub fn id(&self, name: &str) -> QMapId {
        let i = self
            .q
            .maps
            .iter()
            .rposition(|m| m.name == name)
            .unwrap_or_else(|| panic!("no map `{name}`"));
        QMapId(i as u32)
    }

    /// Shape of the map called `name`.
    pub fn shape(&self, name: &str) -> Shape {
        self.q.map(self.id(name)).shape
    }

    /// Adds a step `name` reading `inputs`; returns the output's name.
    pub fn add(&mut self, name: &str, kind: Kind, inputs: &[&str]) -> String {
        let ins: Vec<QMapId> = inputs.iter().map(|n| self.id(n)).collect();
        let s0 = self.q.map(ins[0]).shape;
        let win = |k: usize, s: usize, p: usize, x: usize| (x + 2 * p - k) / s + 1;
        let (shape, kernel) = match kind {
            Kind::Conv {
                out,
                k,
                stride,
                groups,
                transform,
            } => {
                let g = if groups == 0 { s0.c } else { groups };
                let out = if groups == 0 && out == 0 { s0.c } else { out };
                let p = k / 2;
                let shape = Shape::new(out, win(k, stride, p, s0.h), win(k, stride, p, s0.w));
                let conv = QConv {
                    out_channels: out,
                    in_channels: s0.c,
                    kernel: [k, k],
                    stride: [stride, stride],
                    dilation: [1, 1],
                    padding: Padding {
                        top: p,
                        left: p,
                        bottom: p,
                        right: p,
                    },
                    groups: g,
                    weights: vec![0; out * k * k * (s0.c / g)],
                    weight_scales: vec![0.01; out],
                    bias: vec![0; out],
                    requant: vec![M; out],
                    input_zp: 0,
                    clamp: CLAMP,
                    transform: transform.then(|| affine(s0.c)),
                };
                (shape, QKernel::Conv2d(conv))
            }
            Kind::Linear(n) => {
                let lin = QLinear {
                    out_features: n,
                    in_features: s0.len(),
                    weights: vec![0; n * s0.len()],
                    weight_scales: vec![0.01; n],
                    bias: vec![0; n],
                    requant: vec![M; n],
                    clamp: CLAMP,
                };
                (Shape::flat(n), QKernel::Linear(lin))
            }
            Kind::MaxPool(k, s, p) => (
                Shape::new(s0.c, win(k, s, p, s0.h), win(k, s, p, s0.w)),
                QKernel::MaxPool(pool(k, s, p)),
            ),
            Kind::AvgPool(k, s) => (
                Shape::new(s0.c, win(k, s, 0, s0.h), win(k, s, 0, s0.w)),
                QKernel::AvgPool(pool(k, s, 0)),
            ),
            Kind::GlobalAvgPool => (Shape::flat(s0.c), QKernel::GlobalAvgPool(pool(s0.h, 1, 0))),
            Kind::Add => (
                s0,
                QKernel::Add(QAdd {
                    a: M,
                    b: M,
                    out: M,
                    left_shift: 0,
                    clamp: CLAMP,
                }),
            ),
            Kind::Concat => {
                let c = ins.iter().map(|&m| self.q.map(m).shape.c).sum();
                (Shape::new(c, s0.h, s0.w), QKernel::Concat)
            }
            Kind::Channel => (s0, QKernel::Channel(affine(s0.c))),
        };
        let out = QMapId(self.q.maps.len() as u32);
        self.q.maps.push(QMap {
            name: name.into(),
            shape,
            qp: QP,
            float_map: MapId(out.0),
        });
        let layer = LayerId(self.q.steps.len() as u32);
        self.q.steps.push(QStep {
            name: name.into(),
            layers: vec![layer],
            inputs: ins,
            output: out,
            kernel,
        });
        self.q.output = out;
        name.into()
    }

    /// Convolution shorthand.
    pub fn conv(&mut self, name: &str, x: &str, out: usize, k: usize, stride: usize) -> String {
        self.add(
            name,
            Kind::Conv {
                out,
                k,
                stride,
                groups: 1,
                transform: false,
            },
            &[x],
        )
    }

    /// Finishes; the last map written is the output.
    pub fn finish(self) -> QGraph {
        debug_assert_eq!(self.q.verify(), Ok(()));
        self.q
    }
}

/// A plain stack: `input[3,32,32]` → conv3x3 16 → maxpool → conv3x3 32 →
/// maxpool → conv3x3 64 → global average → linear 10.
pub fn plain_stack() -> QGraph {
    let mut b = Builder::new("plain_stack", [3, 32, 32]);
    let x = b.conv("conv1", "input", 16, 3, 1);
    let x = b.add("pool1", Kind::MaxPool(2, 2, 0), &[&x]);
    let x = b.conv("conv2", &x, 32, 3, 1);
    let x = b.add("pool2", Kind::MaxPool(2, 2, 0), &[&x]);
    let x = b.conv("conv3", &x, 64, 3, 1);
    let x = b.add("gap", Kind::GlobalAvgPool, &[&x]);
    b.add("fc", Kind::Linear(10), &[&x]);
    b.finish()
}

/// Configuration of [`dense`].
#[derive(Debug, Clone)]
pub struct DenseCfg {
    /// Name.
    pub name: String,
    /// Input `[c, h, w]`.
    pub input: [usize; 3],
    /// `true`: 7x7/2 conv + 3x3/2 max pool stem; `false`: 3x3 conv.
    pub imagenet_stem: bool,
    /// Stem channels.
    pub stem: usize,
    /// Growth rate.
    pub growth: usize,
    /// Layers per block.
    pub blocks: Vec<usize>,
    /// Bottleneck width factor (`Some(4)`: conv1x1 to 4·growth first).
    pub bottleneck: Option<usize>,
    /// Classes.
    pub classes: usize,
}

impl DenseCfg {
    /// The small dense network: 1x64x64, 3x3 stem to 16, blocks 4/4 of
    /// growth 8 without bottleneck, 4 classes.
    pub fn small() -> Self {
        DenseCfg {
            name: "dense_small".into(),
            input: [1, 64, 64],
            imagenet_stem: false,
            stem: 16,
            growth: 8,
            blocks: vec![4, 4],
            bottleneck: None,
            classes: 4,
        }
    }

    /// DenseNet-121 (Huang et al. 2017, "Densely Connected Convolutional
    /// Networks", table 1): 3x224x224, growth 32, blocks 6/12/24/16,
    /// bottleneck 4·growth, compression 0.5, 1000 classes.
    pub fn densenet121() -> Self {
        DenseCfg {
            name: "densenet121".into(),
            input: [3, 224, 224],
            imagenet_stem: true,
            stem: 64,
            growth: 32,
            blocks: vec![6, 12, 24, 16],
            bottleneck: Some(4),
            classes: 1000,
        }
    }
}

/// A densely connected network as lowered: dense layer `k` reads its own
/// `concat` of all earlier maps of the block (`cat[x0]`, `cat[x0, x1]`, …,
/// the way frameworks export it) with BN-ReLU fused into the convolution's
/// input read; each block ends with a concat of all its maps; transitions
/// are conv1x1 (half the channels) + avgpool 2x2; the head is a
/// per-channel step (final BN-ReLU), global average, linear.
pub fn dense(cfg: &DenseCfg) -> QGraph {
    let mut b = Builder::new(&cfg.name, cfg.input);
    let mut x = if cfg.imagenet_stem {
        let c = b.conv("conv0", "input", cfg.stem, 7, 2);
        b.add("pool0", Kind::MaxPool(3, 2, 1), &[&c])
    } else {
        b.conv("conv0", "input", cfg.stem, 3, 1)
    };
    let pre = |out, k| Kind::Conv {
        out,
        k,
        stride: 1,
        groups: 1,
        transform: true,
    };
    for (bi, &layers) in cfg.blocks.iter().enumerate() {
        let blk = format!("block{}", bi + 1);
        let mut feats = vec![x.clone()];
        for li in 0..layers {
            let p = format!("{blk}.layer{}", li + 1);
            let refs: Vec<&str> = feats.iter().map(String::as_str).collect();
            let cat = b.add(&format!("{p}.cat"), Kind::Concat, &refs);
            let y = match cfg.bottleneck {
                Some(m) => {
                    let y = b.add(&format!("{p}.conv1"), pre(m * cfg.growth, 1), &[&cat]);
                    b.add(&format!("{p}.conv2"), pre(cfg.growth, 3), &[&y])
                }
                None => b.add(&format!("{p}.conv1"), pre(cfg.growth, 3), &[&cat]),
            };
            feats.push(y);
        }
        let refs: Vec<&str> = feats.iter().map(String::as_str).collect();
        x = b.add(&format!("{blk}.cat"), Kind::Concat, &refs);
        if bi + 1 < cfg.blocks.len() {
            let c = b.shape(&x).c / 2;
            let t = format!("transition{}", bi + 1);
            let y = b.add(&format!("{t}.conv"), pre(c, 1), &[&x]);
            x = b.add(&format!("{t}.pool"), Kind::AvgPool(2, 2), &[&y]);
        }
    }
    let y = b.add("norm_final", Kind::Channel, &[&x]);
    let y = b.add("gap", Kind::GlobalAvgPool, &[&y]);
    b.add("classifier", Kind::Linear(cfg.classes), &[&y]);
    b.finish()
}

/// A residual network: 3x32x32, conv 16, two basic blocks at 16 channels,
/// one at 32 with a strided 1x1 projection on the skip, head.
pub fn residual() -> QGraph {
    let mut b = Builder::new("residual", [3, 32, 32]);
    let mut x = b.conv("stem", "input", 16, 3, 1);
    for (i, (c, s)) in [(16, 1), (16, 1), (32, 2)].into_iter().enumerate() {
        let p = format!("res{}", i + 1);
        let y = b.conv(&format!("{p}.conv1"), &x, c, 3, s);
        let y = b.conv(&format!("{p}.conv2"), &y, c, 3, 1);
        let skip = if s != 1 || b.shape(&x).c != c {
            b.conv(&format!("{p}.proj"), &x, c, 1, s)
        } else {
            x.clone()
        };
        x = b.add(&format!("{p}.add"), Kind::Add, &[&y, &skip]);
    }
    let x = b.add("gap", Kind::GlobalAvgPool, &[&x]);
    b.add("fc", Kind::Linear(10), &[&x]);
    b.finish()
}

/// A depthwise-separable network: 3x64x64, conv3x3/2 to 16, four
/// depthwise 3x3 + pointwise pairs (channels 32, 64/2, 64, 128/2), head.
pub fn depthwise_separable() -> QGraph {
    let mut b = Builder::new("depthwise_separable", [3, 64, 64]);
    let mut x = b.conv("stem", "input", 16, 3, 2);
    for (i, (c, s)) in [(32, 1), (64, 2), (64, 1), (128, 2)]
        .into_iter()
        .enumerate()
    {
        let dw = b.add(
            &format!("dw{}", i + 1),
            Kind::Conv {
                out: 0,
                k: 3,
                stride: s,
                groups: 0,
                transform: false,
            },
            &[&x],
        );
        x = b.conv(&format!("pw{}", i + 1), &dw, c, 1, 1);
    }
    let x = b.add("gap", Kind::GlobalAvgPool, &[&x]);
    b.add("fc", Kind::Linear(10), &[&x]);
    b.finish()
}

/// A branchy cell whose file order is memory-hostile: `k` branches each
/// expand the input to a large map and reduce it again, written as all
/// expansions first, then all reductions, then a concat and a head.
pub fn branchy(k: usize) -> QGraph {
    let mut b = Builder::new(&format!("branchy{k}"), [8, 16, 16]);
    let ex: Vec<String> = (0..k)
        .map(|i| b.conv(&format!("expand{i}"), "input", 64, 1, 1))
        .collect();
    let red: Vec<String> = ex
        .iter()
        .enumerate()
        .map(|(i, e)| b.conv(&format!("reduce{i}"), e, 4, 3, 1))
        .collect();
    let refs: Vec<&str> = red.iter().map(String::as_str).collect();
    let c = b.add("cat", Kind::Concat, &refs);
    let x = b.add("gap", Kind::GlobalAvgPool, &[&c]);
    b.add("fc", Kind::Linear(10), &[&x]);
    b.finish()
}

/// The test set: plain stack, small dense, residual, depthwise-separable,
/// DenseNet-121, and a branchy cell.
pub fn test_set() -> Vec<QGraph> {
    vec![
        plain_stack(),
        dense(&DenseCfg::small()),
        residual(),
        depthwise_separable(),
        dense(&DenseCfg::densenet121()),
        branchy(6),
    ]
}

/// The project's zoo networks (`crate::zoo`), lowered with one synthetic
/// range for every map (`[-4, 4]`): the planner needs only shapes, kinds
/// and edges, so no calibration is run.
pub fn zoo_lowered() -> Vec<QGraph> {
    use crate::calibrate::{MapRange, Ranges};
    use crate::lower::{lower, LowerOptions};
    use crate::zoo;
    let nets = [
        zoo::plain_stack(&zoo::PlainStackConfig::default(), 1),
        zoo::dense_small(1),
        zoo::residual(&zoo::ResidualConfig::default(), 1),
        zoo::depthwise_separable(&zoo::DepthwiseConfig::default(), 1),
        zoo::densenet121(1),
    ];
    nets.iter()
        .map(|n| {
            let g = n.build();
            let r = Ranges {
                graph: g.name().into(),
                graph_hash: String::new(),
                method: "synthetic".into(),
                images: 0,
                maps: vec![
                    MapRange {
                        min: -4.0,
                        max: 4.0
                    };
                    g.map_count()
                ],
            };
            let mut q = lower(&g, &r, &LowerOptions::default())
                .unwrap_or_else(|e| panic!("lowering `{}`: {e}", g.name()));
            q.name = format!("zoo/{}", q.name);
            q
        })
        .collect()
}
