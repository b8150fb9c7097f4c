//! Kernels for maps stored as int16 ("wide" maps), for the layers a user
//! keeps at 16 bits because int8 costs them too much accuracy.
//!
//! A wide map lives in the same `&mut [i8]` arena as every other map, two
//! bytes per value, little-endian. Its [`MapRef`] counts `offset` in
//! **bytes** and `c`, `stride` in **values**, so value `(y, x, ch)` starts
//! at byte `offset + 2 · ((y · w + x) · stride + ch)`: the map's byte stride
//! is `2 · stride`. A [`TypedMap`] pairs the `MapRef` with its [`Elem`];
//! every kernel here takes typed maps, so one call may read an int8 map and
//! write an int16 one, or the other way round. Values are read and written
//! one byte pair at a time, so a wide map needs no alignment.
//!
//! Wide maps are quantized like the others (Jacob et al. 2018, §2.1:
//! `real = scale · (q − zero_point)`), the compiler picks them symmetric
//! (`zero_point` 0); the kernels accept any zero point inside the element's
//! range. Requantization has the rounding rule of [`Requant`] (one
//! rounding, ties toward +∞), with the clamp of a [`WideOut`] in the
//! output element's range: `[-32768, 32767]` for int16, `[0, 32767]` with
//! ReLU.
//!
//! # Accumulation
//!
//! An int16 value times an int8 weight reaches `2^22` in magnitude, so an
//! i32 sum holds only about 500 such products safely, where an int8 input
//! allows about 66 000. The convolution therefore bounds every output
//! channel's sum before it runs ([`wide_acc_worst_case`]): when the bound
//! fits i32 the sums are the wrapping i32 dot products of the int8 kernels
//! (exact, because nothing wraps); when it does not, the dot product is
//! taken in runs of [`I32_SAFE_TERMS`] terms, each of which fits i32 by
//! construction, and the runs are added in i64 ([`WideConvArgs::acc64`]).
//! Both paths give the exact sum, so they give the same result wherever
//! both apply. Linear layers, poolings and additions sum in i64 always:
//! they run once per output value, not per MAC, and the exact sum is
//! cheaper to argue about than a bound.
//!
//! All kernels validate their arguments before they write anything and
//! reach the arena only through `get`/`get_mut`: no panic path.

use crate::dot::dot_wide;
use crate::{div_round, Error, InputTransform, MapRef, Requant, Window};

/// The element type of a map in the arena.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Elem {
    /// One byte per value (the int8 maps of every other kernel).
    I8,
    /// Two bytes per value, little-endian.
    I16,
}

impl Elem {
    /// Bytes per value.
    pub const fn bytes(self) -> usize {
        match self {
            Elem::I8 => 1,
            Elem::I16 => 2,
        }
    }

    /// Smallest value.
    pub const fn min(self) -> i32 {
        match self {
            Elem::I8 => i8::MIN as i32,
            Elem::I16 => i16::MIN as i32,
        }
    }

    /// Largest value.
    pub const fn max(self) -> i32 {
        match self {
            Elem::I8 => i8::MAX as i32,
            Elem::I16 => i16::MAX as i32,
        }
    }

    /// True when `v` is a value of this type.
    pub const fn holds(self, v: i32) -> bool {
        v >= self.min() && v <= self.max()
    }
}

/// A map with its element type. For [`Elem::I16`] the `MapRef`'s `offset`
/// is in bytes, `c` and `stride` in values (see the module docs).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct TypedMap {
    /// Where the map lives.
    pub map: MapRef,
    /// Its element type.
    pub elem: Elem,
}

impl TypedMap {
    /// An int8 map.
    pub const fn i8(map: MapRef) -> Self {
        TypedMap {
            map,
            elem: Elem::I8,
        }
    }

    /// An int16 map.
    pub const fn i16(map: MapRef) -> Self {
        TypedMap {
            map,
            elem: Elem::I16,
        }
    }

    /// Channels `first .. first + count` of this map (the view a
    /// concatenation member writes through): the offset moves by
    /// `first` values, i.e. `first · bytes` bytes.
    pub const fn channels(self, first: usize, count: usize) -> Self {
        TypedMap {
            map: MapRef {
                offset: self.map.offset + first * self.elem.bytes(),
                c: count,
                ..self.map
            },
            elem: self.elem,
        }
    }

    /// One past the map's last stored byte (a ring stores `rows` rows),
    /// `None` on overflow.
    pub const fn end(&self) -> Option<usize> {
        let m = &self.map;
        let rows = if m.rows < m.h { m.rows } else { m.h };
        let px = match rows.checked_mul(m.w) {
            Some(p) => p,
            None => return None,
        };
        if px == 0 || m.c == 0 {
            return Some(m.offset);
        }
        let last = match (px - 1).checked_mul(m.stride) {
            Some(v) => v,
            None => return None,
        };
        let values = match last.checked_add(m.c) {
            Some(v) => v,
            None => return None,
        };
        match values.checked_mul(self.elem.bytes()) {
            Some(b) => m.offset.checked_add(b),
            None => None,
        }
    }

    /// True when `stride >= c` and the map ends inside an arena of
    /// `arena_len` bytes.
    pub const fn fits(&self, arena_len: usize) -> bool {
        if self.map.stride < self.map.c {
            return false;
        }
        match self.end() {
            Some(e) => e <= arena_len,
            None => false,
        }
    }

    /// True when the two maps share no byte. Maps of one element type and
    /// one stride whose offsets differ by whole values are compared value
    /// by value (interleaved channel views of one region are disjoint);
    /// otherwise by their byte spans.
    pub const fn is_disjoint(&self, other: &TypedMap) -> bool {
        let (a, b) = (&self.map, &other.map);
        if a.h * a.w * a.c == 0 || b.h * b.w * b.c == 0 {
            return true;
        }
        let (ea, eb) = match (self.end(), other.end()) {
            (Some(x), Some(y)) => (x, y),
            _ => return false,
        };
        if ea <= b.offset || eb <= a.offset {
            return true;
        }
        let n = self.elem.bytes();
        if !matches!(
            (self.elem, other.elem),
            (Elem::I8, Elem::I8) | (Elem::I16, Elem::I16)
        ) {
            return false;
        }
        let base = if a.offset < b.offset {
            a.offset
        } else {
            b.offset
        };
        if (a.offset - base) % n != 0 || (b.offset - base) % n != 0 {
            return false;
        }
        // In value units from `base`, the byte pairs are the values.
        let va = MapRef {
            offset: (a.offset - base) / n,
            ..*a
        };
        let vb = MapRef {
            offset: (b.offset - base) / n,
            ..*b
        };
        va.is_disjoint(&vb)
    }

