//! The arithmetic of lowering: activation and weight quantization, bias
//! folding, fixed-point multipliers and integer channel transforms.
//!
//! Conventions (see `docs/quantization.md`): `real = scale · (q − zero_point)`
//! (Jacob et al. 2018, §2.1); activations asymmetric per tensor, weights
//! symmetric per output channel (Krishnamoorthi 2018, §3.1).

use super::ir::{ChannelTransform, Clamp, Multiplier, QParams};
use crate::ranges::MapRange;
use ingot_rt::Requant;

/// Scale given to a map whose calibrated range is the single point 0 (a dead
/// ReLU, an all-zero channel group): any positive scale represents it
/// exactly. `2^-16` keeps the multipliers of its producer (`s_in·s_w/s_out`,
/// at most `2^16·s_in·s_w`) and of its consumers (`2^-16·s_w/s_out`, rounded
/// to an exact zero when below `2^-32`) inside the representable range for
/// any realistic neighbouring scales.
pub(crate) const DEGENERATE_SCALE: f32 = 1.0 / 65536.0;

/// `round(x)` with ties toward +∞, the rounding of the `ingot-rt` kernels.
pub(crate) fn round_half_up(x: f64) -> f64 {
    (x + 0.5).floor()
}

/// Asymmetric int8 quantization of an activation range:
/// `scale = (max − min) / 255` after widening the range to contain 0,
/// `zero_point = round(−128 − min / scale)` clamped to `-128..=127`.
/// A degenerate range (`max == min == 0`) gets [`DEGENERATE_SCALE`] and
/// zero point −128.
pub fn activation_qparams(r: MapRange) -> QParams {
    let r = r.with_zero();
    let (min, max) = (r.min as f64, r.max as f64);
    let scale = ((max - min) / 255.0) as f32;
    if !(scale.is_normal() && scale > 0.0) {
        return QParams {
            scale: DEGENERATE_SCALE,
            zero_point: -128,
        };
    }
    let zp = round_half_up(-128.0 - min / scale as f64).clamp(-128.0, 127.0) as i32;
    QParams {
        scale,
        zero_point: zp,
    }
}

/// The int8 code of a real value: `clamp(round(v / scale) + zero_point)`,
/// ties toward +∞.
pub fn quantize(v: f32, qp: QParams) -> i8 {
    (round_half_up(v as f64 / qp.scale as f64) + qp.zero_point as f64).clamp(-128.0, 127.0) as i8
}

/// The real value of an int8 code.
pub fn dequantize(q: i8, qp: QParams) -> f32 {
    qp.scale * (q as i32 - qp.zero_point) as f32
}

/// A real value rounded to a code of a wide (int16) map and back:
/// `scale · clamp(round(v / scale) + zero_point, -32768, 32767) − zero_point`.
pub fn fake_wide(v: f32, qp: QParams) -> f32 {
    let q = (round_half_up(v as f64 / qp.scale as f64) + qp.zero_point as f64)
        .clamp(-32768.0, 32767.0) as i32;
    qp.scale * (q - qp.zero_point) as f32
}

/// A real multiplier in the runtime's fixed-point form, or `None` when it is
/// not representable (non-finite or `|m| >= 2^30`).
///
/// `|m| < 2^-32` becomes the exact zero multiplier: every i32 accumulator
/// times such an `m` is below 0.5 in magnitude, so the rounded product is 0
/// either way.
pub(crate) fn multiplier(m: f64) -> Option<Multiplier> {
    if m.is_finite() && m.abs() < 2f64.powi(-32) {
        return Some(Multiplier { mult: 0, shift: 0 });
    }
    Requant::from_real(m).map(|r| Multiplier {
        mult: r.mult,
        shift: r.shift,
    })
}

/// The runtime form of a multiplier.
pub(crate) fn to_requant(m: Multiplier) -> Requant {
    Requant {
        mult: m.mult,
        shift: m.shift,
    }
}

/// A fused activation.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum Activation {
    /// No clamp beyond int8.
    None,
    /// `max(x, 0)`.
    Relu,
    /// `min(max(x, 0), 6)`.
    Relu6,
}

