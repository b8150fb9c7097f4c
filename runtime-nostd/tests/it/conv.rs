//! conv2d against the naive reference, bit-exact, plus float agreement.

use crate::common;

use common::*;
use ingot_rt::*;
use proptest::prelude::*;

/// A requantization multiplier drawn from the interesting range: tiny,
/// ordinary, and just under 1.0, with random mantissas.
fn arb_requant() -> impl Strategy<Value = Requant> {
    prop_oneof![
        (1i32 << 30..i32::MAX, 0i32..20).prop_map(|(m, s)| Requant { mult: m, shift: s }),
        (1i32 << 30..i32::MAX).prop_map(|m| Requant { mult: m, shift: 0 }),
        Just(Requant {
            mult: i32::MAX,
            shift: 0
        }),
        (1i32 << 30..i32::MAX, 20i32..31).prop_map(|(m, s)| Requant { mult: m, shift: s }),
        (1i32 << 30..i32::MAX, -2i32..0).prop_map(|(m, s)| Requant { mult: m, shift: s }),
    ]
}

fn arb_zp() -> impl Strategy<Value = i8> {
    prop_oneof![Just(-128i8), Just(127i8), Just(0i8), any::<i8>()]
}

#[derive(Debug, Clone)]
struct Case {
    h: usize,
    w: usize,
    cin: usize,
    cout: usize,
    groups: usize,
    p: RefConv,
    /// Input view: stride and channel offset inside a wider region.
    in_extra: usize,
    in_c0: usize,
    /// Output placement: `Some(k)` = write into the same region as the input
    /// at channel offset k (dense-block style), None = separate buffer.
    same_region: bool,
    seed: u64,
    rq: Vec<Requant>,
    transform: u8,
}

fn arb_case() -> impl Strategy<Value = Case> {
    let shape = (1usize..7, 1usize..7, 1usize..4, 1usize..4, 1usize..4);
    let kernel = (
        1usize..4,
        1usize..4,
        1usize..3,
        1usize..3,
        1usize..3,
        1usize..3,
    );
    let pad = (0usize..3, 0usize..3, 0usize..3, 0usize..3);
    let quant = (
        arb_zp(),
        arb_zp(),
        0u8..3,
        prop::collection::vec(arb_requant(), 16),
    );
    let layout = (0usize..3, any::<bool>(), any::<u64>(), 0u8..3);
    (shape, kernel, pad, quant, layout).prop_map(|(s, k, pd, q, l)| {
        let (h, w, cpg, opg, groups) = s;
        let (kh, kw, sy, sx, dy, dx) = k;
        let (pt, pl, pb, pr) = pd;
        let (pad_value, zp_out, act, rq) = q;
        let (in_extra, same_region, seed, transform) = l;
        let (lo, hi) = match act {
            0 => (-128i8, 127i8),
            1 => (zp_out, 127),
            _ => (zp_out, zp_out.saturating_add(40)),
        };
        let p = RefConv {
            kh,
            kw,
            sy,
            sx,
            dy,
            dx,
            pt,
            pl,
            pb,
            pr,
            groups,
            pad_value,
            zp_out: zp_out as i32,
            lo,
            hi,
        };
        Case {
            h,
            w,
            cin: cpg * groups,
            cout: opg * groups,
            groups,
            p,
            in_extra,
            in_c0: in_extra.min(1),
            same_region,
            seed,
            rq,
            transform,
        }
    })
}

