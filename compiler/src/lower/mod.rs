//! Lowering: float graph plus calibrated ranges to the int8 [`QGraph`].
//!
//! [`lower`] works in three passes over the float layers:
//!
//! 1. **Fusion plan.** Each layer either becomes a step, is folded into one
//!    (batch norm after a convolution whose only reader it is; ReLU/ReLU6
//!    after a convolution, linear, add, pooling or channel step whose only
//!    reader it is; a pre-activation batch norm (+ReLU) whose only reader is
//!    a convolution becomes that convolution's input transform), or is an
//!    alias of its input (`dropout`, `flatten`, a final `softmax`).
//! 2. **Quantization.** Every stored map gets asymmetric int8 parameters
//!    from its range; maps joined by concatenations share one (union-find
//!    over chains of concatenations); a max pool keeps its input's
//!    parameters unless its output joins such a group.
//! 3. **Steps.** Weights are folded, permuted to HWC order and quantized,
//!    biases folded with the input zero point, multipliers built and the
//!    accumulator bound checked.
//!
//! The arithmetic is in [`quant`] and `docs/quantization.md`; the integer
//! simulator that runs the result with the `ingot-rt` kernels is [`sim`].

pub mod ir;
pub mod quant;
pub mod sim;

pub use ir::{
    ChannelTransform, Clamp, Multiplier, QAdd, QConv, QGraph, QGraphError, QKernel, QLinear, QMap,
    QMapId, QParams, QPool, QStep, StepId,
};
pub use quant::Activation;
pub use sim::{SimError, SimInput, Simulator};

use crate::graph::{BatchNorm, Conv2d, Graph, LayerId, MapId, Op, Shape};
use crate::ranges::Ranges;
use quant::{activation_clamp, activation_qparams, affine_transform, multiplier, quantize_weights};

/// Most taps an average pool's window may have: `255·taps` (the largest
/// centred int8 sum) stays below `i32::MAX`, and `ingot-rt`'s
/// `global_avg_pool` takes fewer than `2^23` pixels.
pub const MAX_POOL_TAPS: usize = (1 << 23) - 1;

/// Largest magnitude of a calibrated range end. Activations of a float
/// network trained in f32 are many orders of magnitude below this; ends
/// like ±1e38 come from broken files, and their scales leave no usable
/// int8 step.
pub const MAX_RANGE_ABS: f32 = 1e9;

/// Refuses an average pool whose int32 sum could wrap.
fn pool_taps(layer: &crate::graph::Layer, taps: usize) -> Result<(), LowerError> {
    if taps > MAX_POOL_TAPS {
        return Err(LowerError::PoolOverflow {
            layer: layer.name.clone(),
            op: layer.op.kind(),
            taps,
        });
    }
    Ok(())
}

/// Choices of the lowering.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct LowerOptions {
    /// One weight scale per output channel (default) instead of one per
    /// tensor.
    pub per_channel: bool,
}

impl Default for LowerOptions {
    fn default() -> Self {
        LowerOptions { per_channel: true }
    }
}

