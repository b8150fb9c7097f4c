//! The four-pixel pointwise kernel of `conv2d_words` (1×1, no padding,
//! one group, a patch of at least `pointwise_patch_len` elements) against
//! the naive i64 reference convolution (common practice: the plain sum of
//! products, then the requantization of Jacob et al. 2018, Section 2).
//!
//! The cases aim at its edges: channel counts that are not multiples of
//! four (a partial last quad of the staging buffer and of the weight
//! rows), output channel counts that leave one to three rows in the last
//! block, pixel counts that leave one to three pixels after the groups of
//! four (odd widths, strides, row ranges that cut the map), inputs at odd
//! byte offsets with a pixel stride wider than the channels, the extreme
//! values ±127 and −128 in inputs and weights. With a fused input
//! transform the kernel steps aside (the ring of rows or the per-pixel
//! patch runs); those cases hold the fallback to the reference. Rings (input and output stored as a few rows) are held to
//! the whole-map run by `rows.rs`, which runs 1×1 word convolutions with
//! a patch large enough for this kernel.

use crate::common::*;
use ingot_rt::*;
use proptest::prelude::*;

#[derive(Debug, Clone)]
struct Case {
    h: usize,
    w: usize,
    cin: usize,
    cout: usize,
    sy: usize,
    sx: usize,
    /// Arena offset of the input (odd offsets included) and extra
    /// elements per input pixel beyond its channels.
    in_off: usize,
    extra: usize,
    /// 0: none, 1: affine, 2: table.
    transform: u8,
    /// Output rows per call (0: the whole map in one call).
    chunk: usize,
    /// Share of extreme values (±127, −128) in inputs and weights, in
    /// sixteenths.
    extreme: u64,
    zp_out: i8,
    act: u8,
    seed: u64,
}

fn arb_case() -> impl Strategy<Value = Case> {
    (
        (1usize..6, 1usize..8, 1usize..41, 1usize..20),
        (1usize..3, 1usize..3, 0usize..4, 0usize..3),
        (0u8..3, 0usize..4, 0u64..17),
        (any::<i8>(), 0u8..3, any::<u64>()),
    )
        .prop_map(|(s, g, t, q)| {
            let (h, w, cin, cout) = s;
            let (sy, sx, in_off, extra) = g;
            let (transform, chunk, extreme) = t;
            let (zp_out, act, seed) = q;
            Case {
                h,
                w,
                cin,
                cout,
                sy,
                sx,
                in_off,
                extra,
                transform,
                chunk,
                extreme,
                zp_out,
                act,
                seed,
            }
        })
}

/// A random int8 value, or one of the extremes with probability
/// `extreme / 16`.
fn value(rng: &mut Lcg, extreme: u64) -> i8 {
    if rng.next() % 16 < extreme {
        [127i8, -127, -128][(rng.next() % 3) as usize]
    } else {
        rng.i8()
    }
}

