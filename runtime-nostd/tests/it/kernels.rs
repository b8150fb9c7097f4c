//! linear, pooling, add, pixel quantization, copies, argmax: bit-exact
//! against naive references, plus error handling.

use crate::common;

use common::*;
use ingot_rt::*;
use proptest::prelude::*;

fn arb_rq() -> impl Strategy<Value = Requant> {
    prop_oneof![
        (1i32 << 30..i32::MAX, 0i32..24).prop_map(|(m, s)| Requant { mult: m, shift: s }),
        Just(Requant {
            mult: i32::MAX,
            shift: 0
        }),
        (1i32 << 30..i32::MAX, -3i32..0).prop_map(|(m, s)| Requant { mult: m, shift: s }),
    ]
}

fn arb_zp() -> impl Strategy<Value = i8> {
    prop_oneof![Just(-128i8), Just(127i8), any::<i8>()]
}

/// A map placed at `offset` inside a region of `extra` more channels.
fn strided(offset: usize, h: usize, w: usize, c: usize, extra: usize) -> MapRef {
    MapRef::strided(offset, h, w, c, c + extra)
}

fn rand_arena(n: usize, seed: u64) -> Vec<i8> {
    let mut r = Lcg(seed);
    (0..n).map(|_| r.i8()).collect()
}

