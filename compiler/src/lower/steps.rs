//! Pass 3 of the lowering: weights folded, permuted and quantized, biases
//! folded with the input zero point, multipliers built and the accumulator
//! bound checked, one [`QStep`] per step role.

use super::fusion::{act_of, is_pool, step_reads, PreAct};
use super::quant::{
    self, activation_clamp, affine_transform_over, multiplier, quantize_weights, round_half_up,
};
use super::*;
use crate::graph::Shape;
use quant::activation_qparams;

/// Refuses an average pool whose int32 sum could wrap.
pub(super) fn pool_taps(layer: &crate::graph::Layer, taps: usize) -> Result<(), LowerError> {
    if taps > MAX_POOL_TAPS {
        return Err(LowerError::PoolOverflow {
            layer: layer.name.clone(),
            op: layer.op.kind(),
            taps,
        });
    }
    Ok(())
}

/// A layer's real bias (batch norm folded) plus its correction from the
/// ranges, if any (`Ranges::bias_shifts`, whose lengths `lower` checked).
fn shifted(ranges: &Ranges, layer: &str, mut bias: Vec<f32>) -> Vec<f32> {
    if let Some(s) = ranges.bias_shifts.get(layer) {
        if s.len() == bias.len() {
            for (b, d) in bias.iter_mut().zip(s) {
                *b += d;
            }
        }
    }
    bias
}

/// The largest `|a[c]|·s_c/s_out` of a channel transform (for errors).
fn max_ratio(ab: &[(f64, f64)], qin: &[QParams], qout: QParams) -> f64 {
    ab.iter()
        .zip(qin.iter().cycle())
        .fold(0f64, |m, (&(a, _), q)| m.max(a.abs() * q.scale as f64))
        / qout.scale as f64
}

pub(super) struct Builder<'a> {
    pub(super) g: &'a Graph,
    pub(super) opts: &'a LowerOptions,
    pub(super) maps: Vec<QMap>,
    pub(super) steps: Vec<QStep>,
    /// Stored map of each (canonical) float map.
    pub(super) qmap: Vec<Option<QMapId>>,
    /// Per float map: the `--wide` layer that makes it int16.
    pub(super) wide_of: Vec<Option<String>>,
    /// The wide maps made so far.
    pub(super) wide: Vec<WideMap>,
}

/// The clamp of activation `act` in int16 codes of a symmetric map of
/// scale `s`: none `[-32768, 32767]`, ReLU `[0, 32767]`, ReLU6
/// `[0, min(32767, round(6/s))]`.
fn wide_clamp(act: Activation, s: f32) -> (i32, i32) {
    match act {
        Activation::None => (-32768, 32767),
        Activation::Relu => (0, 32767),
        Activation::Relu6 => (0, round_half_up(6.0 / s as f64).min(32767.0) as i32),
    }
}