/// Why a graph could not be lowered.
#[derive(Debug, thiserror::Error)]
pub enum LowerError {
    /// The ranges do not cover every map of the graph.
    #[error("no calibrated range for map `{map}` (the ranges have {got} maps, graph `{graph}` has {expected}); recalibrate")]
    MissingRange {
        /// Graph name.
        graph: String,
        /// First map without a range.
        map: String,
        /// Maps in the ranges.
        got: usize,
        /// Maps in the graph.
        expected: usize,
    },
    /// A range is not finite, has `min > max`, or an end beyond
    /// [`MAX_RANGE_ABS`].
    #[error("map `{map}`: calibrated range [{min}, {max}] is not usable")]
    BadRange {
        /// Map name.
        map: String,
        /// Lower end.
        min: f32,
        /// Upper end.
        max: f32,
    },
    /// Every map's range is a single value.
    #[error("graph `{graph}`: every calibrated range is a single value (min = max); the calibration images or the ranges file carry no information")]
    DegenerateRanges {
        /// Graph name.
        graph: String,
    },
    /// A scale ratio cannot be expressed as a fixed-point multiplier.
    #[error("layer `{layer}` ({op}): {what} = {value:e} cannot be represented as a fixed-point multiplier (needs 2^-32 <= |M| < 2^30); check the calibrated ranges of its input and output")]
    Multiplier {
        /// Layer name.
        layer: String,
        /// Op name.
        op: &'static str,
        /// Which multiplier.
        what: String,
        /// Its real value.
        value: f64,
    },
    /// A quantized bias does not fit in i32.
    #[error("layer `{layer}` ({op}): bias of output channel {channel} is {value:e} input·weight steps, beyond int32 (weights or input scale too small for this bias)")]
    BiasOverflow {
        /// Layer name.
        layer: String,
        /// Op name.
        op: &'static str,
        /// Output channel.
        channel: usize,
        /// Bias in units of `s_in · s_w`.
        value: f64,
    },
    /// The worst-case int32 accumulation of a layer could overflow.
    #[error("layer `{layer}` ({op}, input {input}, output {output}): output channel {channel} may accumulate up to {worst} (|bias| + 255·Σ|w|), beyond int32; split the layer or reduce its fan-in")]
    AccumulatorOverflow {
        /// Layer name.
        layer: String,
        /// Op name.
        op: &'static str,
        /// Input shape.
        input: Shape,
        /// Output shape.
        output: Shape,
        /// Output channel.
        channel: usize,
        /// Worst-case accumulator magnitude.
        worst: i64,
    },
    /// An average pool's window is so large that the int32 sum of its
    /// centred taps (each up to 255 in magnitude) could overflow.
    #[error("layer `{layer}` ({op}): a window of {taps} taps may sum to 255·{taps}, beyond int32; at most {max} taps are supported (use a smaller window or pool in stages)", max = MAX_POOL_TAPS)]
    PoolOverflow {
        /// Layer name.
        layer: String,
        /// Op name.
        op: &'static str,
        /// Taps in one window (`kh·kw`, or `h·w` for a global pool).
        taps: usize,
    },
    /// A pattern the int8 lowering does not handle.
    #[error("layer `{layer}` ({op}): {message}")]
    Unsupported {
        /// Layer name.
        layer: String,
        /// Op name.
        op: &'static str,
        /// What is not supported.
        message: String,
    },
    /// A bug in the lowering (a broken invariant), not a problem of the model.
    #[error("internal error in lowering (please report): {0}")]
    Internal(String),
}

/// A pre-activation batch norm (+ReLU) fused into a convolution's input read.
#[derive(Debug, Clone, Copy)]
struct PreAct {
    bn: LayerId,
    relu: Option<LayerId>,
    act: Activation,
    /// Map the batch norm reads (stored).
    src: MapId,
    /// Float map of the transformed values (never stored).
    t: MapId,
}

/// What a float layer becomes.
#[derive(Debug, Clone)]
enum Role {
    /// Folded into another layer's step.
    Absorbed,
    /// Same stored map as its input.
    Alias,
    /// A step writing float map `out`.
    Step {
        out: MapId,
        bn: Option<LayerId>,
        act: Activation,
        act_layer: Option<LayerId>,
        pre: Option<PreAct>,
    },
}

fn act_of(op: &Op) -> Option<Activation> {
    match op {
        Op::Relu => Some(Activation::Relu),
        Op::Relu6 => Some(Activation::Relu6),
        _ => None,
    }
}

