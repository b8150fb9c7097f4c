//! Pass 1 of the lowering: which float layers fold into which steps.

use super::{unsupported, Activation, LowerError};
use crate::graph::{Graph, LayerId, MapId, Op};

/// A pre-activation batch norm (+ReLU) fused into a convolution's input read.
#[derive(Debug, Clone, Copy)]
pub(super) struct PreAct {
    pub(super) bn: LayerId,
    pub(super) relu: Option<LayerId>,
    pub(super) act: Activation,
    /// Map the batch norm reads (stored).
    pub(super) src: MapId,
    /// Float map of the transformed values (never stored).
    pub(super) t: MapId,
}

/// The float maps a step with main layer `inputs` reads: with a fused
/// pre-activation, the batch norm's input instead of the layer's own.
pub(super) fn step_reads(inputs: &[MapId], pre: Option<&PreAct>) -> Vec<MapId> {
    match pre {
        Some(p) => vec![p.src],
        None => inputs.to_vec(),
    }
}

/// True for the poolings, which can write their output with their input's
/// per-channel parameters (one multiplier, `s_in/s_out` or `1/taps`, for
/// every channel).
pub(super) fn is_pool(op: &Op) -> bool {
    matches!(op, Op::MaxPool2d(_) | Op::AvgPool2d(_) | Op::GlobalAvgPool)
}

/// What a float layer becomes.
#[derive(Debug, Clone)]
pub(super) enum Role {
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

pub(super) fn act_of(op: &Op) -> Option<Activation> {
    match op {
        Op::Relu => Some(Activation::Relu),
        Op::Relu6 => Some(Activation::Relu6),
        _ => None,
    }
}

/// Pass 1: which layers fold into which steps.
pub(super) fn fusion_roles(g: &Graph) -> Result<Vec<Role>, LowerError> {
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
