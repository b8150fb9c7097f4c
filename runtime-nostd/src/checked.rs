//! Kernel calls checked once, before the firmware exists.
//!
//! Every kernel of the crate also has a checked form here: a type whose
//! only constructor is a `const fn` that runs all of the kernel's checks
//! (the same ones the `Result`-returning functions run) against the arena
//! and patch lengths given as const parameters. A generated module builds
//! each of its calls in a `static`:
//!
//! ```
//! const ARENA: usize = 8;
//! static COPY: ingot_rt::checked::CopyChannels<ARENA> =
//!     match ingot_rt::checked::CopyChannels::new(
//!         ingot_rt::MapRef::new(0, 1, 2, 2),
//!         ingot_rt::MapRef::new(4, 1, 2, 2),
//!     ) {
//!         Ok(k) => k,
//!         Err(e) => e.refuse(),
//!     };
//! let mut arena = [1i8, 2, 3, 4, 0, 0, 0, 0];
//! COPY.run(&mut arena);
//! assert_eq!(arena, [1, 2, 3, 4, 1, 2, 3, 4]);
//! ```
//!
//! so a call `ingot-rt` would refuse is a compile error of the module
//! ([`Error::refuse`] panics during constant evaluation), never a runtime
//! event. The same copy into a map that reaches past the arena does not
//! compile:
//!
//! ```compile_fail
//! const ARENA: usize = 8;
//! static COPY: ingot_rt::checked::CopyChannels<ARENA> =
//!     match ingot_rt::checked::CopyChannels::new(
//!         ingot_rt::MapRef::new(0, 1, 2, 2),
//!         ingot_rt::MapRef::new(5, 1, 2, 2),
//!     ) {
//!         Ok(k) => k,
//!         Err(e) => e.refuse(),
//!     };
//! ```
//!
//! `run` then takes the arena as `&mut [i8; A]`, the very length the
//! checks assumed, returns nothing and cannot fail: its body reaches every
//! element through `get`, iterators and checked splits whose `None` arms
//! are unreachable after the checks, so no panic path is left in the
//! binary either (see the crate docs, "No panics").

use crate::channel::{check_copy, check_transform, copy_run, transform_run, TransformArgs};
use crate::conv::{
    check_conv, conv_run_depthwise, conv_run_int8, conv_run_pairs, conv_run_pointwise,
    conv_run_stem, conv_run_words, ConvArgs, Kernel, Rows,
};
use crate::eltwise::{add_run, check_add, AddArgs};
use crate::io::{check_io, check_pixels, copy_in_run, copy_out_run, pixels_run};
use crate::linear::{check_linear, linear_run, LinearArgs, LinearRows};
use crate::pool::{
    avg_pool_run, check_global_pool, check_window_pool, global_pool_run, max_pool_run, PoolArgs,
};
use crate::{
    AddParams, ConvParams, Error, FrameParams, InputTransform, MapRef, OutputQuant, PoolQuant,
    Requant, Window,
};

/// A checked [`conv2d`](crate::conv2d) call for an arena of `A` bytes and
/// a patch of `P` elements.
#[derive(Clone, Copy)]
pub struct Conv2d<'a, const A: usize, const P: usize>(ConvArgs<'a>);

impl<'a, const A: usize, const P: usize> Conv2d<'a, A, P> {
    /// Runs every check of [`conv2d`](crate::conv2d).
    #[allow(clippy::too_many_arguments)]
    pub const fn new(
        input: MapRef,
        output: MapRef,
        weights: &'a [i8],
        bias: &'a [i32],
        requant: &'a [Requant],
        p: ConvParams,
        transform: Option<InputTransform<'a>>,
    ) -> Result<Self, Error> {
        let rows = Rows::Bytes(weights);
        match check_conv(A, P, input, output, rows, bias, requant, p, transform) {
            Ok(a) => Ok(Conv2d(a)),
            Err(e) => Err(e),
        }
    }