impl Builder<'_> {
    pub(super) fn add_map(&mut self, m: MapId, qp: MapQuant, shape: Shape) -> QMapId {
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
    pub(super) fn step(
        &mut self,
        id: LayerId,
        out: MapId,
        out_q: MapQuant,
        bn: Option<LayerId>,
        act: Activation,
        pre: Option<PreAct>,
        layers: Vec<LayerId>,
        canon: &[Option<MapId>],
        ranges: &Ranges,
    ) -> Result<(), LowerError> {
        let g = self.g;
        let layer = g.layer(id);
        // A concatenation writes a per-slice map (it has no clamp); a
        // convolution or pooling may write one scale per channel at one
        // zero point (`classes::per_channel_outputs`), so its clamp, made
        // from the zero point alone (no ReLU6 there), is the same for
        // every channel.
        let one_zero = out_q
            .runs()
            .windows(2)
            .all(|w| w[0].zero_point == w[1].zero_point);
        let out_qp = match (&out_q, &layer.op) {
            (MapQuant::Tensor(qp), _) => *qp,
            (MapQuant::Slices(_), Op::Concat) => out_q.channel(0),
            (MapQuant::Slices(_), op)
                if (matches!(op, Op::Conv2d(_)) || is_pool(op))
                    && one_zero
                    && act != Activation::Relu6 =>
            {
                out_q.channel(0)
            }
            (MapQuant::Slices(_), _) => {
                return Err(LowerError::Internal(format!(
                    "`{}` would write a per-slice map",
                    layer.name
                )))
            }
        };
        let clamp = activation_clamp(act, out_qp);
        let out_wide = self.wide_of[out.index()].clone();
        if out_wide.is_some() && matches!(layer.op, Op::BatchNorm(_) | Op::Relu | Op::Relu6) {
            return Err(LowerError::Wide {
                layer: out_wide.unwrap_or_default(),
                message: format!(
                    "`{}` would write an int16 map, and a channel step writes int8",
                    layer.name
                ),
            });
        }
        // Inputs as stored; a pre-activation convolution reads the batch
        // norm's input.
        let read = step_reads(&layer.inputs, pre.as_ref());
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
        let in_q: Vec<MapQuant> = inputs
            .iter()
            .map(|q| self.maps[q.index()].qp.clone())
            .collect();
        // Per-channel parameters of input 0 (read through a channel
        // transform), and per-tensor ones for every other reader.
        let in_channels: Vec<QParams> = in_q
            .first()
            .map(|q| q.per_channel(g.shape(read[0]).c))
            .unwrap_or_default();
        let in_wide = inputs
            .first()
            .is_some_and(|q| self.wide.iter().any(|w| w.map == *q));
        // The largest distance of two input codes (the transforms' bound).
        let span = if in_wide { 65535.0 } else { 255.0 };
        // A pooling passes per-channel parameters on unchanged.
        let passes = is_pool(&layer.op) && in_q.first() == Some(&out_q);
        let absorbs = super::classes::absorbs_slices(&layer.op, pre.is_some()) || passes;
        let in_qp: Vec<QParams> = in_q
            .iter()
            .map(|q| match q.tensor() {
                Some(qp) => Ok(qp),
                None if absorbs => Ok(q.channel(0)),
                None => Err(LowerError::Internal(format!(
                    "`{}` reads a per-slice map",
                    layer.name
                ))),
            })
            .collect::<Result<_, _>>()?;
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
                        let t = affine_transform_over(
                            &ab,
                            &in_channels,
                            dom,
                            activation_clamp(p.act, dom),
                            span,
                        )
                        .ok_or_else(|| LowerError::Multiplier {
                            layer: g.layer(p.bn).name.clone(),
                            op: "batch_norm",
                            what: "input transform multiplier γ·s_in/(σ·s_out)".into(),
                            value: max_ratio(&ab, &in_channels, dom),
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
                let bias = shifted(ranges, &layer.name, bias);
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
                    &out_q,
                    g.shape(read[0]),
                    out_shape,
                    in_wide && transform.is_none(),
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
                let bias = shifted(ranges, &layer.name, bias);
                let (bias, requant) = self
                    .bias_and_requant(id, &qw, &bias, in_qp[0], &out_q, src, out_shape, in_wide)?;
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
                QKernel::Channel(self.transform(id, &ab, &in_channels, out_qp, clamp, span)?)
            }
            Op::Relu | Op::Relu6 => {
                let act = act_of(&layer.op).unwrap_or(Activation::None);
                let ab = vec![(1.0, 0.0); out_shape.c];
                QKernel::Channel(self.transform(
                    id,
                    &ab,
                    &in_channels,
                    out_qp,
                    activation_clamp(act, out_qp),
                    span,
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
        let qid = self.add_map(out, out_q, stored_shape);
        if let Some(because) = out_wide {
            let (min, max) = wide_clamp(act, out_qp.scale);
            self.wide.push(WideMap {
                map: qid,
                min,
                max,
                because,
            });
        }
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
        qin: &[QParams],
        qout: QParams,
        clamp: Clamp,
        span: f64,
    ) -> Result<ChannelTransform, LowerError> {
        affine_transform_over(ab, qin, qout, clamp, span).ok_or_else(|| LowerError::Multiplier {
            layer: self.g.layer(id).name.clone(),
            op: self.g.layer(id).op.kind(),
            what: "channel transform multiplier a·s_in/s_out".into(),
            value: max_ratio(ab, qin, qout),
        })
    }

    /// Quantized, zero-point-folded biases and per-row multipliers of a conv
    /// or linear layer, with the accumulator bound checked; row `o` is
    /// requantized to output channel `o`'s scale.
    #[allow(clippy::too_many_arguments)]
    fn bias_and_requant(
        &self,
        id: LayerId,
        qw: &quant::QuantizedWeights,
        bias: &[f32],
        qin: QParams,
        qout: &MapQuant,
        in_shape: Shape,
        out_shape: Shape,
        wide_in: bool,
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
            // An int16 input is summed in i64 where the i32 bound fails
            // (`ingot_rt::wide`), so only int8 inputs are bounded here.
            if !wide_in && !ingot_rt::acc_fits(row, f) {
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
                s_acc / qout.channel(o).scale as f64,
            )?);
        }
        Ok((folded, requant))
    }
}
