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

/// Four rows at once, same contract as [`dot2_wide`] with four patch
/// slices (all the same patch in practice) and four weight rows.
#[inline(never)]
pub(crate) fn dot4_wide(x: [&[i16]; 4], w: [&[i8]; 4]) -> [i32; 4] {
    let n = w[0].len();
    let (x0, x1, x2, x3) = (&x[0][..n], &x[1][..n], &x[2][..n], &x[3][..n]);
    let (w0, w1, w2, w3) = (w[0], &w[1][..n], &w[2][..n], &w[3][..n]);
    let mut s0 = [0i32; 16];
    let mut s1 = [0i32; 16];
    let mut s2 = [0i32; 16];
    let mut s3 = [0i32; 16];
    let m = n / 16;
    let (x0, x1, x2, x3) = (&x0[..m * 16], &x1[..m * 16], &x2[..m * 16], &x3[..m * 16]);
    let (w0, w1, w2, w3) = (&w0[..m * 16], &w1[..m * 16], &w2[..m * 16], &w3[..m * 16]);
    for i in 0..m {
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