    /// Value index of `(y, x, ch)` counted from the map's offset.
    #[inline(always)]
    const fn value(&self, y: usize, x: usize, ch: usize) -> usize {
        (y * self.map.w + x) * self.map.stride + ch
    }

    /// The kernels of this module address whole maps only: a ring (a map
    /// storing fewer rows than it has, see `MapRef::ring`) is refused.
    const fn check(&self, arena_len: usize) -> Result<(), Error> {
        if self.map.rows < self.map.h {
            Err(Error::BadParams)
        } else if self.fits(arena_len) {
            Ok(())
        } else {
            Err(Error::MapOutOfBounds)
        }
    }
}

/// Reads value number `v` (from the map's offset) of `m`; 0 outside the
/// arena (which checked maps never reach).
#[inline(always)]
fn get(arena: &[i8], m: &TypedMap, v: usize) -> i32 {
    match m.elem {
        Elem::I8 => match arena.get(m.map.offset + v) {
            Some(&b) => b as i32,
            None => 0,
        },
        Elem::I16 => {
            let at = m.map.offset + 2 * v;
            match arena.get(at..at + 2) {
                Some(&[lo, hi]) => i16::from_le_bytes([lo as u8, hi as u8]) as i32,
                _ => 0,
            }
        }
    }
}

/// Writes value number `v` of `m`; `x` is already inside the element's
/// range (the callers clamp).
#[inline(always)]
fn put(arena: &mut [i8], m: &TypedMap, v: usize, x: i32) {
    match m.elem {
        Elem::I8 => {
            if let Some(b) = arena.get_mut(m.map.offset + v) {
                *b = x as i8;
            }
        }
        Elem::I16 => {
            let at = m.map.offset + 2 * v;
            if let Some([lo, hi]) = arena.get_mut(at..at + 2) {
                let [l, h] = (x as i16).to_le_bytes();
                *lo = l as i8;
                *hi = h as i8;
            }
        }
    }
}

/// Output zero point and clamp in the output element's codes (the fused
/// activation): none = the element's whole range, ReLU = `[zero_point,
/// max]`, ReLU6 = `[zero_point, zero_point + round(6 / s)]`.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct WideOut {
    /// Zero point of the output.
    pub zero_point: i32,
    /// Smallest code written.
    pub min: i32,
    /// Largest code written.
    pub max: i32,
}

impl WideOut {
    /// No activation: the whole range of `elem`.
    pub const fn linear(zero_point: i32, elem: Elem) -> Self {
        WideOut {
            zero_point,
            min: elem.min(),
            max: elem.max(),
        }
    }

    /// True when zero point and clamp are codes of `elem` and `min <= max`.
    pub const fn is_valid_for(&self, elem: Elem) -> bool {
        elem.holds(self.zero_point)
            && elem.holds(self.min)
            && elem.holds(self.max)
            && self.min <= self.max
    }

    /// `clamp(zero_point + v, min, max)`.
    #[inline(always)]
    pub const fn finish(&self, v: i64) -> i32 {
        let r = v + self.zero_point as i64;
        if r < self.min as i64 {
            self.min
        } else if r > self.max as i64 {
            self.max
        } else {
            r as i32
        }
    }
}

/// [`Requant::scale`] of a 64-bit sum: `acc · mult / 2^t` rounded once,
/// ties toward +∞, the product kept whole in i128. Equal to
/// [`Requant::scale`] for every `acc` that fits i32.
#[inline(always)]
pub const fn scale_i64(r: Requant, acc: i64) -> i64 {
    let prod = acc as i128 * r.mult as i128;
    (((prod >> (30 + r.shift)) + 1) >> 1) as i64
}

/// Terms of an int16 × int8 dot product whose sum always fits i32:
/// `511 · 2^15 · 2^7 < 2^31`.
pub const I32_SAFE_TERMS: usize = 511;

/// Largest `|acc|` of one output channel, `|bias| + in_max · Σ|w|`, where
/// `in_max` bounds the magnitude of the patch values (128 for an int8
/// input, 32768 for an int16 input or an int16-domain transform).
pub const fn wide_acc_worst_case(weight_row: &[i8], bias: i32, in_max: i64) -> i64 {
    let mut s: i64 = 0;
    let mut i = 0;
    while i < weight_row.len() {
        let w = weight_row[i] as i64;
        s += if w < 0 { -w } else { w };
        i += 1;
    }
    let b = bias as i64;
    (if b < 0 { -b } else { b }) + in_max * s
}

/// Per-channel affine transform of a read map into the int16 domain (a
/// fused batch norm and ReLU of a wide map): like
/// [`AffineTransform`](crate::AffineTransform) but in i64, with an int16
/// clamp:
///
/// ```text
/// t  = (x - zp_in) · mul[ch] + add[ch]                    (i64)
/// q' = clamp(zp_out + ((t + 2^(shift-1)) >> shift), min, max)   (shift 0: t)
/// ```
#[derive(Debug, Clone, Copy)]
pub struct WideAffine<'a> {
    /// Per input channel multiplier.
    pub mul: &'a [i32],
    /// Per input channel additive term in units of `2^-shift` output steps.
    pub add: &'a [i32],
    /// Common right shift, `0..=62`.
    pub shift: u32,
    /// Zero point of the stored input.
    pub zp_in: i32,
    /// Zero point of the transformed values (the padding value).
    pub zp_out: i32,
    /// Lower clamp of the transformed value, an int16 code.
    pub min: i32,
    /// Upper clamp of the transformed value, an int16 code.
    pub max: i32,
}

