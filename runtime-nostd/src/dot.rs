//! The inner products every MAC-heavy kernel runs.
//!
//! Two operand forms exist:
//! * [`dot_wide`] / [`dot2_wide`]: activations already widened to `i16` (the
//!   convolution patch) against int8 weights. The weight is the only
//!   operand that still needs a sign extension in the loop.
//! * [`dot_i8`]: both operands int8 (linear layers read the arena directly).
//!
//! They are written as fixed-width chunk loops over `chunks_exact` with a
//! 16-lane accumulator array and one horizontal sum at the end: no bounds
//! checks in the loop, and LLVM turns the `i16 × i8 → i32` lanes into
//! `pmaddwd` on x86 SSE2 (eight products summed pairwise into four i32
//! lanes per instruction). Accumulation wraps in i32; the compiler
//! guarantees it cannot overflow (see [`acc_worst_case`](crate::acc_worst_case)).
//!
//! On Arm (Cortex-M) that shape is wrong: there is no SIMD unit for the
//! lanes, so sixteen accumulators per row spill to the stack and every MAC
//! becomes a load, a multiply-accumulate and a store. There the
//! [`scalar`] forms are used: one accumulator per row, the patch value
//! loaded once for all rows, two terms per iteration, so each MAC is a
//! byte load and an `smlabb` plus a shared halfword load and loop step.
//! Both forms compute the same wrapping sums (a unit test compares them).

#[cfg(target_arch = "arm")]
pub(crate) use scalar::{dot2_wide, dot4_wide, dot_wide};

/// An int8 weight as the kernels read it: an `i8`, or the byte of the
/// weights file that holds it (two's complement), so generated modules can
/// pass the file's bytes as they are. Both read as one sign-extending byte
/// load.
pub(crate) trait Wt: Copy {
    /// The weight's value.
    fn v(self) -> i32;
    /// The weight's byte (two's complement), for word loads.
    fn byte(self) -> u8;
}

impl Wt for i8 {
    #[inline(always)]
    fn v(self) -> i32 {
        self as i32
    }
    #[inline(always)]
    fn byte(self) -> u8 {
        self as u8
    }
}

impl Wt for u8 {
    #[inline(always)]
    fn v(self) -> i32 {
        self as i8 as i32
    }
    #[inline(always)]
    fn byte(self) -> u8 {
        self
    }
}

/// Sums the lanes of an accumulator array.
#[inline(always)]
fn lane_sum(acc: &[i32; 16]) -> i32 {
    let mut t: i32 = 0;
    for &a in acc {
        t = t.wrapping_add(a);
    }
    t
}

/// One 16-lane step: `s[j] += x[j] · w[j]`.
#[cfg(not(target_arch = "arm"))]
#[inline(always)]
fn step16<W: Wt>(s: &mut [i32; 16], x: &[i16], w: &[W]) {
    for j in 0..16 {
        s[j] = s[j].wrapping_add((x[j] as i32).wrapping_mul(w[j].v()));
    }
}

/// `Σ x[i]·w[i]` over `w.len()` terms (`x.len() >= w.len()`).
#[cfg(not(target_arch = "arm"))]
#[inline(never)]
pub(crate) fn dot_wide<W: Wt>(x: &[i16], w: &[W]) -> i32 {
    let n = w.len();
    let Some(x) = x.get(..n) else {
        return 0;
    };
    let mut s = [0i32; 16];
    let (xc, wc) = (x.chunks_exact(16), w.chunks_exact(16));
    let (xr, wr) = (xc.remainder(), wc.remainder());
    for (xc, wc) in xc.zip(wc) {
        step16(&mut s, xc, wc);
    }
    let t = if !wr.is_empty() { tail_wide(xr, wr) } else { 0 };
    lane_sum(&s).wrapping_add(t)
}

