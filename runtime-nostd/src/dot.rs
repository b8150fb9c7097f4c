//! The inner products every MAC-heavy kernel runs.
//!
//! Two operand forms exist:
//! * [`dot_wide`]: activations already widened to 16 bits (the conv patch,
//!   two bytes per element, little-endian) against int8 weights. The weight
//!   is the only operand that still needs a sign extension in the loop.
//! * [`dot_i8`]: both operands int8 (linear layers read the arena directly).
//!
//! Both are written as fixed-width chunk loops over `chunks_exact` with a
//! lane-array accumulator and a final horizontal sum: no bounds checks in the
//! loop, and LLVM turns it into `pmaddwd` (x86 SSE2) / channel-pair
//! multiply-accumulates. Accumulation wraps in i32; the compiler guarantees
//! it cannot overflow (see [`acc_worst_case`](crate::acc_worst_case)).

/// Reads element `i` of a widened patch.
#[inline(always)]
fn wide_at(xw: &[i8], i: usize) -> i32 {
    i16::from_le_bytes([xw[2 * i] as u8, xw[2 * i + 1] as u8]) as i32
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

/// `Σ x[i]·w[i]` over `w.len()` terms, with `x` stored widened in `xw`
/// (`xw.len() >= 2 * w.len()`).
#[inline(never)]
pub(crate) fn dot_wide(xw: &[i8], w: &[i8]) -> i32 {
    let n = w.len();
    let xw = &xw[..2 * n];
    let mut acc = [0i32; 16];
    let xc = xw.chunks_exact(32);
    let wc = w.chunks_exact(16);
    let (xr, wr) = (xc.remainder(), wc.remainder());
    for (x, w) in xc.zip(wc) {
        for j in 0..16 {
            let xv = i16::from_le_bytes([x[2 * j] as u8, x[2 * j + 1] as u8]) as i32;
            acc[j] = acc[j].wrapping_add(xv.wrapping_mul(w[j] as i32));
        }
    }
    lane_sum(&acc).wrapping_add(tail_wide(xr, wr))
}

/// Two rows at once: `[Σ x·w0, Σ x·w1]` over `w0.len()` terms
/// (`w1.len() >= w0.len()`, `xw.len() >= 2 * w0.len()`).
///
/// Each 16-lane step loads the patch once for both rows. The two
/// per-row inner loops are kept separate (rather than interleaved in one
/// loop body): that is the shape LLVM turns into `pmaddwd` on SSE2.
#[inline(never)]
pub(crate) fn dot2_wide(xw: &[i8], w0: &[i8], w1: &[i8]) -> [i32; 2] {
    let n = w0.len();
    let xw = &xw[..2 * n];
    let w1 = &w1[..n];
    let mut s0 = [0i32; 16];
    let mut s1 = [0i32; 16];
    let xc = xw.chunks_exact(32);
    let ac = w0.chunks_exact(16);
    let bc = w1.chunks_exact(16);
    let (xr, ar, br) = (xc.remainder(), ac.remainder(), bc.remainder());
    for ((x, a), b) in xc.zip(ac).zip(bc) {
        for j in 0..16 {
            let xv = i16::from_le_bytes([x[2 * j] as u8, x[2 * j + 1] as u8]) as i32;
            s0[j] = s0[j].wrapping_add(xv.wrapping_mul(a[j] as i32));
        }
        for j in 0..16 {
            let xv = i16::from_le_bytes([x[2 * j] as u8, x[2 * j + 1] as u8]) as i32;
            s1[j] = s1[j].wrapping_add(xv.wrapping_mul(b[j] as i32));
        }
    }
    [
        lane_sum(&s0).wrapping_add(tail_wide(xr, ar)),
        lane_sum(&s1).wrapping_add(tail_wide(xr, br)),
    ]
}

/// Scalar tail (fewer than 16 terms), in channel pairs.
#[inline(always)]
fn tail_wide(xr: &[i8], wr: &[i8]) -> i32 {
    let mut total: i32 = 0;
    for (x, w) in xr.chunks_exact(4).zip(wr.chunks_exact(2)) {
        let a = (i16::from_le_bytes([x[0] as u8, x[1] as u8]) as i32).wrapping_mul(w[0] as i32);
        let b = (i16::from_le_bytes([x[2] as u8, x[3] as u8]) as i32).wrapping_mul(w[1] as i32);
        total = total.wrapping_add(a.wrapping_add(b));
    }
    if wr.len() % 2 == 1 {
        let k = wr.len() - 1;
        total = total.wrapping_add(wide_at(xr, k).wrapping_mul(wr[k] as i32));
    }
    total
}

/// `Σ x[i]·w[i]` over `min(x.len(), w.len())` int8 terms.
#[inline]
pub(crate) fn dot_i8(x: &[i8], w: &[i8]) -> i32 {
    let n = x.len().min(w.len());
    let (x, w) = (&x[..n], &w[..n]);
    let mut acc = [0i32; 16];
    let xc = x.chunks_exact(16);
    let wc = w.chunks_exact(16);
    let (xr, wr) = (xc.remainder(), wc.remainder());
    for (x, w) in xc.zip(wc) {
        let x: &[i8; 16] = x.try_into().unwrap_or(&[0; 16]);
        let w: &[i8; 16] = w.try_into().unwrap_or(&[0; 16]);
        for j in 0..16 {
            acc[j] = acc[j].wrapping_add((x[j] as i32).wrapping_mul(w[j] as i32));
        }
    }
    let mut total: i32 = 0;
    for a in acc {
        total = total.wrapping_add(a);
    }
    for (&a, &b) in xr.iter().zip(wr) {
        total = total.wrapping_add((a as i32).wrapping_mul(b as i32));
    }
    total
}

/// Writes `v` widened to 16 bits into `dst[0..2]` (little-endian).
#[inline(always)]
pub(crate) fn put_wide(dst: &mut [i8], v: i8) {
    let b = (v as i16).to_le_bytes();
    dst[0] = b[0] as i8;
    dst[1] = b[1] as i8;
}

/// Widens every element of `src` into `dst` (`dst.len() >= 2 * src.len()`).
#[inline(always)]
pub(crate) fn widen_into(dst: &mut [i8], src: &[i8]) {
    for (d, &s) in dst.chunks_exact_mut(2).zip(src) {
        let b = (s as i16).to_le_bytes();
        d[0] = b[0] as i8;
        d[1] = b[1] as i8;
    }
}

/// Fills `dst` (an even number of bytes) with the widened value `v`.
#[inline(always)]
pub(crate) fn fill_wide(dst: &mut [i8], v: i8) {
    let b = (v as i16).to_le_bytes();
    for d in dst.chunks_exact_mut(2) {
        d[0] = b[0] as i8;
        d[1] = b[1] as i8;
    }
}
