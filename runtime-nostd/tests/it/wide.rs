//! The int16 kernels of `ingot_rt::wide` against straightforward i64
//! references written here: every value read and written through its own
//! byte pair (little-endian), exact sums, the rounding of `ref_scale`.

#![allow(clippy::needless_range_loop)] // the references index like the formulas
use crate::common::{ref_scale, Lcg};
use ingot_rt::wide::*;
use ingot_rt::{MapRef, Padding, Requant, Window};
use proptest::prelude::*;

/// A dense HWC value array placed in an arena as a typed map, possibly a
/// channel view (`c0`, `stride`) of a wider region at an odd byte base.
struct Placed {
    map: TypedMap,
}

fn store(arena: &mut [i8], m: &TypedMap, y: usize, x: usize, ch: usize, v: i32) {
    let i = (y * m.map.w + x) * m.map.stride + ch;
    match m.elem {
        Elem::I8 => arena[m.map.offset + i] = v as i8,
        Elem::I16 => {
            let b = (v as i16).to_le_bytes();
            arena[m.map.offset + 2 * i] = b[0] as i8;
            arena[m.map.offset + 2 * i + 1] = b[1] as i8;
        }
    }
}

fn load(arena: &[i8], m: &TypedMap, y: usize, x: usize, ch: usize) -> i32 {
    let i = (y * m.map.w + x) * m.map.stride + ch;
    match m.elem {
        Elem::I8 => arena[m.map.offset + i] as i32,
        Elem::I16 => i16::from_le_bytes([
            arena[m.map.offset + 2 * i] as u8,
            arena[m.map.offset + 2 * i + 1] as u8,
        ]) as i32,
    }
}

/// Places a map of `h×w×c` at byte `base`, as channels `c0..c0+c` of a
/// region `stride` values wide; returns the map and the byte after it.
fn place(
    base: usize,
    h: usize,
    w: usize,
    c: usize,
    c0: usize,
    stride: usize,
    elem: Elem,
) -> (Placed, usize) {
    let region = TypedMap {
        map: MapRef::strided(base, h, w, stride, stride),
        elem,
    };
    let map = region.channels(c0, c);
    (Placed { map }, region.end().unwrap())
}

fn elem_of(wide: bool) -> Elem {
    if wide {
        Elem::I16
    } else {
        Elem::I8
    }
}

/// A value of `elem`, the edges often.
fn value(r: &mut Lcg, elem: Elem) -> i32 {
    match r.next() % 6 {
        0 => elem.min(),
        1 => elem.max(),
        _ => r.range(elem.min() as i64, elem.max() as i64) as i32,
    }
}

fn weight(r: &mut Lcg) -> i8 {
    match r.next() % 5 {
        0 => 127,
        1 => -127,
        _ => r.range(-127, 127) as i8,
    }
}

fn requant(r: &mut Lcg, small: bool) -> Requant {
    let mult = r.range(1 << 30, i32::MAX as i64) as i32;
    let shift = if small {
        r.range(8, 24)
    } else {
        r.range(-1, 12)
    } as i32;
    Requant::new(mult, shift).unwrap()
}

/// `clamp(zp + ref_scale(acc))` in i64 (the reference of every kernel).
fn finish(acc: i64, rq: Requant, out: WideOut) -> i32 {
    (ref_scale(acc, rq) + out.zero_point as i64).clamp(out.min as i64, out.max as i64) as i32
}

#[derive(Debug, Clone)]
struct ConvCase {
    seed: u64,
    h: usize,
    w: usize,
    cg: usize,
    og: usize,
    groups: usize,
    k: [usize; 2],
    step: [usize; 2],
    pad: [usize; 4],
    in_wide: bool,
    out_wide: bool,
    relu: bool,
    view: bool,
    affine: bool,
}

