//! Shape arithmetic: the one place that knows how convolution and pooling
//! windows turn input sizes into output sizes.
//!
//! Formulas follow Dumoulin & Visin (2016), "A guide to convolution
//! arithmetic for deep learning", relationship 15 (dilated, padded, strided):
//! `o = floor((i + p_lo + p_hi - d*(k-1) - 1) / s) + 1`.

use serde::{Deserialize, Serialize};
use std::fmt;

/// Shape of one feature map of one image: channels, height, width.
///
/// Flat vectors (after `flatten`, `linear`, `global_avg_pool`) are `[N, 1, 1]`.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize, Deserialize)]
pub struct Shape {
    /// Channels.
    pub c: usize,
    /// Height in pixels.
    pub h: usize,
    /// Width in pixels.
    pub w: usize,
}

impl Shape {
    /// A `[c, h, w]` shape.
    pub const fn new(c: usize, h: usize, w: usize) -> Self {
        Shape { c, h, w }
    }

    /// A flat vector `[n, 1, 1]`.
    pub const fn flat(n: usize) -> Self {
        Shape { c: n, h: 1, w: 1 }
    }

    /// Number of elements, or `None` on overflow.
    pub fn checked_len(&self) -> Option<usize> {
        self.c.checked_mul(self.h)?.checked_mul(self.w)
    }

    /// Number of elements. Shapes in a checked graph never overflow.
    pub fn len(&self) -> usize {
        self.c * self.h * self.w
    }

    /// True when the shape holds no element.
    pub fn is_empty(&self) -> bool {
        self.len() == 0
    }

    /// Pixels per channel (`h * w`).
    pub fn pixels(&self) -> usize {
        self.h * self.w
    }
}

impl fmt::Display for Shape {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "[{}, {}, {}]", self.c, self.h, self.w)
    }
}

/// Explicit padding of the four borders, in pixels.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, Serialize, Deserialize)]
pub struct Padding {
    /// Rows added above.
    pub top: usize,
    /// Columns added on the left.
    pub left: usize,
    /// Rows added below.
    pub bottom: usize,
    /// Columns added on the right.
    pub right: usize,
}

impl Padding {
    /// The same padding on all four sides.
    pub const fn uniform(p: usize) -> Self {
        Padding { top: p, left: p, bottom: p, right: p }
    }

    /// True when no border is padded.
    pub fn is_zero(&self) -> bool {
        *self == Padding::default()
    }
}

/// A sliding window over one spatial axis.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Window {
    /// Kernel extent.
    pub kernel: usize,
    /// Step between windows.
    pub stride: usize,
    /// Spacing between kernel taps (1 = dense).
    pub dilation: usize,
    /// Padding before the first element.
    pub pad_lo: usize,
    /// Padding after the last element.
    pub pad_hi: usize,
}

impl Window {
    /// Extent covered by the dilated kernel: `d*(k-1) + 1`.
    pub fn effective_kernel(&self) -> Option<usize> {
        self.dilation
            .checked_mul(self.kernel.checked_sub(1)?)?
            .checked_add(1)
    }

    /// Output length for an input of `input` elements; `None` when the window
    /// does not fit even once or the arithmetic overflows.
    pub fn output_len(&self, input: usize) -> Option<usize> {
        if self.stride == 0 || self.kernel == 0 || self.dilation == 0 {
            return None;
        }
        let padded = input.checked_add(self.pad_lo)?.checked_add(self.pad_hi)?;
        let k = self.effective_kernel()?;
        if padded < k {
            return None;
        }
        Some((padded - k) / self.stride + 1)
    }

    /// Padding that makes the output `ceil(input / stride)` long, split with
    /// the odd pixel at the end (the "same" convention of common frameworks).
    pub fn same_padding(input: usize, kernel: usize, stride: usize, dilation: usize) -> Option<(usize, usize)> {
        if stride == 0 {
            return None;
        }
        let out = input.div_ceil(stride);
        let k = dilation.checked_mul(kernel.checked_sub(1)?)?.checked_add(1)?;
        let needed = (out.checked_sub(1)?).checked_mul(stride)?.checked_add(k)?;
        let total = needed.saturating_sub(input);
        Some((total / 2, total - total / 2))
    }
}

/// Output height and width of a 2-D window operation, or `None` when it does
/// not fit.
pub fn window_output(
    h: usize,
    w: usize,
    kernel: [usize; 2],
    stride: [usize; 2],
    dilation: [usize; 2],
    padding: Padding,
) -> Option<(usize, usize)> {
    let wh = Window { kernel: kernel[0], stride: stride[0], dilation: dilation[0], pad_lo: padding.top, pad_hi: padding.bottom };
    let ww = Window { kernel: kernel[1], stride: stride[1], dilation: dilation[1], pad_lo: padding.left, pad_hi: padding.right };
    Some((wh.output_len(h)?, ww.output_len(w)?))
}

#[cfg(test)]
mod tests {
    use super::*;

    fn w(kernel: usize, stride: usize, pad: usize) -> Window {
        Window { kernel, stride, dilation: 1, pad_lo: pad, pad_hi: pad }
    }

    // Worked examples from Dumoulin & Visin (2016), "A guide to convolution
    // arithmetic for deep learning", figures 2.1-2.7 and 5.1.
    #[test]
    fn dumoulin_visin_worked_examples() {
        // Fig 2.1: i=4, k=3, s=1, p=0 -> o=2.
        assert_eq!(w(3, 1, 0).output_len(4), Some(2));
        // Fig 2.2: i=5, k=4, s=1, p=2 -> o=6.
        assert_eq!(w(4, 1, 2).output_len(5), Some(6));
        // Fig 2.3 (half/same padding): i=5, k=3, s=1, p=1 -> o=5.
        assert_eq!(w(3, 1, 1).output_len(5), Some(5));
        // Fig 2.4 (full padding): i=5, k=3, s=1, p=2 -> o=7.
        assert_eq!(w(3, 1, 2).output_len(5), Some(7));
        // Fig 2.5: i=5, k=3, s=2, p=0 -> o=2.
        assert_eq!(w(3, 2, 0).output_len(5), Some(2));
        // Fig 2.6: i=5, k=3, s=2, p=1 -> o=3.
        assert_eq!(w(3, 2, 1).output_len(5), Some(3));
        // Fig 2.7: i=6, k=3, s=2, p=1 -> o=3.
        assert_eq!(w(3, 2, 1).output_len(6), Some(3));
        // Fig 5.1 (dilated): i=7, k=3, d=2, s=1, p=0 -> o=3.
        let d = Window { kernel: 3, stride: 1, dilation: 2, pad_lo: 0, pad_hi: 0 };
        assert_eq!(d.output_len(7), Some(3));
    }

    #[test]
    fn kernel_larger_than_input_does_not_fit() {
        assert_eq!(w(5, 1, 0).output_len(3), None);
        assert_eq!(w(5, 1, 1).output_len(3), Some(1));
    }

    #[test]
    fn same_padding_keeps_size() {
        assert_eq!(Window::same_padding(5, 3, 1, 1), Some((1, 1)));
        assert_eq!(Window::same_padding(6, 3, 2, 1), Some((0, 1)));
        assert_eq!(Window::same_padding(7, 5, 1, 1), Some((2, 2)));
        assert_eq!(Window::same_padding(8, 1, 2, 1), Some((0, 0)));
    }
}
