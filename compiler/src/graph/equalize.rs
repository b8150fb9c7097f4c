//! Cross-layer equalization of depthwise → pointwise pairs (Nagel et al.
//! 2019, "Data-Free Quantization Through Weight Equalization and Bias
//! Correction", §4.1).
//!
//! For a pair `y = f(W2 · g(W1 · x + b1) + b2)` where `g` is
//! positive-homogeneous (`g(x / s) = g(x) / s` for `s > 0`: ReLU or the
//! identity), dividing output channel `i` of the first layer (weights and
//! bias) by `s_i` and multiplying input channel `i` of the second layer by
//! `s_i` leaves the function unchanged. With `r1_i` the range of the first
//! layer's (batch-norm folded) output-channel-`i` weights and `r2_i` the
//! range of the second layer's input-channel-`i` weights, the paper's
//! choice `s_i = (1 / r2_i) · sqrt(r1_i · r2_i)` makes both ranges
//! `sqrt(r1_i · r2_i)`: equal, so neither layer's channels waste int8
//! steps on the other's outliers. The range of a channel is its largest
//! absolute weight (ingot quantizes weights symmetrically).
//!
//! What is equalized: a depthwise convolution (one output channel per
//! input channel), optionally followed by a batch norm, optionally by a
//! ReLU (or a dropout), whose result only a non-grouped convolution reads.
//! A batch norm between them is taken into account folded, as the lowering
//! folds it: the scale goes into the batch norm's `gamma` and `beta`
//! (`bn(x) / s` is the batch norm with `gamma / s`, `beta / s`), so the
//! folded weights are those equalized. ReLU6 is *not* positive-homogeneous
//! (the clip at 6 would move to `6 / s_i`), so pairs with a ReLU6 between
//! are left alone and listed as skipped; the paper replaces ReLU6 by ReLU
//! first, which changes the network and is left to the user.
//!
//! Every map keeps its layer and shape: only weights change, so a ranges
//! file (indexed by map) observed on the equalized graph fits it. The
//! transform depends on the weights alone, so the same graph file always
//! gives the same equalized weights.

use super::{Graph, LayerId, Op};
use serde::Serialize;

/// One equalized (or skipped) pair.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Pair {
    /// The depthwise layer.
    pub first: String,
    /// The layer reading its (activated) output.
    pub second: String,
    /// What lies between: e.g. `batch_norm, relu`.
    pub between: String,
    /// Channels.
    pub channels: usize,
    /// `max_i r_i / min_i r_i` over the first layer's folded output
    /// channels and the second's input channels, before (`[first,
    /// second]`); channels whose weights are all zero are left out.
    pub ratio_before: [f64; 2],
    /// The same after equalization.
    pub ratio_after: [f64; 2],
    /// Why the pair was left alone, if it was (`ratio_after` then equals
    /// `ratio_before`).
    pub skipped: Option<String>,
}

/// What [`equalize`] did.
#[derive(Debug, Clone, Default, PartialEq, Serialize)]
pub struct Equalization {
    /// The pairs found, in layer order.
    pub pairs: Vec<Pair>,
}

impl Equalization {
    /// Pairs actually equalized.
    pub fn equalized(&self) -> usize {
        self.pairs.iter().filter(|p| p.skipped.is_none()).count()
    }
}

/// Largest absolute value per group of `len` consecutive values.
fn abs_max_rows(data: &[f32], len: usize) -> Vec<f32> {
    data.chunks(len.max(1))
        .map(|c| c.iter().fold(0f32, |m, v| m.max(v.abs())))
        .collect()
}

fn ratio(r: &[f32]) -> f64 {
    let nz: Vec<f64> = r.iter().filter(|v| **v > 0.0).map(|&v| v as f64).collect();
    if nz.is_empty() {
        return 1.0;
    }
    let max = nz.iter().cloned().fold(f64::MIN, f64::max);
    let min = nz.iter().cloned().fold(f64::MAX, f64::min);
    max / min
}

/// The ranges of the second layer's input channels: `w` is `[O, C, kH,
/// kW]` and `k = kH · kW`.
fn input_channel_ranges(w: &[f32], channels: usize, k: usize) -> Vec<f32> {
    let mut r = vec![0f32; channels];
    for (j, v) in w.iter().enumerate() {
        let c = (j / k) % channels;
        r[c] = r[c].max(v.abs());
    }
    r
}

/// The one layer reading `layer`'s output, if exactly one does and it is
/// not the graph's output.
fn sole_consumer(g: &Graph, layer: LayerId) -> Option<LayerId> {
    let m = layer.output();
    match g.consumers(m) {
        [only] if m != g.output() => Some(*only),
        _ => None,
    }
}