fn arb_conv() -> impl Strategy<Value = ConvCase> {
    (
        (
            any::<u64>(),
            1usize..6,
            1usize..6,
            1usize..4,
            1usize..4,
            1usize..4,
        ),
        (
            1usize..4,
            1usize..4,
            1usize..3,
            1usize..3,
            0usize..2,
            0usize..2,
        ),
        (
            any::<bool>(),
            any::<bool>(),
            any::<bool>(),
            any::<bool>(),
            any::<bool>(),
        ),
    )
        .prop_map(
            |(
                (seed, h, w, cg, og, groups),
                (kh, kw, sy, sx, pt, pl),
                (iw, ow, relu, view, affine),
            )| ConvCase {
                seed,
                h: h + kh,
                w: w + kw,
                cg,
                og,
                groups,
                k: [kh, kw],
                step: [sy, sx],
                pad: [pt, pl, 1 - pt, pl],
                in_wide: iw,
                out_wide: ow,
                relu,
                view,
                affine,
            },
        )
}

/// Runs one convolution case through the kernel and the reference;
/// returns `(kernel, reference, acc64)`.
fn run_conv(cs: &ConvCase, force: Option<(i32, i8)>) -> (Vec<i32>, Vec<i32>, bool) {
    let mut r = Lcg(cs.seed);
    let (ci, co) = (cs.cg * cs.groups, cs.og * cs.groups);
    let window = Window {
        kh: cs.k[0],
        kw: cs.k[1],
        step_y: cs.step[0],
        step_x: cs.step[1],
        dilation_y: 1,
        dilation_x: 1,
        pad: Padding {
            top: cs.pad[0],
            left: cs.pad[1],
            bottom: cs.pad[2],
            right: cs.pad[3],
        },
    };
    let (oh, ow) = (window.out_h(cs.h).unwrap(), window.out_w(cs.w).unwrap());
    let (ie, oe) = (elem_of(cs.in_wide), elem_of(cs.out_wide));
    let (extra, c0) = if cs.view { (3, 2) } else { (0, 0) };
    let (inp, end) = place(1, cs.h, cs.w, ci, c0, ci + extra, ie);
    let (outp, end) = place(end + 1, oh, ow, co, c0, co + extra, oe);
    let mut arena = vec![0i8; end + 3];
    let mut x = vec![0i32; cs.h * cs.w * ci];
    for y in 0..cs.h {
        for xx in 0..cs.w {
            for ch in 0..ci {
                let v = force.map_or_else(|| value(&mut r, ie), |f| f.0);
                x[(y * cs.w + xx) * ci + ch] = v;
                store(&mut arena, &inp.map, y, xx, ch, v);
            }
        }
    }
    let kk = cs.k[0] * cs.k[1] * cs.cg;
    let weights: Vec<i8> = (0..co * kk)
        .map(|_| force.map_or_else(|| weight(&mut r), |f| f.1))
        .collect();
    let bias: Vec<i32> = (0..co).map(|_| r.range(-100_000, 100_000) as i32).collect();
    let rq: Vec<Requant> = (0..co)
        .map(|_| requant(&mut r, cs.out_wide || cs.in_wide))
        .collect();
    let mul: Vec<i32> = (0..ci).map(|_| r.range(-3000, 3000) as i32).collect();
    let add: Vec<i32> = (0..ci).map(|_| r.range(-50_000, 50_000) as i32).collect();
    let affine = WideAffine {
        mul: &mul,
        add: &add,
        shift: 10,
        zp_in: if ie == Elem::I8 { -3 } else { 5 },
        zp_out: 0,
        min: if cs.relu { 0 } else { -32768 },
        max: 32767,
    };
    let pad_value = if cs.affine {
        0
    } else if ie == Elem::I8 {
        -7
    } else {
        11
    };
    let out = WideOut {
        zero_point: if oe == Elem::I8 { 4 } else { 0 },
        min: if cs.relu { 0 } else { oe.min() },
        max: oe.max(),
    };
    let p = WideConvParams {
        window,
        groups: cs.groups,
        input_zp: pad_value,
        out,
    };
    let tr = WideTransform::Affine(affine);
    let mut patch = vec![0i16; ingot_rt::conv_patch_len(cs.k[0], cs.k[1], ci)];
    let args = check_conv_wide(
        arena.len(),
        patch.len(),
        inp.map,
        outp.map,
        WideWeights::I8(&weights),
        &bias,
        &rq,
        p,
        cs.affine.then_some(tr),
    )
    .unwrap();
    conv2d_wide(
        &mut arena,
        inp.map,
        outp.map,
        &weights,
        &bias,
        &rq,
        &p,
        cs.affine.then_some(&tr),
        &mut patch,
    )
    .unwrap();
    let mut got = Vec::new();
    let mut want = Vec::new();
    for oy in 0..oh {
        for ox in 0..ow {
            for o in 0..co {
                let g = o / cs.og;
                let mut acc = bias[o] as i64;
                for ky in 0..cs.k[0] {
                    for kx in 0..cs.k[1] {
                        for i in 0..cs.cg {
                            let yy = (oy * cs.step[0] + ky) as i64 - cs.pad[0] as i64;
                            let xx = (ox * cs.step[1] + kx) as i64 - cs.pad[1] as i64;
                            let ch = g * cs.cg + i;
                            let v = if yy < 0 || xx < 0 || yy >= cs.h as i64 || xx >= cs.w as i64 {
                                pad_value as i64
                            } else {
                                let raw = x[(yy as usize * cs.w + xx as usize) * ci + ch] as i64;
                                if cs.affine {
                                    let t = (raw - affine.zp_in as i64) * mul[ch] as i64
                                        + add[ch] as i64;
                                    let t = (t + 512).div_euclid(1024);
                                    t.clamp(affine.min as i64, affine.max as i64)
                                } else {
                                    raw
                                }
                            };
                            let wv = weights[o * kk + (ky * cs.k[1] + kx) * cs.cg + i] as i64;
                            acc += v * wv;
                        }
                    }
                }
                want.push(finish(acc, rq[o], out));
                got.push(load(&arena, &outp.map, oy, ox, o));
            }
        }
    }
    (got, want, args.acc64)
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(400))]

    /// Every element type pairing, groups and depthwise (`cg == 1`),
    /// strided channel views at odd byte offsets, int16 edge values,
    /// weights ±127, the int16-domain affine transform.
    #[test]
    fn conv_matches_the_i64_reference(cs in arb_conv()) {
        let (got, want, _) = run_conv(&cs, None);
        prop_assert_eq!(got, want);
    }
}