/// Runs one case through conv2d and the reference; returns (got, want) or
/// None when the window does not fit.
fn run_case(c: &Case) -> Option<(Vec<i8>, Vec<i8>)> {
    let p = &c.p;
    let win = Window {
        kh: p.kh,
        kw: p.kw,
        step_y: p.sy,
        step_x: p.sx,
        dilation_y: p.dy,
        dilation_x: p.dx,
        pad: Padding {
            top: p.pt,
            left: p.pl,
            bottom: p.pb,
            right: p.pr,
        },
    };
    let oh = win.out_h(c.h)?;
    let ow = win.out_w(c.w)?;
    let mut rng = Lcg(c.seed);
    // Region layout: [c0 unused][cin input][output if same_region][extra].
    let (input, output, arena_len) = if c.same_region {
        // Dense block: input channels [c0, c0+cin), output channels right
        // after, both strided by the region width. Output spatial size must
        // equal input size for one region, so only use it when it does.
        if oh != c.h || ow != c.w {
            return None;
        }
        let stride = c.in_c0 + c.cin + c.cout + c.in_extra;
        let region = MapRef::strided(3, c.h, c.w, stride, stride);
        (
            region.channels(c.in_c0, c.cin),
            region.channels(c.in_c0 + c.cin, c.cout),
            3 + c.h * c.w * stride + 2,
        )
    } else {
        let stride = c.in_c0 + c.cin + c.in_extra;
        let input = MapRef::strided(c.in_c0, c.h, c.w, c.cin, stride);
        let out_off = c.h * c.w * stride + 1;
        let output = MapRef::new(out_off, oh, ow, c.cout);
        (input, output, out_off + output.len() + 1)
    };
    let mut arena: Vec<i8> = (0..arena_len).map(|_| rng.i8()).collect();
    let cpg = c.cin / c.groups;
    let weights: Vec<i8> = (0..c.cout * p.kh * p.kw * cpg)
        .map(|_| rng.range(-127, 127) as i8)
        .collect();
    let bias: Vec<i32> = (0..c.cout)
        .map(|_| rng.range(-2_000_000, 2_000_000) as i32)
        .collect();
    let data = RandTransform::new(&mut rng, c.cin, Lcg::i8);
    let (rt, tr) = data.pair(c.transform, p.pad_value);
    let want = ref_conv(
        &arena,
        &input,
        oh,
        ow,
        c.cout,
        &weights,
        &bias,
        &c.rq,
        p,
        rt.as_ref(),
    );
    let before = arena.clone();
    let mut patch = vec![0i16; conv_patch_len(p.kh, p.kw, c.cin)];
    conv2d(
        &mut arena,
        input,
        output,
        &weights,
        &bias,
        &c.rq,
        &ConvParams {
            window: win,
            groups: c.groups,
            input_zp: p.pad_value,
            out: OutputQuant::clamped(p.zp_out, p.lo, p.hi),
        },
        tr.as_ref(),
        &mut patch,
    )
    .unwrap();
    // Nothing outside the output view may change.
    let mut got = vec![0i8; output.len()];
    copy_out(&arena, output, &mut got).unwrap();
    let mut restored = arena.clone();
    for y in 0..output.h {
        for x in 0..output.w {
            for ch in 0..output.c {
                let i = output.index(y, x, ch);
                restored[i] = before[i];
            }
        }
    }
    assert_eq!(restored, before, "conv2d wrote outside its output view");
    if c.groups == 1 {
        // The paired form must give the same bytes and touch nothing else:
        // with the per-pixel patch, and with room for whole input rows (the
        // row path, where it applies).
        let k = p.kh * p.kw * c.cin;
        let mut pairs = vec![0u32; paired_len(c.cout, k)];
        pair_rows_into(&weights, c.cout, k, &mut pairs).expect("pair_rows_into: lengths agree");
        let params = ConvParams {
            window: win,
            groups: 1,
            input_zp: p.pad_value,
            out: OutputQuant::clamped(p.zp_out, p.lo, p.hi),
        };
        let rows_len = conv_rows_len(&win, c.w, c.cin).max(patch.len());
        for (what, len) in [("patch", patch.len()), ("rows", rows_len)] {
            let mut scratch = vec![0i16; len];
            let mut a = before.clone();
            conv2d_paired(
                &mut a,
                input,
                output,
                &pairs,
                &bias,
                &c.rq,
                &params,
                tr.as_ref(),
                &mut scratch,
            )
            .unwrap();
            assert_eq!(a, arena, "conv2d_paired ({what}) differs from conv2d");
        }
        // The word form (int8 weights, widened in registers) too.
        let mut words = vec![0u8; words_len(c.cout, k)];
        word_rows_into(&weights, c.cout, k, &mut words).expect("word_rows_into: lengths agree");
        for (what, len) in [("patch", patch.len()), ("rows", rows_len)] {
            let mut scratch = vec![0i16; len];
            let mut a = before.clone();
            conv2d_words(
                &mut a,
                input,
                output,
                &words,
                &bias,
                &c.rq,
                &params,
                tr.as_ref(),
                &mut scratch,
            )
            .unwrap();
            assert_eq!(a, arena, "conv2d_words ({what}) differs from conv2d");
        }
    }
    Some((got, want))
}

