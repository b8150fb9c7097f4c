//! Depthwise 3×3 convolutions read straight from the int8 HWC map.
//!
//! The general path ([`conv2d`](crate::conv2d)) gathers every output
//! pixel's 3×3×C window into the widened patch first: one load, one
//! widening and one store per MAC before any multiply. A depthwise layer
//! has only nine MACs per output value, so that copy, not the
//! multiply-accumulates, set its cost (about 17 instructions per MAC on
//! the emulated Cortex-M4).
//!
//! Here every output pixel reads the map itself, four channels per pass:
//! HWC puts four neighbouring channels of one pixel in one 32-bit word.
//! On cores with the DSP extension one unaligned word load gives the four
//! inputs, `sxtb16` and `sxtb16 … ror #8` widen them into the pairs
//! `(x0, x2)` and `(x1, x3)`, and `smlabb`/`smlatt` meet them with the
//! matching 16-bit weights: per tap and four channels the loop is twelve
//! instructions (`arm-none-eabi-objdump -d` of the thumbv7em rlib: the
//! tap's address, one input load, two widenings, two weight loads, four
//! multiply-accumulates, the loop step). Elsewhere (Cortex-M0+, M3, plain M33,
//! hosts) the same loop runs as byte loads and plain multiplies, which
//! those cores do faster than the instructions' portable twins.
//!
//! Bounds checks: a pixel cuts each tap's bytes for 32 (then 16, 8, 4)
//! channels out of the map once, as fixed-size arrays, and the blocks of
//! four channels read those arrays with no check. A padded tap (border
//! pixels) points at an array of the input zero point instead, which is
//! what the folded bias assumes, so border pixels take the same loop.
//!
//! Loop shape: the taps are a rolled loop whose trip count LLVM cannot
//! see (it is read from memory). With the nine taps written out (or a
//! loop of a known nine), LLVM computes one accumulator's chain over all
//! nine taps at a time, every input word live at once, and spills: 13 and
//! more instructions per MAC on the emulated Cortex-M4, against about six
//! for the rolled loop.
//!
//! The weights reach the kernel as the module stores them (`[C][3][3]`,
//! int8). The kernel widens them once per call into the convolution's
//! patch scratch, which it does not otherwise need: four channels per
//! block, tap-major, so that each tap's four weights are two words ready
//! for the multiplies. The patch of a 3×3 depthwise convolution holds
//! `9·C` values, exactly the widened weights; the widening costs a few
//! instructions per weight per call (per row range of a row pipeline),
//! against nine MACs per weight per output pixel.
//!
//! One pixel and four channels per pass, nine taps of four MACs each: two
//! pixels per pass (eight accumulators, each pair of weight words read
//! once for eight MACs) do not fit the thirteen free registers, and LLVM
//! spilled accumulators in the tap loop (26 to 32 instructions per eight
//! MACs against 24); two pixels sharing a block's set-up, each with its
//! own tap loop, measured the same as one pixel for 6.5 kB more code;
//! taps in pairs (one `smlad` per channel for two taps, packed with
//! `pkhbt`/`pkhtb`) were 22 to 23 per eight MACs in the library but 24
//! to 34 in the firmware (`docs/kernels.md`).
//!
//! Requantization stays out of the tap loop. [`Requant::apply`] chooses
//! between its 32-bit and 64-bit paths for every value; when every
//! multiplier of the call takes the 32-bit one (total shift 32 or more),
//! the choice is made once per call instead ([`requant_fast`], the same
//! arithmetic, shared with the other kernels in `requant.rs`), with the
//! zero point folded into the rounding term. When
//! the output bounds are the whole int8 range (no activation, or a ReLU6
//! calibrated to `[0, max]`) the clamp is one `ssat`, which also does the
//! final halving: eight instructions per output value on the Cortex-M4
//! (one `ldrd` of the multiplier and shift, two to bring the shift into
//! range, `smmul`, the shift, the zero point, `ssat`, the store) instead
//! of fourteen.
//!
//! Channel counts that are not a multiple of four, dilation, other kernel
//! sizes, a fused input transform, and inputs that interleave with the
//! output (channel views of one concatenation region) keep the gathering
//! path; the results are the same bytes either way
//! (`runtime-nostd/tests/it/depthwise.rs`).

use crate::conv::Window;
use crate::dot::{no_unroll, Wt};
use crate::requant::{fast_requant, requant_fast, Fast};
use crate::{MapRef, OutputQuant, Requant};