/// 64 channels of a 3×3 window are 576 terms: -32768 · 127 each sums to
/// about -2.4·10⁹, past i32, so the kernel must take the i64 path, and its
/// result is the exact one.
#[test]
fn conv_takes_the_i64_accumulator_when_the_bound_needs_it() {
    let cs = ConvCase {
        seed: 7,
        h: 3,
        w: 3,
        cg: 64,
        og: 2,
        groups: 1,
        k: [3, 3],
        step: [1, 1],
        pad: [0, 0, 0, 0],
        in_wide: true,
        out_wide: true,
        relu: false,
        view: false,
        affine: false,
    };
    let (got, want, acc64) = run_conv(&cs, Some((-32768, 127)));
    assert!(acc64);
    assert_eq!(got, want);
    // The exact sum is below i32::MIN; a wrapped i32 sum would have the
    // other sign, so the (negative, unclamped) results show no wrap.
    assert!(want.iter().all(|&v| v < 0 && v > -32768), "{want:?}");
    // A small input keeps the i32 path.
    let mut small = cs.clone();
    small.cg = 4;
    let (got, want, acc64) = run_conv(&small, Some((-32768, 127)));
    assert!(!acc64);
    assert_eq!(got, want);
}

/// Hand check: a 1×1 convolution of three int8 inputs with int16 output.
/// The int16 result dequantizes within half an int16 step of the float
/// result (Jacob et al. 2018, §2.1: `real = s · (q − z)`, symmetric output
/// `z = 0`, `s = max|y| / 32767`).
#[test]
fn int16_output_is_within_half_a_step_of_float() {
    let (s_in, z_in) = (0.05f64, -10i32);
    let x_q = [-128i32, 17, 127];
    let w_q = [[90i8, -127, 33], [-5, 64, 127]];
    let s_w = [0.01f64, 0.02];
    let bias_f = [0.3f64, -1.7];
    // Float outputs from the dequantized operands.
    let y: Vec<f64> = (0..2)
        .map(|o| {
            bias_f[o]
                + (0..3)
                    .map(|i| s_in * (x_q[i] - z_in) as f64 * s_w[o] * w_q[o][i] as f64)
                    .sum::<f64>()
        })
        .collect();
    let s_out = y.iter().fold(0f64, |m, v| m.max(v.abs())) / 32767.0;
    let bias: Vec<i32> = (0..2)
        .map(|o| {
            let bq = (bias_f[o] / (s_in * s_w[o])).round() as i32;
            bq - z_in * w_q[o].iter().map(|&w| w as i32).sum::<i32>()
        })
        .collect();
    let rq: Vec<Requant> = (0..2)
        .map(|o| Requant::from_real(s_in * s_w[o] / s_out).unwrap())
        .collect();
    let weights: Vec<i8> = w_q.iter().flatten().copied().collect();
    let input = TypedMap::i8(MapRef::new(0, 1, 1, 3));
    let output = TypedMap::i16(MapRef::new(4, 1, 1, 2));
    let mut arena = vec![0i8; 8];
    for (i, &v) in x_q.iter().enumerate() {
        arena[i] = v as i8;
    }
    let p = WideConvParams {
        window: Window::square(1, 1, 0),
        groups: 1,
        input_zp: z_in,
        out: WideOut::linear(0, Elem::I16),
    };
    let mut patch = [0i16; 4];
    conv2d_wide(
        &mut arena, input, output, &weights, &bias, &rq, &p, None, &mut patch,
    )
    .unwrap();
    let mut q = [0i16; 2];
    copy_out_wide(&arena, output, &mut q).unwrap();
    for o in 0..2 {
        // The bias rounds to half an input·weight step; that and the
        // 31-bit multiplier add far less than the output step here.
        let err = (s_out * q[o] as f64 - y[o]).abs();
        assert!(
            err <= 0.5 * s_out + 0.5 * s_in * s_w[o],
            "channel {o}: {} vs {}",
            s_out * q[o] as f64,
            y[o]
        );
    }
    assert_eq!(q.iter().map(|v| v.unsigned_abs()).max(), Some(32767));
}