/// Runs one case through `conv2d_words` (the pointwise kernel) and the
/// reference; also through the same call with one patch element fewer
/// (the per-pixel word kernels), which must give the same bytes.
fn run_case(c: &Case) -> Result<(), TestCaseError> {
    let win = Window {
        kh: 1,
        kw: 1,
        step_y: c.sy,
        step_x: c.sx,
        dilation_y: 1,
        dilation_x: 1,
        pad: Padding::NONE,
    };
    prop_assert!(pointwise_applies(&win, 1));
    let (oh, ow) = (win.out_h(c.h).unwrap(), win.out_w(c.w).unwrap());
    let mut rng = Lcg(c.seed);
    let stride = c.cin + c.extra;
    let input = MapRef::strided(c.in_off, c.h, c.w, c.cin, stride);
    let out_off = c.in_off + c.h * c.w * stride + 3;
    let output = MapRef::strided(out_off, oh, ow, c.cout, c.cout + 1);
    let arena_len = out_off + oh * ow * (c.cout + 1) + 2;
    let arena: Vec<i8> = (0..arena_len).map(|_| value(&mut rng, c.extreme)).collect();
    let weights: Vec<i8> = (0..c.cout * c.cin)
        .map(|_| value(&mut rng, c.extreme))
        .collect();
    let bias: Vec<i32> = (0..c.cout)
        .map(|_| rng.range(-1_000_000, 1_000_000) as i32)
        .collect();
    let rq: Vec<Requant> = (0..c.cout)
        .map(|_| Requant::from_real(0.0005 + (rng.next() % 200) as f64 * 0.0002).unwrap())
        .collect();
    let pad_value = rng.i8();
    let (lo, hi) = match c.act {
        0 => (-128i8, 127i8),
        1 => (c.zp_out, 127),
        _ => (c.zp_out, c.zp_out.saturating_add(40)),
    };
    let data = RandTransform::new(&mut rng, c.cin, |r| value(r, c.extreme));
    let (rt, tr) = data.pair(c.transform, pad_value);
    let rp = RefConv {
        kh: 1,
        kw: 1,
        sy: c.sy,
        sx: c.sx,
        dy: 1,
        dx: 1,
        pt: 0,
        pl: 0,
        pb: 0,
        pr: 0,
        groups: 1,
        pad_value,
        zp_out: c.zp_out as i32,
        lo,
        hi,
    };
    let want = ref_conv(
        &arena,
        &input,
        oh,
        ow,
        c.cout,
        &weights,
        &bias,
        &rq,
        &rp,
        rt.as_ref(),
    );
    let params = ConvParams {
        window: win,
        groups: 1,
        input_zp: pad_value,
        out: OutputQuant::clamped(c.zp_out as i32, lo, hi),
    };
    let mut words = vec![0u8; words_len(c.cout, c.cin)];
    word_rows_into(&weights, c.cout, c.cin, &mut words).unwrap();
    let need = pointwise_patch_len(c.cin);
    let mut results = Vec::new();
    for len in [need, need - 1] {
        let mut a = arena.clone();
        // Leftovers of other steps in the patch must not matter.
        let mut patch = vec![0x5a5ai16; len];
        let chunk = if c.chunk == 0 { oh } else { c.chunk };
        let mut y0 = 0;
        while y0 < oh {
            let y1 = (y0 + chunk).min(oh);
            conv2d_words_rows(
                &mut a,
                input,
                output,
                &words,
                &bias,
                &rq,
                &params,
                tr.as_ref(),
                &mut patch,
                (y0, y1),
            )
            .unwrap();
            y0 = y1;
        }
        let mut got = vec![0i8; output.len()];
        copy_out(&a, output, &mut got).unwrap();
        prop_assert_eq!(&got, &want, "patch of {} (pointwise needs {})", len, need);
        // Nothing outside the output view changes.
        let mut restored = a.clone();
        for y in 0..oh {
            for x in 0..ow {
                for ch in 0..c.cout {
                    let i = output.index(y, x, ch);
                    restored[i] = arena[i];
                }
            }
        }
        prop_assert!(restored == arena, "wrote outside its output view");
        results.push(a);
    }
    prop_assert!(results[0] == results[1]);
    Ok(())
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(600))]

    #[test]
    fn four_pixel_pointwise_matches_reference(c in arb_case()) {
        run_case(&c)?;
    }
}

