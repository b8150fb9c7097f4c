//! Depthwise 3×3 convolutions, which read the int8 map
//! directly (`src/depthwise.rs`), against the naive reference
//! (`common::ref_conv`), bit for bit: interior and border pixels, steps 1
//! and 2 on each axis, asymmetric padding, 1 to 13 channels (multiples of
//! four take the direct kernel, the others the gathering path), inputs
//! at odd byte offsets and pixel strides, output before or after the
//! input in the arena, extreme values (−128, 127, weights ±127), whole
//! maps and rings of rows, `i8` weights and the weights file's bytes
//! (`checked::Conv2d::new_bytes`).

use crate::common;

use common::*;
use ingot_rt::*;
use proptest::prelude::*;

const A: usize = 2048;
const P: usize = 9 * 64;

#[derive(Debug, Clone)]
struct Case {
    h: usize,
    w: usize,
    c: usize,
    sy: usize,
    sx: usize,
    pad: [usize; 4],
    /// Input offset in the arena and extra channels of its pixel stride.
    in_off: usize,
    in_extra: usize,
    /// Output placed before the input in the arena.
    out_first: bool,
    pad_value: i8,
    zp_out: i8,
    act: u8,
    /// Values drawn from the extremes only.
    extremes: bool,
    seed: u64,
    rq: Vec<Requant>,
}

fn arb_requant() -> impl Strategy<Value = Requant> {
    prop_oneof![
        (1i32 << 30..i32::MAX, 0i32..20).prop_map(|(m, s)| Requant { mult: m, shift: s }),
        (1i32 << 30..i32::MAX, 20i32..31).prop_map(|(m, s)| Requant { mult: m, shift: s }),
        (1i32 << 30..i32::MAX, -2i32..0).prop_map(|(m, s)| Requant { mult: m, shift: s }),
    ]
}

fn arb_i8() -> impl Strategy<Value = i8> {
    prop_oneof![Just(-128i8), Just(127i8), Just(0i8), any::<i8>()]
}

fn arb_case() -> impl Strategy<Value = Case> {
    (
        (1usize..8, 1usize..9, 1usize..14, 1usize..3, 1usize..3),
        [0usize..3, 0usize..3, 0usize..3, 0usize..3],
        (0usize..4, 0usize..3, any::<bool>()),
        (arb_i8(), arb_i8(), 0u8..3, any::<bool>(), any::<u64>()),
        prop::collection::vec(arb_requant(), 13),
    )
        .prop_map(|(s, pad, l, q, rq)| {
            let (h, w, c, sy, sx) = s;
            let (in_off, in_extra, out_first) = l;
            let (pad_value, zp_out, act, extremes, seed) = q;
            Case {
                h,
                w,
                c,
                sy,
                sx,
                pad,
                in_off,
                in_extra,
                out_first,
                pad_value,
                zp_out,
                act,
                extremes,
                seed,
                rq,
            }
        })
}

/// Everything one case runs with.
struct Setup {
    win: Window,
    params: ConvParams,
    refp: RefConv,
    input: MapRef,
    output: MapRef,
    arena: Box<[i8; A]>,
    weights: Vec<i8>,
    bias: Vec<i32>,
}

fn setup(k: &Case) -> Option<Setup> {
    let [pt, pl, pb, pr] = k.pad;
    let win = Window {
        kh: 3,
        kw: 3,
        step_y: k.sy,
        step_x: k.sx,
        dilation_y: 1,
        dilation_x: 1,
        pad: Padding {
            top: pt,
            left: pl,
            bottom: pb,
            right: pr,
        },
    };
    let (oh, ow) = (win.out_h(k.h)?, win.out_w(k.w)?);
    let stride = k.c + k.in_extra;
    let in_len = k.h * k.w * stride;
    let out_len = oh * ow * k.c;
    let (in_at, out_at) = if k.out_first {
        (1 + out_len + k.in_off, 1)
    } else {
        (k.in_off, k.in_off + in_len + 1)
    };
    let input = MapRef::strided(in_at, k.h, k.w, k.c, stride);
    let output = MapRef::new(out_at, oh, ow, k.c);
    assert!(input.end()? <= A && output.end()? <= A, "case too large");
    let mut rng = Lcg(k.seed);
    let ext = |rng: &mut Lcg, v: [i64; 3]| v[(rng.next() % 3) as usize];
    let mut arena = Box::new([0i8; A]);
    for v in arena.iter_mut() {
        *v = if k.extremes {
            ext(&mut rng, [-128, 127, -127]) as i8
        } else {
            rng.i8()
        };
    }
    let weights: Vec<i8> = (0..k.c * 9)
        .map(|_| {
            if k.extremes {
                ext(&mut rng, [-127, 127, 126]) as i8
            } else {
                rng.range(-127, 127) as i8
            }
        })
        .collect();
    let bias: Vec<i32> = (0..k.c)
        .map(|_| rng.range(-2_000_000, 2_000_000) as i32)
        .collect();
    let (lo, hi) = match k.act {
        0 => (-128i8, 127i8),
        1 => (k.zp_out, 127),
        _ => (k.zp_out, k.zp_out.saturating_add(40)),
    };
    let refp = RefConv {
        kh: 3,
        kw: 3,
        sy: k.sy,
        sx: k.sx,
        dy: 1,
        dx: 1,
        pt,
        pl,
        pb,
        pr,
        groups: k.c,
        pad_value: k.pad_value,
        zp_out: k.zp_out as i32,
        lo,
        hi,
    };
    let params = ConvParams {
        window: win,
        groups: k.c,
        input_zp: k.pad_value,
        out: OutputQuant::clamped(k.zp_out as i32, lo, hi),
    };
    Some(Setup {
        win,
        params,
        refp,
        input,
        output,
        arena,
        weights,
        bias,
    })
}

