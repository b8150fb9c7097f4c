//! A network that is part float, part int8: the float reference in which
//! chosen steps of the lowered graph are fake-quantized (quantized, then
//! dequantized) with exactly the parameters the lowering chose.
//!
//! A *unit* is the graph input (its quantization) or one step of the
//! [`QGraph`] that quantizes something (every step but a concatenation,
//! which only copies maps that already share its parameters). Turning a
//! unit on makes the reference, for that step:
//!
//! - compute a convolution or linear layer with the step's int8 weights
//!   (dequantized, with the batch norm folded into them taken out again so
//!   the float graph's batch-norm layer can apply it) and its bias rounded
//!   to the accumulator's step `s_in·s_w`;
//! - round the values a fused input transform (pre-activation batch norm,
//!   ReLU) writes to the convolution's input domain;
//! - round the step's output map to its int8 parameters (with the clamp
//!   of the int8 range).
//!
//! With every unit on it approximates the integer simulator (what remains
//! is the kernels' own rounding of multipliers and averages); with one on
//! it shows what that step alone costs. This is how the sensitivity
//! report and bias correction measure layers one at a time.

use crate::graph::{Graph, LayerId, MapId, Op};
use crate::lower::quant::{self, activation_qparams};
use crate::lower::{QGraph, QKernel, QParams, StepId};
use crate::ranges::Ranges;
use crate::reference::{Alternative, Reference};

/// One part of the network that can be quantized on its own.
#[derive(Debug, Clone, PartialEq)]
pub struct Unit {
    /// The step's name (`input` for the graph input).
    pub name: String,
    /// The step's kind ([`QKernel::kind`]), or `input`.
    pub kind: &'static str,
    /// The step (`None` for the input).
    pub step: Option<StepId>,
}

/// The float reference with chosen units fake-quantized.
#[derive(Debug, Clone)]
pub struct Mixed<'a> {
    graph: &'a Graph,
    q: &'a QGraph,
    reference: Reference<'a>,
    units: Vec<Unit>,
    /// Per float map: the unit that rounds it and with which parameters
    /// (one set, or one per channel of a per-channel convolution map).
    /// (and whether it is a wide map, rounded to int16 codes).
    rounds: Vec<Option<(usize, Vec<QParams>, bool)>>,
    /// Per float layer: the unit whose int8 weights it computes with.
    weights_of: Vec<Option<usize>>,
    /// Per unit with weights: its main layer, its pre-activation map
    /// (where a bias shift shows) and the `(scale, shift)` of the batch
    /// norm folded after it (identity when none).
    weighted: Vec<Option<Weighted>>,
    /// The map holding the logits (the lowered graph's output).
    logits: MapId,
}

#[derive(Debug, Clone)]
struct Weighted {
    layer: LayerId,
    pre_activation: MapId,
    /// Folded batch norm per output channel.
    bn: Vec<(f64, f64)>,
    /// The step's int8 bias, in real units (`s_in·s_w[o]·b_q[o]`), before
    /// any correction.
    bias: Vec<f64>,
    /// Dequantized int8 weights in the float layout, batch norm folded in.
    weight: Vec<f64>,
}