impl WideAffine<'_> {
    /// Transforms one value of channel `ch` (a channel without parameters,
    /// which a checked call never sees, gets `mul = add = 0`).
    #[inline(always)]
    pub fn apply(&self, ch: usize, x: i32) -> i32 {
        let (m, a) = match (self.mul.get(ch), self.add.get(ch)) {
            (Some(&m), Some(&a)) => (m, a),
            _ => (0, 0),
        };
        let t = (x as i64 - self.zp_in as i64) * m as i64 + a as i64;
        let r = if self.shift > 0 {
            (t + (1i64 << (self.shift - 1))) >> self.shift
        } else {
            t
        };
        let r = r + self.zp_out as i64;
        if r < self.min as i64 {
            self.min
        } else if r > self.max as i64 {
            self.max
        } else {
            r as i32
        }
    }

    /// True for `channels` channels of parameters, a shift below 63, a
    /// clamp inside int16 that holds `zp_out`, and no i64 overflow.
    pub const fn is_valid_for(&self, channels: usize) -> bool {
        if self.mul.len() < channels
            || self.add.len() < channels
            || self.shift > 62
            || !Elem::I16.holds(self.min)
            || !Elem::I16.holds(self.max)
            || self.min > self.max
            || !Elem::I16.holds(self.zp_out)
            || !Elem::I16.holds(self.zp_in)
        {
            return false;
        }
        // |x - zp_in| <= 65535 and |mul| < 2^31: the product stays below
        // 2^47, far inside i64 together with `add` and the rounding.
        true
    }
}

/// What a wide convolution applies to each input value as it gathers the
/// patch.
#[derive(Debug, Clone, Copy)]
pub enum WideTransform<'a> {
    /// An int8 → int8 transform of an int8 input (the int8 kernels' kind).
    Int8(InputTransform<'a>),
    /// An affine transform into the int16 domain, of an input of either
    /// element type.
    Affine(WideAffine<'a>),
}

impl WideTransform<'_> {
    #[inline(always)]
    fn apply(&self, ch: usize, x: i32) -> i32 {
        match self {
            WideTransform::Int8(t) => t.apply(ch, x as i8) as i32,
            WideTransform::Affine(a) => a.apply(ch, x),
        }
    }
}

/// Parameters of one [`conv2d_wide`] call.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct WideConvParams {
    /// Kernel geometry.
    pub window: Window,
    /// Channel groups (`groups == C_in` is depthwise).
    pub groups: usize,
    /// The value padded taps take, in the patch's domain (the input's
    /// codes, or the transform's output codes); the folded bias assumes it.
    pub input_zp: i32,
    /// Output zero point and clamp, in the output element's codes.
    pub out: WideOut,
}

/// Int8 weights as a slice of `i8`, or as the bytes of a weights file
/// (each the two's complement of a weight), read as they are.
#[derive(Debug, Clone, Copy)]
pub enum WideWeights<'a> {
    /// `i8` weights.
    I8(&'a [i8]),
    /// Weights-file bytes.
    Bytes(&'a [u8]),
}

impl WideWeights<'_> {
    const fn len(&self) -> usize {
        match self {
            WideWeights::I8(w) => w.len(),
            WideWeights::Bytes(w) => w.len(),
        }
    }

    /// `Σ|w|` over `[from, from + n)` (in range: the caller checked it).
    const fn abs_sum(&self, from: usize, n: usize) -> i64 {
        let mut s: i64 = 0;
        let mut i = from;
        while i < from + n {
            let w = match self {
                WideWeights::I8(w) => w[i] as i64,
                WideWeights::Bytes(w) => w[i] as i8 as i64,
            };
            s += if w < 0 { -w } else { w };
            i += 1;
        }
        s
    }
}

/// A [`conv2d_wide`] call that passed its checks.
#[derive(Debug, Clone, Copy)]
pub struct WideConvArgs<'a> {
    input: TypedMap,
    output: TypedMap,
    weights: WideWeights<'a>,
    bias: &'a [i32],
    requant: &'a [Requant],
    p: WideConvParams,
    transform: Option<WideTransform<'a>>,
    /// True when some output channel's worst-case sum does not fit i32, so
    /// the dot products are summed in i64 runs of [`I32_SAFE_TERMS`].
    pub acc64: bool,
}

/// Taps of one group's patch: `kh · kw · C_in / groups`.
const fn group_patch(window: &Window, c_in: usize, groups: usize) -> usize {
    window.kh * window.kw * (c_in / groups)
}

/// The checks of [`conv2d_wide`]; also tells which accumulator the call
/// uses ([`WideConvArgs::acc64`]).
#[allow(clippy::too_many_arguments)]
pub const fn check_conv_wide<'a>(
    arena_len: usize,
    patch_len: usize,
    input: TypedMap,
    output: TypedMap,
    weights: WideWeights<'a>,
    bias: &'a [i32],
    requant: &'a [Requant],
    p: WideConvParams,
    transform: Option<WideTransform<'a>>,
) -> Result<WideConvArgs<'a>, Error> {
    if let Err(e) = input.check(arena_len) {
        return Err(e);
    }
    if let Err(e) = output.check(arena_len) {
        return Err(e);
    }
    if !input.is_disjoint(&output) {
        return Err(Error::Overlap);
    }
    let (ci, co, g) = (input.map.c, output.map.c, p.groups);
    if g == 0 || ci % g != 0 || co % g != 0 || p.window.dilation_x == 0 || p.window.dilation_y == 0
    {
        return Err(Error::BadParams);
    }
    if !p
        .window
        .matches(input.map.h, input.map.w, output.map.h, output.map.w)
    {
        return Err(Error::ShapeMismatch);
    }
    let k = group_patch(&p.window, ci, g);
    if weights.len() < co * k || bias.len() < co || patch_len < k {
        return Err(Error::BufferTooSmall);
    }
    if !crate::requant::all_valid(requant, co) || !p.out.is_valid_for(output.elem) {
        return Err(Error::BadParams);
    }
    // The patch is i16: the padding value and the input domain must be.
    let in_max: i64 = match (&transform, input.elem) {
        (None, Elem::I8) => 128,
        (None, Elem::I16) => 32768,
        (Some(WideTransform::Int8(t)), Elem::I8) => {
            if p.input_zp < -128 || p.input_zp > 127 || !t.is_valid_for(ci, p.input_zp as i8) {
                return Err(Error::BadParams);
            }
            256
        }
        (Some(WideTransform::Int8(_)), Elem::I16) => return Err(Error::BadParams),
        (Some(WideTransform::Affine(a)), _) => {
            if !a.is_valid_for(ci) || a.zp_out != p.input_zp {
                return Err(Error::BadParams);
            }
            // The patch holds clamped values and the padding value.
            let (lo, hi, z) = (
                a.min.unsigned_abs(),
                a.max.unsigned_abs(),
                a.zp_out.unsigned_abs(),
            );
            let m = if lo > hi { lo } else { hi };
            (if m > z { m } else { z }) as i64
        }
    };
    if !Elem::I16.holds(p.input_zp) {
        return Err(Error::BadParams);
    }
    let mut acc64 = false;
    let mut o = 0;
    while o < co {
        let b = bias[o] as i64;
        let worst = (if b < 0 { -b } else { b }) + in_max * weights.abs_sum(o * k, k);
        if worst >= 1i64 << 31 {
            acc64 = true;
        }
        o += 1;
    }
    Ok(WideConvArgs {
        input,
        output,
        weights,
        bias,
        requant,
        p,
        transform,
        acc64,
    })
}