/// The output clamp implementing `act` on a map quantized with `qp`:
/// none `[-128, 127]`, ReLU `[z, 127]`, ReLU6 `[z, min(127, z + round(6/s))]`.
pub(crate) fn activation_clamp(act: Activation, qp: QParams) -> Clamp {
    let z = qp.zero_point.clamp(-128, 127) as i8;
    match act {
        Activation::None => Clamp {
            min: i8::MIN,
            max: i8::MAX,
        },
        Activation::Relu => Clamp {
            min: z,
            max: i8::MAX,
        },
        Activation::Relu6 => {
            let six = round_half_up(6.0 / qp.scale as f64).min(255.0) as i32;
            Clamp {
                min: z,
                max: (qp.zero_point + six).clamp(-128, 127) as i8,
            }
        }
    }
}

/// Weights quantized symmetrically, one scale per row (output channel).
#[derive(Debug, Clone, PartialEq)]
pub(crate) struct QuantizedWeights {
    /// Codes in `-127..=127`, same order as the input.
    pub codes: Vec<i8>,
    /// Scale of each row.
    pub scales: Vec<f32>,
}

/// Symmetric weight quantization of `rows` equal rows: `s = max|w| / 127`
/// per row (`per_channel`) or over the whole tensor, `q = round(w / s)`
/// (ties away from zero, so `w` and `−w` get opposite codes) clamped to
/// `±127`. An all-zero row (or tensor) gets scale 1 and zero codes.
pub(crate) fn quantize_weights(w: &[f32], rows: usize, per_channel: bool) -> QuantizedWeights {
    let n = w.len().checked_div(rows).unwrap_or(0);
    let scale_of = |v: &[f32]| {
        let m = v.iter().fold(0f32, |a, &x| a.max(x.abs()));
        let s = m / 127.0;
        if s.is_normal() && s > 0.0 {
            s
        } else {
            1.0
        }
    };
    let scales: Vec<f32> = if per_channel {
        w.chunks(n.max(1)).take(rows).map(scale_of).collect()
    } else {
        vec![scale_of(w); rows]
    };
    let codes = w
        .iter()
        .enumerate()
        .map(|(i, &v)| {
            let s = scales[i / n.max(1)] as f64;
            (v as f64 / s).round().clamp(-127.0, 127.0) as i8
        })
        .collect();
    QuantizedWeights { codes, scales }
}

/// Builds the integer form of the per-channel real map
/// `y = clamp_act(a[c] · x + b[c])` from a map quantized with `qin` to one
/// quantized with `qout`:
///
/// ```text
/// q' − z_out = (q − z_in) · a[c]·s_in/s_out + b[c]/s_out
/// mul[c] = round(a[c]·s_in/s_out · 2^shift),  add[c] = round(b[c]/s_out · 2^shift)
/// ```
///
/// `qin` holds one parameter set (a per-tensor input) or one per channel (a
/// per-slice concatenation region). With per-channel parameters that are
/// not all equal, each channel's own scale goes into its multiplier and its
/// zero point is folded into its additive term, and the runtime's `zp_in`
/// is 0:
///
/// ```text
/// mul[c] = round(a[c]·s_c/s_out · 2^shift)
/// add[c] = round((b[c]/s_out − z_c·a[c]·s_c/s_out) · 2^shift),  zp_in = 0
/// ```
///
/// so the generated code keeps its shape; only the coefficients change.
///
/// The common `shift` is the largest (at most 29) that keeps the runtime's
/// i32 bound `255·|mul| + |add| + 2^(shift-1) < 2^30`
/// (`ingot_rt::AffineTransform`, checked per channel) true. That bound is
/// what the runtime checks for `|x − zp_in| ≤ 255`; with `zp_in = 0` the
/// factor is `|x| ≤ 128`, so the evaluation `x·mul + add + 2^(shift−1)`
/// stays below the same `2^30` and the runtime's check still proves it.
/// The folded `add` is larger by `|z_c·mul| ≤ 128·|mul|`, and the shift is
/// chosen from the folded values, so the bound holds for them.
///
/// An `add` so large that the output saturates for every input code is first
/// reduced to a value that still saturates: beyond `±(255·|m| + 1024)`
/// output steps, `m·(x − zp_in) + add` keeps the sign of `add` and exceeds
/// 255 in magnitude for every code (`|x − zp_in| ≤ 255`), before and after
/// the reduction. Returns `None` when even `shift = 0` cannot hold a
/// multiplier (one input step worth more than about 2^22 output steps), or
/// when `qin` has neither one entry nor one per channel.
#[cfg(test)]
pub(crate) fn affine_transform(
    ab: &[(f64, f64)],
    qin: &[QParams],
    qout: QParams,
    clamp: Clamp,
) -> Option<ChannelTransform> {
    affine_transform_over(ab, qin, qout, clamp, 255.0)
}