proptest! {
    /// The power-of-two shortcut of `div_round` is the same floor division
    /// (exact reference in i128).
    #[test]
    fn div_round_matches_exact_floor(s in -(1i64 << 40)..(1i64 << 40), k in 0u32..20, odd in 1i64..50) {
        for n in [1i64 << k, odd, odd * (1 << (k % 5))] {
            let want = (2 * s as i128 + n as i128).div_euclid(2 * n as i128) as i64;
            prop_assert_eq!(div_round(s, n), want, "s={} n={}", s, n);
        }
    }

    #[test]
    fn linear_matches_reference(
        (h, w, c, extra) in (1usize..4, 1usize..4, 1usize..20, 0usize..3),
        o in 1usize..12,
        seed in any::<u64>(),
        rqs in prop::collection::vec(arb_rq(), 12),
        zp in arb_zp(),
        relu in any::<bool>(),
    ) {
        let input = strided(1, h, w, c, extra);
        let n_in = h * w * c;
        let output = MapRef::new(input.end().unwrap() + 2, 1, 1, o);
        let mut arena = rand_arena(output.end().unwrap() + 1, seed);
        let mut r = Lcg(seed ^ 77);
        let weights: Vec<i8> = (0..o * n_in).map(|_| r.range(-127, 127) as i8).collect();
        let bias: Vec<i32> = (0..o).map(|_| r.range(-100_000, 100_000) as i32).collect();
        let oq = if relu { OutputQuant::relu(zp as i32) } else { OutputQuant::linear(zp as i32) };
        let mut want = vec![0i8; o];
        for (k, wv) in want.iter_mut().enumerate() {
            let mut acc = bias[k] as i64;
            let mut i = 0;
            for y in 0..h { for x in 0..w { for ch in 0..c {
                acc += weights[k * n_in + i] as i64 * get(&arena, &input, y, x, ch) as i64;
                i += 1;
            }}}
            *wv = ref_finish(ref_scale(acc, rqs[k]), oq.zero_point, oq.min, oq.max);
        }
        linear(&mut arena, input, output, &weights, &bias, &rqs, oq).unwrap();
        prop_assert_eq!(&arena[output.offset..output.offset + o], &want[..]);
    }

    #[test]
    fn pools_match_reference(
        (h, w, c, extra) in (1usize..7, 1usize..7, 1usize..5, 0usize..3),
        (kh, kw, sy, sx) in (1usize..4, 1usize..4, 1usize..3, 1usize..3),
        (pt, pl, pb, pr) in (0usize..3, 0usize..3, 0usize..3, 0usize..3),
        seed in any::<u64>(),
        in_zp in arb_zp(),
        out_zp in arb_zp(),
        rq in prop::option::of(arb_rq()),
    ) {
        let win = Window { kh, kw, step_y: sy, step_x: sx, dilation_y: 1, dilation_x: 1,
            pad: Padding { top: pt, left: pl, bottom: pb, right: pr } };
        let (Some(oh), Some(ow)) = (win.out_h(h), win.out_w(w)) else { return Ok(()); };
        let input = strided(0, h, w, c, extra);
        let output = strided(input.end().unwrap() + 1, oh, ow, c, extra);
        let arena0 = rand_arena(output.end().unwrap() + extra + 1, seed);
        // For the plain (no requant) max pool the output shares the input's
        // quantization, so use the input zero point.
        let q = PoolQuant { in_zp: in_zp as i32, requant: rq, out: OutputQuant::linear(out_zp as i32) };
        let qmax = PoolQuant { out: if rq.is_none() { OutputQuant::linear(in_zp as i32) } else { q.out }, ..q };
        let mut want_max = vec![0i8; oh * ow * c];
        let mut want_avg = vec![0i8; oh * ow * c];
        for oy in 0..oh { for ox in 0..ow { for ch in 0..c {
            let mut m: Option<i64> = None;
            let mut s: i64 = 0;
            for ky in 0..kh { for kx in 0..kw {
                let iy = (oy * sy + ky) as i64 - pt as i64;
                let ix = (ox * sx + kx) as i64 - pl as i64;
                if iy >= 0 && ix >= 0 && iy < h as i64 && ix < w as i64 {
                    let v = get(&arena0, &input, iy as usize, ix as usize, ch) as i64;
                    m = Some(m.map_or(v, |a| a.max(v)));
                    s += v - in_zp as i64;
                }
            }}
            let m = m.unwrap_or(in_zp as i64);
            let i = (oy * ow + ox) * c + ch;
            want_max[i] = match rq {
                None => m.clamp(-128, 127) as i8,
                Some(r) => ref_finish(ref_scale(m - in_zp as i64, r), out_zp as i32, -128, 127),
            };
            let n = (kh * kw) as i64;
            want_avg[i] = match rq {
                // round half up: floor(s/n + 1/2)
                None => ref_finish((2 * s + n).div_euclid(2 * n), out_zp as i32, -128, 127),
                Some(r) => ref_finish(ref_scale(s, r), out_zp as i32, -128, 127),
            };
        }}}
        let mut arena = arena0.clone();
        max_pool2d(&mut arena, input, output, &win, &qmax).unwrap();
        let mut got = vec![0i8; output.len()];
        copy_out(&arena, output, &mut got).unwrap();
        prop_assert_eq!(&got, &want_max);
        let mut arena = arena0.clone();
        avg_pool2d(&mut arena, input, output, &win, &q).unwrap();
        copy_out(&arena, output, &mut got).unwrap();
        prop_assert_eq!(&got, &want_avg);

        // Global average pooling over the whole input.
        let gout = MapRef::new(output.offset, 1, 1, c);
        let mut arena = arena0.clone();
        global_avg_pool(&mut arena, input, gout, &q).unwrap();
        for ch in 0..c {
            let mut s: i64 = 0;
            for y in 0..h { for x in 0..w { s += get(&arena0, &input, y, x, ch) as i64 - in_zp as i64; } }
            let n = (h * w) as i64;
            let want = match rq {
                None => ref_finish((2 * s + n).div_euclid(2 * n), out_zp as i32, -128, 127),
                Some(r) => ref_finish(ref_scale(s, r), out_zp as i32, -128, 127),
            };
            prop_assert_eq!(arena[gout.offset + ch], want);
        }
    }

    #[test]
    fn add_matches_reference(
        (h, w, c, extra) in (1usize..5, 1usize..5, 1usize..6, 0usize..3),
        (za, zb, zo) in (arb_zp(), arb_zp(), arb_zp()),
        (sa, sb, so) in (0.001f64..1.0, 0.001f64..1.0, 0.001f64..1.0),
        seed in any::<u64>(),
        mode in 0u8..3,
    ) {
        // a and b interleaved in one region (concat-style views).
        let stride = 2 * c + extra;
        let region = MapRef::strided(0, h, w, stride, stride);
        let a = region.channels(0, c);
        let b = region.channels(c, c);
        let sep = MapRef::new(region.end().unwrap(), h, w, c);
        let out = match mode { 0 => a, 1 => b, _ => sep };
        let arena0 = rand_arena(sep.end().unwrap() + 1, seed);
        let p = AddParams::from_scales(sa, za as i32, sb, zb as i32, so, OutputQuant::linear(zo as i32)).unwrap();
        let mut want = vec![0i8; h * w * c];
        for y in 0..h { for x in 0..w { for ch in 0..c {
            let va = get(&arena0, &a, y, x, ch) as i64;
            let vb = get(&arena0, &b, y, x, ch) as i64;
            let ta = ref_scale((va - za as i64) << p.left_shift, p.a_rq);
            let tb = ref_scale((vb - zb as i64) << p.left_shift, p.b_rq);
            let v = ref_scale(ta + tb, p.out_rq);
            want[(y * w + x) * c + ch] = ref_finish(v, zo as i32, -128, 127);
            // And within one output step of the real-valued sum.
            let real = sa * (va - za as i64) as f64 + sb * (vb - zb as i64) as f64;
            let exact = (real / so + zo as f64).clamp(-128.0, 127.0);
            prop_assert!((want[(y * w + x) * c + ch] as f64 - exact).abs() <= 0.5 + 1e-3,
                "add off by more than half a step: {} vs {}", want[(y * w + x) * c + ch], exact);
        }}}
        let mut arena = arena0.clone();
        add(&mut arena, a, b, out, &p).unwrap();
        let mut got = vec![0i8; out.len()];
        copy_out(&arena, out, &mut got).unwrap();
        prop_assert_eq!(got, want);
        // The input that is not the output is untouched.
        let other = if mode == 0 { b } else { a };
        for y in 0..h { for x in 0..w { for ch in 0..c {
            prop_assert_eq!(get(&arena, &other, y, x, ch), get(&arena0, &other, y, x, ch));
        }}}
    }

    #[test]
    fn quantize_pixels_uses_per_channel_table(
        (h, w, c) in (1usize..6, 1usize..6, prop_oneof![Just(1usize), Just(3usize)]),
        extra in 0usize..2,
        seed in any::<u64>(),
    ) {
        let mut r = Lcg(seed);
        let pixels: Vec<u8> = (0..h * w * c).map(|_| r.next() as u8).collect();
        let table: Vec<i8> = (0..256 * c).map(|_| r.i8()).collect();
        let out = MapRef::strided(2, h, w, c, c + extra);
        let mut arena = vec![0i8; out.end().unwrap() + 1];
        quantize_pixels(&pixels, &mut arena, out, &table).unwrap();
        for y in 0..h { for x in 0..w { for ch in 0..c {
            let px = pixels[(y * w + x) * c + ch] as usize;
            prop_assert_eq!(get(&arena, &out, y, x, ch), table[ch * 256 + px]);
        }}}
        let mut back = vec![0i8; out.len()];
        copy_out(&arena, out, &mut back).unwrap();
        let mut arena2 = vec![0i8; arena.len()];
        copy_in(&back, &mut arena2, out).unwrap();
        let mut back2 = vec![0i8; out.len()];
        copy_out(&arena2, out, &mut back2).unwrap();
        prop_assert_eq!(back, back2);
    }

    #[test]
    fn argmax_first_maximum_wins(v in prop::collection::vec(any::<i8>(), 1..40)) {
        let i = argmax(&v);
        let m = *v.iter().max().unwrap();
        prop_assert_eq!(v[i], m);
        prop_assert!(v[..i].iter().all(|&x| x < m));
    }
}