/// 2-D convolution reading an int8 or int16 map and writing an int8 or
/// int16 map, int8 weights: any kernel, step, dilation, padding, groups
/// (depthwise with any channel multiplier), per-output-channel
/// requantization, fused clamp, optional fused input transform.
///
/// Per output pixel and group, the group's receptive field is gathered
/// into `patch` (at least `kh · kw · C_in / groups` values; padded taps
/// take `p.input_zp`, in-bounds values go through the transform), then
/// output channel `o` of the group gets
///
/// ```text
/// acc = bias[o] + Σ w[o][ky][kx][i] · patch[ky][kx][i]     (exact)
/// out = clamp(z_out + requant[o].scale(acc), min, max)
/// ```
///
/// with the dot products of the int8 kernels (see the module docs for the
/// i64 path). Weights `[C_out][kh][kw][C_in / groups]`, bias folded with
/// the padding value as for [`conv2d`](crate::conv2d). `output` must not
/// share bytes with `input`.
#[allow(clippy::too_many_arguments)]
pub fn conv2d_wide(
    arena: &mut [i8],
    input: TypedMap,
    output: TypedMap,
    weights: &[i8],
    bias: &[i32],
    requant: &[Requant],
    p: &WideConvParams,
    transform: Option<&WideTransform<'_>>,
    patch: &mut [i16],
) -> Result<(), Error> {
    let a = check_conv_wide(
        arena.len(),
        patch.len(),
        input,
        output,
        WideWeights::I8(weights),
        bias,
        requant,
        *p,
        transform.copied(),
    )?;
    conv_wide_run(arena, &a, patch);
    Ok(())
}

/// The exact `Σ x·w` over `w.len()` terms in i64, as i32 dot products of
/// at most [`I32_SAFE_TERMS`] terms each.
#[inline(always)]
fn dot_i64<W: crate::dot::Wt>(x: &[i16], w: &[W]) -> i64 {
    let mut s: i64 = 0;
    for (xc, wc) in x.chunks(I32_SAFE_TERMS).zip(w.chunks(I32_SAFE_TERMS)) {
        s += dot_wide(xc, wc) as i64;
    }
    s
}

/// Runs a checked wide convolution.
#[inline(never)]
pub fn conv_wide_run(arena: &mut [i8], a: &WideConvArgs<'_>, patch: &mut [i16]) {
    match a.weights {
        WideWeights::I8(w) => conv_wide_rows(arena, a, w, patch),
        WideWeights::Bytes(w) => conv_wide_rows(arena, a, w, patch),
    }
}

fn conv_wide_rows<W: crate::dot::Wt>(
    arena: &mut [i8],
    a: &WideConvArgs<'_>,
    weights: &[W],
    patch: &mut [i16],
) {
    let (input, output, w) = (&a.input, &a.output, &a.p.window);
    let g = a.p.groups.max(1);
    let (cg, og) = (input.map.c / g, output.map.c / g);
    let k = w.kh * w.kw * cg;
    let Some(patch) = patch.get_mut(..k) else {
        return;
    };
    for oy in 0..output.map.h {
        for ox in 0..output.map.w {
            for gi in 0..g {
                // Gather the group's receptive field, `[ky][kx][i]`.
                let mut t = 0;
                for ky in 0..w.kh {
                    let yy = oy * w.step_y + ky * w.dilation_y;
                    let row_in = yy >= w.pad.top && yy - w.pad.top < input.map.h;
                    for kx in 0..w.kw {
                        let xx = ox * w.step_x + kx * w.dilation_x;
                        let inside = row_in && xx >= w.pad.left && xx - w.pad.left < input.map.w;
                        for i in 0..cg {
                            let ch = gi * cg + i;
                            let v = if inside {
                                let x = get(
                                    arena,
                                    input,
                                    input.value(yy - w.pad.top, xx - w.pad.left, ch),
                                );
                                match &a.transform {
                                    None => x,
                                    Some(tr) => tr.apply(ch, x),
                                }
                            } else {
                                a.p.input_zp
                            };
                            if let Some(d) = patch.get_mut(t) {
                                *d = v as i16;
                            }
                            t += 1;
                        }
                    }
                }
                for j in 0..og {
                    let o = gi * og + j;
                    let (Some(row), Some(&b), Some(&rq)) = (
                        weights.get(o * k..o * k + k),
                        a.bias.get(o),
                        a.requant.get(o),
                    ) else {
                        return;
                    };
                    let v = if a.acc64 {
                        scale_i64(rq, b as i64 + dot_i64(patch, row))
                    } else {
                        rq.scale(b.wrapping_add(dot_wide(patch, row)))
                    };
                    put(arena, output, output.value(oy, ox, o), a.p.out.finish(v));
                }
            }
        }
    }
}

/// Fully connected layer reading an int8 or int16 map (`in_features`
/// values in HWC order) and writing `out_features` values of an int8 or
/// int16 map: `out[o] = clamp(z_out + requant[o].scale(bias[o] + Σ
/// w[o][i] · x[i]))`, summed in i64. `weights` is `[out][in]`, the bias
/// folded with the input zero point.
pub fn linear_wide(
    arena: &mut [i8],
    input: TypedMap,
    output: TypedMap,
    weights: &[i8],
    bias: &[i32],
    requant: &[Requant],
    out: WideOut,
) -> Result<(), Error> {
    let a = check_linear_wide(
        arena.len(),
        input,
        output,
        WideWeights::I8(weights),
        bias,
        requant,
        out,
    )?;
    linear_wide_run(arena, &a);
    Ok(())
}