    /// [`Conv2d::new`] with the weights as the bytes of the weights file
    /// (each the two's complement of an int8 weight, same order), read as
    /// they are: a generated module passes a sub-array of its
    /// `include_bytes!` with no conversion while rustc compiles it.
    #[allow(clippy::too_many_arguments)]
    pub const fn new_bytes(
        input: MapRef,
        output: MapRef,
        weights: &'a [u8],
        bias: &'a [i32],
        requant: &'a [Requant],
        p: ConvParams,
        transform: Option<InputTransform<'a>>,
    ) -> Result<Self, Error> {
        let rows = Rows::File(weights);
        match check_conv(A, P, input, output, rows, bias, requant, p, transform) {
            Ok(a) => Ok(Conv2d(a)),
            Err(e) => Err(e),
        }
    }

    /// The convolution; cannot fail.
    pub fn run(&self, arena: &mut [i8; A], patch: &mut [i16; P]) {
        self.run_rows(arena, patch, 0, usize::MAX);
    }

    /// Output rows `[y0, y1)` only (clipped to the output; nothing when
    /// empty), for a row pipeline; cannot fail. Rows of a ring input must
    /// be in their slots.
    #[inline(always)]
    pub fn run_rows(&self, arena: &mut [i8; A], patch: &mut [i16; P], y0: usize, y1: usize) {
        // A constant of the call's `static`: a firmware links only the
        // kernels its calls choose.
        match self.0.kernel {
            Kernel::Depthwise => conv_run_depthwise(arena, &self.0, patch, y0, y1),
            Kernel::Stem => conv_run_stem(arena, &self.0, y0, y1),
            _ => conv_run_int8(arena, &self.0, patch, y0, y1),
        }
    }
}

/// A checked [`conv2d_paired`](crate::conv2d_paired) call for an arena of
/// `A` bytes and a patch of `P` elements.
#[derive(Clone, Copy)]
pub struct Conv2dPaired<'a, const A: usize, const P: usize>(ConvArgs<'a>);

impl<'a, const A: usize, const P: usize> Conv2dPaired<'a, A, P> {
    /// Runs every check of [`conv2d_paired`](crate::conv2d_paired).
    #[allow(clippy::too_many_arguments)]
    pub const fn new(
        input: MapRef,
        output: MapRef,
        weights: &'a [u32],
        bias: &'a [i32],
        requant: &'a [Requant],
        p: ConvParams,
        transform: Option<InputTransform<'a>>,
    ) -> Result<Self, Error> {
        let rows = Rows::Pairs(weights);
        match check_conv(A, P, input, output, rows, bias, requant, p, transform) {
            Ok(a) => Ok(Conv2dPaired(a)),
            Err(e) => Err(e),
        }
    }

    /// The convolution; cannot fail.
    pub fn run(&self, arena: &mut [i8; A], patch: &mut [i16; P]) {
        self.run_rows(arena, patch, 0, usize::MAX);
    }

    /// Output rows `[y0, y1)` only (clipped to the output; nothing when
    /// empty), for a row pipeline; cannot fail. Rows of a ring input must
    /// be in their slots.
    #[inline(always)]
    pub fn run_rows(&self, arena: &mut [i8; A], patch: &mut [i16; P], y0: usize, y1: usize) {
        // A constant of the call's `static` (see `Conv2d::run_rows`).
        match self.0.kernel {
            Kernel::Stem => conv_run_stem(arena, &self.0, y0, y1),
            _ => conv_run_pairs(arena, &self.0, patch, y0, y1),
        }
    }
}

/// A checked [`conv2d_words`](crate::conv2d_words) call for an arena of
/// `A` bytes and a patch of `P` elements.
#[derive(Clone, Copy)]
pub struct Conv2dWords<'a, const A: usize, const P: usize>(ConvArgs<'a>);

impl<'a, const A: usize, const P: usize> Conv2dWords<'a, A, P> {
    /// Runs every check of [`conv2d_words`](crate::conv2d_words).
    #[allow(clippy::too_many_arguments)]
    pub const fn new(
        input: MapRef,
        output: MapRef,
        weights: &'a [u8],
        bias: &'a [i32],
        requant: &'a [Requant],
        p: ConvParams,
        transform: Option<InputTransform<'a>>,
    ) -> Result<Self, Error> {
        let rows = Rows::Words(weights);
        match check_conv(A, P, input, output, rows, bias, requant, p, transform) {
            Ok(a) => Ok(Conv2dWords(a)),
            Err(e) => Err(e),
        }
    }