proptest! {
    #[test]
    fn conv2d_matches_reference(c in arb_case()) {
        // A window that does not fit is an invalid case, not a pass: it is
        // rejected so that every counted case compares outputs.
        let r = run_case(&c);
        prop_assume!(r.is_some());
        let (got, want) = r.unwrap();
        prop_assert_eq!(got, want);
    }
}

/// Wider layers (so the 4-row, 2-row and 16-lane paths all run) on small
/// maps: dense and dense-block (interleaved in-place concat) layouts.
fn arb_wide_case() -> impl Strategy<Value = Case> {
    (
        (1usize..5, 1usize..5, 1usize..41, 1usize..20),
        (1usize..4, 0usize..2, any::<bool>(), 0u8..3),
        (arb_zp(), arb_zp(), prop::collection::vec(arb_requant(), 20)),
        (0usize..3, any::<bool>(), any::<u64>()),
    )
        .prop_map(|(s, k, q, l)| {
            let (h, w, cin, cout) = s;
            let (kk, pad, asym, transform) = k;
            let (pad_value, zp_out, rq) = q;
            let (in_extra, same_region, seed) = l;
            Case {
                h,
                w,
                cin,
                cout,
                groups: 1,
                p: RefConv {
                    kh: kk,
                    kw: kk,
                    sy: 1,
                    sx: 1,
                    dy: 1,
                    dx: 1,
                    pt: pad,
                    pl: pad,
                    pb: if asym { 0 } else { pad },
                    pr: pad,
                    groups: 1,
                    pad_value,
                    zp_out: zp_out as i32,
                    lo: -128,
                    hi: 127,
                },
                in_extra,
                in_c0: in_extra.min(1),
                same_region,
                seed,
                rq,
                transform,
            }
        })
}

proptest! {
    #[test]
    fn wide_conv2d_matches_reference(c in arb_wide_case()) {
        // A window that does not fit is an invalid case, not a pass: it is
        // rejected so that every counted case compares outputs.
        let r = run_case(&c);
        prop_assume!(r.is_some());
        let (got, want) = r.unwrap();
        prop_assert_eq!(got, want);
    }
}

/// Depthwise layers with enough channels (2 to 19, one per group) that the
/// four-channel pass and the one-to-three-channel rest both run.
fn arb_depthwise_case() -> impl Strategy<Value = Case> {
    (
        (1usize..6, 1usize..6, 2usize..20),
        (1usize..4, 1usize..4, 1usize..3, 1usize..3, 0usize..2),
        (arb_zp(), arb_zp(), prop::collection::vec(arb_requant(), 20)),
        (0usize..3, any::<bool>(), any::<u64>(), 0u8..3),
    )
        .prop_map(|(s, k, q, l)| {
            let (h, w, c) = s;
            let (kh, kw, sy, sx, pad) = k;
            let (pad_value, zp_out, rq) = q;
            let (in_extra, same_region, seed, transform) = l;
            Case {
                h,
                w,
                cin: c,
                cout: c,
                groups: c,
                p: RefConv {
                    kh,
                    kw,
                    sy,
                    sx,
                    dy: 1,
                    dx: 1,
                    pt: pad,
                    pl: pad,
                    pb: pad,
                    pr: pad,
                    groups: c,
                    pad_value,
                    zp_out: zp_out as i32,
                    lo: -128,
                    hi: 127,
                },
                in_extra,
                in_c0: in_extra.min(1),
                same_region,
                seed,
                rq,
                transform,
            }
        })
}