/// A [`linear_wide`] call that passed its checks.
#[derive(Debug, Clone, Copy)]
pub struct WideLinearArgs<'a> {
    input: TypedMap,
    output: TypedMap,
    weights: WideWeights<'a>,
    bias: &'a [i32],
    requant: &'a [Requant],
    out: WideOut,
}

/// The checks of [`linear_wide`].
pub const fn check_linear_wide<'a>(
    arena_len: usize,
    input: TypedMap,
    output: TypedMap,
    weights: WideWeights<'a>,
    bias: &'a [i32],
    requant: &'a [Requant],
    out: WideOut,
) -> Result<WideLinearArgs<'a>, Error> {
    if let Err(e) = input.check(arena_len) {
        return Err(e);
    }
    if let Err(e) = output.check(arena_len) {
        return Err(e);
    }
    if !input.is_disjoint(&output) {
        return Err(Error::Overlap);
    }
    let (n_in, n_out) = (input.map.len(), output.map.len());
    if weights.len() < n_in * n_out || bias.len() < n_out {
        return Err(Error::BufferTooSmall);
    }
    if !crate::requant::all_valid(requant, n_out) || !out.is_valid_for(output.elem) {
        return Err(Error::BadParams);
    }
    Ok(WideLinearArgs {
        input,
        output,
        weights,
        bias,
        requant,
        out,
    })
}

/// Runs a checked wide linear layer.
#[inline(never)]
pub fn linear_wide_run(arena: &mut [i8], a: &WideLinearArgs<'_>) {
    match a.weights {
        WideWeights::I8(w) => linear_wide_rows(arena, a, w),
        WideWeights::Bytes(w) => linear_wide_rows(arena, a, w),
    }
}

fn linear_wide_rows<W: crate::dot::Wt>(arena: &mut [i8], a: &WideLinearArgs<'_>, weights: &[W]) {
    let (input, output) = (&a.input, &a.output);
    let (n_in, n_out) = (input.map.len(), output.map.len());
    let iw = input.map.w.max(1);
    let ic = input.map.c.max(1);
    let ow = output.map.w.max(1);
    let oc = output.map.c.max(1);
    for o in 0..n_out {
        let (Some(row), Some(&b), Some(&rq)) = (
            weights.get(o * n_in..o * n_in + n_in),
            a.bias.get(o),
            a.requant.get(o),
        ) else {
            return;
        };
        let mut s = b as i64;
        for (i, &wv) in row.iter().enumerate() {
            let (px, ch) = (i / ic, i % ic);
            let x = get(arena, input, input.value(px / iw, px % iw, ch));
            s += x as i64 * wv.v() as i64;
        }
        let (px, ch) = (o / oc, o % oc);
        put(
            arena,
            output,
            output.value(px / ow, px % ow, ch),
            a.out.finish(scale_i64(rq, s)),
        );
    }
}

/// Quantization of a wide pooling: as [`PoolQuant`](crate::PoolQuant),
/// with the output in the output element's codes.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct WidePool {
    /// Input zero point.
    pub in_zp: i32,
    /// Rescaling; `None` = same scale (and, for max pooling, same zero
    /// point).
    pub requant: Option<Requant>,
    /// Output zero point and clamp.
    pub out: WideOut,
}

/// The pooling kinds of [`pool_wide`].
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum PoolKind {
    /// Maximum over the window (padded taps never win; a window of
    /// padding only gives `in_zp`).
    Max,
    /// Average over all `kh · kw` taps, padded taps real zeros.
    Avg,
    /// Average over the whole map into a `1 × 1 × C` output (the window is
    /// ignored).
    Global,
}

/// Max, average or global average pooling between maps of any element
/// types, the formulas of [`max_pool2d`](crate::max_pool2d),
/// [`avg_pool2d`](crate::avg_pool2d) and
/// [`global_avg_pool`](crate::global_avg_pool) with sums in i64 and the
/// output clamp of `q.out`. Output and input must not share bytes.
pub fn pool_wide(
    arena: &mut [i8],
    input: TypedMap,
    output: TypedMap,
    kind: PoolKind,
    window: &Window,
    q: &WidePool,
) -> Result<(), Error> {
    let a = check_pool_wide(arena.len(), input, output, kind, *window, *q)?;
    pool_wide_run(arena, &a);
    Ok(())
}

/// A [`pool_wide`] call that passed its checks.
#[derive(Debug, Clone, Copy)]
pub struct WidePoolArgs {
    input: TypedMap,
    output: TypedMap,
    kind: PoolKind,
    window: Window,
    q: WidePool,
}

/// The checks of [`pool_wide`].
pub const fn check_pool_wide(
    arena_len: usize,
    input: TypedMap,
    output: TypedMap,
    kind: PoolKind,
    window: Window,
    q: WidePool,
) -> Result<WidePoolArgs, Error> {
    if let Err(e) = input.check(arena_len) {
        return Err(e);
    }
    if let Err(e) = output.check(arena_len) {
        return Err(e);
    }
    if !input.is_disjoint(&output) {
        return Err(Error::Overlap);
    }
    let valid_rq = match q.requant {
        Some(r) => r.is_valid(),
        None => true,
    };
    if !valid_rq || !q.out.is_valid_for(output.elem) || !input.elem.holds(q.in_zp) {
        return Err(Error::BadParams);
    }
    if input.map.c != output.map.c {
        return Err(Error::ShapeMismatch);
    }
    let window = match kind {
        PoolKind::Global => {
            if output.map.h != 1 || output.map.w != 1 || input.map.h * input.map.w == 0 {
                return Err(Error::ShapeMismatch);
            }
            Window::square(1, 1, 0)
        }
        _ => {
            if window.dilation_y == 0 || window.dilation_x == 0 {
                return Err(Error::BadParams);
            }
            if !window.matches(input.map.h, input.map.w, output.map.h, output.map.w) {
                return Err(Error::ShapeMismatch);
            }
            window
        }
    };
    Ok(WidePoolArgs {
        input,
        output,
        kind,
        window,
        q,
    })
}