#[test]
fn linear_pools_add_channel_and_copies_match_references() {
    for seed in 0..40u64 {
        let mut r = Lcg(seed);
        for (ie, oe) in [
            (Elem::I8, Elem::I16),
            (Elem::I16, Elem::I8),
            (Elem::I16, Elem::I16),
        ] {
            let (h, w, c) = (
                1 + r.next() as usize % 4,
                1 + r.next() as usize % 4,
                1 + r.next() as usize % 4,
            );
            let (inp, end) = place(3, h, w, c, 1, c + 2, ie);
            let mut arena = vec![0i8; end + 600];
            let mut x = vec![0i32; h * w * c];
            for y in 0..h {
                for xx in 0..w {
                    for ch in 0..c {
                        let v = value(&mut r, ie);
                        x[(y * w + xx) * c + ch] = v;
                        store(&mut arena, &inp.map, y, xx, ch, v);
                    }
                }
            }
            let out = WideOut {
                zero_point: 0,
                min: if r.next() % 2 == 0 { 0 } else { oe.min() },
                max: oe.max(),
            };
            let base = end + 1;
            // Linear: n_in × 3.
            let n_in = h * w * c;
            let weights: Vec<i8> = (0..3 * n_in).map(|_| weight(&mut r)).collect();
            let bias: Vec<i32> = (0..3).map(|_| r.range(-1000, 1000) as i32).collect();
            let rq: Vec<Requant> = (0..3).map(|_| requant(&mut r, true)).collect();
            let lo = TypedMap {
                map: MapRef::new(base, 1, 1, 3),
                elem: oe,
            };
            linear_wide(&mut arena, inp.map, lo, &weights, &bias, &rq, out).unwrap();
            for o in 0..3 {
                let acc = bias[o] as i64
                    + (0..n_in)
                        .map(|i| x[i] as i64 * weights[o * n_in + i] as i64)
                        .sum::<i64>();
                assert_eq!(
                    load(&arena, &lo, 0, 0, o),
                    finish(acc, rq[o], out),
                    "linear {seed}"
                );
            }
            // Poolings: 2×2 step 1 window with padding 1 on the right.
            let win = Window {
                pad: Padding {
                    top: 0,
                    left: 0,
                    bottom: 1,
                    right: 1,
                },
                ..Window::square(2, 1, 0)
            };
            let in_zp = if ie == Elem::I8 { -5 } else { 0 };
            for (kind, with_rq) in [
                (PoolKind::Max, false),
                (PoolKind::Max, true),
                (PoolKind::Avg, false),
                (PoolKind::Avg, true),
                (PoolKind::Global, true),
                (PoolKind::Global, false),
            ] {
                let (oh, ow) = if kind == PoolKind::Global {
                    (1, 1)
                } else {
                    (h, w)
                };
                let po = TypedMap {
                    map: MapRef::new(base, oh, ow, c),
                    elem: oe,
                };
                let prq = with_rq.then(|| requant(&mut r, oe == Elem::I8 && ie == Elem::I16));
                let pout = WideOut {
                    zero_point: if kind == PoolKind::Max && !with_rq {
                        in_zp.clamp(oe.min(), oe.max())
                    } else {
                        0
                    },
                    ..out
                };
                let q = WidePool {
                    in_zp,
                    requant: prq,
                    out: pout,
                };
                pool_wide(&mut arena, inp.map, po, kind, &win, &q).unwrap();
                for oy in 0..oh {
                    for ox in 0..ow {
                        for ch in 0..c {
                            let taps: Vec<i64> = match kind {
                                PoolKind::Global => {
                                    (0..h * w).map(|p| x[p * c + ch] as i64).collect()
                                }
                                _ => (0..2)
                                    .flat_map(|ky| (0..2).map(move |kx| (oy + ky, ox + kx)))
                                    .filter(|&(y, xx)| y < h && xx < w)
                                    .map(|(y, xx)| x[(y * w + xx) * c + ch] as i64)
                                    .collect(),
                            };
                            let n = if kind == PoolKind::Global {
                                (h * w) as i64
                            } else {
                                4
                            };
                            let s: i64 = taps.iter().map(|v| v - in_zp as i64).sum();
                            let want = match (kind, prq) {
                                (PoolKind::Max, None) => {
                                    let m = taps.iter().copied().max().unwrap_or(in_zp as i64);
                                    m.clamp(pout.min as i64, pout.max as i64) as i32
                                }
                                (PoolKind::Max, Some(rq)) => {
                                    let m = taps.iter().copied().max().unwrap_or(in_zp as i64);
                                    finish(m - in_zp as i64, rq, pout)
                                }
                                (_, Some(rq)) => finish(s, rq, pout),
                                // round(s / n), ties toward +∞.
                                (_, None) => ((2 * s + n).div_euclid(2 * n)
                                    + pout.zero_point as i64)
                                    .clamp(pout.min as i64, pout.max as i64)
                                    as i32,
                            };
                            assert_eq!(load(&arena, &po, oy, ox, ch), want, "{kind:?} {seed}");
                        }
                    }
                }
            }
            // Add: the input with itself shifted to another map of `oe`.
            let b = TypedMap {
                map: MapRef::new(base + 2 * n_in + 8, h, w, c),
                elem: oe,
            };
            let mut bx = vec![0i32; n_in];
            for y in 0..h {
                for xx in 0..w {
                    for ch in 0..c {
                        let v = value(&mut r, oe);
                        bx[(y * w + xx) * c + ch] = v;
                        store(&mut arena, &b, y, xx, ch, v);
                    }
                }
            }
            let ao = TypedMap {
                map: MapRef::new(base, h, w, c),
                elem: oe,
            };
            let pa = WideAdd {
                a_zp: in_zp,
                b_zp: 0,
                a_rq: Requant::from_real(0.5).unwrap(),
                b_rq: Requant::from_real(0.25).unwrap(),
                out_rq: Requant::from_real(1.0 / (1u64 << 20) as f64 * 1.3).unwrap(),
                left_shift: 20,
                out,
            };
            add_wide(&mut arena, inp.map, b, ao, &pa).unwrap();
            for i in 0..n_in {
                let (px, ch) = (i / c, i % c);
                let da = (x[i] as i64 - in_zp as i64) << 20;
                let db = (bx[i] as i64) << 20;
                let t = ref_scale(da, pa.a_rq) + ref_scale(db, pa.b_rq);
                assert_eq!(
                    load(&arena, &ao, px / w, px % w, ch),
                    finish(t, pa.out_rq, out),
                    "add {seed}"
                );
            }
            // Channel transform into the output type, and the copies.
            let mul: Vec<i32> = (0..c).map(|_| r.range(-3000, 3000) as i32).collect();
            let addv: Vec<i32> = (0..c).map(|_| r.range(-5000, 5000) as i32).collect();
            let t = WideAffine {
                mul: &mul,
                add: &addv,
                shift: 7,
                zp_in: in_zp,
                zp_out: 0,
                min: out.min,
                max: out.max,
            };
            channel_wide(&mut arena, inp.map, ao, &t).unwrap();
            for i in 0..n_in {
                let (px, ch) = (i / c, i % c);
                let v = ((x[i] as i64 - in_zp as i64) * mul[ch] as i64 + addv[ch] as i64 + 64) >> 7;
                let want = v.clamp(out.min as i64, out.max as i64) as i32;
                assert_eq!(
                    load(&arena, &ao, px / w, px % w, ch),
                    want,
                    "channel {seed}"
                );
            }
            let mut dense = vec![0i16; n_in];
            copy_out_wide(&arena, inp.map, &mut dense).unwrap();
            assert_eq!(dense.iter().map(|&v| v as i32).collect::<Vec<_>>(), x);
            if ie == Elem::I16 {
                let o16 = TypedMap::i16(MapRef::new(base + 1, h, w, c));
                copy_in_wide(&dense, &mut arena, o16).unwrap();
                let mut back = vec![0i16; n_in];
                copy_out_wide(&arena, o16, &mut back).unwrap();
                assert_eq!(back, dense);
                let cc = TypedMap::i16(MapRef::new(base + 4 * n_in + 17, h, w, c));
                copy_channels_wide(&mut arena, o16, cc).unwrap();
                copy_out_wide(&arena, cc, &mut back).unwrap();
                assert_eq!(back, dense);
                let m = x.iter().max().unwrap();
                assert_eq!(argmax_wide(&dense), x.iter().position(|v| v == m).unwrap());
            }
        }
    }
}

