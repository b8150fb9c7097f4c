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
#[inline(always)]
fn step16(s: &mut [i32; 16], x: &[i16], w: &[i8]) {
    for j in 0..16 {
        s[j] = s[j].wrapping_add((x[j] as i32).wrapping_mul(w[j] as i32));
    }
}

/// `Σ x[i]·w[i]` over `w.len()` terms (`x.len() >= w.len()`).
#[inline(never)]
pub(crate) fn dot_wide(x: &[i16], w: &[i8]) -> i32 {
    let n = w.len();
    let x = &x[..n];
    let mut s = [0i32; 16];
    for (xc, wc) in x.chunks_exact(16).zip(w.chunks_exact(16)) {
        step16(&mut s, xc, wc);
    }
    let full = n - n % 16;
    let t = if full < n {
        tail_wide(&x[full..], &w[full..])
    } else {
        0
    };
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
#[inline(never)]
pub(crate) fn dot2_wide(x0: &[i16], x1: &[i16], w0: &[i8], w1: &[i8]) -> [i32; 2] {
    let n = w0.len();
    let x0 = &x0[..n];
    let x1 = &x1[..n];
    let w1 = &w1[..n];
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

/// Scalar dot product for short runs (tails, depthwise windows), in
/// channel pairs.
#[inline(never)]
pub(crate) fn tail_wide(x: &[i16], w: &[i8]) -> i32 {
    let mut total: i32 = 0;
    let xc = x.chunks_exact(2);
    let wc = w.chunks_exact(2);
    let (xr, wr) = (xc.remainder(), wc.remainder());
    for (x, w) in xc.zip(wc) {
        let a = (x[0] as i32).wrapping_mul(w[0] as i32);
        let b = (x[1] as i32).wrapping_mul(w[1] as i32);
        total = total.wrapping_add(a.wrapping_add(b));
    }
    if let (Some(&a), Some(&b)) = (xr.first(), wr.first()) {
        total = total.wrapping_add((a as i32).wrapping_mul(b as i32));
    }
    total
}

/// `Σ x[i]·w[i]` over `min(x.len(), w.len())` int8 terms.
#[inline(never)]
pub(crate) fn dot_i8(x: &[i8], w: &[i8]) -> i32 {
    let n = x.len().min(w.len());
    let (x, w) = (&x[..n], &w[..n]);
    let mut acc = [0i32; 16];
    for (xc, wc) in x.chunks_exact(16).zip(w.chunks_exact(16)) {
        for j in 0..16 {
            acc[j] = acc[j].wrapping_add((xc[j] as i32).wrapping_mul(wc[j] as i32));
        }
    }
    let mut total = lane_sum(&acc);
    let full = n - n % 16;
    for (&a, &b) in x[full..].iter().zip(&w[full..]) {
        total = total.wrapping_add((a as i32).wrapping_mul(b as i32));
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
