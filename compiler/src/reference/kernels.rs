//! f32 kernels of the reference, on CHW maps of one image.

use crate::graph::{Conv2d, Linear, Pool2d, Shape};

/// True unless the convolution is a plain 1x1, stride 1, unpadded product,
/// which reads its input as the GEMM right-hand side directly.
pub(super) fn conv_needs_im2col(c: &Conv2d) -> bool {
    !(c.kernel == [1, 1] && c.stride == [1, 1] && c.padding.is_zero())
}

/// The valid output range `[lo, hi)` along one axis for kernel tap offset
/// `tap` (already multiplied by the dilation): outputs `o` whose input index
/// `o * stride + tap - pad_lo` lies in `[0, input)`.
fn valid_range(
    out_len: usize,
    input: usize,
    stride: usize,
    tap: usize,
    pad_lo: usize,
) -> (usize, usize) {
    // o * stride + tap >= pad_lo
    let lo = if pad_lo > tap {
        (pad_lo - tap).div_ceil(stride)
    } else {
        0
    };
    // o * stride + tap - pad_lo <= input - 1  <=>  o * stride <= input - 1 + pad_lo - tap
    let hi = match (input + pad_lo).checked_sub(tap + 1) {
        Some(lim) => (lim / stride + 1).min(out_len),
        None => 0,
    };
    (lo.min(hi), hi)
}

/// Convolution as one GEMM per group: `out[g] = W[g] * im2col(x[g]) + bias`.
pub(super) fn conv2d(
    c: &Conv2d,
    x: &[f32],
    xs: Shape,
    out: &mut [f32],
    os: Shape,
    scratch: &mut [f32],
) {
    let [kh, kw] = c.kernel;
    let [sh, sw] = c.stride;
    let [dh, dw] = c.dilation;
    let p = c.padding;
    let cig = c.in_channels / c.groups;
    let cog = c.out_channels / c.groups;
    let k = cig * kh * kw;
    let n = os.pixels();
    let in_px = xs.pixels();
    // Start from the bias (or zero) and accumulate with beta = 1.
    for (o, chunk) in out.chunks_exact_mut(n).enumerate() {
        chunk.fill(c.bias.as_ref().map_or(0.0, |b| b.data[o]));
    }
    let direct = !conv_needs_im2col(c);
    for g in 0..c.groups {
        let xg = &x[g * cig * in_px..(g + 1) * cig * in_px];
        let b: &[f32] = if direct {
            xg
        } else {
            let col = &mut scratch[..k * n];
            for ci in 0..cig {
                let plane = &xg[ci * in_px..(ci + 1) * in_px];
                for ky in 0..kh {
                    let (oy_lo, oy_hi) = valid_range(os.h, xs.h, sh, ky * dh, p.top);
                    for kx in 0..kw {
                        let row = &mut col[((ci * kh + ky) * kw + kx) * n..][..n];
                        let (ox_lo, ox_hi) = valid_range(os.w, xs.w, sw, kx * dw, p.left);
                        for oy in 0..os.h {
                            let dst = &mut row[oy * os.w..(oy + 1) * os.w];
                            if oy < oy_lo || oy >= oy_hi || ox_lo >= ox_hi {
                                dst.fill(0.0);
                                continue;
                            }
                            let iy = oy * sh + ky * dh - p.top;
                            let src = &plane[iy * xs.w..(iy + 1) * xs.w];
                            dst[..ox_lo].fill(0.0);
                            dst[ox_hi..].fill(0.0);
                            let ix0 = ox_lo * sw + kx * dw - p.left;
                            if sw == 1 {
                                dst[ox_lo..ox_hi].copy_from_slice(&src[ix0..ix0 + (ox_hi - ox_lo)]);
                            } else {
                                for (j, d) in dst[ox_lo..ox_hi].iter_mut().enumerate() {
                                    *d = src[ix0 + j * sw];
                                }
                            }
                        }
                    }
                }
            }
            col
        };
        let a = &c.weight.data[g * cog * k..(g + 1) * cog * k];
        let cg = &mut out[g * cog * n..(g + 1) * cog * n];
        gemm(cog, k, n, a, b, cg);
    }
}

/// `c += a * b` for row-major `a` `[m, k]`, `b` `[k, n]`, `c` `[m, n]`.
fn gemm(m: usize, k: usize, n: usize, a: &[f32], b: &[f32], c: &mut [f32]) {
    assert!(a.len() >= m * k && b.len() >= k * n && c.len() >= m * n);
    // SAFETY: the assertion above keeps every access of the row-major
    // operands (strides k/1, n/1, n/1) inside the three slices; `c` is a
    // unique borrow, so it does not alias `a` or `b`.
    unsafe {
        matrixmultiply::sgemm(
            m,
            k,
            n,
            1.0,
            a.as_ptr(),
            k as isize,
            1,
            b.as_ptr(),
            n as isize,
            1,
            1.0,
            c.as_mut_ptr(),
            n as isize,
            1,
        );
    }
}