proptest! {
    #[test]
    fn depthwise_conv2d_matches_reference(c in arb_depthwise_case()) {
        let r = run_case(&c);
        prop_assume!(r.is_some());
        let (got, want) = r.unwrap();
        prop_assert_eq!(got, want);
    }
}

/// Depthwise with channel multiplier and a 1×1 map with a kernel larger
/// than the input (all but one tap padded).
#[test]
fn depthwise_multiplier_and_oversized_kernel() {
    for (h, w, k, pad, groups, opg) in [(3, 4, 3, 1, 5, 2), (1, 1, 5, 2, 3, 1), (2, 2, 3, 2, 1, 3)]
    {
        let c = Case {
            h,
            w,
            cin: groups,
            cout: groups * opg,
            groups,
            p: RefConv {
                kh: k,
                kw: k,
                sy: 1,
                sx: 1,
                dy: 1,
                dx: 1,
                pt: pad,
                pl: pad,
                pb: pad,
                pr: pad,
                groups,
                pad_value: -128,
                zp_out: 127,
                lo: -128,
                hi: 127,
            },
            in_extra: 1,
            in_c0: 1,
            same_region: false,
            seed: 42,
            rq: vec![Requant::from_real(0.001).unwrap(); groups * opg],
            transform: 0,
        };
        let (got, want) = run_case(&c).unwrap();
        assert_eq!(got, want);
    }
}

/// Against the float computation it approximates: with a real multiplier
/// M, the dequantized integer output is within 0.5 LSB (+ the 2^-31
/// relative error of the Q31 mantissa) of
/// `clamp(z_out + M · Σ w·(x − z_in) + bias)`, the exact float convolution
/// of the dequantized inputs and weights.
#[test]
fn conv2d_agrees_with_float_within_half_lsb() {
    let mut rng = Lcg(7);
    for _ in 0..20 {
        let (h, w, cin, cout) = (5, 4, 6, 5);
        let s_in = 0.02 + rng.range(0, 100) as f64 * 0.001;
        let z_in = rng.range(-128, 127) as i32;
        let s_out = 0.05 + rng.range(0, 100) as f64 * 0.002;
        let z_out = rng.range(-128, 127) as i32;
        let input = MapRef::new(0, h, w, cin);
        let output = MapRef::new(input.len(), h, w, cout);
        let mut arena: Vec<i8> = (0..input.len() + output.len()).map(|_| rng.i8()).collect();
        let s_w: Vec<f64> = (0..cout)
            .map(|_| 0.001 + rng.range(0, 50) as f64 * 0.0002)
            .collect();
        let weights: Vec<i8> = (0..cout * 9 * cin)
            .map(|_| rng.range(-127, 127) as i8)
            .collect();
        let bias_real: Vec<f64> = (0..cout)
            .map(|_| rng.range(-100, 100) as f64 * 0.01)
            .collect();
        // Compiler side: quantize the bias at s_in·s_w and fold z_in.
        let bias_q: Vec<i32> = (0..cout)
            .map(|o| (bias_real[o] / (s_in * s_w[o])).round() as i32)
            .collect();
        let folded: Vec<i32> = (0..cout)
            .map(|o| {
                let sw: i32 = weights[o * 9 * cin..(o + 1) * 9 * cin]
                    .iter()
                    .map(|&v| v as i32)
                    .sum();
                bias_q[o] - z_in * sw
            })
            .collect();
        let rq: Vec<Requant> = (0..cout)
            .map(|o| Requant::from_real(s_in * s_w[o] / s_out).unwrap())
            .collect();
        let before = arena.clone();
        let mut patch = vec![0i16; conv_patch_len(3, 3, cin)];
        conv2d(
            &mut arena,
            input,
            output,
            &weights,
            &folded,
            &rq,
            &ConvParams {
                window: Window::square(3, 1, 1),
                groups: 1,
                input_zp: z_in as i8,
                out: OutputQuant::linear(z_out),
            },
            None,
            &mut patch,
        )
        .unwrap();
        for y in 0..h {
            for x in 0..w {
                for o in 0..cout {
                    let mut real = bias_q[o] as f64 * s_in * s_w[o];
                    for ky in 0..3 {
                        for kx in 0..3 {
                            let (iy, ix) = (y as i64 + ky - 1, x as i64 + kx - 1);
                            if iy < 0 || ix < 0 || iy >= h as i64 || ix >= w as i64 {
                                continue; // padding is real zero
                            }
                            for i in 0..cin {
                                let q = get(&before, &input, iy as usize, ix as usize, i) as i32;
                                let wq =
                                    weights[((o * 3 + ky as usize) * 3 + kx as usize) * cin + i];
                                real += s_in * (q - z_in) as f64 * s_w[o] * wq as f64;
                            }
                        }
                    }
                    let want = (real / s_out + z_out as f64).clamp(-128.0, 127.0);
                    let got = get(&arena, &output, y, x, o) as f64;
                    let tol = 0.5 + 1e-6 + (real / s_out).abs() * 2f64.powi(-30);
                    assert!(
                        (got - want).abs() <= tol,
                        "({y},{x},{o}): int {got} vs float {want}"
                    );
                    // The dequantized value is within half a step in real units.
                    let deq = dequantize(got as i8, s_out as f32, z_out) as f64;
                    let real_c = (want - z_out as f64) * s_out;
                    assert!((deq - real_c).abs() <= s_out * tol + 1e-6);
                }
            }
        }
    }
}