/// Two rows at once: `[Σ x0·w0, Σ x1·w1]` over the first `16·⌊n/16⌋` of
/// the `n = w0.len()` terms; the caller adds [`tail_wide`] for the rest
/// (`w1`, `x0`, `x1` at least `n` long).
///
/// The convolution passes the same patch as `x0` and `x1`. Taking two
/// slices keeps the two rows' expression trees independent, so LLVM's SLP
/// vectorizer costs each row like the single-row loop (and emits
/// `pmaddwd`), while the pair shares the loop overhead and the call.
#[cfg(not(target_arch = "arm"))]
#[inline(never)]
pub(crate) fn dot2_wide<W: Wt>(x0: &[i16], x1: &[i16], w0: &[W], w1: &[W]) -> [i32; 2] {
    let n = w0.len();
    let (Some(x0), Some(x1), Some(w1)) = (x0.get(..n), x1.get(..n), w1.get(..n)) else {
        return [0; 2];
    };
    let mut s0 = [0i32; 16];
    let mut s1 = [0i32; 16];
    for (((xa, xb), a), b) in x0
        .chunks_exact(16)
        .zip(x1.chunks_exact(16))
        .zip(w0.chunks_exact(16))
        .zip(w1.chunks_exact(16))
    {
        step16(&mut s0, xa, a);
        step16(&mut s1, xb, b);
    }
    [lane_sum(&s0), lane_sum(&s1)]
}

/// Four rows at once, same contract as [`dot2_wide`] with four patch
/// slices (all the same patch in practice) and four weight rows.
#[cfg(not(target_arch = "arm"))]
#[inline(never)]
pub(crate) fn dot4_wide<W: Wt>(x: [&[i16]; 4], w: [&[W]; 4]) -> [i32; 4] {
    let n = w[0].len() / 16 * 16;
    let (Some(x0), Some(x1), Some(x2), Some(x3)) =
        (x[0].get(..n), x[1].get(..n), x[2].get(..n), x[3].get(..n))
    else {
        return [0; 4];
    };
    let (Some(w0), Some(w1), Some(w2), Some(w3)) =
        (w[0].get(..n), w[1].get(..n), w[2].get(..n), w[3].get(..n))
    else {
        return [0; 4];
    };
    let mut s0 = [0i32; 16];
    let mut s1 = [0i32; 16];
    let mut s2 = [0i32; 16];
    let mut s3 = [0i32; 16];
    // Host only (Arm uses `scalar`): the indexed form is the one the SLP
    // vectorizer turns into `pmaddwd`; its bounds checks fold away.
    for i in 0..n / 16 {
        let r = i * 16..i * 16 + 16;
        step16(&mut s0, &x0[r.clone()], &w0[r.clone()]);
        step16(&mut s1, &x1[r.clone()], &w1[r.clone()]);
        step16(&mut s2, &x2[r.clone()], &w2[r.clone()]);
        step16(&mut s3, &x3[r.clone()], &w3[r]);
    }
    [lane_sum(&s0), lane_sum(&s1), lane_sum(&s2), lane_sum(&s3)]
}

/// Scalar dot product for short runs (tails, depthwise windows), in
/// channel pairs.
#[inline(never)]
pub(crate) fn tail_wide<W: Wt>(x: &[i16], w: &[W]) -> i32 {
    let mut total: i32 = 0;
    let xc = x.chunks_exact(2);
    let wc = w.chunks_exact(2);
    let (xr, wr) = (xc.remainder(), wc.remainder());
    for (x, w) in xc.zip(wc) {
        let a = (x[0] as i32).wrapping_mul(w[0].v());
        let b = (x[1] as i32).wrapping_mul(w[1].v());
        total = total.wrapping_add(a.wrapping_add(b));
    }
    if let (Some(&a), Some(&b)) = (xr.first(), wr.first()) {
        total = total.wrapping_add((a as i32).wrapping_mul(b.v()));
    }
    total
}

/// `Σ x[i]·w[i]` over `min(x.len(), w.len())` int8 terms.
#[inline(never)]
pub(crate) fn dot_i8<W: Wt>(x: &[i8], w: &[W]) -> i32 {
    let n = x.len().min(w.len());
    let (Some(x), Some(w)) = (x.get(..n), w.get(..n)) else {
        return 0;
    };
    let mut acc = [0i32; 16];
    let (xc, wc) = (x.chunks_exact(16), w.chunks_exact(16));
    let (xr, wr) = (xc.remainder(), wc.remainder());
    for (xc, wc) in xc.zip(wc) {
        for j in 0..16 {
            acc[j] = acc[j].wrapping_add((xc[j] as i32).wrapping_mul(wc[j].v()));
        }
    }
    let mut total = lane_sum(&acc);
    for (&a, &b) in xr.iter().zip(wr) {
        total = total.wrapping_add((a as i32).wrapping_mul(b.v()));
    }
    total
}