/// The output map of `arena`, dense HWC.
fn read(arena: &[i8], m: MapRef) -> Vec<i8> {
    let mut v = vec![0i8; m.len()];
    copy_out(arena, m, &mut v).unwrap();
    v
}

/// Runs one case every way; each must give the reference's bytes and
/// leave every byte outside the output as it was.
fn run(k: &Case) -> Result<(), TestCaseError> {
    let Some(s) = setup(k) else {
        return Ok(());
    };
    let rq = &k.rq[..k.c];
    let want = ref_conv(
        &s.arena[..],
        &s.input,
        s.output.h,
        s.output.w,
        k.c,
        &s.weights,
        &s.bias,
        rq,
        &s.refp,
        None,
    );
    let outside = |a: &[i8]| -> Vec<i8> {
        let mut b = a.to_vec();
        for y in 0..s.output.h {
            for x in 0..s.output.w {
                for ch in 0..k.c {
                    b[s.output.index(y, x, ch)] = 0;
                }
            }
        }
        b
    };
    let before = outside(&s.arena[..]);

    // `conv2d`, `i8` weights, whole map.
    let mut a = s.arena.clone();
    let mut patch = vec![0i16; conv_patch_len(3, 3, k.c)];
    conv2d(
        &mut a[..],
        s.input,
        s.output,
        &s.weights,
        &s.bias,
        rq,
        &s.params,
        None,
        &mut patch,
    )
    .unwrap();
    prop_assert_eq!(read(&a[..], s.output), want.clone(), "conv2d");
    prop_assert_eq!(outside(&a[..]), before.clone(), "conv2d wrote outside");

    // The checked call of a generated module: the weights file's bytes.
    let bytes: Vec<u8> = s.weights.iter().map(|&v| v as u8).collect();
    let call =
        checked::Conv2d::<A, P>::new_bytes(s.input, s.output, &bytes, &s.bias, rq, s.params, None)
            .unwrap();
    let mut a = s.arena.clone();
    call.run(&mut a, &mut [0i16; P]);
    prop_assert_eq!(read(&a[..], s.output), want.clone(), "new_bytes");
    prop_assert_eq!(outside(&a[..]), before, "new_bytes wrote outside");

    // One output row at a time from a ring of the three (step 1) or
    // `2 + step` input rows it needs, filled as a producer would.
    let in_rows = (s.win.step_y + 2).min(k.h);
    let ring = MapRef::ring(s.input.offset, k.h, k.w, k.c, s.input.stride, in_rows);
    let mut a = s.arena.clone();
    let mut got = Vec::new();
    for oy in 0..s.output.h {
        let first = (oy * s.win.step_y).saturating_sub(s.win.pad.top);
        let last = (oy * s.win.step_y + 3)
            .saturating_sub(s.win.pad.top)
            .min(k.h);
        for iy in first..last {
            for x in 0..k.w {
                for ch in 0..k.c {
                    a[ring.index(iy, x, ch)] = s.arena[s.input.index(iy, x, ch)];
                }
            }
        }
        // A stale patch must not matter either.
        let mut patch = vec![0x55i16; conv_patch_len(3, 3, k.c)];
        conv2d_rows(
            &mut a[..],
            ring,
            s.output,
            &s.weights,
            &s.bias,
            rq,
            &s.params,
            None,
            &mut patch,
            (oy, oy + 1),
        )
        .unwrap();
        let row = s.output.row(oy);
        got.extend_from_slice(&a[row..row + s.output.w * k.c]);
    }
    prop_assert_eq!(got, want, "rows from a ring");
    Ok(())
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(512))]
    #[test]
    fn depthwise_3x3_matches_reference(k in arb_case()) {
        run(&k)?;
    }
}

/// The layers of the Howard (2017) and Sandler (2018) layouts the direct
/// kernel is for: 3×3, pad 1, step 1 and 2, channel counts multiple of
/// four, maps wide enough that most pixels are interior. The last three
/// take the kernel's groups of 32 and 16 channels (36 = 32 + 4, 28 =
/// 16 + 8 + 4, 60 = 32 + 16 + 8 + 4), which the random cases (at most 13
/// channels) do not reach; seeds 0 and 3 have the whole int8 range as
/// output bounds (the `ssat` finish), 1 and 2 a ReLU's.
#[test]
fn common_layers_match_reference() {
    for (h, w, c, step) in [
        (8, 8, 8, 1),
        (9, 7, 12, 2),
        (6, 10, 4, 1),
        (7, 7, 16, 2),
        (5, 5, 36, 1),
        (4, 6, 28, 2),
        (3, 5, 60, 2),
    ] {
        for seed in 0..4u64 {
            let k = Case {
                h,
                w,
                c,
                sy: step,
                sx: step,
                pad: [1; 4],
                in_off: (seed % 4) as usize,
                in_extra: (seed % 3) as usize,
                out_first: seed % 2 == 1,
                pad_value: -128 + 40 * seed as i8,
                zp_out: -5,
                act: (seed % 3) as u8,
                extremes: seed == 3,
                seed,
                rq: vec![Requant::from_real(0.0007 * (seed + 1) as f64).unwrap(); 64],
            };
            run(&k).unwrap_or_else(|e| panic!("{h}x{w}x{c} step {step} seed {seed}: {e}"));
        }
    }
}
