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
//!    from its range. Maps joined by concatenations form a region
//!    (union-find over chains of concatenations): when every reader of its
//!    concatenation outputs absorbs per-channel input parameters (a fused
//!    input transform, a channel step, another concatenation), each member
//!    keeps its own and a concatenation output is quantized per slice
//!    ([`MapQuant::Slices`]); otherwise the region shares one parameter
//!    set. A max pool keeps its input's parameters unless its output joins
//!    a shared region.
//! 3. **Steps.** Weights are folded, permuted to HWC order and quantized,
//!    biases folded with the input zero point, multipliers built and the
//!    accumulator bound checked.
//!
//! The arithmetic is in [`quant`] and `docs/quantization.md`; the integer
//! simulator that runs the result with the `ingot-rt` kernels is [`sim`].
//! Pass 1 is in `fusion.rs`, pass 2 in `classes.rs`, pass 3 (the step
//! builder) in `steps.rs`, the errors in `error.rs`.

pub mod ir;
pub mod quant;
pub mod sim;

mod classes;
mod error;
mod fusion;
mod steps;

pub use error::LowerError;
pub use ir::{
    ChannelTransform, Clamp, MapQuant, Multiplier, QAdd, QConv, QGraph, QGraphError, QKernel,
    QLinear, QMap, QMapId, QParams, QPool, QSlice, QStep, StepId, WideMap,
};
pub use quant::Activation;
pub use sim::{wide_op, RowCall, SimCall, SimError, SimInput, Simulator, WideOp};

use crate::graph::{BatchNorm, Conv2d, Graph, LayerId, MapId, Op};
use crate::ranges::Ranges;
use error::unsupported;
use fusion::{fusion_roles, Role};
use steps::Builder;

/// Most taps an average pool's window may have: `255·taps` (the largest
/// centred int8 sum) stays below `i32::MAX`, and `ingot-rt`'s
/// `global_avg_pool` takes fewer than `2^23` pixels.
pub const MAX_POOL_TAPS: usize = (1 << 23) - 1;

/// Largest magnitude of a calibrated range end. Activations of a float
/// network trained in f32 are many orders of magnitude below this; ends
/// like ±1e38 come from broken files, and their scales leave no usable
/// int8 step.
pub const MAX_RANGE_ABS: f32 = 1e9;

/// Choices of the lowering.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct LowerOptions {
    /// One weight scale per output channel (default) instead of one per
    /// tensor.
    pub per_channel: bool,
    /// Layers whose output maps are stored as int16 (`--wide`, already
    /// resolved from `auto:N`); a member of a concatenation region widens
    /// the whole region. Empty: all int8.
    pub wide: Vec<String>,
}

impl Default for LowerOptions {
    fn default() -> Self {
        LowerOptions {
            per_channel: true,
            wide: Vec::new(),
        }
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

    let asked = wide_requests(g, &roles, &opts.wide)?;
    let (qp, wide) = classes::map_qparams(g, ranges, &roles, &canon, stored, &asked)?;
    if let Some(w) = canon[g.output().index()].and_then(|m| wide[m.index()].clone()) {
        return Err(LowerError::Wide {
            layer: w,
            message: format!(
                "the network's output `{}` stays int8 (it would be widened with its concatenation region)",
                g.map_name(g.output())
            ),
        });
    }

    // Pass 3: maps and steps.
    let mut b = Builder {
        g,
        opts,
        maps: Vec::new(),
        steps: Vec::new(),
        qmap: vec![None; nm],
        wide_of: wide,
        wide: Vec::new(),
    };
    let in_qp = qp[0]
        .as_ref()
        .and_then(MapQuant::tensor)
        .ok_or_else(|| LowerError::Internal("input not quantized per tensor".into()))?;
    b.add_map(MapId::INPUT, in_qp.into(), g.shape(MapId::INPUT));
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
            .clone()
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
        wide: b.wide,
    };
    debug_assert_eq!(q.verify(), Ok(()), "lowered graph fails verification");
    Ok(q)
}

/// The `--wide` layers' output maps, per float map: the layer's name where
/// asked. A layer must exist and write a map of its own as a step that has
/// an int16 form (convolution, linear, pooling, add); the network's output
/// is refused later (with its region).
fn wide_requests(
    g: &Graph,
    roles: &[Role],
    names: &[String],
) -> Result<Vec<Option<String>>, LowerError> {
    let mut asked = vec![None; g.map_count()];
    for name in names {
        let err = |message: String| LowerError::Wide {
            layer: name.clone(),
            message,
        };
        let id = g
            .find_layer(name)
            .ok_or_else(|| err(format!("no layer of that name in graph `{}`", g.name())))?;
        match &roles[id.index()] {
            Role::Step { out, .. } => match g.layer(id).op {
                Op::Conv2d(_)
                | Op::Linear(_)
                | Op::MaxPool2d(_)
                | Op::AvgPool2d(_)
                | Op::GlobalAvgPool
                | Op::Add
                | Op::Concat => asked[out.index()] = Some(name.clone()),
                ref op => {
                    return Err(err(format!(
                        "a {} step has no int16 output form (widen the convolution, linear, pooling or add before or after it)",
                        op.kind()
                    )))
                }
            },
            Role::Absorbed => {
                return Err(err(
                    "has no output map of its own: it is folded into a neighbouring layer's step"
                        .into(),
                ))
            }
            Role::Alias => {
                return Err(err(
                    "has no output map of its own: it stores nothing (an alias of its input)"
                        .into(),
                ))
            }
        }
    }
    Ok(asked)
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
    for (name, shift) in &ranges.bias_shifts {
        let channels = match g.find_layer(name).map(|l| &g.layer(l).op) {
            Some(Op::Conv2d(c)) => Some(c.out_channels),
            Some(Op::Linear(l)) => Some(l.out_features),
            _ => None,
        };
        let message = match channels {
            None => Some("not a convolution or linear layer of the graph".to_string()),
            Some(n) if n != shift.len() => {
                Some(format!("{} values for {n} output channels", shift.len()))
            }
            Some(_) if shift.iter().any(|v| !v.is_finite()) => {
                Some("a value is not finite".to_string())
            }
            Some(_) => None,
        };
        if let Some(message) = message {
            return Err(LowerError::BadBiasShift {
                layer: name.clone(),
                message,
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

/// The wide (int16) maps of `q` as report lines: name, shape, the bytes
/// int16 adds before memory planning, and why (named with `--wide`, or
/// widened with the concatenation region of a named layer). Empty for an
/// all-int8 graph.
pub fn wide_table(q: &QGraph) -> String {
    use std::fmt::Write;
    let mut s = String::new();
    if q.wide.is_empty() {
        return s;
    }
    let extra: usize = q.wide.iter().map(|w| q.map(w.map).shape.len()).sum();
    let _ = writeln!(
        s,
        "int16 maps (--wide): {} map(s), +{} B before memory planning",
        q.wide.len(),
        crate::util::group_digits(extra as u64)
    );
    for w in &q.wide {
        let m = q.map(w.map);
        let why = if m.name == w.because {
            "named".to_string()
        } else {
            format!("concatenation region of `{}`", w.because)
        };
        let _ = writeln!(
            s,
            "  {:<18} {:>12}  +{:>7} B  {why}",
            m.name,
            m.shape.to_string(),
            crate::util::group_digits(m.shape.len() as u64)
        );
    }
    s
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