/// Pass 1: which layers fold into which steps.
fn fusion_roles(g: &Graph) -> Result<Vec<Role>, LowerError> {
    let n = g.layers().len();
    let mut role: Vec<Option<Role>> = vec![None; n];
    let mut pre: Vec<Option<PreAct>> = vec![None; n];
    // The one layer reading `m`, if `m` may disappear into a fused step.
    let sole = |m: MapId| -> Option<LayerId> {
        let c = g.consumers(m);
        (c.len() == 1 && m != g.output()).then(|| c[0])
    };
    let fold_act = |out: &mut MapId, role: &mut [Option<Role>]| -> (Activation, Option<LayerId>) {
        if let Some(j) = sole(*out) {
            if let Some(a) = act_of(&g.layer(j).op) {
                role[j.index()] = Some(Role::Absorbed);
                *out = j.output();
                return (a, Some(j));
            }
        }
        (Activation::None, None)
    };
    for id in g.layer_ids() {
        let i = id.index();
        if role[i].is_some() {
            continue;
        }
        let layer = g.layer(id);
        let mut out = id.output();
        let r = match &layer.op {
            Op::Conv2d(_) => {
                let mut bn = None;
                if let Some(j) = sole(out) {
                    if matches!(g.layer(j).op, Op::BatchNorm(_)) {
                        role[j.index()] = Some(Role::Absorbed);
                        bn = Some(j);
                        out = j.output();
                    }
                }
                let (act, act_layer) = fold_act(&mut out, &mut role);
                Role::Step {
                    out,
                    bn,
                    act,
                    act_layer,
                    pre: pre[i].take(),
                }
            }
            Op::Linear(_) | Op::Add | Op::MaxPool2d(_) | Op::AvgPool2d(_) | Op::GlobalAvgPool => {
                let (act, act_layer) = fold_act(&mut out, &mut role);
                Role::Step {
                    out,
                    bn: None,
                    act,
                    act_layer,
                    pre: None,
                }
            }
            Op::BatchNorm(_) => {
                let (act, act_layer) = fold_act(&mut out, &mut role);
                match sole(out) {
                    Some(j) if matches!(g.layer(j).op, Op::Conv2d(_)) => {
                        pre[j.index()] = Some(PreAct {
                            bn: id,
                            relu: act_layer,
                            act,
                            src: layer.inputs[0],
                            t: out,
                        });
                        Role::Absorbed
                    }
                    _ => Role::Step {
                        out,
                        bn: Some(id),
                        act,
                        act_layer,
                        pre: None,
                    },
                }
            }
            Op::Relu | Op::Relu6 | Op::Concat => Role::Step {
                out,
                bn: None,
                act: Activation::None,
                act_layer: None,
                pre: None,
            },
            Op::Dropout | Op::Flatten => Role::Alias,
            Op::Softmax => {
                if id.output() != g.output() || !g.consumers(id.output()).is_empty() {
                    return Err(unsupported(g, id, "softmax is only supported as the last layer (it is dropped; the arg-max is unchanged)"));
                }
                Role::Alias
            }
        };
        role[i] = Some(r);
    }
    role.into_iter()
        .enumerate()
        .map(|(i, r)| r.ok_or_else(|| LowerError::Internal(format!("layer {i} got no role"))))
        .collect()
}

fn unsupported(g: &Graph, id: LayerId, message: impl Into<String>) -> LowerError {
    let l = g.layer(id);
    LowerError::Unsupported {
        layer: l.name.clone(),
        op: l.op.kind(),
        message: message.into(),
    }
}

/// Union-find over float map indices, path-halving, union by smaller index
/// (deterministic roots).
struct UnionFind(Vec<usize>);

impl UnionFind {
    fn find(&mut self, mut x: usize) -> usize {
        while self.0[x] != x {
            self.0[x] = self.0[self.0[x]];
            x = self.0[x];
        }
        x
    }
    fn union(&mut self, a: usize, b: usize) {
        let (ra, rb) = (self.find(a), self.find(b));
        let (lo, hi) = (ra.min(rb), ra.max(rb));
        self.0[hi] = lo;
    }
}