/// Taps of the kernel this module handles (3×3).
const TAPS: usize = 9;
/// The tap mask of a pixel whose nine taps all lie inside the map.
const INSIDE: u32 = (1 << TAPS) - 1;
/// True where such pixels cut their taps without the mask (see
/// [`Pixels::group`]): on cores with the DSP extension and on hosts. On
/// the Cortex-M0+ the extra path measured slower (19.53 instructions per
/// MAC for the Howard et al. (2017) layout's depthwise layers against
/// 19.18).
const INTERIOR_CUT: bool = ingot_dsp::NATIVE || !cfg!(target_arch = "arm");
/// Widened weights of one block of four channels: four per tap.
const BLOCK: usize = 4 * TAPS;

/// True when a depthwise convolution (one input and one output channel
/// per group, `c` channels) can run here: a 3×3
/// kernel without dilation, any step and padding, `c` a nonzero multiple
/// of four, no fused input transform, and input and output in separate
/// byte spans of the arena.
pub(crate) const fn applies(
    w: &Window,
    c: usize,
    transform: bool,
    input: &MapRef,
    output: &MapRef,
) -> bool {
    w.kh == 3
        && w.kw == 3
        && w.dilation_y == 1
        && w.dilation_x == 1
        && w.step_x > 0
        && w.step_y > 0
        && !transform
        && c > 0
        && c % 4 == 0
        && split_spans(input, output).is_some()
}

/// Where to cut the arena so that one side holds the whole input and the
/// other the whole output: `Some((at, input_first))`, or `None` when
/// their byte spans overlap (interleaved channel views) or are empty.
const fn split_spans(input: &MapRef, output: &MapRef) -> Option<(usize, bool)> {
    let (ie, oe) = match (input.end(), output.end()) {
        (Some(i), Some(o)) => (i, o),
        _ => return None,
    };
    if ie <= output.offset {
        Some((output.offset, true))
    } else if oe <= input.offset {
        Some((input.offset, false))
    } else {
        None
    }
}

/// Order of a block's four channels among one tap's four widened weights:
/// `(w0, w2)` then `(w1, w3)` for `smlabb`/`smlatt` against the lanes
/// `sxtb16` makes, in channel order for the plain loop.
const ORDER: [usize; 4] = if ingot_dsp::NATIVE {
    [0, 2, 1, 3]
} else {
    [0, 1, 2, 3]
};

/// Widens the weights `[C][9]` into `table`: per block of four channels,
/// per tap, the four weights in [`ORDER`].
fn widen_weights<W: Wt>(weights: &[W], table: &mut [i16]) {
    for (src, dst) in weights
        .chunks_exact(BLOCK)
        .zip(table.chunks_exact_mut(BLOCK))
    {
        let (Ok(src), Ok(dst)) = (
            <&[W; BLOCK]>::try_from(src),
            <&mut [i16; BLOCK]>::try_from(dst),
        ) else {
            return;
        };
        for t in 0..TAPS {
            for (k, &j) in ORDER.iter().enumerate() {
                dst[4 * t + k] = src[j * TAPS + t].v() as i16;
            }
        }
    }
}

/// Output rows `[y0, y1)` of a depthwise 3×3 convolution for which
/// [`applies`] holds: `weights` are `[C][9]`, padded taps read
/// `input_zp`, `table` is the patch scratch (at least `9·C` values).
#[allow(clippy::too_many_arguments)]
pub(crate) fn run<W: Wt>(
    arena: &mut [i8],
    input: &MapRef,
    output: &MapRef,
    w: &Window,
    weights: &[W],
    bias: &[i32],
    requant: &[Requant],
    out_q: OutputQuant,
    input_zp: i8,
    table: &mut [i16],
    y0: usize,
    y1: usize,
) {
    let c = input.c;
    let (Some(table), Some(weights), Some(bias), Some(requant)) = (
        table.get_mut(..TAPS * c),
        weights.get(..TAPS * c),
        bias.get(..c),
        requant.get(..c),
    ) else {
        return;
    };
    widen_weights(weights, table);
    let Some((at, input_first)) = split_spans(input, output) else {
        return;
    };
    let Some((a, b)) = arena.split_at_mut_checked(at) else {
        return;
    };
    // Input indices are arena indices less `src_base`, output ones less
    // `dst_base`.
    let (src, src_base, dst, dst_base) = if input_first {
        (&*a, 0, b, at)
    } else {
        (&*b, at, a, 0)
    };
    let k = Pixels {
        table,
        bias,
        requant,
        out_q,
        c,
        s: input.stride,
        pad: [input_zp; 32],
        fast: fast_requant(requant, out_q),
        taps: TAPS,
    };
    let geo = RowGeometry {
        step_x: w.step_x,
        pad_left: w.pad.left,
        in_w: input.w,
        out_stride: output.stride,
        out_w: output.w,
    };
    for oy in y0..y1 {
        // The input row of each kernel row (index into `src`), or `None`
        // for a padding row.
        let y = oy * w.step_y;
        let rows: [Option<usize>; 3] = core::array::from_fn(|ky| {
            let yy = (y + ky).checked_sub(w.pad.top)?;
            (yy < input.h).then(|| input.row(yy).wrapping_sub(src_base))
        });
        // Tap t = 3·ky + kx of the pixel whose window starts at padded
        // column x reads `src[bases[t] + (x − pad.left)·s]` (wrapping:
        // the sum is in range whenever the tap's column is), if bit t of
        // the row's mask and its column are set.
        let mut bases = [0usize; TAPS];
        let mut mask = 0u32;
        for (t, b) in bases.iter_mut().enumerate() {
            if let Some(Some(r)) = rows.get(t / 3) {
                *b = r.wrapping_add((t % 3) * input.stride);
                mask |= 1 << t;
            }
        }
        let Some(out_row) = output.row(oy).checked_sub(dst_base) else {
            return;
        };
        k.row(src, dst, &bases, mask, &geo, out_row);
    }
}