/// Per-channel `scale * x + shift`.
pub(super) fn affine(x: &[f32], xs: Shape, scale: &[f32], shift: &[f32], out: &mut [f32]) {
    let px = xs.pixels();
    for (ch, (o, i)) in out.chunks_exact_mut(px).zip(x.chunks_exact(px)).enumerate() {
        let (s, t) = (scale[ch], shift[ch]);
        o.iter_mut().zip(i).for_each(|(o, &v)| *o = s * v + t);
    }
}

/// Max pooling; padded taps are ignored (never win).
pub(super) fn max_pool(p: &Pool2d, x: &[f32], xs: Shape, out: &mut [f32], os: Shape) {
    pool(p, x, xs, out, os, f32::NEG_INFINITY, f32::max, |m| m);
}

/// Average pooling; padded taps count as zeros, the divisor is `kH * kW`.
pub(super) fn avg_pool(p: &Pool2d, x: &[f32], xs: Shape, out: &mut [f32], os: Shape) {
    let inv = 1.0 / (p.kernel[0] * p.kernel[1]) as f32;
    pool(p, x, xs, out, os, 0.0, |a, b| a + b, |s| s * inv);
}

#[allow(clippy::too_many_arguments)]
fn pool(
    p: &Pool2d,
    x: &[f32],
    xs: Shape,
    out: &mut [f32],
    os: Shape,
    init: f32,
    fold: impl Fn(f32, f32) -> f32,
    finish: impl Fn(f32) -> f32,
) {
    let [kh, kw] = p.kernel;
    let [sh, sw] = p.stride;
    let (pt, pl) = (p.padding.top, p.padding.left);
    for ch in 0..xs.c {
        let plane = &x[ch * xs.pixels()..(ch + 1) * xs.pixels()];
        let oplane = &mut out[ch * os.pixels()..(ch + 1) * os.pixels()];
        for oy in 0..os.h {
            for ox in 0..os.w {
                let mut acc = init;
                for ky in 0..kh {
                    let Some(iy) = (oy * sh + ky).checked_sub(pt).filter(|&iy| iy < xs.h) else {
                        continue;
                    };
                    for kx in 0..kw {
                        let Some(ix) = (ox * sw + kx).checked_sub(pl).filter(|&ix| ix < xs.w)
                        else {
                            continue;
                        };
                        acc = fold(acc, plane[iy * xs.w + ix]);
                    }
                }
                oplane[oy * os.w + ox] = finish(acc);
            }
        }
    }
}

/// Mean of each channel.
pub(super) fn global_avg_pool(x: &[f32], xs: Shape, out: &mut [f32]) {
    let px = xs.pixels();
    for (o, plane) in out.iter_mut().zip(x.chunks_exact(px)) {
        *o = plane.iter().sum::<f32>() / px as f32;
    }
}

/// `out = W x + b`.
pub(super) fn linear(l: &Linear, x: &[f32], out: &mut [f32]) {
    for (o, (row, y)) in l
        .weight
        .data
        .chunks_exact(l.in_features)
        .zip(out.iter_mut())
        .enumerate()
    {
        let dot: f32 = row.iter().zip(x).map(|(w, v)| w * v).sum();
        *y = dot + l.bias.as_ref().map_or(0.0, |b| b.data[o]);
    }
}

/// Softmax over channels, separately at each pixel, with the maximum
/// subtracted first so `exp` cannot overflow.
pub(super) fn softmax(x: &[f32], xs: Shape, out: &mut [f32]) {
    let px = xs.pixels();
    for i in 0..px {
        let max = (0..xs.c)
            .map(|c| x[c * px + i])
            .fold(f32::NEG_INFINITY, f32::max);
        let mut sum = 0.0;
        for c in 0..xs.c {
            let e = (x[c * px + i] - max).exp();
            out[c * px + i] = e;
            sum += e;
        }
        for c in 0..xs.c {
            out[c * px + i] /= sum;
        }
    }
}

#[cfg(test)]
mod tests {
    use super::valid_range;

    #[test]
    fn valid_range_matches_brute_force() {
        for out_len in 1..6 {
            for input in 1..8 {
                for stride in 1..4 {
                    for tap in 0..5 {
                        for pad in 0..4 {
                            let brute: Vec<usize> = (0..out_len)
                                .filter(|&o| {
                                    let i = (o * stride + tap) as isize - pad as isize;
                                    i >= 0 && (i as usize) < input
                                })
                                .collect();
                            let (lo, hi) = valid_range(out_len, input, stride, tap, pad);
                            let got: Vec<usize> = (lo..hi).collect();
                            assert_eq!(
                                got, brute,
                                "out {out_len} in {input} s {stride} tap {tap} pad {pad}"
                            );
                        }
                    }
                }
            }
        }
    }
}