/// Runs a checked wide pooling.
#[inline(never)]
pub fn pool_wide_run(arena: &mut [i8], a: &WidePoolArgs) {
    let (input, output, kind, w, q) = (a.input, a.output, a.kind, a.window, a.q);
    let finish = |v: i64| match q.requant {
        Some(r) => q.out.finish(scale_i64(r, v)),
        None => q.out.finish(v),
    };
    if kind == PoolKind::Global {
        let n = input.map.pixels() as i64;
        for ch in 0..input.map.c {
            let mut s: i64 = 0;
            for px in 0..input.map.pixels() {
                s += (get(arena, &input, px * input.map.stride + ch) - q.in_zp) as i64;
            }
            let v = match q.requant {
                Some(_) => finish(s),
                None => q.out.finish(div_round(s, n)),
            };
            put(arena, &output, output.value(0, 0, ch), v);
        }
        return;
    }
    let n = w.taps() as i64;
    for oy in 0..output.map.h {
        for ox in 0..output.map.w {
            for ch in 0..input.map.c {
                let mut m: Option<i32> = None;
                let mut s: i64 = 0;
                for ky in 0..w.kh {
                    let yy = oy * w.step_y + ky * w.dilation_y;
                    if yy < w.pad.top || yy - w.pad.top >= input.map.h {
                        continue;
                    }
                    for kx in 0..w.kw {
                        let xx = ox * w.step_x + kx * w.dilation_x;
                        if xx < w.pad.left || xx - w.pad.left >= input.map.w {
                            continue;
                        }
                        let v = get(
                            arena,
                            &input,
                            input.value(yy - w.pad.top, xx - w.pad.left, ch),
                        );
                        m = Some(match m {
                            Some(m) if m >= v => m,
                            _ => v,
                        });
                        s += (v - q.in_zp) as i64;
                    }
                }
                let v = match kind {
                    PoolKind::Max => {
                        let m = m.unwrap_or(q.in_zp);
                        match q.requant {
                            None => q.out.finish(m as i64 - q.out.zero_point as i64),
                            Some(_) => finish((m - q.in_zp) as i64),
                        }
                    }
                    _ => match q.requant {
                        Some(_) => finish(s),
                        None => q.out.finish(div_round(s, n)),
                    },
                };
                put(arena, &output, output.value(oy, ox, ch), v);
            }
        }
    }
}

/// Parameters of [`add_wide`]: the formula of
/// [`AddParams`](crate::AddParams) in i64, zero points in the inputs'
/// codes, the clamp in the output's.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct WideAdd {
    /// Zero point of input `a`.
    pub a_zp: i32,
    /// Zero point of input `b`.
    pub b_zp: i32,
    /// Multiplier of input `a` to the shared scale.
    pub a_rq: Requant,
    /// Multiplier of input `b` to the shared scale.
    pub b_rq: Requant,
    /// Multiplier from the shared scale (times `2^left_shift`) to the output.
    pub out_rq: Requant,
    /// Headroom shift, `0..=22`.
    pub left_shift: u32,
    /// Output zero point and clamp.
    pub out: WideOut,
}

impl WideAdd {
    /// One element:
    /// `clamp(z_out + out_rq.scale(a_rq.scale((a - a_zp) << ls) + b_rq.scale((b - b_zp) << ls)))`.
    #[inline(always)]
    pub fn apply(&self, a: i32, b: i32) -> i32 {
        let da = ((a - self.a_zp) as i64) << self.left_shift;
        let db = ((b - self.b_zp) as i64) << self.left_shift;
        let t = scale_i64(self.a_rq, da) + scale_i64(self.b_rq, db);
        self.out.finish(scale_i64(self.out_rq, t))
    }
}

/// Element-wise sum of two maps of any element types into a third of the
/// same shape (see [`WideAdd`]). The output may be exactly one of the
/// inputs (same map and type); otherwise it shares no byte with them.
pub fn add_wide(
    arena: &mut [i8],
    a: TypedMap,
    b: TypedMap,
    output: TypedMap,
    p: &WideAdd,
) -> Result<(), Error> {
    let args = check_add_wide(arena.len(), a, b, output, *p)?;
    add_wide_run(arena, &args);
    Ok(())
}

/// An [`add_wide`] call that passed its checks.
#[derive(Debug, Clone, Copy)]
pub struct WideAddArgs {
    a: TypedMap,
    b: TypedMap,
    output: TypedMap,
    p: WideAdd,
}

const fn same_typed(x: &TypedMap, y: &TypedMap) -> bool {
    x.map.offset == y.map.offset
        && x.map.stride == y.map.stride
        && x.map.same_shape(&y.map)
        && matches!(
            (x.elem, y.elem),
            (Elem::I8, Elem::I8) | (Elem::I16, Elem::I16)
        )
}

/// The checks of [`add_wide`].
pub const fn check_add_wide(
    arena_len: usize,
    a: TypedMap,
    b: TypedMap,
    output: TypedMap,
    p: WideAdd,
) -> Result<WideAddArgs, Error> {
    if let Err(e) = a.check(arena_len) {
        return Err(e);
    }
    if let Err(e) = b.check(arena_len) {
        return Err(e);
    }
    if let Err(e) = output.check(arena_len) {
        return Err(e);
    }
    if !a.map.same_shape(&output.map) || !b.map.same_shape(&output.map) {
        return Err(Error::ShapeMismatch);
    }
    if !same_typed(&a, &output) && !a.is_disjoint(&output) {
        return Err(Error::Overlap);
    }
    if !same_typed(&b, &output) && !b.is_disjoint(&output) {
        return Err(Error::Overlap);
    }
    if !(a.elem.holds(p.a_zp)
        && b.elem.holds(p.b_zp)
        && p.a_rq.is_valid()
        && p.b_rq.is_valid()
        && p.out_rq.is_valid()
        && p.left_shift <= 22
        && p.out.is_valid_for(output.elem))
    {
        return Err(Error::BadParams);
    }
    Ok(WideAddArgs { a, b, output, p })
}