/// The horizontal geometry every output row shares.
struct RowGeometry {
    step_x: usize,
    pad_left: usize,
    in_w: usize,
    out_stride: usize,
    out_w: usize,
}

/// What every pixel of a call shares.
struct Pixels<'a> {
    /// The widened weights ([`widen_weights`]).
    table: &'a [i16],
    bias: &'a [i32],
    requant: &'a [Requant],
    out_q: OutputQuant,
    /// Channels, input pixel stride.
    c: usize,
    s: usize,
    /// What padded taps read (the input zero point).
    pad: [i8; 32],
    /// The output's finish when every multiplier takes the 32-bit path
    /// of [`Requant::apply`] (see [`fast_requant`]).
    fast: Option<Fast>,
    /// [`TAPS`], read from memory where the tap loop needs it (see
    /// [`Pixels::group`]).
    taps: usize,
}

impl Pixels<'_> {
    /// One output row, its first pixel at `dst[out_row]`; `bases` and
    /// `row_mask` say where its taps read `src` (see [`run`]).
    #[inline(never)]
    fn row(
        &self,
        src: &[i8],
        dst: &mut [i8],
        bases: &[usize; TAPS],
        row_mask: u32,
        g: &RowGeometry,
        out_row: usize,
    ) {
        let (c, s) = (self.c, self.s);
        for ox in 0..g.out_w {
            let x = ox * g.step_x;
            // Bit kx: column x + kx lies inside the map.
            let mut cols = 0u32;
            for kx in 0..3 {
                let inside = (x + kx)
                    .checked_sub(g.pad_left)
                    .is_some_and(|ix| ix < g.in_w);
                cols |= (inside as u32) << kx;
            }
            let mask = row_mask & (cols * 0b001_001_001);
            let off = x.wrapping_sub(g.pad_left).wrapping_mul(s);
            let o = out_row + ox * g.out_stride;
            let Some(out) = dst.get_mut(o..o + c) else {
                return;
            };
            // Thirty-two channels at a time, then sixteen, eight, four.
            let (c32, c16, c8) = (c - c % 32, c - c % 16, c - c % 8);
            let Some((out32, rest)) = out.split_at_mut_checked(c32) else {
                return;
            };
            let Some((out16, rest)) = rest.split_at_mut_checked(c16 - c32) else {
                return;
            };
            let Some((out8, out4)) = rest.split_at_mut_checked(c8 - c16) else {
                return;
            };
            let at = (bases, off, mask);
            self.group::<32>(src, at, 0, out32);
            self.group::<16>(src, at, c32, out16);
            self.group::<8>(src, at, c16, out8);
            self.group::<4>(src, at, c8, out4);
        }
    }

    /// Channels `c0..c0 + out.len()` of one pixel, `G` at a time: the
    /// `G` bytes of every tap are cut from `src` (or the padding) once,
    /// so the blocks of four read them without bounds checks. Tap `t`
    /// reads `src[bases[t] + off + channel]` when bit `t` of `mask` is
    /// set, the padding otherwise.
    #[inline(always)]
    fn group<const G: usize>(
        &self,
        src: &[i8],
        (bases, off, mask): (&[usize; TAPS], usize, u32),
        c0: usize,
        out: &mut [i8],
    ) {
        let Some(pad) = self.pad.first_chunk::<G>() else {
            return;
        };
        for (g, og) in out.chunks_exact_mut(G).enumerate() {
            let ch0 = c0 + g * G;
            let at = off.wrapping_add(ch0);
            let mut taps: [&[i8; G]; TAPS] = [pad; TAPS];
            if INTERIOR_CUT && mask == INSIDE {
                // No padded tap: no mask test per tap, and a check of
                // each tap's start and length (no end that could
                // overflow).
                for (tp, &b) in taps.iter_mut().zip(bases) {
                    let Some(v) = src.get(b.wrapping_add(at)..).and_then(|v| v.first_chunk())
                    else {
                        return;
                    };
                    *tp = v;
                }
            } else {
                for (t, (tp, &b)) in taps.iter_mut().zip(bases).enumerate() {
                    if mask & (1 << t) != 0 {
                        let i = b.wrapping_add(at);
                        let Some(v) = src.get(i..i + G) else {
                            return;
                        };
                        let Ok(v) = <&[i8; G]>::try_from(v) else {
                            return;
                        };
                        *tp = v;
                    }
                }
            }
            let (Some(tg), Some(bg), Some(rg)) = (
                self.table.get(TAPS * ch0..TAPS * (ch0 + G)),
                self.bias.get(ch0..ch0 + G),
                self.requant.get(ch0..ch0 + G),
            ) else {
                return;
            };
            let blocks = og
                .chunks_exact_mut(4)
                .zip(tg.chunks_exact(BLOCK))
                .zip(bg.chunks_exact(4).zip(rg.chunks_exact(4)));
            // The taps as a slice of `self.taps` (always nine) elements:
            // with a length LLVM knows, it unrolls the tap loop below
            // whatever `no_unroll` says, and then runs one accumulator's
            // chain at a time over all nine taps, every input word live
            // at once (spilled to the stack).
            let Some(taps) = taps.get(..self.taps) else {
                return;
            };
            for (b, ((o, wt), (bb, rq))) in blocks.enumerate() {
                let mut acc = [0i32; 4];
                for (j, a) in acc.iter_mut().enumerate() {
                    *a = bb.get(j).copied().unwrap_or(0);
                }
                for (tp, w) in taps.iter().zip(wt.chunks_exact(4)) {
                    no_unroll();
                    let (Some(x), Ok(w)) = (tp.get(4 * b..4 * b + 4), <&[i16; 4]>::try_from(w))
                    else {
                        return;
                    };
                    let Ok(&x) = <&[i8; 4]>::try_from(x) else {
                        return;
                    };
                    tap(&mut acc, x, w);
                }
                if let Some(Fast::Full { k }) = self.fast {
                    for ((o, &a), r) in o.iter_mut().zip(&acc).zip(rq) {
                        // Constant bounds (no panic path): one `ssat`
                        // with the halving.
                        *o = requant_fast(a, r, k).clamp(-128, 127) as i8;
                    }
                } else if let Some(Fast::Clamp { k, lo, hi }) = self.fast {
                    for ((o, &a), r) in o.iter_mut().zip(&acc).zip(rq) {
                        *o = requant_fast(a, r, k).max(lo).min(hi) as i8;
                    }
                } else {
                    for ((o, &a), r) in o.iter_mut().zip(&acc).zip(rq) {
                        *o = r.apply(a, self.out_q);
                    }
                }
            }
        }
    }
}