/// Widens every element of `src` into `dst` (`dst.len() >= src.len()`).
#[inline(always)]
pub(crate) fn widen_into(dst: &mut [i16], src: &[i8]) {
    for (d, &s) in dst.iter_mut().zip(src) {
        *d = s as i16;
    }
}

/// Two `i16` values as one word, the first in the low half (one unaligned
/// 32-bit load on Cortex-M4/M7; the halves feed `smlabb`/`smlatt`).
#[inline(always)]
pub(crate) fn word(lo: i16, hi: i16) -> u32 {
    (lo as u16 as u32) | ((hi as u16 as u32) << 16)
}

/// The two signed 16-bit halves of a word, low first (the shapes LLVM
/// maps onto the bottom/top operand selection of `smlabb` and friends).
#[inline(always)]
fn halves(v: u32) -> (i32, i32) {
    (((v << 16) as i32) >> 16, (v as i32) >> 16)
}

/// `acc + lo(x)·lo(w) + hi(x)·hi(w)`, each half a signed 16-bit value,
/// wrapping: one `smlad` on cores with the DSP extension (two MACs per
/// instruction), its portable twin elsewhere (see `ingot-dsp`).
#[inline(always)]
fn mac_pair(acc: i32, x: u32, w: u32) -> i32 {
    ingot_dsp::smlad(x, w, acc)
}

/// Keeps LLVM from unrolling the loop it sits in, on Arm only. On
/// M-profile cores LLVM unrolls small loops by two or four; in loops with
/// many live values (four accumulators and five words here, six constants
/// and four pointers in the affine transform) the copies spill to the
/// stack: the paired loop measured 38 instructions per 16 MACs unrolled,
/// 14 per 8 rolled; the transform 99 per 4 values unrolled, 19 per value
/// rolled. An opaque zero-sized value is an empty inline-asm statement: no
/// instruction, but the loop now holds a call, which the unroller leaves
/// alone. Not used on other targets: it would also stop vectorisation.
#[inline(always)]
pub(crate) fn no_unroll() {
    #[cfg(target_arch = "arm")]
    core::hint::black_box(());
}

/// Four weight rows in the paired layout (see
/// [`pair_rows`](crate::pair_rows)) against the patch `x`: `w` holds, for
/// every column pair `p < x.len() / 2`, one word of each of the four rows.
#[inline(never)]
pub(crate) fn dot4_pairs(x: &[i16], w: &[u32]) -> [i32; 4] {
    let (mut a, mut b, mut c, mut d) = (0i32, 0i32, 0i32, 0i32);
    for (xp, q) in x.chunks_exact(2).zip(w.chunks_exact(4)) {
        no_unroll();
        let xv = word(xp[0], xp[1]);
        a = mac_pair(a, xv, q[0]);
        b = mac_pair(b, xv, q[1]);
        c = mac_pair(c, xv, q[2]);
        d = mac_pair(d, xv, q[3]);
    }
    [a, b, c, d]
}

/// `acc.len()` (1 to 3) rows in the paired layout, as [`dot4_pairs`] with a
/// block of `acc.len()` rows; adds into `acc`.
#[inline(never)]
pub(crate) fn dot_pairs_few(x: &[i16], w: &[u32], acc: &mut [i32]) {
    let m = acc.len();
    if m == 0 {
        return;
    }
    for (xp, q) in x.chunks_exact(2).zip(w.chunks_exact(m)) {
        let xv = word(xp[0], xp[1]);
        for (s, &wv) in acc.iter_mut().zip(q) {
            *s = mac_pair(*s, xv, wv);
        }
    }
}

/// One word of the word layout (see [`word_rows_into`](crate::word_rows_into)):
/// four int8 weights stored as bytes `[w0, w2, w1, w3]`, read as one
/// little-endian 32-bit load.
#[inline(always)]
fn load_word(b: &[u8; 4]) -> u32 {
    u32::from_le_bytes(*b)
}

/// The little-endian word at byte `i` of a chunk of sixteen (constant
/// indices: no bounds check, one load).
#[inline(always)]
fn word_at(q: &[u8; 16], i: usize) -> u32 {
    u32::from_le_bytes([q[i], q[i + 1], q[i + 2], q[i + 3]])
}