    /// The convolution; cannot fail.
    pub fn run(&self, arena: &mut [i8; A], patch: &mut [i16; P]) {
        self.run_rows(arena, patch, 0, usize::MAX);
    }

    /// Output rows `[y0, y1)` only (clipped to the output; nothing when
    /// empty), for a row pipeline; cannot fail. Rows of a ring input must
    /// be in their slots.
    #[inline(always)]
    pub fn run_rows(&self, arena: &mut [i8; A], patch: &mut [i16; P], y0: usize, y1: usize) {
        // A constant of the call's `static` (see `Conv2d::run_rows`).
        match self.0.kernel {
            Kernel::Stem => conv_run_stem(arena, &self.0, y0, y1),
            Kernel::Pointwise => conv_run_pointwise(arena, &self.0, patch, y0, y1),
            _ => conv_run_words(arena, &self.0, patch, y0, y1),
        }
    }
}

/// A checked [`linear`](crate::linear) call for an arena of `A` bytes.
#[derive(Clone, Copy)]
pub struct Linear<'a, const A: usize>(LinearArgs<'a>);

impl<'a, const A: usize> Linear<'a, A> {
    /// Runs every check of [`linear`](crate::linear).
    pub const fn new(
        input: MapRef,
        output: MapRef,
        weights: &'a [i8],
        bias: &'a [i32],
        requant: &'a [Requant],
        out: OutputQuant,
    ) -> Result<Self, Error> {
        match check_linear(
            A,
            input,
            output,
            LinearRows::Bytes(weights),
            bias,
            requant,
            out,
        ) {
            Ok(a) => Ok(Linear(a)),
            Err(e) => Err(e),
        }
    }

    /// [`Linear::new`] with the weights as the bytes of the weights file,
    /// as [`Conv2d::new_bytes`].
    pub const fn new_bytes(
        input: MapRef,
        output: MapRef,
        weights: &'a [u8],
        bias: &'a [i32],
        requant: &'a [Requant],
        out: OutputQuant,
    ) -> Result<Self, Error> {
        match check_linear(
            A,
            input,
            output,
            LinearRows::File(weights),
            bias,
            requant,
            out,
        ) {
            Ok(a) => Ok(Linear(a)),
            Err(e) => Err(e),
        }
    }

    /// The layer; cannot fail.
    pub fn run(&self, arena: &mut [i8; A]) {
        linear_run(arena, &self.0);
    }
}

/// A checked [`max_pool2d`](crate::max_pool2d) call for an arena of `A`
/// bytes.
#[derive(Debug, Clone, Copy)]
pub struct MaxPool2d<const A: usize>(PoolArgs);

impl<const A: usize> MaxPool2d<A> {
    /// Runs every check of [`max_pool2d`](crate::max_pool2d).
    pub const fn new(
        input: MapRef,
        output: MapRef,
        window: Window,
        q: PoolQuant,
    ) -> Result<Self, Error> {
        match check_window_pool(A, input, output, window, q) {
            Ok(a) => Ok(MaxPool2d(a)),
            Err(e) => Err(e),
        }
    }

    /// The pooling; cannot fail.
    pub fn run(&self, arena: &mut [i8; A]) {
        max_pool_run(arena, &self.0, 0, usize::MAX);
    }

    /// Output rows `[y0, y1)` only (clipped to the output; nothing when
    /// empty), for a row pipeline; cannot fail.
    pub fn run_rows(&self, arena: &mut [i8; A], y0: usize, y1: usize) {
        max_pool_run(arena, &self.0, y0, y1);
    }
}

/// A checked [`avg_pool2d`](crate::avg_pool2d) call for an arena of `A`
/// bytes.
#[derive(Debug, Clone, Copy)]
pub struct AvgPool2d<const A: usize>(PoolArgs);