#[test]
fn argmax_ties_and_empty() {
    assert_eq!(argmax(&[3, 7, 7, -1]), 1);
    assert_eq!(argmax(&[-128, -128]), 0);
    assert_eq!(argmax(&[]), 0);
}

#[test]
fn dequantize_helper() {
    assert_eq!(dequantize(10, 0.5, -2), 6.0);
    assert_eq!(dequantize(-128, 0.25, -128), 0.0);
}

#[test]
fn max_pool_with_requant_example() {
    // 2×2 map, one channel, window covering everything.
    let input = MapRef::new(0, 2, 2, 1);
    let output = MapRef::new(4, 1, 1, 1);
    let mut arena = vec![-5i8, 20, 3, -128, 0];
    let q = PoolQuant {
        in_zp: -10,
        requant: Some(Requant::from_real(0.5).unwrap()),
        out: OutputQuant::linear(1),
    };
    max_pool2d(&mut arena, input, output, &Window::square(2, 1, 0), &q).unwrap();
    // max = 20; (20 - (-10)) · 0.5 = 15; + 1 = 16
    assert_eq!(arena[4], 16);
    // avg: Σ(x - zp) = 5 + 30 + 13 - 118 = -70; /4 = -17.5 → -17 (ties up); +1
    let q = PoolQuant { requant: None, ..q };
    avg_pool2d(&mut arena, input, output, &Window::square(2, 1, 0), &q).unwrap();
    assert_eq!(arena[4], -16);
}