/// `acc + x01·(w0, w1) + x23·(w2, w3)` for one stored word `wv` of the
/// word layout: `sxtb16` widens bytes 0 and 2 (`w0`, `w1`) into the two
/// 16-bit lanes, `sxtb16` with `ror #8` bytes 1 and 3 (`w2`, `w3`), so the
/// lanes line up with the patch pairs `(x0, x1)` and `(x2, x3)` and each
/// feeds one `smlad`. Four MACs for one load, two widenings and two
/// multiply-accumulates.
#[inline(always)]
fn mac_quad(acc: i32, x01: u32, x23: u32, wv: u32) -> i32 {
    let acc = mac_pair(acc, x01, ingot_dsp::sxtb16(wv));
    mac_pair(acc, x23, ingot_dsp::sxtb16_ror8(wv))
}

/// The patch values `x[0..4]` as two words of two `i16`, zeros past the
/// end of `x` (the last, partial quad of a row meets zero weights there).
#[inline(always)]
fn quad_words(x: &[i16]) -> (u32, u32) {
    let at = |i: usize| x.get(i).copied().unwrap_or(0);
    (word(at(0), at(1)), word(at(2), at(3)))
}

/// Four weight rows in the word layout (see
/// [`word_rows_into`](crate::word_rows_into)) against the patch `x`: `w` holds, for
/// every quad `q < ⌈x.len() / 4⌉` of patch elements, one word (four
/// bytes) of each of the four rows. A last partial quad of `x` is padded
/// with zeros (its weights are zero there too). Adds the four sums into
/// `acc`: a caller summing several calls (one per kernel row) then keeps
/// its accumulators in memory the callee reads and writes once, instead
/// of copying a returned array back and adding it per call.
#[inline(never)]
pub(crate) fn dot4_words(x: &[i16], w: &[u8], acc: &mut [i32; 4]) {
    let [mut a, mut b, mut c, mut d] = *acc;
    let full = (x.len() / 4).min(w.len() / 16);
    let (Some(mut xs), Some(mut ws)) = (x.get(..4 * full), w.get(..16 * full)) else {
        return;
    };
    // Both slices shrink from the front (one pointer each, one count),
    // and an empty inline-asm statement between the rows keeps LLVM from
    // loading all four weight words first: with the loads hoisted, the
    // loop needed more registers than the core has and spilled two to
    // four accumulators per pass (31 instructions per 16 MACs, 24 now:
    // `arm-none-eabi-objdump -d` for thumbv7em, in the `ingot-rt` rlib
    // and in the LTO firmware of `check --on m4` alike). Combining the
    // patch halves into words also needs the patch read through its own
    // pointer, not an index shared with the weights. The loop is driven
    // by the weights alone, the patch split inside: testing both splits
    // in the loop condition cost two more instructions per pass (a copy
    // and a compare besides the count's `adds`/`bne`).
    while let Some((q, wr)) = ws.split_first_chunk::<16>() {
        let Some((xq, xr)) = xs.split_first_chunk::<4>() else {
            break;
        };
        no_unroll();
        (xs, ws) = (xr, wr);
        let [x0, x1, x2, x3] = *xq;
        let (x01, x23) = (word(x0, x1), word(x2, x3));
        a = mac_quad(a, x01, x23, word_at(q, 0));
        no_unroll();
        b = mac_quad(b, x01, x23, word_at(q, 4));
        no_unroll();
        c = mac_quad(c, x01, x23, word_at(q, 8));
        no_unroll();
        d = mac_quad(d, x01, x23, word_at(q, 12));
    }
    // A last, partial quad of patch elements.
    let tail = x.get(4 * full..).unwrap_or(&[]);
    if !tail.is_empty() {
        if let Some(Ok(q)) = w.get(16 * full..16 * full + 16).map(<&[u8; 16]>::try_from) {
            let (x01, x23) = quad_words(tail);
            a = mac_quad(a, x01, x23, word_at(q, 0));
            b = mac_quad(b, x01, x23, word_at(q, 4));
            c = mac_quad(c, x01, x23, word_at(q, 8));
            d = mac_quad(d, x01, x23, word_at(q, 12));
        }
    }
    *acc = [a, b, c, d];
}

