//! conv2d against the naive reference, bit-exact, plus float agreement.

mod common;

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
    let kernel = (1usize..4, 1usize..4, 1usize..3, 1usize..3, 1usize..3, 1usize..3);
    let pad = (0usize..3, 0usize..3, 0usize..3, 0usize..3);
    let quant = (arb_zp(), arb_zp(), 0u8..3, prop::collection::vec(arb_requant(), 16));
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
    let table: Vec<i8> = (0..256 * c.cin).map(|_| rng.i8()).collect();
    let mul: Vec<i32> = (0..c.cin).map(|_| rng.range(-70000, 70000) as i32).collect();
    let addv: Vec<i32> = (0..c.cin).map(|_| rng.range(-1 << 24, 1 << 24) as i32).collect();
    let zp_in = rng.range(-128, 127) as i32;
    let shift = rng.range(0, 16) as u32;
    let (rt, tr) = match c.transform {
        1 => (
            Some(RefTransform::Affine {
                mul: mul.clone(),
                add: addv.clone(),
                shift,
                zp_in,
                zp_out: p.pad_value as i32,
                lo: p.pad_value,
                hi: 127,
            }),
            Some(InputTransform::Affine(AffineTransform {
                mul: &mul,
                add: &addv,
                shift,
                zp_in,
                zp_out: p.pad_value as i32,
                min: p.pad_value,
                max: 127,
            })),
        ),
        2 => (
            Some(RefTransform::Table(table.clone())),
            Some(InputTransform::Table(&table)),
        ),
        _ => (None, None),
    };
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
    Some((got, want))
}

proptest! {
    #[test]
    fn conv2d_matches_reference(c in arb_case()) {
        if let Some((got, want)) = run_case(&c) {
            prop_assert_eq!(got, want);
        }
    }
}