impl<'a> Mixed<'a> {
    /// Prepares `graph` with the int8 forms of the steps of `q`, its
    /// lowering with `ranges`.
    pub fn new(graph: &'a Graph, q: &'a QGraph, ranges: &Ranges) -> Mixed<'a> {
        let mut reference = Reference::new(graph);
        let nm = graph.map_count();
        let mut units = vec![Unit {
            name: "input".into(),
            kind: "input",
            step: None,
        }];
        let mut rounds = vec![None; nm];
        rounds[MapId::INPUT.index()] = Some((0, vec![q.input_qp()], false));
        let mut weights_of = vec![None; graph.layers().len()];
        let mut weighted = vec![None];
        for id in q.step_ids() {
            let s = q.step(id);
            if matches!(s.kernel, QKernel::Concat) {
                continue;
            }
            let u = units.len();
            units.push(Unit {
                name: s.name.clone(),
                kind: s.kernel.kind(),
                step: Some(id),
            });
            let out = q.map(s.output);
            // A convolution or pooling may write one scale per channel.
            rounds[out.float_map.index()] = Some((
                u,
                match out.qp.tensor() {
                    Some(qp) => vec![qp],
                    None => out.qp.per_channel(out.shape.c),
                },
                q.is_wide(s.output),
            ));
            let main = s.layers[0];
            // Layers fused before the main one are the pre-activation batch
            // norm (and ReLU): the last of them writes the transformed map.
            let pre = s.layers.iter().filter(|l| l.index() < main.index()).max();
            // A per-slice input is read only through a fused transform.
            let mut in_qp = q.map(s.inputs[0]).qp.tensor();
            if let (Some(t), QKernel::Conv2d(c)) = (pre, &s.kernel) {
                if c.transform.is_some() {
                    let dom = activation_qparams(ranges.maps[t.output().index()]);
                    rounds[t.output().index()] = Some((u, vec![dom], false));
                    in_qp = Some(dom);
                }
            }
            let w = in_qp.and_then(|in_qp| weighted_of(graph, q, id, in_qp));
            if let Some(w) = &w {
                weights_of[w.layer.index()] = Some(u);
                reference.set_alternative(w.layer, w.alternative(None));
            }
            weighted.push(w);
        }
        Mixed {
            graph,
            q,
            reference,
            units,
            rounds,
            weights_of,
            weighted,
            logits: q.map(q.output).float_map,
        }
    }

    /// The units, the input first, then the steps in schedule order.
    pub fn units(&self) -> &[Unit] {
        &self.units
    }

    /// The float graph.
    pub fn graph(&self) -> &'a Graph {
        self.graph
    }

    /// The lowered graph whose parameters are used.
    pub fn lowered(&self) -> &'a QGraph {
        self.q
    }

    /// The map whose values [`Mixed::run`] returns (the logits).
    pub fn logits_map(&self) -> MapId {
        self.logits
    }

    /// True when the unit computes with int8 weights (a convolution or a
    /// linear layer).
    pub fn has_weights(&self, unit: usize) -> bool {
        self.weighted.get(unit).is_some_and(|w| w.is_some())
    }

    /// The convolution or linear layer of a unit with weights.
    pub fn weighted_layer(&self, unit: usize) -> Option<LayerId> {
        self.weighted.get(unit)?.as_ref().map(|w| w.layer)
    }

    /// The pre-activation map of a unit with weights: after the folded
    /// batch norm, before the activation (where a bias shift shows).
    pub fn pre_activation(&self, unit: usize) -> Option<MapId> {
        self.weighted.get(unit)?.as_ref().map(|w| w.pre_activation)
    }

    /// Adds `shift[o]` (real units of the pre-activation map) to the bias
    /// of a unit with weights, on top of its int8 bias. Returns false for
    /// a unit without weights or a wrong length.
    pub fn set_bias_shift(&mut self, unit: usize, shift: &[f64]) -> bool {
        let Some(Some(w)) = self.weighted.get(unit) else {
            return false;
        };
        if shift.len() != w.bias.len() {
            return false;
        }
        let alt = w.alternative(Some(shift));
        self.reference.set_alternative(w.layer, alt)
    }

    /// Runs one image (`[C, H, W]`) with the units for which `on` is true
    /// quantized; `visit` sees every map as computed, before it is rounded
    /// (the pre-activation sums bias correction compares). Returns the
    /// logits, rounded when their unit is on.
    pub fn run(
        &self,
        input: &[f32],
        on: &dyn Fn(usize) -> bool,
        mut visit: impl FnMut(MapId, &[f32]),
    ) -> Vec<f32> {
        let alt: Vec<bool> = self.weights_of.iter().map(|u| u.is_some_and(on)).collect();
        let mut logits = Vec::new();
        self.reference
            .run_mixed(input, &alt, |m, v| {
                visit(m, v);
                if let Some((u, qps, wide)) = &self.rounds[m.index()] {
                    if on(*u) && !qps.is_empty() {
                        // Float maps are [C, H, W]: channel c is the c-th run.
                        let per = (v.len() / qps.len()).max(1);
                        for (i, x) in v.iter_mut().enumerate() {
                            let qp = qps[(i / per).min(qps.len() - 1)];
                            *x = if *wide {
                                quant::fake_wide(*x, qp)
                            } else {
                                quant::dequantize(quant::quantize(*x, qp), qp)
                            };
                        }
                    }
                }
                if m == self.logits {
                    logits = v.to_vec();
                }
            })
            .expect("sample has the input's length");
        logits
    }
}