impl<const A: usize> AvgPool2d<A> {
    /// Runs every check of [`avg_pool2d`](crate::avg_pool2d).
    pub const fn new(
        input: MapRef,
        output: MapRef,
        window: Window,
        q: PoolQuant,
    ) -> Result<Self, Error> {
        match check_window_pool(A, input, output, window, q) {
            Ok(a) => Ok(AvgPool2d(a)),
            Err(e) => Err(e),
        }
    }

    /// The pooling; cannot fail.
    pub fn run(&self, arena: &mut [i8; A]) {
        avg_pool_run(arena, &self.0, 0, usize::MAX);
    }

    /// Output rows `[y0, y1)` only (clipped to the output; nothing when
    /// empty), for a row pipeline; cannot fail.
    pub fn run_rows(&self, arena: &mut [i8; A], y0: usize, y1: usize) {
        avg_pool_run(arena, &self.0, y0, y1);
    }
}

/// A checked [`global_avg_pool`](crate::global_avg_pool) call for an arena
/// of `A` bytes.
#[derive(Debug, Clone, Copy)]
pub struct GlobalAvgPool<const A: usize>(PoolArgs);

impl<const A: usize> GlobalAvgPool<A> {
    /// Runs every check of [`global_avg_pool`](crate::global_avg_pool).
    pub const fn new(input: MapRef, output: MapRef, q: PoolQuant) -> Result<Self, Error> {
        match check_global_pool(A, input, output, q) {
            Ok(a) => Ok(GlobalAvgPool(a)),
            Err(e) => Err(e),
        }
    }

    /// The pooling; cannot fail.
    pub fn run(&self, arena: &mut [i8; A]) {
        global_pool_run(arena, &self.0);
    }
}

/// A checked [`add`](crate::add) call for an arena of `A` bytes.
#[derive(Debug, Clone, Copy)]
pub struct Add<const A: usize>(AddArgs);

impl<const A: usize> Add<A> {
    /// Runs every check of [`add`](crate::add).
    pub const fn new(a: MapRef, b: MapRef, output: MapRef, p: AddParams) -> Result<Self, Error> {
        match check_add(A, a, b, output, p) {
            Ok(a) => Ok(Add(a)),
            Err(e) => Err(e),
        }
    }

    /// The addition; cannot fail.
    pub fn run(&self, arena: &mut [i8; A]) {
        add_run(arena, &self.0, 0, usize::MAX);
    }

    /// Output rows `[y0, y1)` only (clipped to the output; nothing when
    /// empty), for a row pipeline; cannot fail.
    pub fn run_rows(&self, arena: &mut [i8; A], y0: usize, y1: usize) {
        add_run(arena, &self.0, y0, y1);
    }
}

/// A checked [`copy_channels`](crate::copy_channels) call for an arena of
/// `A` bytes.
#[derive(Debug, Clone, Copy)]
pub struct CopyChannels<const A: usize>((MapRef, MapRef));

impl<const A: usize> CopyChannels<A> {
    /// Runs every check of [`copy_channels`](crate::copy_channels).
    pub const fn new(input: MapRef, output: MapRef) -> Result<Self, Error> {
        match check_copy(A, input, output) {
            Ok(a) => Ok(CopyChannels(a)),
            Err(e) => Err(e),
        }
    }

    /// The copy; cannot fail.
    pub fn run(&self, arena: &mut [i8; A]) {
        copy_run(arena, &self.0);
    }
}

/// A checked [`channel_transform`](crate::channel_transform) call for an
/// arena of `A` bytes.
#[derive(Clone, Copy)]
pub struct ChannelTransform<'a, const A: usize>(TransformArgs<'a>);

impl<'a, const A: usize> ChannelTransform<'a, A> {
    /// Runs every check of [`channel_transform`](crate::channel_transform).
    pub const fn new(input: MapRef, output: MapRef, t: InputTransform<'a>) -> Result<Self, Error> {
        match check_transform(A, input, output, t) {
            Ok(a) => Ok(ChannelTransform(a)),
            Err(e) => Err(e),
        }
    }

