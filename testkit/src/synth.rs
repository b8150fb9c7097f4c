//! Hand-built [`QGraph`]s with the structure of the project's test networks
//! (plain stack, dense blocks exported as a chain of concatenations,
//! residual, depthwise-separable, DenseNet-121) and dummy quantization data.
//! The planner only looks at shapes, kernel kinds and edges; the tensors are
//! sized consistently so that flash estimates are meaningful.
//!
//! The builder is [`crate::qbuild::QBuilder`] in its dummy fill.

pub use crate::qbuild::Kind;
use crate::qbuild::QBuilder;
use ingot_compiler::lower::QGraph;

/// A plain stack: `input[3,32,32]` → conv3x3 16 → maxpool → conv3x3 32 →
/// maxpool → conv3x3 64 → global average → linear 10.
pub fn plain_stack() -> QGraph {
    let mut b = QBuilder::dummy("plain_stack", [3, 32, 32]);
    let x = b.conv_named("conv1", "input", 16, 3, 1);
    let x = b.step("pool1", Kind::MaxPool(2, 2, 0), &[&x]);
    let x = b.conv_named("conv2", &x, 32, 3, 1);
    let x = b.step("pool2", Kind::MaxPool(2, 2, 0), &[&x]);
    let x = b.conv_named("conv3", &x, 64, 3, 1);
    let x = b.step("gap", Kind::GlobalAvgPool, &[&x]);
    b.step("fc", Kind::Linear(10), &[&x]);
    b.build()
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
    let mut b = QBuilder::dummy(&cfg.name, cfg.input);
    let mut x = if cfg.imagenet_stem {
        let c = b.conv_named("conv0", "input", cfg.stem, 7, 2);
        b.step("pool0", Kind::MaxPool(3, 2, 1), &[&c])
    } else {
        b.conv_named("conv0", "input", cfg.stem, 3, 1)
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
            let cat = b.step(&format!("{p}.cat"), Kind::Concat, &refs);
            let y = match cfg.bottleneck {
                Some(m) => {
                    let y = b.step(&format!("{p}.conv1"), pre(m * cfg.growth, 1), &[&cat]);
                    b.step(&format!("{p}.conv2"), pre(cfg.growth, 3), &[&y])
                }
                None => b.step(&format!("{p}.conv1"), pre(cfg.growth, 3), &[&cat]),
            };
            feats.push(y);
        }
        let refs: Vec<&str> = feats.iter().map(String::as_str).collect();
        x = b.step(&format!("{blk}.cat"), Kind::Concat, &refs);
        if bi + 1 < cfg.blocks.len() {
            let c = b.shape_of(&x).c / 2;
            let t = format!("transition{}", bi + 1);
            let y = b.step(&format!("{t}.conv"), pre(c, 1), &[&x]);
            x = b.step(&format!("{t}.pool"), Kind::AvgPool(2, 2), &[&y]);
        }
    }
    let y = b.step("norm_final", Kind::Channel, &[&x]);
    let y = b.step("gap", Kind::GlobalAvgPool, &[&y]);
    b.step("classifier", Kind::Linear(cfg.classes), &[&y]);
    b.build()
}

/// A residual network: 3x32x32, conv 16, two basic blocks at 16 channels,
/// one at 32 with a strided 1x1 projection on the skip, head.
pub fn residual() -> QGraph {
    let mut b = QBuilder::dummy("residual", [3, 32, 32]);
    let mut x = b.conv_named("stem", "input", 16, 3, 1);
    for (i, (c, s)) in [(16, 1), (16, 1), (32, 2)].into_iter().enumerate() {
        let p = format!("res{}", i + 1);
        let y = b.conv_named(&format!("{p}.conv1"), &x, c, 3, s);
        let y = b.conv_named(&format!("{p}.conv2"), &y, c, 3, 1);
        let skip = if s != 1 || b.shape_of(&x).c != c {
            b.conv_named(&format!("{p}.proj"), &x, c, 1, s)
        } else {
            x.clone()
        };
        x = b.step(&format!("{p}.add"), Kind::Add, &[&y, &skip]);
    }
    let x = b.step("gap", Kind::GlobalAvgPool, &[&x]);
    b.step("fc", Kind::Linear(10), &[&x]);
    b.build()
}

/// A depthwise-separable network: 3x64x64, conv3x3/2 to 16, four
/// depthwise 3x3 + pointwise pairs (channels 32, 64/2, 64, 128/2), head.
pub fn depthwise_separable() -> QGraph {
    let mut b = QBuilder::dummy("depthwise_separable", [3, 64, 64]);
    let mut x = b.conv_named("stem", "input", 16, 3, 2);
    for (i, (c, s)) in [(32, 1), (64, 2), (64, 1), (128, 2)]
        .into_iter()
        .enumerate()
    {
        let dw = b.step(
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
        x = b.conv_named(&format!("pw{}", i + 1), &dw, c, 1, 1);
    }
    let x = b.step("gap", Kind::GlobalAvgPool, &[&x]);
    b.step("fc", Kind::Linear(10), &[&x]);
    b.build()
}

/// A branchy cell whose file order is memory-hostile: `k` branches each
/// expand the input to a large map and reduce it again, written as all
/// expansions first, then all reductions, then a concat and a head.
pub fn branchy(k: usize) -> QGraph {
    let mut b = QBuilder::dummy(&format!("branchy{k}"), [8, 16, 16]);
    let ex: Vec<String> = (0..k)
        .map(|i| b.conv_named(&format!("expand{i}"), "input", 64, 1, 1))
        .collect();
    let red: Vec<String> = ex
        .iter()
        .enumerate()
        .map(|(i, e)| b.conv_named(&format!("reduce{i}"), e, 4, 3, 1))
        .collect();
    let refs: Vec<&str> = red.iter().map(String::as_str).collect();
    let c = b.step("cat", Kind::Concat, &refs);
    let x = b.step("gap", Kind::GlobalAvgPool, &[&c]);
    b.step("fc", Kind::Linear(10), &[&x]);
    b.build()
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
    use crate::zoo;
    use ingot_compiler::calibrate::{MapRange, Ranges};
    use ingot_compiler::lower::{lower, LowerOptions};
    let nets = [
        zoo::plain_stack(&zoo::PlainStackConfig::default(), 1),
        zoo::dense_small(1),
        zoo::residual(&zoo::ResidualConfig::default(), 1),
        zoo::depthwise_separable(&zoo::DepthwiseConfig::default(), 1),
        zoo::inverted_residual(&zoo::InvertedResidualConfig::sandler2018(0.35), 1),
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
                bias_shifts: Default::default(),
                channels: Vec::new(),
            };
            let mut q = lower(&g, &r, &LowerOptions::default())
                .unwrap_or_else(|e| panic!("lowering `{}`: {e}", g.name()));
            q.name = format!("zoo/{}", q.name);
            q
        })
        .collect()
}