/// Runs a checked wide addition.
#[inline(never)]
pub fn add_wide_run(arena: &mut [i8], args: &WideAddArgs) {
    let (a, b, output, p) = (&args.a, &args.b, &args.output, &args.p);
    for y in 0..output.map.h {
        for x in 0..output.map.w {
            for ch in 0..output.map.c {
                let va = get(arena, a, a.value(y, x, ch));
                let vb = get(arena, b, b.value(y, x, ch));
                put(arena, output, output.value(y, x, ch), p.apply(va, vb));
            }
        }
    }
}

/// A per-channel affine transform as a step of its own, between maps of
/// any element types (a batch norm of a wide map that could not be fused):
/// `out = clamp(t.apply(ch, x))` with `t`'s clamp, which must hold codes
/// of the output type. May run in place (`output == input`).
pub fn channel_wide(
    arena: &mut [i8],
    input: TypedMap,
    output: TypedMap,
    t: &WideAffine<'_>,
) -> Result<(), Error> {
    let a = check_channel_wide(arena.len(), input, output, *t)?;
    channel_wide_run(arena, &a);
    Ok(())
}

/// A [`channel_wide`] call that passed its checks.
#[derive(Debug, Clone, Copy)]
pub struct WideChannelArgs<'a> {
    input: TypedMap,
    output: TypedMap,
    t: WideAffine<'a>,
}

/// The checks of [`channel_wide`].
pub const fn check_channel_wide<'a>(
    arena_len: usize,
    input: TypedMap,
    output: TypedMap,
    t: WideAffine<'a>,
) -> Result<WideChannelArgs<'a>, Error> {
    if let Err(e) = input.check(arena_len) {
        return Err(e);
    }
    if let Err(e) = output.check(arena_len) {
        return Err(e);
    }
    if !input.map.same_shape(&output.map) {
        return Err(Error::ShapeMismatch);
    }
    let same = input.map.offset == output.map.offset
        && input.map.stride == output.map.stride
        && matches!(
            (input.elem, output.elem),
            (Elem::I8, Elem::I8) | (Elem::I16, Elem::I16)
        );
    if !same && !input.is_disjoint(&output) {
        return Err(Error::Overlap);
    }
    if !t.is_valid_for(input.map.c) || !output.elem.holds(t.min) || !output.elem.holds(t.max) {
        return Err(Error::BadParams);
    }
    Ok(WideChannelArgs { input, output, t })
}

/// Runs a checked wide channel transform.
#[inline(never)]
pub fn channel_wide_run(arena: &mut [i8], a: &WideChannelArgs<'_>) {
    let (input, output) = (a.input, a.output);
    for y in 0..output.map.h {
        for x in 0..output.map.w {
            for ch in 0..output.map.c {
                let v = a.t.apply(ch, get(arena, &input, input.value(y, x, ch)));
                put(arena, &output, output.value(y, x, ch), v);
            }
        }
    }
}

/// Copies the channels of `input` into `output` (same shape, same element
/// type; a concatenation member that could not be written in place).
pub fn copy_channels_wide(
    arena: &mut [i8],
    input: TypedMap,
    output: TypedMap,
) -> Result<(), Error> {
    let a = check_copy_wide(arena.len(), input, output)?;
    copy_wide_run(arena, &a);
    Ok(())
}

/// The checks of [`copy_channels_wide`]; returns the two maps.
pub const fn check_copy_wide(
    arena_len: usize,
    input: TypedMap,
    output: TypedMap,
) -> Result<(TypedMap, TypedMap), Error> {
    if let Err(e) = input.check(arena_len) {
        return Err(e);
    }
    if let Err(e) = output.check(arena_len) {
        return Err(e);
    }
    let same_elem = matches!(
        (input.elem, output.elem),
        (Elem::I8, Elem::I8) | (Elem::I16, Elem::I16)
    );
    if !input.map.same_shape(&output.map) || !same_elem {
        return Err(Error::ShapeMismatch);
    }
    let same = input.map.offset == output.map.offset && input.map.stride == output.map.stride;
    if !same && !input.is_disjoint(&output) {
        return Err(Error::Overlap);
    }
    Ok((input, output))
}

/// Runs a checked wide channel copy (nothing when input and output are
/// the same map: a concatenation written in place).
#[inline(never)]
pub fn copy_wide_run(arena: &mut [i8], &(input, output): &(TypedMap, TypedMap)) {
    if input == output {
        return;
    }
    for y in 0..output.map.h {
        for x in 0..output.map.w {
            for ch in 0..output.map.c {
                let v = get(arena, &input, input.value(y, x, ch));
                put(arena, &output, output.value(y, x, ch), v);
            }
        }
    }
}

/// Writes dense HWC int16 values into an int16 map (the network's input,
/// when it is wide).
pub fn copy_in_wide(src: &[i16], arena: &mut [i8], output: TypedMap) -> Result<(), Error> {
    output.check(arena.len())?;
    if output.elem != Elem::I16 || src.len() != output.map.len() {
        return Err(Error::ShapeMismatch);
    }
    let c = output.map.c.max(1);
    for (i, &v) in src.iter().enumerate() {
        let (px, ch) = (i / c, i % c);
        put(arena, &output, px * output.map.stride + ch, v as i32);
    }
    Ok(())
}

/// Reads a map of either element type into dense HWC int16 values (the
/// network's output, when it is wide; the simulator's view of any map).
pub fn copy_out_wide(arena: &[i8], input: TypedMap, dst: &mut [i16]) -> Result<(), Error> {
    input.check(arena.len())?;
    if dst.len() != input.map.len() {
        return Err(Error::ShapeMismatch);
    }
    let c = input.map.c.max(1);
    for (i, d) in dst.iter_mut().enumerate() {
        let (px, ch) = (i / c, i % c);
        *d = get(arena, &input, px * input.map.stride + ch) as i16;
    }
    Ok(())
}

/// Index of the largest value, the first on ties (0 for no values): the
/// class of an int16 output.
pub fn argmax_wide(values: &[i16]) -> usize {
    let mut best = 0;
    let mut bv = i16::MIN;
    for (i, &v) in values.iter().enumerate() {
        if i == 0 || v > bv {
            best = i;
            bv = v;
        }
    }
    best
}

/// Checked forms of the int16 kernels for generated modules: each type is
/// built only by a `const fn` that runs every check of its kernel against
/// an arena of `A` bytes (and a patch of `P` values), as
/// [`crate::checked`] does for the int8 kernels, and its `run` cannot fail.
pub mod checked {
    use super::*;