/// Lowers a float graph with calibrated ranges to the int8 [`QGraph`].
pub fn lower(g: &Graph, ranges: &Ranges, opts: &LowerOptions) -> Result<QGraph, LowerError> {
    check_ranges(g, ranges)?;
    let roles = fusion_roles(g)?;
    let nm = g.map_count();

    // Stored map holding each float map's value (aliases resolved).
    let mut canon: Vec<Option<MapId>> = vec![None; nm];
    canon[0] = Some(MapId::INPUT);
    for id in g.layer_ids() {
        match &roles[id.index()] {
            Role::Alias => canon[id.output().index()] = canon[g.layer(id).inputs[0].index()],
            Role::Step { out, .. } => canon[out.index()] = Some(*out),
            Role::Absorbed => {}
        }
    }
    let stored = |m: MapId, id: LayerId| -> Result<MapId, LowerError> {
        canon[m.index()].ok_or_else(|| {
            LowerError::Internal(format!(
                "layer `{}` reads map {m}, which is folded away",
                g.layer(id).name
            ))
        })
    };

    // Pass 2: concatenation groups and quantization of stored maps.
    let mut classes = UnionFind((0..nm).collect());
    for id in g.layer_ids() {
        if let (Op::Concat, Role::Step { out, .. }) = (&g.layer(id).op, &roles[id.index()]) {
            for &m in &g.layer(id).inputs {
                classes.union(out.index(), stored(m, id)?.index());
            }
        }
    }
    let mut members = vec![0usize; nm];
    let mut class_range: Vec<Option<crate::ranges::MapRange>> = vec![None; nm];
    for (m, c) in canon.iter().enumerate() {
        if *c == Some(MapId(m as u32)) {
            let root = classes.find(m);
            members[root] += 1;
            let r = ranges.maps[m].with_zero();
            class_range[root] = Some(match class_range[root] {
                None => r,
                Some(u) => crate::ranges::MapRange {
                    min: u.min.min(r.min),
                    max: u.max.max(r.max),
                },
            });
        }
    }
    // The main layer of the step writing each stored map.
    let mut writer: Vec<Option<LayerId>> = vec![None; nm];
    for id in g.layer_ids() {
        if let Role::Step { out, .. } = &roles[id.index()] {
            writer[out.index()] = Some(id);
        }
    }
    let mut qp: Vec<Option<QParams>> = vec![None; nm];
    for (m, c) in canon.iter().enumerate() {
        if *c != Some(MapId(m as u32)) {
            continue;
        }
        let root = classes.find(m);
        let p = if members[root] > 1 {
            activation_qparams(class_range[root].unwrap_or(ranges.maps[m]))
        } else {
            match writer[m] {
                Some(l) if matches!(g.layer(l).op, Op::MaxPool2d(_)) => {
                    let src = stored(g.layer(l).inputs[0], l)?;
                    qp[src.index()].ok_or_else(|| {
                        LowerError::Internal("max pool input not quantized yet".into())
                    })?
                }
                _ => activation_qparams(ranges.maps[m]),
            }
        };
        qp[m] = Some(p);
    }

    // Pass 3: maps and steps.
    let mut b = Builder {
        g,
        opts,
        maps: Vec::new(),
        steps: Vec::new(),
        qmap: vec![None; nm],
    };
    let in_qp = qp[0].ok_or_else(|| LowerError::Internal("input not quantized".into()))?;
    b.add_map(MapId::INPUT, in_qp, g.shape(MapId::INPUT));
    for id in g.layer_ids() {
        let Role::Step {
            out,
            bn,
            act,
            act_layer,
            pre,
        } = roles[id.index()].clone()
        else {
            continue;
        };
        let out_qp = qp[out.index()]
            .ok_or_else(|| LowerError::Internal(format!("map {out} not quantized")))?;
        let mut layers = vec![id];
        layers.extend(pre.map(|p| p.bn));
        layers.extend(pre.and_then(|p| p.relu));
        layers.extend(bn.filter(|&l| l != id));
        layers.extend(act_layer);
        b.step(id, out, out_qp, bn, act, pre, layers, &canon, ranges)?;
    }
    let out_canon = canon[g.output().index()]
        .ok_or_else(|| LowerError::Internal("graph output folded away".into()))?;
    let output = b.qmap[out_canon.index()]
        .ok_or_else(|| LowerError::Internal("graph output not stored".into()))?;
    if b.maps[output.index()].shape != g.shape(g.output()) {
        return Err(LowerError::Unsupported {
            layer: g.map_name(g.output()).into(),
            op: "flatten",
            message: format!("the graph output is a flattened {} map; int8 maps are stored HWC, so flattening is only supported into a linear layer", b.maps[output.index()].shape),
        });
    }
    let softmax_dropped = g
        .output()
        .producer()
        .is_some_and(|l| matches!(g.layer(l).op, Op::Softmax));
    let q = QGraph {
        name: g.name().into(),
        labels: g.labels().to_vec(),
        maps: b.maps,
        steps: b.steps,
        input: QMapId(0),
        pixel_table: pixel_table(g, in_qp),
        output,
        softmax_dropped,
    };
    debug_assert_eq!(q.verify(), Ok(()), "lowered graph fails verification");
    Ok(q)
}