/// The transform described above (`affine_transform`, of an int8 input) of an input whose codes lie `span` apart at most:
/// 255 for int8, 65535 for an int16 (wide) map. The saturation argument
/// and the shift bound use `span`; the int16 kernel (`ingot_rt::wide::WideAffine`)
/// evaluates in i64, so the i32 bound is only kept for uniformity.
pub(crate) fn affine_transform_over(
    ab: &[(f64, f64)],
    qin: &[QParams],
    qout: QParams,
    clamp: Clamp,
    span: f64,
) -> Option<ChannelTransform> {
    if qin.len() != 1 && qin.len() != ab.len() {
        return None;
    }
    let shared = qin.windows(2).all(|w| w[0] == w[1]);
    let zp_in = if shared {
        qin.first().map_or(0, |q| q.zero_point)
    } else {
        0
    };
    let so = qout.scale as f64;
    let reals: Vec<(f64, f64)> = ab
        .iter()
        .enumerate()
        .map(|(c, &(a, b))| {
            let q = qin[if qin.len() == 1 { 0 } else { c }];
            let m = a * q.scale as f64 / so;
            let fold = if shared { 0.0 } else { q.zero_point as f64 * m };
            let limit = span * m.abs() + 1024.0;
            (m, (b / so - fold).clamp(-limit, limit))
        })
        .collect();
    if reals.iter().any(|(m, a)| !m.is_finite() || !a.is_finite()) {
        return None;
    }
    // One unit of margin per term absorbs the rounding of mul and add.
    let worst = reals.iter().fold(0f64, |acc, &(m, a)| {
        acc.max(span * (m.abs() + 1.0) + a.abs() + 1.0)
    });
    let limit = (1u64 << 30) as f64;
    let mut shift: i32 = 29;
    while shift >= 0 && worst * 2f64.powi(shift) + 2f64.powi(shift - 1) >= limit {
        shift -= 1;
    }
    if shift < 0 {
        return None;
    }
    let k = 2f64.powi(shift);
    let mul = reals.iter().map(|&(m, _)| (m * k).round() as i32).collect();
    let add = reals.iter().map(|&(_, a)| (a * k).round() as i32).collect();
    Some(ChannelTransform::Affine {
        mul,
        add,
        shift: shift as u32,
        zp_in,
        zp_out: qout.zero_point,
        clamp,
    })
}

/// Applies a [`ChannelTransform`] to one value of channel `ch`, with the
/// runtime's own code (`ingot_rt::InputTransform::apply`).
pub fn apply_transform(t: &ChannelTransform, ch: usize, x: i8) -> i8 {
    with_runtime_transform(t, |rt| rt.apply(ch, x))
}