/// Equalizes every depthwise → convolution pair of `g` in place (see the
/// module documentation) and reports each pair found.
pub fn equalize(g: &mut Graph) -> Equalization {
    let mut out = Equalization::default();
    for a in g.layer_ids().collect::<Vec<_>>() {
        let Op::Conv2d(ca) = &g.layer(a).op else {
            continue;
        };
        if !ca.is_depthwise() || ca.out_channels != ca.in_channels {
            continue;
        }
        let channels = ca.out_channels;
        let mut bn = None;
        let mut between = Vec::new();
        let mut skipped = None;
        let mut cur = a;
        let second = loop {
            let Some(next) = sole_consumer(g, cur) else {
                break None;
            };
            match &g.layer(next).op {
                Op::BatchNorm(_) if bn.is_none() && between.is_empty() => bn = Some(next),
                Op::Relu | Op::Dropout => {}
                Op::Relu6 => {
                    skipped =
                        Some("ReLU6 between the layers is not positive-homogeneous".to_string())
                }
                Op::Conv2d(cb) if cb.groups == 1 && cb.in_channels == channels => break Some(next),
                _ => break None,
            }
            between.push(g.layer(next).op.kind());
            cur = next;
        };
        let Some(b) = second else { continue };
        let Op::Conv2d(ca) = &g.layer(a).op else {
            continue;
        };
        let Op::Conv2d(cb) = &g.layer(b).op else {
            continue;
        };
        let k1 = ca.kernel[0] * ca.kernel[1];
        let mut r1 = abs_max_rows(&ca.weight.data, k1);
        let bn_scale: Option<Vec<f32>> = bn.map(|l| match &g.layer(l).op {
            Op::BatchNorm(n) => n.affine().into_iter().map(|(s, _)| s).collect(),
            _ => vec![1.0; channels],
        });
        if let Some(s) = &bn_scale {
            for (r, s) in r1.iter_mut().zip(s) {
                *r *= s.abs();
            }
        }
        let k2 = cb.kernel[0] * cb.kernel[1];
        let r2 = input_channel_ranges(&cb.weight.data, channels, k2);
        let before = [ratio(&r1), ratio(&r2)];
        let mut pair = Pair {
            first: g.layer(a).name.clone(),
            second: g.layer(b).name.clone(),
            between: if between.is_empty() {
                "nothing".into()
            } else {
                between.join(", ")
            },
            channels,
            ratio_before: before,
            ratio_after: before,
            skipped,
        };
        if pair.skipped.is_some() {
            out.pairs.push(pair);
            continue;
        }
        // s_i = sqrt(r1_i · r2_i) / r2_i; a channel with all-zero weights
        // on either side is left as it is.
        let s: Vec<f32> = r1
            .iter()
            .zip(&r2)
            .map(|(&x, &y)| {
                let v = ((x as f64 * y as f64).sqrt() / y as f64) as f32;
                if x > 0.0 && y > 0.0 && v.is_finite() && v > 0.0 {
                    v
                } else {
                    1.0
                }
            })
            .collect();
        match bn {
            Some(l) => {
                if let Op::BatchNorm(n) = &mut g.layers[l.index()].op {
                    for (c, sc) in s.iter().enumerate() {
                        n.gamma.data[c] /= sc;
                        n.beta.data[c] /= sc;
                    }
                }
            }
            None => {
                if let Op::Conv2d(c) = &mut g.layers[a.index()].op {
                    for (row, sc) in c.weight.data.chunks_mut(k1).zip(&s) {
                        row.iter_mut().for_each(|v| *v /= sc);
                    }
                    if let Some(bias) = &mut c.bias {
                        bias.data.iter_mut().zip(&s).for_each(|(v, sc)| *v /= sc);
                    }
                }
            }
        }
        if let Op::Conv2d(c) = &mut g.layers[b.index()].op {
            for (j, v) in c.weight.data.iter_mut().enumerate() {
                *v *= s[(j / k2) % channels];
            }
        }
        let r1_after: Vec<f32> = r1.iter().zip(&s).map(|(r, s)| r / s).collect();
        let r2_after: Vec<f32> = r2.iter().zip(&s).map(|(r, s)| r * s).collect();
        pair.ratio_after = [ratio(&r1_after), ratio(&r2_after)];
        out.pairs.push(pair);
    }
    out
}

impl std::fmt::Display for Equalization {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write_pairs(f, &self.pairs)
    }
}

/// The pairs' lines as the calibration report prints them: a heading with
/// the count equalized, then each pair's channel-range ratios before and
/// after, or why it was skipped.
pub fn write_pairs(f: &mut dyn std::fmt::Write, pairs: &[Pair]) -> std::fmt::Result {
    writeln!(
        f,
        "cross-layer equalization: {} of {} depthwise pairs equalized (channel-range ratio max/min, first layer / second layer)",
        pairs.iter().filter(|p| p.skipped.is_none()).count(),
        pairs.len()
    )?;
    for p in pairs {
        match &p.skipped {
            Some(why) => writeln!(
                f,
                "  {} -> {} ({}): skipped: {why}",
                p.first, p.second, p.between
            )?,
            None => writeln!(
                f,
                "  {} -> {} ({}): {:.1} / {:.1} -> {:.2} / {:.2}",
                p.first,
                p.second,
                p.between,
                p.ratio_before[0],
                p.ratio_before[1],
                p.ratio_after[0],
                p.ratio_after[1]
            )?,
        }
    }
    Ok(())
}