fn check_ranges(g: &Graph, ranges: &Ranges) -> Result<(), LowerError> {
    if ranges.maps.len() != g.map_count() {
        let first = ranges.maps.len().min(g.map_count().saturating_sub(1));
        return Err(LowerError::MissingRange {
            graph: g.name().into(),
            map: g.map_name(MapId(first as u32)).into(),
            got: ranges.maps.len(),
            expected: g.map_count(),
        });
    }
    for (i, r) in ranges.maps.iter().enumerate() {
        if !(r.min.is_finite()
            && r.max.is_finite()
            && r.min <= r.max
            && r.min.abs() <= MAX_RANGE_ABS
            && r.max.abs() <= MAX_RANGE_ABS)
        {
            return Err(LowerError::BadRange {
                map: g.map_name(MapId(i as u32)).into(),
                min: r.min,
                max: r.max,
            });
        }
    }
    // Every map collapsed to one value: the ranges say the network computes
    // a constant (a calibration on blank images, or an edited file); no
    // int8 network can be built from that.
    if ranges.maps.iter().all(|r| r.min == r.max) {
        return Err(LowerError::DegenerateRanges {
            graph: g.name().into(),
        });
    }
    Ok(())
}

/// `pixel_table[c·256 + p] = clamp(round(((p·pixel_scale − mean[c]) / std[c]) / s_in) + z_in)`.
pub fn pixel_table(g: &Graph, qp: QParams) -> Vec<i8> {
    let spec = g.input();
    (0..spec.shape.c)
        .flat_map(|c| (0..=255u8).map(move |p| quant::quantize(spec.preprocess(c, p), qp)))
        .collect()
}

/// Folds an inference batch norm into the convolution before it:
/// `w'[o] = w[o]·γ[o]/σ[o]`, `b'[o] = (b[o] − μ[o])·γ[o]/σ[o] + β[o]`
/// (Jacob et al. 2018, §3.2; Krishnamoorthi 2018, §2.5). Returns the weights in
/// the float layout `[O][I/g][kH][kW]` and the bias.
pub fn fold_batch_norm(conv: &Conv2d, bn: &BatchNorm) -> (Vec<f32>, Vec<f32>) {
    let aff = bn.affine();
    let per = conv.weight.len() / conv.out_channels;
    let w = conv
        .weight
        .data
        .iter()
        .enumerate()
        .map(|(i, &v)| (v as f64 * aff[i / per].0 as f64) as f32)
        .collect();
    let b = (0..conv.out_channels)
        .map(|o| {
            let b0 = conv.bias.as_ref().map_or(0.0, |t| t.data[o]) as f64;
            (b0 * aff[o].0 as f64 + aff[o].1 as f64) as f32
        })
        .collect();
    (w, b)
}

/// RAM the pre-activation input transforms avoid: the int8 batch-norm(-ReLU)
/// maps that would otherwise be stored before each fused convolution.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub struct FusionSavings {
    /// Convolutions with a fused input transform.
    pub fused: usize,
    /// Bytes of the largest avoided map.
    pub largest: usize,
    /// Bytes of all avoided maps together.
    pub total: usize,
    /// Input channels transformed, summed over the fused convolutions (each
    /// has per-channel coefficients in flash).
    pub channels: usize,
}

/// Measures [`FusionSavings`] of a lowered graph. Each fused transform
/// replaces a map of the convolution's input shape (batch norm and ReLU keep
/// the shape), one byte per element. The largest such map is a lower bound of
/// the peak scratch the fusion saves (it would be live next to the map it is
/// computed from); the planner gives the exact difference.
pub fn fusion_savings(q: &QGraph) -> FusionSavings {
    let mut s = FusionSavings::default();
    for st in &q.steps {
        if let QKernel::Conv2d(c) = &st.kernel {
            if c.transform.is_some() {
                let bytes = q.map(st.inputs[0]).shape.len();
                s.fused += 1;
                s.largest = s.largest.max(bytes);
                s.total += bytes;
                s.channels += c.in_channels;
            }
        }
    }
    s
}

struct Builder<'a> {
    g: &'a Graph,
    opts: &'a LowerOptions,
    maps: Vec<QMap>,
    steps: Vec<QStep>,
    /// Stored map of each (canonical) float map.
    qmap: Vec<Option<QMapId>>,
}