    /// A checked [`conv2d_wide`] call.
    #[derive(Clone, Copy)]
    pub struct Conv2d<'a, const A: usize, const P: usize>(WideConvArgs<'a>);

    impl<'a, const A: usize, const P: usize> Conv2d<'a, A, P> {
        /// Runs every check of [`conv2d_wide`] (`i8` weights).
        #[allow(clippy::too_many_arguments)]
        pub const fn new(
            input: TypedMap,
            output: TypedMap,
            weights: &'a [i8],
            bias: &'a [i32],
            requant: &'a [Requant],
            p: WideConvParams,
            transform: Option<WideTransform<'a>>,
        ) -> Result<Self, Error> {
            let w = WideWeights::I8(weights);
            match check_conv_wide(A, P, input, output, w, bias, requant, p, transform) {
                Ok(a) => Ok(Conv2d(a)),
                Err(e) => Err(e),
            }
        }

        /// [`Conv2d::new`] with the weights as weights-file bytes.
        #[allow(clippy::too_many_arguments)]
        pub const fn new_bytes(
            input: TypedMap,
            output: TypedMap,
            weights: &'a [u8],
            bias: &'a [i32],
            requant: &'a [Requant],
            p: WideConvParams,
            transform: Option<WideTransform<'a>>,
        ) -> Result<Self, Error> {
            let w = WideWeights::Bytes(weights);
            match check_conv_wide(A, P, input, output, w, bias, requant, p, transform) {
                Ok(a) => Ok(Conv2d(a)),
                Err(e) => Err(e),
            }
        }

        /// True when the call sums in i64 (see the module docs).
        pub const fn acc64(&self) -> bool {
            self.0.acc64
        }

        /// The convolution; cannot fail.
        pub fn run(&self, arena: &mut [i8; A], patch: &mut [i16; P]) {
            conv_wide_run(arena, &self.0, patch);
        }
    }

    /// A checked [`linear_wide`] call.
    #[derive(Clone, Copy)]
    pub struct Linear<'a, const A: usize>(WideLinearArgs<'a>);

    impl<'a, const A: usize> Linear<'a, A> {
        /// Runs every check of [`linear_wide`] (`i8` weights).
        pub const fn new(
            input: TypedMap,
            output: TypedMap,
            weights: &'a [i8],
            bias: &'a [i32],
            requant: &'a [Requant],
            out: WideOut,
        ) -> Result<Self, Error> {
            let w = WideWeights::I8(weights);
            match check_linear_wide(A, input, output, w, bias, requant, out) {
                Ok(a) => Ok(Linear(a)),
                Err(e) => Err(e),
            }
        }

        /// [`Linear::new`] with the weights as weights-file bytes.
        pub const fn new_bytes(
            input: TypedMap,
            output: TypedMap,
            weights: &'a [u8],
            bias: &'a [i32],
            requant: &'a [Requant],
            out: WideOut,
        ) -> Result<Self, Error> {
            let w = WideWeights::Bytes(weights);
            match check_linear_wide(A, input, output, w, bias, requant, out) {
                Ok(a) => Ok(Linear(a)),
                Err(e) => Err(e),
            }
        }

        /// The layer; cannot fail.
        pub fn run(&self, arena: &mut [i8; A]) {
            linear_wide_run(arena, &self.0);
        }
    }

    /// A checked [`add_wide`] call.
    #[derive(Clone, Copy)]
    pub struct Add<const A: usize>(WideAddArgs);

    impl<const A: usize> Add<A> {
        /// Runs every check of [`add_wide`].
        pub const fn new(
            a: TypedMap,
            b: TypedMap,
            output: TypedMap,
            p: WideAdd,
        ) -> Result<Self, Error> {
            match check_add_wide(A, a, b, output, p) {
                Ok(x) => Ok(Add(x)),
                Err(e) => Err(e),
            }
        }

        /// The addition; cannot fail.
        pub fn run(&self, arena: &mut [i8; A]) {
            add_wide_run(arena, &self.0);
        }
    }

    /// A checked [`pool_wide`] call.
    #[derive(Clone, Copy)]
    pub struct Pool<const A: usize>(WidePoolArgs);

    impl<const A: usize> Pool<A> {
        /// Runs every check of [`pool_wide`].
        pub const fn new(
            input: TypedMap,
            output: TypedMap,
            kind: PoolKind,
            window: Window,
            q: WidePool,
        ) -> Result<Self, Error> {
            match check_pool_wide(A, input, output, kind, window, q) {
                Ok(a) => Ok(Pool(a)),
                Err(e) => Err(e),
            }
        }

        /// The pooling; cannot fail.
        pub fn run(&self, arena: &mut [i8; A]) {
            pool_wide_run(arena, &self.0);
        }
    }

    /// A checked [`channel_wide`] call.
    #[derive(Clone, Copy)]
    pub struct Channel<'a, const A: usize>(WideChannelArgs<'a>);

    impl<'a, const A: usize> Channel<'a, A> {
        /// Runs every check of [`channel_wide`].
        pub const fn new(
            input: TypedMap,
            output: TypedMap,
            t: WideAffine<'a>,
        ) -> Result<Self, Error> {
            match check_channel_wide(A, input, output, t) {
                Ok(a) => Ok(Channel(a)),
                Err(e) => Err(e),
            }
        }

        /// The transform; cannot fail.
        pub fn run(&self, arena: &mut [i8; A]) {
            channel_wide_run(arena, &self.0);
        }
    }

    /// A checked [`copy_channels_wide`] call.
    #[derive(Clone, Copy)]
    pub struct Copy<const A: usize>((TypedMap, TypedMap));

    impl<const A: usize> Copy<A> {
        /// Runs every check of [`copy_channels_wide`].
        pub const fn new(input: TypedMap, output: TypedMap) -> Result<Self, Error> {
            match check_copy_wide(A, input, output) {
                Ok(a) => Ok(Copy(a)),
                Err(e) => Err(e),
            }
        }

        /// The copy; cannot fail.
        pub fn run(&self, arena: &mut [i8; A]) {
            copy_wide_run(arena, &self.0);
        }
    }
}