    /// The transform; cannot fail.
    pub fn run(&self, arena: &mut [i8; A]) {
        transform_run(arena, &self.0, 0, usize::MAX);
    }

    /// Output rows `[y0, y1)` only (clipped to the output; nothing when
    /// empty), for a row pipeline; cannot fail.
    pub fn run_rows(&self, arena: &mut [i8; A], y0: usize, y1: usize) {
        transform_run(arena, &self.0, y0, y1);
    }
}

/// A checked [`copy_in`](crate::copy_in) of `N` dense values into an arena
/// of `A` bytes.
#[derive(Debug, Clone, Copy)]
pub struct CopyIn<const A: usize, const N: usize>(MapRef);

impl<const A: usize, const N: usize> CopyIn<A, N> {
    /// Runs every check of [`copy_in`](crate::copy_in).
    pub const fn new(output: MapRef) -> Result<Self, Error> {
        match check_io(A, N, output) {
            Ok(()) => Ok(CopyIn(output)),
            Err(e) => Err(e),
        }
    }

    /// The copy; cannot fail.
    pub fn run(&self, src: &[i8; N], arena: &mut [i8; A]) {
        copy_in_run(src, arena, self.0);
    }
}

/// A checked [`copy_out`](crate::copy_out) of a map of an arena of `A`
/// bytes into `N` dense values.
#[derive(Debug, Clone, Copy)]
pub struct CopyOut<const A: usize, const N: usize>(MapRef);

impl<const A: usize, const N: usize> CopyOut<A, N> {
    /// Runs every check of [`copy_out`](crate::copy_out).
    pub const fn new(input: MapRef) -> Result<Self, Error> {
        match check_io(A, N, input) {
            Ok(()) => Ok(CopyOut(input)),
            Err(e) => Err(e),
        }
    }

    /// The copy; cannot fail.
    pub fn run(&self, arena: &[i8; A], dst: &mut [i8; N]) {
        copy_out_run(arena, self.0, dst);
    }
}

/// A checked [`quantize_pixels`](crate::quantize_pixels) of `N` camera
/// bytes into a dense input of `N` codes.
#[derive(Debug, Clone, Copy)]
pub struct QuantizePixels<'a, const N: usize> {
    output: MapRef,
    table: &'a [i8],
}

impl<'a, const N: usize> QuantizePixels<'a, N> {
    /// Runs every check of [`quantize_pixels`](crate::quantize_pixels) with
    /// `output` inside an `N`-element buffer.
    pub const fn new(output: MapRef, table: &'a [i8]) -> Result<Self, Error> {
        match check_pixels(N, N, output, table) {
            Ok(()) => Ok(QuantizePixels { output, table }),
            Err(e) => Err(e),
        }
    }

    /// The quantization; cannot fail.
    pub fn run(&self, pixels: &[u8; N], input: &mut [i8; N]) {
        pixels_run(pixels, input, self.output, self.table);
    }
}

/// A checked [`convert_frame`](crate::convert_frame) from a frame of `F`
/// bytes into an input of `N` codes.
#[derive(Debug, Clone, Copy)]
pub struct ConvertFrame<'a, const F: usize, const N: usize> {
    params: FrameParams,
    table: &'a [i8],
}

impl<'a, const F: usize, const N: usize> ConvertFrame<'a, F, N> {
    /// Checks what [`convert_frame`](crate::convert_frame) checks at run
    /// time: the frame holds `params.frame_bytes()` bytes, the input
    /// `params.input_len()` codes, the table 256 entries per channel.
    pub const fn new(params: FrameParams, table: &'a [i8]) -> Result<Self, Error> {
        let c = params.config().out_c as usize;
        if F < params.frame_bytes() || N < params.input_len() || table.len() < 256 * c {
            return Err(Error::BufferTooSmall);
        }
        Ok(ConvertFrame { params, table })
    }

    /// The conversion; cannot fail.
    pub fn run(&self, frame: &[u8; F], input: &mut [i8; N]) {
        // The only refusal of `convert_frame` is a short buffer, which
        // `new` ruled out for these lengths.
        let _ = crate::convert_frame(frame, &self.params, self.table, input);
    }
}