/// `acc.len()` (1 to 3) rows in the word layout, as [`dot4_words`] with a
/// block of `acc.len()` rows; adds into `acc`.
#[inline(never)]
pub(crate) fn dot_words_few(x: &[i16], w: &[u8], acc: &mut [i32]) {
    let m = acc.len();
    if m == 0 {
        return;
    }
    let mut ws = w.chunks_exact((4 * m).max(1));
    for xq in x.chunks(4) {
        let Some(q) = ws.next() else {
            return;
        };
        let (x01, x23) = quad_words(xq);
        for (s, wb) in acc.iter_mut().zip(q.chunks_exact(4)) {
            if let Ok(wb) = <&[u8; 4]>::try_from(wb) {
                *s = mac_quad(*s, x01, x23, load_word(wb));
            }
        }
    }
}

/// Register-friendly forms for cores without SIMD lanes (used on Arm; also
/// compiled on the host so their results can be compared with the lane
/// forms). Same contracts as the lane forms, except that [`dot4_wide`] and
/// [`dot2_wide`] read the patch once for every row: all `x` slices must be
/// the same patch, as the convolution passes them.
#[cfg_attr(not(target_arch = "arm"), allow(dead_code))]
pub(crate) mod scalar {
    use super::Wt;

    /// See [`super::dot_wide`] (all `w.len()` terms).
    #[inline(never)]
    pub(crate) fn dot_wide<W: Wt>(x: &[i16], w: &[W]) -> i32 {
        let Some(x) = x.get(..w.len()) else {
            return 0;
        };
        let (mut a, mut b) = (0i32, 0i32);
        let (xc, wc) = (x.chunks_exact(2), w.chunks_exact(2));
        let tail = match (xc.remainder(), wc.remainder()) {
            (&[xv], &[wv]) => (xv as i32).wrapping_mul(wv.v()),
            _ => 0,
        };
        for (xp, wp) in xc.zip(wc) {
            a = a.wrapping_add((xp[0] as i32).wrapping_mul(wp[0].v()));
            b = b.wrapping_add((xp[1] as i32).wrapping_mul(wp[1].v()));
        }
        a.wrapping_add(b).wrapping_add(tail)
    }

    /// See [`super::dot2_wide`]; `x1` must be `x0`.
    #[inline(never)]
    pub(crate) fn dot2_wide<W: Wt>(x0: &[i16], x1: &[i16], w0: &[W], w1: &[W]) -> [i32; 2] {
        debug_assert!(core::ptr::eq(x0, x1));
        let _ = x1;
        let n = w0.len() - w0.len() % 16;
        let (Some(x), Some(w0), Some(w1)) = (x0.get(..n), w0.get(..n), w1.get(..n)) else {
            return [0; 2];
        };
        let (mut a, mut b) = (0i32, 0i32);
        for ((xp, p), q) in x
            .chunks_exact(2)
            .zip(w0.chunks_exact(2))
            .zip(w1.chunks_exact(2))
        {
            let (x0, x1) = (xp[0] as i32, xp[1] as i32);
            a = a
                .wrapping_add(x0.wrapping_mul(p[0].v()))
                .wrapping_add(x1.wrapping_mul(p[1].v()));
            b = b
                .wrapping_add(x0.wrapping_mul(q[0].v()))
                .wrapping_add(x1.wrapping_mul(q[1].v()));
        }
        [a, b]
    }

