//! Addressing feature maps inside the caller-owned arena.

use crate::Error;

/// A feature map stored channels-last (HWC) somewhere in the arena.
///
/// Element `(y, x, ch)` lives at `arena[offset + (y * w + x) * stride + ch]`.
/// `stride >= c` is the *pixel stride*: the channel count of the region the
/// map lives in. A plain map has `stride == c`; a view of some channels of a
/// concatenation region has `stride == C_total` (see the crate docs).
///
/// A *ring* ([`MapRef::ring`]) stores only `rows` of its `h` rows: row `y`
/// lives in slot `y mod rows`, so element `(y, x, ch)` is at
/// `offset + ((y mod rows) * w + x) * stride + ch`. A producer writes rows
/// into it just before a consumer that reads a window of a few rows needs
/// them (row streaming). `rows == h` is the whole map.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct MapRef {
    /// Arena index of element `(0, 0, 0)`.
    pub offset: usize,
    /// Height in pixels.
    pub h: usize,
    /// Width in pixels.
    pub w: usize,
    /// Number of channels this view covers.
    pub c: usize,
    /// Distance in arena elements between two horizontally adjacent pixels.
    pub stride: usize,
    /// Rows stored (`h` for a whole map, fewer for a ring).
    pub rows: usize,
}

impl MapRef {
    /// A dense map (`stride == c`).
    pub const fn new(offset: usize, h: usize, w: usize, c: usize) -> Self {
        MapRef {
            offset,
            h,
            w,
            c,
            stride: c,
            rows: h,
        }
    }

    /// A map with an explicit pixel stride (a view into a wider region).
    pub const fn strided(offset: usize, h: usize, w: usize, c: usize, stride: usize) -> Self {
        MapRef {
            offset,
            h,
            w,
            c,
            stride,
            rows: h,
        }
    }

    /// A ring of `rows` rows of an `h`-row map with pixel stride `stride`
    /// (see the type's docs); `rows >= h` is the whole map.
    pub const fn ring(
        offset: usize,
        h: usize,
        w: usize,
        c: usize,
        stride: usize,
        rows: usize,
    ) -> Self {
        MapRef {
            offset,
            h,
            w,
            c,
            stride,
            rows: if rows < h { rows } else { h },
        }
    }

    /// True when the view stores fewer rows than its height.
    pub const fn is_ring(&self) -> bool {
        self.rows < self.h
    }

    /// The stored slot of row `y`: `y` itself below `rows` (every row of a
    /// whole map, no division), else `y mod rows`.
    #[inline(always)]
    pub const fn slot(&self, y: usize) -> usize {
        if y < self.rows {
            y
        } else {
            match y.checked_rem(self.rows) {
                Some(r) => r,
                None => 0,
            }
        }
    }

    /// Arena index of channel 0 of pixel `(y, 0)`: a row's base, computed
    /// once per row by the kernels.
    #[inline(always)]
    pub const fn row(&self, y: usize) -> usize {
        self.offset + self.slot(y) * self.w * self.stride
    }

    /// The view of channels `[first, first + count)` of this map, with the
    /// same pixel stride. Used to hand a producer or consumer its slice of a
    /// concatenation region.
    pub const fn channels(self, first: usize, count: usize) -> Self {
        MapRef {
            offset: self.offset + first,
            h: self.h,
            w: self.w,
            c: count,
            stride: self.stride,
            rows: self.rows,
        }
    }

    /// Number of pixels (`h * w`).
    pub const fn pixels(&self) -> usize {
        self.h * self.w
    }

    /// Number of elements the view covers (`h * w * c`).
    pub const fn len(&self) -> usize {
        self.h * self.w * self.c
    }

    /// True when the view covers no element.
    pub const fn is_empty(&self) -> bool {
        self.len() == 0
    }

    /// Arena index of channel 0 of pixel `(y, x)` (row `y` in its slot for
    /// a ring).
    #[inline(always)]
    pub const fn pixel(&self, y: usize, x: usize) -> usize {
        self.offset + (self.slot(y) * self.w + x) * self.stride
    }

    /// Arena index of element `(y, x, ch)`.
    pub const fn index(&self, y: usize, x: usize, ch: usize) -> usize {
        self.pixel(y, x) + ch
    }

    /// One past the largest arena index the view touches (`offset` when
    /// empty; the stored rows of a ring), or `None` on arithmetic overflow.
    pub const fn end(&self) -> Option<usize> {
        let rows = if self.rows < self.h {
            self.rows
        } else {
            self.h
        };
        let px = match rows.checked_mul(self.w) {
            Some(p) => p,
            None => return None,
        };
        if px == 0 || self.c == 0 {
            return Some(self.offset);
        }
        let last = match (px - 1).checked_mul(self.stride) {
            Some(v) => v,
            None => return None,
        };
        match self.offset.checked_add(last) {
            Some(v) => v.checked_add(self.c),
            None => None,
        }
    }

    /// True when `stride >= c`, a ring stores at least one row, and every
    /// stored element lies inside an arena of `arena_len` elements.
    pub const fn fits(&self, arena_len: usize) -> bool {
        if self.stride < self.c || (self.rows == 0 && self.h > 0) {
            return false;
        }
        match self.end() {
            Some(e) => e <= arena_len,
            None => false,
        }
    }

    /// Conservative disjointness test: true only when the two views provably
    /// share no element. Detects disjoint byte spans and, for equal pixel
    /// strides, disjoint channel ranges within the interleaved pixels (the
    /// in-place concatenation case).
    pub const fn is_disjoint(&self, other: &MapRef) -> bool {
        if self.is_empty() || other.is_empty() {
            return true;
        }
        let (ea, eb) = match (self.end(), other.end()) {
            (Some(a), Some(b)) => (a, b),
            _ => return false,
        };
        if ea <= other.offset || eb <= self.offset {
            return true;
        }
        if self.stride == other.stride && self.stride > 0 {
            let s = self.stride;
            let ra = self.offset % s;
            let rb = other.offset % s;
            // Channel residues [ra, ra + c) and [rb, rb + c) on a circle of s.
            let d_ab = (rb + s - ra) % s;
            let d_ba = (ra + s - rb) % s;
            return d_ab >= self.c && d_ba >= other.c;
        }
        false
    }

    /// True when both views have the same height, width and channel count
    /// (a ring has the shape of its whole map).
    pub const fn same_shape(&self, other: &MapRef) -> bool {
        self.h == other.h && self.w == other.w && self.c == other.c
    }

    /// [`fits`](Self::fits) as a `Result`.
    pub(crate) const fn check(&self, arena_len: usize) -> Result<(), Error> {
        if self.fits(arena_len) {
            Ok(())
        } else {
            Err(Error::MapOutOfBounds)
        }
    }
}