/// Interleaved channel views of one int16 region are disjoint; views
/// that overlap by one byte, or an int8 view of the same bytes, are not.
#[test]
fn wide_views_and_refusals() {
    let region = TypedMap::i16(MapRef::new(1, 2, 2, 6));
    let (a, b) = (region.channels(0, 2), region.channels(2, 4));
    assert!(a.is_disjoint(&b) && b.is_disjoint(&a));
    assert_eq!(b.map.offset, 1 + 4);
    assert_eq!(region.end(), Some(1 + 2 * 24));
    let odd = TypedMap::i16(MapRef {
        offset: a.map.offset + 1,
        ..a.map
    });
    assert!(!odd.is_disjoint(&b) || !odd.is_disjoint(&a));
    assert!(!TypedMap::i8(a.map).is_disjoint(&b));
    // A map one byte past the arena is refused before anything is written.
    let mut arena = vec![0i8; 48];
    let out = TypedMap::i16(MapRef::new(1, 1, 1, 2));
    let res = copy_in_wide(&[1, 2], &mut arena[..4], out);
    assert_eq!(res, Err(ingot_rt::Error::MapOutOfBounds));
    // An int16 output clamp outside int8 is refused for an int8 output.
    let p = WideConvParams {
        window: Window::square(1, 1, 0),
        groups: 1,
        input_zp: 0,
        out: WideOut::linear(0, Elem::I16),
    };
    let r = conv2d_wide(
        &mut arena,
        TypedMap::i8(MapRef::new(0, 1, 1, 1)),
        TypedMap::i8(MapRef::new(4, 1, 1, 1)),
        &[1],
        &[0],
        &[Requant::ONE],
        &p,
        None,
        &mut [0; 2],
    );
    assert_eq!(r, Err(ingot_rt::Error::BadParams));
}