    /// See [`super::dot4_wide`]; all four `x` must be the same patch.
    ///
    /// Two patch values travel in one 32-bit word, so each pair costs one
    /// load for all four rows, and the halves feed `smlabb`/`smlatb`
    /// directly.
    #[inline(never)]
    pub(crate) fn dot4_wide<W: Wt>(x: [&[i16]; 4], w: [&[W]; 4]) -> [i32; 4] {
        debug_assert!(x.iter().all(|v| core::ptr::eq(*v, x[0])));
        let n = w[0].len() - w[0].len() % 16;
        let (Some(xs), Some(w0), Some(w1), Some(w2), Some(w3)) = (
            x[0].get(..n),
            w[0].get(..n),
            w[1].get(..n),
            w[2].get(..n),
            w[3].get(..n),
        ) else {
            return [0; 4];
        };
        let (mut a, mut b, mut c, mut d) = (0i32, 0i32, 0i32, 0i32);
        for ((((xp, p), q), r), t) in xs
            .chunks_exact(2)
            .zip(w0.chunks_exact(2))
            .zip(w1.chunks_exact(2))
            .zip(w2.chunks_exact(2))
            .zip(w3.chunks_exact(2))
        {
            let (lo, hi) = super::halves(super::word(xp[0], xp[1]));
            a = a
                .wrapping_add(lo.wrapping_mul(p[0].v()))
                .wrapping_add(hi.wrapping_mul(p[1].v()));
            b = b
                .wrapping_add(lo.wrapping_mul(q[0].v()))
                .wrapping_add(hi.wrapping_mul(q[1].v()));
            c = c
                .wrapping_add(lo.wrapping_mul(r[0].v()))
                .wrapping_add(hi.wrapping_mul(r[1].v()));
            d = d
                .wrapping_add(lo.wrapping_mul(t[0].v()))
                .wrapping_add(hi.wrapping_mul(t[1].v()));
        }
        [a, b, c, d]
    }
}

#[cfg(all(test, not(target_arch = "arm")))]
mod tests {
    use super::*;

    const MAX: usize = 433;

    /// Deterministic values covering the int8/int16 extremes.
    fn data(seed: u32) -> ([i16; MAX], [[i8; MAX]; 4]) {
        let mut s = seed;
        let mut next = move || {
            s ^= s << 13;
            s ^= s >> 17;
            s ^= s << 5;
            s
        };
        let mut x = [0i16; MAX];
        for (i, v) in x.iter_mut().enumerate() {
            *v = match i % 7 {
                0 => i16::MIN,
                1 => 255,
                _ => (next() >> 16) as i16 % 300,
            };
        }
        let mut w = [[0i8; MAX]; 4];
        for (r, row) in w.iter_mut().enumerate() {
            for (i, v) in row.iter_mut().enumerate() {
                *v = if (i + r) % 5 == 0 {
                    -128
                } else {
                    (next() >> 24) as i8
                };
            }
        }
        (x, w)
    }

    #[test]
    fn scalar_forms_equal_lane_forms() {
        for n in [0, 1, 2, 15, 16, 17, 31, 32, 48, 72, 144, MAX] {
            let (x, w) = data(0x1234_5678 ^ n as u32);
            let x = &x[..n];
            let (a, b, c, d) = (&w[0][..n], &w[1][..n], &w[2][..n], &w[3][..n]);
            assert_eq!(scalar::dot_wide(x, a), dot_wide(x, a), "n={n}");
            assert_eq!(
                scalar::dot2_wide(x, x, a, b),
                dot2_wide(x, x, a, b),
                "n={n}"
            );
            assert_eq!(
                scalar::dot4_wide([x, x, x, x], [a, b, c, d]),
                dot4_wide([x, x, x, x], [a, b, c, d]),
                "n={n}"
            );
        }
    }

    /// `dot4_words` adds each row's sum into what `acc` held: several
    /// calls (one per kernel row) sum like one over the joined patch. The
    /// reference is the plain i32 wrapping sum of products (common
    /// practice); the layout is `word_rows_into`'s, padded quads included.
    #[test]
    fn words_add_into_the_accumulators() {
        for n in [1, 3, 4, 5, 16, 27, 48, 145] {
            let (x, w) = data(0x9e37_79b9 ^ n as u32);
            let x = &x[..n];
            let mut rows = [0i8; 4 * MAX];
            for (r, row) in w.iter().enumerate() {
                rows[r * n..(r + 1) * n].copy_from_slice(&row[..n]);
            }
            let mut packed = [0u8; 4 * (MAX + 3)];
            let len = crate::words_len(4, n);
            crate::word_rows_into(&rows[..4 * n], 4, n, &mut packed[..len]).unwrap();
            let start = [7, -1_000_000, i32::MAX, i32::MIN];
            let mut acc = start;
            dot4_words(x, &packed[..len], &mut acc);
            for r in 0..4 {
                let sum = x.iter().zip(&w[r][..n]).fold(start[r], |s, (&a, &b)| {
                    s.wrapping_add(i32::from(a) * i32::from(b))
                });
                assert_eq!(acc[r], sum, "n={n} row {r}");
            }
        }
    }
}