/// Calls `f` with the runtime view of a transform.
pub(crate) fn with_runtime_transform<R>(
    t: &ChannelTransform,
    f: impl FnOnce(&ingot_rt::InputTransform<'_>) -> R,
) -> R {
    f(&t.runtime())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn activation_qparams_follow_the_affine_formula() {
        // [-1, 3]: scale 4/255, zero point round(-128 + 63.75) = -64.
        let qp = activation_qparams(MapRange {
            min: -1.0,
            max: 3.0,
        });
        assert!((qp.scale - 4.0 / 255.0).abs() < 1e-9);
        assert_eq!(qp.zero_point, -64);
        // Real zero is exactly representable (Jacob et al. 2018, §2.1).
        assert_eq!(dequantize(qp.zero_point as i8, qp), 0.0);
        // A positive-only range is widened to 0: zero point -128.
        let relu = activation_qparams(MapRange { min: 0.5, max: 2.0 });
        assert_eq!(relu.zero_point, -128);
        assert!((relu.scale - 2.0 / 255.0).abs() < 1e-9);
        // Negative-only: zero point 127.
        assert_eq!(
            activation_qparams(MapRange {
                min: -2.0,
                max: -1.0
            })
            .zero_point,
            127
        );
        let dead = activation_qparams(MapRange { min: 0.0, max: 0.0 });
        assert_eq!(
            dead,
            QParams {
                scale: DEGENERATE_SCALE,
                zero_point: -128
            }
        );
        assert_eq!(quantize(0.0, dead), -128);
    }

    #[test]
    fn tiny_multipliers_become_exact_zero_and_huge_ones_are_refused() {
        assert_eq!(multiplier(1e-12), Some(Multiplier { mult: 0, shift: 0 }));
        assert!(multiplier(2f64.powi(31)).is_none());
        let m = multiplier(0.3).unwrap();
        assert!((to_requant(m).to_real() - 0.3).abs() < 1e-9);
    }

    #[test]
    fn relu6_clamp_stops_at_six() {
        let qp = QParams {
            scale: 0.05,
            zero_point: -128,
        };
        let c = activation_clamp(Activation::Relu6, qp);
        assert_eq!((c.min, c.max), (-128, -8)); // -128 + round(6 / 0.05) = -8
        assert_eq!(
            activation_clamp(Activation::Relu, qp),
            Clamp {
                min: -128,
                max: 127
            }
        );
    }

    #[test]
    fn weights_symmetric_per_row_and_zero_rows() {
        let w = [0.5, -1.0, 0.25, 0.0, 0.0, 0.0, 2.0, 1.0, -0.5];
        let q = quantize_weights(&w, 3, true);
        assert_eq!(q.scales[1], 1.0);
        assert_eq!(&q.codes[..3], &[64, -127, 32]); // 0.5 / (1/127) = 63.5 -> 64
        assert_eq!(&q.codes[3..6], &[0, 0, 0]);
        assert_eq!(&q.codes[6..], &[127, 64, -32]);
        let t = quantize_weights(&w, 3, false);
        assert!(t.scales.iter().all(|&s| (s - 2.0 / 127.0).abs() < 1e-9));
        assert_eq!(&t.codes[..3], &[32, -64, 16]);
    }

    #[test]
    fn affine_transform_reproduces_the_real_map() {
        let qin = QParams {
            scale: 0.1,
            zero_point: -20,
        };
        let qout = QParams {
            scale: 0.05,
            zero_point: -128,
        };
        let ab = [(1.5, 0.2), (-0.7, 1.0), (0.0, 0.0)];
        let t =
            affine_transform(&ab, &[qin], qout, activation_clamp(Activation::Relu, qout)).unwrap();
        for (c, &(a, b)) in ab.iter().enumerate() {
            for q in -128..=127i32 {
                let y = (a * 0.1 * (q + 20) as f64 + b).max(0.0);
                let want = (round_half_up(y / 0.05) - 128.0).clamp(-128.0, 127.0) as i32;
                let got = apply_transform(&t, c, q as i8) as i32;
                assert!(
                    (got - want).abs() <= 1,
                    "channel {c} code {q}: {got} vs {want}"
                );
            }
        }
    }

    #[test]
    fn per_channel_input_parameters_fold_into_the_transform() {
        // Two slices: channel 0 at (0.1, -20), channel 1 at (0.5, 30).
        let qin = [
            QParams {
                scale: 0.1,
                zero_point: -20,
            },
            QParams {
                scale: 0.5,
                zero_point: 30,
            },
        ];
        let qout = QParams {
            scale: 0.05,
            zero_point: -128,
        };
        let ab = [(1.5, 0.2), (-0.7, 1.0)];
        let t =
            affine_transform(&ab, &qin, qout, activation_clamp(Activation::Relu, qout)).unwrap();
        let ChannelTransform::Affine { zp_in, .. } = &t else {
            panic!("affine")
        };
        assert_eq!(*zp_in, 0);
        for (c, &(a, b)) in ab.iter().enumerate() {
            let (s, z) = (qin[c].scale as f64, qin[c].zero_point);
            for q in -128..=127i32 {
                // real = s_c·(q − z_c) (Jacob et al. 2018, §2.1).
                let y = (a * s * (q - z) as f64 + b).max(0.0);
                let want = (round_half_up(y / 0.05) - 128.0).clamp(-128.0, 127.0) as i32;
                let got = apply_transform(&t, c, q as i8) as i32;
                assert!(
                    (got - want).abs() <= 1,
                    "channel {c} code {q}: {got} vs {want}"
                );
            }
        }
        // Equal per-channel parameters give the per-tensor transform.
        let one = affine_transform(
            &ab,
            &qin[..1],
            qout,
            Clamp {
                min: -128,
                max: 127,
            },
        );
        let same = affine_transform(
            &ab,
            &[qin[0], qin[0]],
            qout,
            Clamp {
                min: -128,
                max: 127,
            },
        );
        assert_eq!(one, same);
        // Neither one set nor one per channel.
        assert!(affine_transform(
            &ab,
            &[qin[0]; 3],
            qout,
            Clamp {
                min: -128,
                max: 127
            }
        )
        .is_none());
    }
}