impl Weighted {
    /// Weights and bias for the float layer: the int8 ones with the folded
    /// batch norm taken out (`w / a`, `(b − shift) / a`), plus `extra`.
    fn alternative(&self, extra: Option<&[f64]>) -> Alternative {
        let rows = self.bn.len().max(1);
        let per = self.weight.len() / rows;
        let mut weight = Vec::with_capacity(self.weight.len());
        let mut bias = Vec::with_capacity(rows);
        for (o, &(a, sh)) in self.bn.iter().enumerate() {
            let b = self.bias[o] + extra.map_or(0.0, |e| e[o]);
            // A zero batch-norm scale zeroes the folded row: the output is
            // the shift whatever the layer computes.
            let (wa, ba) = if a == 0.0 {
                (0.0, 0.0)
            } else {
                (1.0 / a, (b - sh) / a)
            };
            weight.extend(
                self.weight[o * per..(o + 1) * per]
                    .iter()
                    .map(|&w| (w * wa) as f32),
            );
            bias.push(ba as f32);
        }
        Alternative { weight, bias }
    }
}

/// The int8 weights and bias of a convolution or linear step, back in the
/// float graph's layout and real units.
fn weighted_of(g: &Graph, q: &QGraph, id: StepId, in_qp: QParams) -> Option<Weighted> {
    let s = q.step(id);
    let main = s.layers[0];
    let bn_layer = s
        .layers
        .iter()
        .copied()
        .find(|l| l.index() > main.index() && matches!(g.layer(*l).op, Op::BatchNorm(_)));
    let (codes, scales, bias_folded, rows, in_zp) = match &s.kernel {
        QKernel::Conv2d(c) => (
            &c.weights,
            &c.weight_scales,
            &c.bias,
            c.out_channels,
            c.input_zp,
        ),
        QKernel::Linear(l) => (
            &l.weights,
            &l.weight_scales,
            &l.bias,
            l.out_features,
            q.map(s.inputs[0]).qp.tensor()?.zero_point,
        ),
        _ => return None,
    };
    let per = codes.len() / rows.max(1);
    // Undo the zero-point folding: b_q = b_folded + z_in·Σw.
    let bias: Vec<f64> = (0..rows)
        .map(|o| {
            let sum: i64 = codes[o * per..(o + 1) * per]
                .iter()
                .map(|&w| w as i64)
                .sum();
            let bq = bias_folded[o] as f64 + in_zp as f64 * sum as f64;
            bq * in_qp.scale as f64 * scales[o] as f64
        })
        .collect();
    let mut weight = vec![0f64; codes.len()];
    match (&s.kernel, &g.layer(main).op) {
        (QKernel::Conv2d(c), Op::Conv2d(_)) => {
            let [kh, kw] = c.kernel;
            let cpg = c.in_channels / c.groups;
            for o in 0..c.out_channels {
                for i in 0..cpg {
                    for y in 0..kh {
                        for x in 0..kw {
                            let code = codes[((o * kh + y) * kw + x) * cpg + i];
                            weight[((o * cpg + i) * kh + y) * kw + x] =
                                code as f64 * scales[o] as f64;
                        }
                    }
                }
            }
        }
        (QKernel::Linear(l), Op::Linear(_)) => {
            let src = q.map(s.inputs[0]).shape;
            let (c, hw) = (src.c, src.pixels());
            for o in 0..l.out_features {
                for ch in 0..c {
                    for p in 0..hw {
                        let code = codes[o * l.in_features + p * c + ch];
                        weight[o * l.in_features + ch * hw + p] = code as f64 * scales[o] as f64;
                    }
                }
            }
        }
        _ => return None,
    }
    let bn = match bn_layer.map(|l| &g.layer(l).op) {
        Some(Op::BatchNorm(b)) => b
            .affine()
            .iter()
            .map(|&(a, sh)| (a as f64, sh as f64))
            .collect(),
        _ => vec![(1.0, 0.0); rows],
    };
    Some(Weighted {
        layer: main,
        pre_activation: bn_layer.unwrap_or(main).output(),
        bn,
        bias,
        weight,
    })
}