/// The checked forms, built in `static`s as a generated module builds them
/// (so their checks run while rustc compiles this test), compute what the
/// `Result`-returning kernels compute; a refused call is an error value.
#[test]
fn checked_forms_match_the_kernels() {
    const A: usize = 64;
    static W: [i8; 4] = [1, -2, 3, 127];
    static WB: [u8; 4] = [1, 254, 3, 127];
    static B: [i32; 2] = [5, -7];
    static RQ: [Requant; 2] = [Requant::ONE, Requant::ONE];
    const IN: TypedMap = TypedMap::i16(MapRef::new(0, 2, 2, 2));
    const OUT: TypedMap = TypedMap::i16(MapRef::new(16, 2, 2, 2));
    const P: WideConvParams = WideConvParams {
        window: Window::square(1, 1, 0),
        groups: 1,
        input_zp: 0,
        out: WideOut::linear(0, Elem::I16),
    };
    static K: checked::Conv2d<'static, A, 2> =
        match checked::Conv2d::new(IN, OUT, &W, &B, &RQ, P, None) {
            Ok(k) => k,
            Err(e) => e.refuse(),
        };
    static KB: checked::Conv2d<'static, A, 2> =
        match checked::Conv2d::new_bytes(IN, OUT, &WB, &B, &RQ, P, None) {
            Ok(k) => k,
            Err(e) => e.refuse(),
        };
    const Q: WidePool = WidePool {
        in_zp: 0,
        requant: None,
        out: WideOut::linear(0, Elem::I16),
    };
    const POUT: TypedMap = TypedMap::i16(MapRef::new(40, 1, 1, 2));
    static KP: checked::Pool<A> =
        match checked::Pool::new(IN, POUT, PoolKind::Max, Window::square(2, 2, 0), Q) {
            Ok(k) => k,
            Err(e) => e.refuse(),
        };
    static KC: checked::Copy<A> =
        match checked::Copy::new(IN, TypedMap::i16(MapRef::new(44, 2, 2, 2))) {
            Ok(k) => k,
            Err(e) => e.refuse(),
        };
    let mut arena = [0i8; A];
    let mut r = Lcg(3);
    for i in 0..16 {
        arena[i] = r.i8();
    }
    let mut want = arena;
    conv2d_wide(&mut want, IN, OUT, &W, &B, &RQ, &P, None, &mut [0; 2]).unwrap();
    pool_wide(
        &mut want,
        IN,
        POUT,
        PoolKind::Max,
        &Window::square(2, 2, 0),
        &Q,
    )
    .unwrap();
    copy_channels_wide(&mut want, IN, TypedMap::i16(MapRef::new(44, 2, 2, 2))).unwrap();
    let mut got = arena;
    K.run(&mut got, &mut [0; 2]);
    KP.run(&mut got);
    KC.run(&mut got);
    assert_eq!(got, want);
    let mut bytes = arena;
    KB.run(&mut bytes, &mut [0; 2]);
    assert_eq!(bytes[16..32], want[16..32]);
    assert!(!K.acc64());
    // One byte short of the output: refused.
    let r = checked::Conv2d::<'static, 31, 2>::new(IN, OUT, &W, &B, &RQ, P, None);
    assert!(matches!(r, Err(ingot_rt::Error::MapOutOfBounds)));
}