#[test]
fn errors_are_reported_without_writing() {
    let input = MapRef::new(0, 4, 4, 2);
    let mut arena = vec![1i8; 64];
    let q = PoolQuant {
        in_zp: 0,
        requant: None,
        out: OutputQuant::linear(0),
    };
    let w = Window::square(2, 2, 0);
    // Output overlapping the input.
    assert_eq!(
        max_pool2d(&mut arena, input, MapRef::new(8, 2, 2, 2), &w, &q),
        Err(Error::Overlap)
    );
    // Output beyond the arena.
    assert_eq!(
        max_pool2d(&mut arena, input, MapRef::new(60, 2, 2, 2), &w, &q),
        Err(Error::MapOutOfBounds)
    );
    // Wrong output shape.
    assert_eq!(
        max_pool2d(&mut arena, input, MapRef::new(32, 3, 2, 2), &w, &q),
        Err(Error::ShapeMismatch)
    );
    // stride < c
    assert_eq!(
        max_pool2d(
            &mut arena,
            MapRef::strided(0, 4, 4, 2, 1),
            MapRef::new(32, 2, 2, 2),
            &w,
            &q
        ),
        Err(Error::MapOutOfBounds)
    );
    assert!(arena.iter().all(|&v| v == 1));
    // conv2d: short weights, bad groups, short patch.
    let out = MapRef::new(32, 4, 4, 2);
    let p = ConvParams {
        window: Window::square(3, 1, 1),
        groups: 1,
        input_zp: 0,
        out: OutputQuant::linear(0),
    };
    let rq = [Requant::ONE; 2];
    let mut patch = [0i16; 18];
    let wts = [0i8; 36];
    assert_eq!(
        conv2d(
            &mut arena,
            input,
            out,
            &wts[..35],
            &[0; 2],
            &rq,
            &p,
            None,
            &mut patch
        ),
        Err(Error::BufferTooSmall)
    );
    assert_eq!(
        conv2d(
            &mut arena,
            input,
            out,
            &wts,
            &[0; 2],
            &rq,
            &p,
            None,
            &mut patch[..17]
        ),
        Err(Error::BufferTooSmall)
    );
    assert_eq!(
        conv2d(
            &mut arena,
            input,
            out,
            &wts,
            &[0; 2],
            &rq,
            &ConvParams { groups: 0, ..p },
            None,
            &mut patch
        ),
        Err(Error::BadParams)
    );
    let bad_rq = [Requant { mult: 5, shift: 0 }; 2];
    assert_eq!(
        conv2d(&mut arena, input, out, &wts, &[0; 2], &bad_rq, &p, None, &mut patch),
        Err(Error::BadParams)
    );
    assert!(arena.iter().all(|&v| v == 1));
    assert_eq!(
        conv2d(&mut arena, input, out, &wts, &[0; 2], &rq, &p, None, &mut patch),
        Ok(())
    );
}

#[test]
fn disjointness_of_concat_views() {
    let region = MapRef::strided(10, 3, 3, 8, 8);
    let a = region.channels(0, 3);
    let b = region.channels(3, 5);
    assert!(a.is_disjoint(&b) && b.is_disjoint(&a));
    assert!(!a.is_disjoint(&region.channels(2, 2)));
    assert!(!a.is_disjoint(&a));
    assert!(MapRef::new(0, 2, 2, 2).is_disjoint(&MapRef::new(8, 1, 1, 1)));
    assert_eq!(region.end(), Some(10 + 8 * 8 + 8));
    assert!(region.fits(82) && !region.fits(81));
}