/// A map of five pixels with 8 → 4 channels: one group of four pixels and
/// one left over, every input and weight at −128 or 127 (the largest
/// products an int8 layer can make), against sums worked by hand.
#[test]
fn extreme_values_by_hand() {
    let (c, m) = (8usize, 4usize);
    let input = MapRef::new(1, 1, 5, c);
    let output = MapRef::new(1 + 5 * c, 1, 5, m);
    let mut arena = vec![0i8; 1 + 5 * c + 5 * m];
    for px in 0..5 {
        for ch in 0..c {
            arena[1 + px * c + ch] = if (px + ch) % 2 == 0 { -128 } else { 127 };
        }
    }
    // Row o: all −128 (o = 0), all 127 (o = 1), alternating (o = 2, 3).
    let weights: Vec<i8> = (0..m * c)
        .map(|i| match (i / c, i % c) {
            (0, _) => -128,
            (1, _) => 127,
            (2, k) => [127, -128][k % 2],
            (_, k) => [-128, 127][k % 2],
        })
        .collect();
    let mut words = vec![0u8; words_len(m, c)];
    word_rows_into(&weights, m, c, &mut words).unwrap();
    // Multiplier 2^-10 (mantissa 2^30, total shift 40): outputs stay in range.
    let rq = vec![
        Requant {
            mult: 1 << 30,
            shift: 9
        };
        m
    ];
    let bias = vec![0i32; m];
    let p = ConvParams {
        window: Window::square(1, 1, 0),
        groups: 1,
        input_zp: 0,
        out: OutputQuant::clamped(0, -128, 127),
    };
    let mut patch = vec![0i16; pointwise_patch_len(c)];
    conv2d_words(
        &mut arena, input, output, &words, &bias, &rq, &p, None, &mut patch,
    )
    .unwrap();
    for px in 0..5 {
        let x: Vec<i64> = (0..c).map(|ch| arena[1 + px * c + ch] as i64).collect();
        for o in 0..m {
            let acc: i64 = (0..c).map(|k| x[k] * weights[o * c + k] as i64).sum();
            // acc · 2^-10, rounded half up.
            let want = ((acc + 512).div_euclid(1024)).clamp(-128, 127) as i8;
            assert_eq!(arena[output.index(0, px, o)], want, "pixel {px} row {o}");
        }
    }
}

const LA: usize = 2048;

proptest! {
    #![proptest_config(ProptestConfig::with_cases(300))]

    /// Linear layers (two rows per pass over the input, four int8 values
    /// per word on cores with the DSP extension and on hosts): odd input
    /// lengths (a partial last word), odd output counts (a last row
    /// alone), several output pixels, strided (non-contiguous) inputs,
    /// extreme values, `i8` weights and the weights file's bytes, against
    /// the naive i64 sum (common practice).
    #[test]
    fn linear_matches_reference(
        (h, w, c, extra, off) in (1usize..4, 1usize..4, 1usize..23, 0usize..3, 0usize..4),
        (oh, ow, o) in (1usize..3, 1usize..3, 1usize..10),
        extreme in 0u64..17,
        seed in any::<u64>(),
        zp in any::<i8>(),
    ) {
        let mut rng = Lcg(seed);
        let input = MapRef::strided(off, h, w, c, c + extra);
        let n_in = h * w * c;
        let output = MapRef::new(input.end().unwrap() + 1, oh, ow, o);
        let n_out = output.len();
        let mut arena = [0i8; LA];
        for v in arena.iter_mut() {
            *v = value(&mut rng, extreme);
        }
        let weights: Vec<i8> = (0..n_out * n_in).map(|_| value(&mut rng, extreme)).collect();
        let bytes: Vec<u8> = weights.iter().map(|&v| v as u8).collect();
        let bias: Vec<i32> = (0..n_out).map(|_| rng.range(-100_000, 100_000) as i32).collect();
        let rq: Vec<Requant> = (0..n_out)
            .map(|_| Requant::from_real(0.0005 + (rng.next() % 200) as f64 * 0.0002).unwrap())
            .collect();
        let oq = OutputQuant::linear(zp as i32);
        let mut want = vec![0i8; n_out];
        for (k, wv) in want.iter_mut().enumerate() {
            let mut acc = bias[k] as i64;
            let mut i = 0;
            for y in 0..h {
                for x in 0..w {
                    for ch in 0..c {
                        acc += weights[k * n_in + i] as i64 * get(&arena, &input, y, x, ch) as i64;
                        i += 1;
                    }
                }
            }
            *wv = ref_finish(ref_scale(acc, rq[k]), oq.zero_point, oq.min, oq.max);
        }
        let mut a = arena;
        linear(&mut a, input, output, &weights, &bias, &rq, oq).unwrap();
        let mut got = vec![0i8; n_out];
        copy_out(&a, output, &mut got).unwrap();
        prop_assert_eq!(&got, &want);
        let mut b = arena;
        checked::Linear::<LA>::new_bytes(input, output, &bytes, &bias, &rq, oq)
            .unwrap()
            .run(&mut b);
        prop_assert!(a == b, "the weights file's bytes give other bytes");
    }
}