/// The row-ring path of the word and paired forms with a fused input
/// transform: channel counts on both sides of the transform's block of
/// 32 channels (`affine_row` builds its table per block), odd and even
/// widths, 1×1 and 3×3 windows with and without padding, strided and
/// interleaved (dense-block) inputs. `run_case` holds the ring (room for
/// whole rows) against `conv2d`'s per-pixel patch and `conv2d` against
/// the naive reference.
fn arb_ring_case() -> impl Strategy<Value = Case> {
    (
        (1usize..4, 1usize..8, 1usize..19, 1usize..10),
        (prop_oneof![Just(1usize), Just(3)], 0usize..2, 0usize..4),
        (arb_zp(), arb_zp(), prop::collection::vec(arb_requant(), 10)),
        (0usize..3, any::<bool>(), any::<u64>()),
    )
        .prop_map(|(s, k, q, l)| {
            let (h, w, quads, cout) = s;
            let (kk, pad, kind) = k;
            let (pad_value, zp_out, rq) = q;
            let (in_extra, same_region, seed) = l;
            // Transform kind 1 (affine) twice as often as none or table.
            let transform = [0u8, 1, 1, 2][kind];
            Case {
                h,
                w,
                cin: 4 * quads,
                cout,
                groups: 1,
                p: RefConv {
                    kh: kk,
                    kw: kk,
                    sy: 1,
                    sx: 1,
                    dy: 1,
                    dx: 1,
                    pt: pad,
                    pl: pad,
                    pb: pad,
                    pr: pad,
                    groups: 1,
                    pad_value,
                    zp_out: zp_out as i32,
                    lo: -128,
                    hi: 127,
                },
                in_extra,
                in_c0: in_extra.min(1),
                same_region,
                seed,
                rq,
                transform,
            }
        })
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(300))]
    #[test]
    fn ring_rows_with_transform_match_reference(c in arb_ring_case()) {
        let r = run_case(&c);
        prop_assume!(r.is_some());
        let (got, want) = r.unwrap();
        prop_assert_eq!(got, want);
    }
}

