//! Requantization: worked examples, the rounding rule and the host-side
//! constructor.

use crate::common;

use common::*;
use ingot_rt::*;
use proptest::prelude::*;

/// Worked example from Jacob et al. (2018), "Quantization and Training of
/// Neural Networks for Efficient Integer-Arithmetic-Only Inference",
/// Section 2 (the normalised multiplier M = 2^-n · M0, M0 in [0.5, 1)).
///
/// M = 0.0072474273 = 0.9276706944 × 2^-7, so shift = 7 and
/// mult = round(0.9276706944 × 2^31) = round(1992157646.95…) = 1992157647
/// (computed by hand: 0.0072474273 × 2^38 = 1992157646.9528…).
#[test]
fn jacob_2018_section2_multiplier() {
    let r = Requant::from_real(0.0072474273).unwrap();
    assert_eq!(
        r,
        Requant {
            mult: 1992157647,
            shift: 7
        }
    );
    assert_eq!(r.total_shift(), 38);
    assert!((r.to_real() - 0.0072474273).abs() < 0.0072474273 * 2f64.powi(-31));
}

/// Hand-applied products with the same multiplier:
/// * 12345 × M = 89.469… → 89
/// * −12345 × M = −89.469… → −89
/// * 1000 × M = 7.247… → 7
/// * 69 × M = 0.50007… → 1 (just above one half)
#[test]
fn jacob_2018_section2_products() {
    let r = Requant {
        mult: 1992157647,
        shift: 7,
    };
    assert_eq!(r.scale(12345), 89);
    assert_eq!(r.scale(-12345), -89);
    assert_eq!(r.scale(1000), 7);
    assert_eq!(r.scale(69), 1);
    // With an output zero point of -128 and a ReLU clamp.
    assert_eq!(r.apply(12345, OutputQuant::relu(-128)), -39);
    assert_eq!(r.apply(-12345, OutputQuant::relu(-128)), -128);
}

/// Ties go toward +∞ (M = 0.5 exactly: mult = 2^30, shift = 0).
#[test]
fn ties_round_toward_plus_infinity() {
    let half = Requant {
        mult: 1 << 30,
        shift: 0,
    };
    assert_eq!(half.scale(3), 2); // 1.5 → 2
    assert_eq!(half.scale(-3), -1); // -1.5 → -1
    assert_eq!(half.scale(5), 3); // 2.5 → 3
    assert_eq!(half.scale(-5), -2); // -2.5 → -2
    assert_eq!(Requant::ONE.scale(-77), -77);
    assert_eq!(Requant::ONE.to_real(), 1.0);
}

#[test]
fn validation() {
    assert!(Requant::new(1 << 30, 0).is_some());
    assert!(Requant::new(i32::MAX, 31).is_some()); // total 62
    assert!(Requant::new(i32::MAX, 32).is_none()); // total 63
    assert!(Requant::new(1 << 30, -30).is_some()); // total 1
    assert!(Requant::new(1 << 30, -31).is_none()); // total 0
    assert!(Requant::new((1 << 30) - 1, 0).is_none()); // not normalised
    assert!(Requant::new(-(1 << 30), 0).is_some()); // negative mantissa
    assert!(Requant::new(i32::MIN, 0).is_none());
    assert!(Requant::new(0, 0).is_some());
    assert!(Requant::from_real(f64::NAN).is_none());
    assert!(Requant::from_real(f64::INFINITY).is_none());
    assert!(Requant::from_real(1e-12).is_none()); // needs total shift > 62
    assert!(Requant::from_real(2f64.powi(31)).is_none()); // needs total shift < 1
    assert_eq!(Requant::from_real(0.0), Some(Requant { mult: 0, shift: 0 }));
    // Rounding up to 2^31 renormalises.
    let r = Requant::from_real(1.0 - 1e-12).unwrap();
    assert_eq!(
        r,
        Requant {
            mult: 1 << 30,
            shift: -1
        }
    );
    let r = Requant::from_real(-0.75).unwrap();
    assert_eq!(
        r,
        Requant {
            mult: -(3 << 29),
            shift: 0
        }
    );
    assert_eq!(r.scale(4), -3);
}

#[test]
fn output_quant_activations() {
    assert_eq!(OutputQuant::linear(5), OutputQuant::clamped(5, -128, 127));
    assert_eq!(OutputQuant::relu(-20), OutputQuant::clamped(-20, -20, 127));
    assert_eq!(
        OutputQuant::relu6(-128, 100),
        OutputQuant::clamped(-128, -128, -28)
    );
    assert_eq!(
        OutputQuant::relu6(100, 100),
        OutputQuant::clamped(100, 100, 127)
    );
    assert_eq!(OutputQuant::relu(3).finish(-10), 3);
    assert_eq!(OutputQuant::linear(0).finish(1 << 40), 127);
    assert_eq!(OutputQuant::linear(0).finish(-(1 << 40)), -128);
}

#[test]
fn accumulator_bound() {
    let row = [127i8, -127, 3, 0];
    assert_eq!(acc_worst_case(&row, -1000), 1000 + 255 * 257);
    assert!(acc_fits(&row, -1000));
    // 2^31 / (127 · 255) = 66 311.06 taps of full-scale weights.
    let big = [127i8; 66_312];
    assert!(!acc_fits(&big, 0));
    assert!(acc_fits(&big[..66_311], 0));
}

fn arb_rq() -> impl Strategy<Value = Requant> {
    (1i32 << 30..=i32::MAX, -30i32..=31, any::<bool>()).prop_map(|(m, s, neg)| Requant {
        mult: if neg { -m } else { m },
        shift: s,
    })
}

proptest! {
    /// The i64 kernel formula equals the exact rounded value (i128 floor
    /// division) for every valid multiplier and every i32 input.
    #[test]
    fn scale_is_correctly_rounded(x in any::<i32>(), r in arb_rq()) {
        prop_assert!(r.is_valid());
        prop_assert_eq!(r.scale(x), ref_scale(x as i64, r));
    }

    /// `apply` (32-bit path for total shifts of 32 and more) equals the
    /// exact rounded value, offset and clamped in i128, for every valid
    /// multiplier, input, zero point and clamp range.
    #[test]
    fn apply_equals_exact_clamped_value(
        x in any::<i32>(),
        r in arb_rq(),
        zp in -128i32..=127,
        lo in any::<i8>(),
        span in 0u8..=255,
    ) {
        let hi = (lo as i32 + span as i32).min(127) as i8;
        let out = OutputQuant::clamped(zp, lo, hi);
        let want = (ref_scale(x as i64, r) as i128 + zp as i128).clamp(lo as i128, hi as i128) as i8;
        prop_assert_eq!(r.apply(x, out), want);
    }

    /// from_real is within half a mantissa step of the real multiplier.
    #[test]
    fn from_real_is_accurate(m in 1e-9f64..1e8) {
        let r = Requant::from_real(m).unwrap();
        prop_assert!(r.is_valid());
        let rel = (r.to_real() - m).abs() / m;
        prop_assert!(rel <= 2f64.powi(-31), "rel error {rel}");
    }
}