impl Builder<'_> {
    fn add_map(&mut self, m: MapId, qp: QParams, shape: Shape) -> QMapId {
        let id = QMapId(self.maps.len() as u32);
        self.maps.push(QMap {
            name: self.g.map_name(m).into(),
            shape,
            qp,
            float_map: m,
        });
        self.qmap[m.index()] = Some(id);
        id
    }

    fn input_map(
        &self,
        id: LayerId,
        m: MapId,
        canon: &[Option<MapId>],
    ) -> Result<QMapId, LowerError> {
        canon[m.index()]
            .and_then(|c| self.qmap[c.index()])
            .ok_or_else(|| {
                LowerError::Internal(format!(
                    "layer `{}` reads map {m} before it is stored",
                    self.g.layer(id).name
                ))
            })
    }

    fn mult(
        &self,
        id: LayerId,
        what: impl Into<String>,
        value: f64,
    ) -> Result<Multiplier, LowerError> {
        multiplier(value).ok_or_else(|| LowerError::Multiplier {
            layer: self.g.layer(id).name.clone(),
            op: self.g.layer(id).op.kind(),
            what: what.into(),
            value,
        })
    }

    #[allow(clippy::too_many_arguments)]
    fn step(
        &mut self,
        id: LayerId,
        out: MapId,
        out_qp: QParams,
        bn: Option<LayerId>,
        act: Activation,
        pre: Option<PreAct>,
        layers: Vec<LayerId>,
        canon: &[Option<MapId>],
        ranges: &Ranges,
    ) -> Result<(), LowerError> {
        let g = self.g;
        let layer = g.layer(id);
        let clamp = activation_clamp(act, out_qp);
        // Inputs as stored; a pre-activation convolution reads the batch
        // norm's input.
        let read: Vec<MapId> = match pre {
            Some(p) => vec![p.src],
            None => layer.inputs.clone(),
        };
        let inputs = read
            .iter()
            .map(|&m| self.input_map(id, m, canon))
            .collect::<Result<Vec<_>, _>>()?;
        for (&m, &q) in read.iter().zip(&inputs) {
            let stored = self.maps[q.index()].shape;
            if stored != g.shape(m) && !matches!(layer.op, Op::Linear(_)) {
                return Err(unsupported(g, id, format!("reads a flattened {stored} map; int8 maps are stored HWC, so flattening is only supported into a linear layer")));
            }
        }
        let in_qp: Vec<QParams> = inputs.iter().map(|q| self.maps[q.index()].qp).collect();
        let out_shape = g.shape(out);
        let kernel = match &layer.op {
            Op::Conv2d(conv) => {
                let (transform, dom) = match pre {
                    None => (None, in_qp[0]),
                    Some(p) => {
                        let Op::BatchNorm(bnp) = &g.layer(p.bn).op else {
                            return Err(LowerError::Internal(
                                "pre-activation without batch norm".into(),
                            ));
                        };
                        let dom = activation_qparams(ranges.maps[p.t.index()]);
                        let ab: Vec<(f64, f64)> = bnp
                            .affine()
                            .iter()
                            .map(|&(a, b)| (a as f64, b as f64))
                            .collect();
                        let t = affine_transform(&ab, in_qp[0], dom, activation_clamp(p.act, dom))
                            .ok_or_else(|| LowerError::Multiplier {
                                layer: g.layer(p.bn).name.clone(),
                                op: "batch_norm",
                                what: "input transform multiplier γ·s_in/(σ·s_out)".into(),
                                value: ab.iter().fold(0f64, |m, &(a, _)| m.max(a.abs()))
                                    * in_qp[0].scale as f64
                                    / dom.scale as f64,
                            })?;
                        (Some(t), dom)
                    }
                };
                let (w, bias) = match bn {
                    Some(l) => match &g.layer(l).op {
                        Op::BatchNorm(bnp) => fold_batch_norm(conv, bnp),
                        _ => {
                            return Err(LowerError::Internal(
                                "folded layer is not a batch norm".into(),
                            ))
                        }
                    },
                    None => (
                        conv.weight.data.clone(),
                        conv.bias
                            .as_ref()
                            .map_or_else(|| vec![0.0; conv.out_channels], |t| t.data.clone()),
                    ),
                };
                let [kh, kw] = conv.kernel;
                let cpg = conv.in_channels / conv.groups;
                // [O][I/g][kh][kw] -> [O][kh][kw][I/g]
                let mut hwc = vec![0f32; w.len()];
                for o in 0..conv.out_channels {
                    for i in 0..cpg {
                        for y in 0..kh {
                            for x in 0..kw {
                                hwc[((o * kh + y) * kw + x) * cpg + i] =
                                    w[((o * cpg + i) * kh + y) * kw + x];
                            }
                        }
                    }
                }
                let qw = quantize_weights(&hwc, conv.out_channels, self.opts.per_channel);
                let (bias, requant) = self.bias_and_requant(
                    id,
                    &qw,
                    &bias,
                    dom,
                    out_qp,
                    g.shape(read[0]),
                    out_shape,
                )?;
                QKernel::Conv2d(QConv {
                    out_channels: conv.out_channels,
                    in_channels: conv.in_channels,
                    kernel: conv.kernel,
                    stride: conv.stride,
                    dilation: conv.dilation,
                    padding: conv.padding,
                    groups: conv.groups,
                    weights: qw.codes,
                    weight_scales: qw.scales,
                    bias,
                    requant,
                    input_zp: dom.zero_point,
                    clamp,
                    transform,
                })
            }
            Op::Linear(lin) => {
                let src = self.maps[inputs[0].index()].shape;
                let (c, h, w) = (src.c, src.h, src.w);
                // Row layout from CHW-flatten order to the stored HWC order.
                let mut wq = vec![0f32; lin.weight.len()];
                for o in 0..lin.out_features {
                    let row = &lin.weight.data[o * lin.in_features..(o + 1) * lin.in_features];
                    for ch in 0..c {
                        for p in 0..h * w {
                            wq[o * lin.in_features + p * c + ch] = row[ch * h * w + p];
                        }
                    }
                }
                let qw = quantize_weights(&wq, lin.out_features, self.opts.per_channel);
                let bias: Vec<f32> = lin
                    .bias
                    .as_ref()
                    .map_or_else(|| vec![0.0; lin.out_features], |t| t.data.clone());
                let (bias, requant) =
                    self.bias_and_requant(id, &qw, &bias, in_qp[0], out_qp, src, out_shape)?;
                QKernel::Linear(QLinear {
                    out_features: lin.out_features,
                    in_features: lin.in_features,
                    weights: qw.codes,
                    weight_scales: qw.scales,
                    bias,
                    requant,
                    clamp,
                })
            }
            Op::MaxPool2d(p) => {
                let requant = if in_qp[0] == out_qp {
                    None
                } else {
                    Some(self.mult(
                        id,
                        "s_in/s_out",
                        in_qp[0].scale as f64 / out_qp.scale as f64,
                    )?)
                };
                QKernel::MaxPool(QPool {
                    kernel: p.kernel,
                    stride: p.stride,
                    padding: p.padding,
                    requant,
                    clamp,
                })
            }
            Op::AvgPool2d(p) => {
                pool_taps(layer, p.kernel[0].saturating_mul(p.kernel[1]))?;
                let n = (p.kernel[0] * p.kernel[1]) as f64;
                let r = self.mult(
                    id,
                    "s_in/(s_out·kh·kw)",
                    in_qp[0].scale as f64 / (out_qp.scale as f64 * n),
                )?;
                QKernel::AvgPool(QPool {
                    kernel: p.kernel,
                    stride: p.stride,
                    padding: p.padding,
                    requant: Some(r),
                    clamp,
                })
            }
            Op::GlobalAvgPool => {
                let s = g.shape(read[0]);
                pool_taps(layer, s.pixels())?;
                let r = self.mult(
                    id,
                    "s_in/(s_out·h·w)",
                    in_qp[0].scale as f64 / (out_qp.scale as f64 * s.pixels() as f64),
                )?;
                QKernel::GlobalAvgPool(QPool {
                    kernel: [s.h, s.w],
                    stride: [1, 1],
                    padding: Default::default(),
                    requant: Some(r),
                    clamp,
                })
            }
            Op::Add => {
                let oq = ingot_rt::OutputQuant::clamped(out_qp.zero_point, clamp.min, clamp.max);
                let p = ingot_rt::AddParams::from_scales(
                    in_qp[0].scale as f64,
                    in_qp[0].zero_point,
                    in_qp[1].scale as f64,
                    in_qp[1].zero_point,
                    out_qp.scale as f64,
                    oq,
                )
                .ok_or_else(|| LowerError::Multiplier {
                    layer: layer.name.clone(),
                    op: "add",
                    what: "input or output rescaling (s_a, s_b, s_out)".into(),
                    value: in_qp[0].scale.max(in_qp[1].scale) as f64 / out_qp.scale as f64,
                })?;
                let m = |r: ingot_rt::Requant| Multiplier {
                    mult: r.mult,
                    shift: r.shift,
                };
                QKernel::Add(QAdd {
                    a: m(p.a_rq),
                    b: m(p.b_rq),
                    out: m(p.out_rq),
                    left_shift: p.left_shift,
                    clamp,
                })
            }
            Op::Concat => QKernel::Concat,
            Op::BatchNorm(bnp) => {
                let ab: Vec<(f64, f64)> = bnp
                    .affine()
                    .iter()
                    .map(|&(a, b)| (a as f64, b as f64))
                    .collect();
                QKernel::Channel(self.transform(id, &ab, in_qp[0], out_qp, clamp)?)
            }
            Op::Relu | Op::Relu6 => {
                let act = act_of(&layer.op).unwrap_or(Activation::None);
                let ab = vec![(1.0, 0.0); out_shape.c];
                QKernel::Channel(self.transform(
                    id,
                    &ab,
                    in_qp[0],
                    out_qp,
                    activation_clamp(act, out_qp),
                )?)
            }
            Op::Dropout | Op::Flatten | Op::Softmax => {
                return Err(LowerError::Internal(format!(
                    "alias layer `{}` planned as a step",
                    layer.name
                )))
            }
        };
        let stored_shape = out_shape;
        let qid = self.add_map(out, out_qp, stored_shape);
        self.steps.push(QStep {
            name: layer.name.clone(),
            layers,
            inputs,
            output: qid,
            kernel,
        });
        Ok(())
    }

    fn transform(
        &self,
        id: LayerId,
        ab: &[(f64, f64)],
        qin: QParams,
        qout: QParams,
        clamp: Clamp,
    ) -> Result<ChannelTransform, LowerError> {
        affine_transform(ab, qin, qout, clamp).ok_or_else(|| LowerError::Multiplier {
            layer: self.g.layer(id).name.clone(),
            op: self.g.layer(id).op.kind(),
            what: "channel transform multiplier a·s_in/s_out".into(),
            value: ab.iter().fold(0f64, |m, &(a, _)| m.max(a.abs())) * qin.scale as f64
                / qout.scale as f64,
        })
    }

    /// Quantized, zero-point-folded biases and per-row multipliers of a conv
    /// or linear layer, with the accumulator bound checked.
    #[allow(clippy::too_many_arguments)]
    fn bias_and_requant(
        &self,
        id: LayerId,
        qw: &quant::QuantizedWeights,
        bias: &[f32],
        qin: QParams,
        qout: QParams,
        in_shape: Shape,
        out_shape: Shape,
    ) -> Result<(Vec<i32>, Vec<Multiplier>), LowerError> {
        let layer = self.g.layer(id);
        let rows = qw.scales.len();
        let per = qw.codes.len() / rows.max(1);
        let mut folded = Vec::with_capacity(rows);
        let mut requant = Vec::with_capacity(rows);
        for (o, row) in qw.codes.chunks(per.max(1)).take(rows).enumerate() {
            let s_acc = qin.scale as f64 * qw.scales[o] as f64;
            let bq = (bias[o] as f64 / s_acc).round();
            let sum: i64 = row.iter().map(|&w| w as i64).sum();
            let f = bq - qin.zero_point as f64 * sum as f64;
            if !(bq.abs() <= i32::MAX as f64 && f.abs() <= i32::MAX as f64) {
                return Err(LowerError::BiasOverflow {
                    layer: layer.name.clone(),
                    op: layer.op.kind(),
                    channel: o,
                    value: f,
                });
            }
            let f = f as i32;
            if !ingot_rt::acc_fits(row, f) {
                return Err(LowerError::AccumulatorOverflow {
                    layer: layer.name.clone(),
                    op: layer.op.kind(),
                    input: in_shape,
                    output: out_shape,
                    channel: o,
                    worst: ingot_rt::acc_worst_case(row, f),
                });
            }
            folded.push(f);
            requant.push(self.mult(
                id,
                format!("output channel {o} multiplier s_in·s_w/s_out"),
                s_acc / qout.scale as f64,
            )?);
        }
        Ok((folded, requant))
    }
}