/// The ring's row transform folds the output zero point into its
/// additive terms only while `|zp_out|·2^shift` is small; the random
/// transforms above (shift below 16) always fold. Shifts up to the
/// largest valid one (29), zero points at both ends and multipliers and
/// offsets near the validity bound (`255·|mul| + |add| + 2^(shift-1) <
/// 2^30`) take both branches; the ring (word and paired forms) must give
/// `conv2d`'s bytes, whose per-pixel patch applies the transform value by
/// value (`AffineTransform::apply`, the definition).
#[test]
fn ring_transform_with_large_shifts_matches_conv2d() {
    let (h, w, cin, cout) = (3, 5, 36, 5);
    let mut rng = Lcg(0x5eed_0015);
    let input = MapRef::new(0, h, w, cin);
    let output = MapRef::new(input.len(), h, w, cout);
    let arena0: Vec<i8> = (0..input.len() + output.len()).map(|_| rng.i8()).collect();
    let weights: Vec<i8> = (0..cout * 9 * cin).map(|_| rng.i8()).collect();
    let bias: Vec<i32> = (0..cout)
        .map(|_| rng.range(-50_000, 50_000) as i32)
        .collect();
    let rq = vec![Requant::new(1 << 30, 12).unwrap(); cout];
    let mut pairs = vec![0u32; paired_len(cout, 9 * cin)];
    pair_rows_into(&weights, cout, 9 * cin, &mut pairs).unwrap();
    let mut words = vec![0u8; words_len(cout, 9 * cin)];
    word_rows_into(&weights, cout, 9 * cin, &mut words).unwrap();
    let win = Window::square(3, 1, 1);
    let mut folded = [false; 2];
    for shift in [0u32, 7, 16, 20, 22, 26, 29] {
        for zp_out in [-128i32, -1, 0, 127] {
            // Near the bound: |mul| up to (2^30 - 2^29 - rounding) / 255.
            let room = (1i64 << 30) - (1 << 29) - if shift > 0 { 1i64 << (shift - 1) } else { 0 };
            let mul: Vec<i32> = (0..cin)
                .map(|_| rng.range(-room / 255, room / 255) as i32)
                .collect();
            let add: Vec<i32> = (0..cin)
                .map(|_| rng.range(-(1 << 29) + 1, (1 << 29) - 1) as i32)
                .collect();
            let t = InputTransform::Affine(AffineTransform {
                mul: &mul,
                add: &add,
                shift,
                zp_in: rng.range(-128, 127) as i32,
                zp_out,
                min: zp_out.max(-128) as i8,
                max: 127,
            });
            assert!(
                t.is_valid_for(cin, zp_out as i8),
                "shift {shift} zp {zp_out}"
            );
            folded[usize::from((zp_out.unsigned_abs() as u64) << shift < 1 << 29)] = true;
            let p = ConvParams {
                window: win,
                groups: 1,
                input_zp: zp_out as i8,
                out: OutputQuant::clamped(3, -128, 127),
            };
            let mut want = arena0.clone();
            let mut patch = vec![0i16; conv_patch_len(3, 3, cin)];
            conv2d(
                &mut want,
                input,
                output,
                &weights,
                &bias,
                &rq,
                &p,
                Some(&t),
                &mut patch,
            )
            .unwrap();
            let mut ring = vec![0i16; conv_rows_len(&win, w, cin)];
            let mut got = arena0.clone();
            conv2d_words(
                &mut got,
                input,
                output,
                &words,
                &bias,
                &rq,
                &p,
                Some(&t),
                &mut ring,
            )
            .unwrap();
            assert_eq!(got, want, "words, shift {shift} zp {zp_out}");
            let mut got = arena0.clone();
            conv2d_paired(
                &mut got,
                input,
                output,
                &pairs,
                &bias,
                &rq,
                &p,
                Some(&t),
                &mut ring,
            )
            .unwrap();
            assert_eq!(got, want, "pairs, shift {shift} zp {zp_out}");
        }
    }
    assert_eq!(folded, [true, true], "both branches of the fold were taken");
}