/// `acc[j] += x[j] · w[j]` for the four channels of one tap, the weights
/// in [`ORDER`].
#[inline(always)]
fn tap(acc: &mut [i32; 4], x: [i8; 4], w: &[i16; 4]) {
    if ingot_dsp::NATIVE {
        let xv = u32::from_le_bytes(x.map(|v| v as u8));
        let (xe, xo) = (ingot_dsp::sxtb16(xv), ingot_dsp::sxtb16_ror8(xv));
        let (p0, p1) = (pair(w[0], w[1]), pair(w[2], w[3]));
        acc[0] = ingot_dsp::smlabb(xe, p0, acc[0]);
        acc[2] = ingot_dsp::smlatt(xe, p0, acc[2]);
        acc[1] = ingot_dsp::smlabb(xo, p1, acc[1]);
        acc[3] = ingot_dsp::smlatt(xo, p1, acc[3]);
    } else {
        for j in 0..4 {
            acc[j] = acc[j].wrapping_add((x[j] as i32).wrapping_mul(w[j] as i32));
        }
    }
}

/// Two 16-bit values in one word, `lo` in the low half.
#[inline(always)]
fn pair(lo: i16, hi: i16) -> u32 {
    (lo as u16 as u32) | ((hi as u16 as u32) << 16)
}
