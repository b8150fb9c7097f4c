//! `ingot-rt`: the int8 kernels that ingot-generated firmware modules call,
//! and that the ingot compiler runs as its bit-exact integer simulator.
//!
//! `#![no_std]`, no `alloc`, no `unsafe`, no statics, no internal
//! buffers, one dependency (`ingot-dsp`, the audited wrappers around the
//! Arm DSP instructions such as `smlad`, with portable twins elsewhere),
//! and no floating point on the inference path (the only float code is
//! marked *host-side*: [`Requant::from_real`],
//! [`Requant::to_real`], [`AddParams::from_scales`] and [`dequantize`]).
//! Nothing assumes a 64-bit `usize`; 64-bit arithmetic is `i64`, which
//! 32-bit Cortex-M does with `SMULL`/`SMLAL` and register pairs.
//!
//! # Layout: channels-last (HWC), one arena
//!
//! Every feature map of one image is stored channels-last: the channels of
//! a pixel are adjacent, pixels follow row by row. All maps live in **one
//! caller-owned arena** `&mut [i8]` and are addressed by a [`MapRef`]:
//!
//! ```text
//! element (y, x, ch)  at  arena[offset + (y * w + x) * stride + ch]
//! ```
//!
//! HWC is chosen because a convolution's receptive field is then `kh·kw`
//! runs of contiguous channels, and the weights are stored
//! `[C_out][kh][kw][C_in/groups]` with the same channel-innermost order: the
//! multiply-accumulate loop walks two contiguous arrays.
//!
//! # The stride convention and in-place concatenation
//!
//! `MapRef::stride >= c` is the **pixel stride**: the channel count of the
//! region the map lives in. A plain map has `stride == c`. A concatenation
//! of `C_total` channels is one region; the producer of channels
//! `[c0, c0 + C)` writes through `MapRef { offset: region + c0, c: C,
//! stride: C_total, .. }` and a consumer of the first `k` channels reads
//! `MapRef { offset: region, c: k, stride: C_total, .. }`
//! ([`MapRef::channels`] builds such views). So concatenation costs no copy,
//! and a densely connected layer reads channels `[0, k)` and writes
//! `[k, k + g)` of the *same* region in one call: its reader and writer
//! interleave byte by byte.
//!
//! Safe Rust cannot hand out a `&[i8]` and a `&mut [i8]` to interleaved
//! bytes, so kernels never take per-map slices: they take the single arena
//! plus `MapRef`s, read into registers or scratch, and write back by index.
//! That keeps the crate free of `unsafe`. Each kernel validates its maps up
//! front ([`MapRef::fits`], [`MapRef::is_disjoint`]) and returns an
//! [`Error`] instead of writing anything when they are wrong.
//!
//! # Rings of rows (row streaming)
//!
//! A [`MapRef::ring`] stores only `rows` of its `h` rows, row `y` in slot
//! `y mod rows`. Convolution (every form), max and average pooling,
//! [`add`] and [`channel_transform`] compute output rows `[y0, y1)` only
//! when asked ([`conv2d_rows`], `checked::*::run_rows`), so a producer and
//! its consumer can run row by row through a ring just large enough for
//! the consumer's window: the large map between them is never stored
//! whole. `rows == h` is the whole map, and every call on whole maps is
//! unchanged. Linear layers, global pooling and the input/output copies
//! take whole maps only.
//!
//! Aliasing rules: convolution, linear and pooling outputs must not share
//! elements with their inputs (interleaved channel views of one region are
//! fine; pooling in place is **not** supported). [`add`] may write in place:
//! the output may be exactly one of the inputs (same `MapRef`).
//!
//! # Quantization and the rounding rule
//!
//! Values follow Jacob et al. (2018), *Quantization and Training of Neural
//! Networks for Efficient Integer-Arithmetic-Only Inference*, Section 2:
//! `real = scale · (q − zero_point)`. Weights are symmetric per output
//! channel (zero point 0, values in `[-127, 127]`); the bias is folded with
//! the input zero point by the compiler
//! (`bias_folded[o] = bias_q[o] − z_in · Σ w[o]`), so kernels accumulate
//! `acc = bias_folded[o] + Σ w·x` over raw int8 `x`, and padded taps equal to
//! `z_in` keep that exact.
//!
//! The real multiplier `M = s_in·s_w / s_out` is a [`Requant`]: a Q31
//! mantissa `mult` with `|mult|` in `[2^30, 2^31)` and a `shift`, so that
//! `M ≈ mult · 2^-(31 + shift)`, total shift `t = 31 + shift` in `1..=62`.
//! Requantization is
//!
//! ```text
//! out = clamp(z_out + ((acc as i64 * mult as i64 + (1 << (t - 1))) >> t), min, max)
//! ```
//!
//! i.e. round to nearest, **ties toward +∞**, with a **single rounding**
//! (computed as `((p >> (t − 1)) + 1) >> 1`, which is the same integer).
//! The full 62-bit product is kept and rounded once; the common two-step
//! alternative (a rounding doubling high-multiply followed by a rounding
//! right shift) rounds twice and can be off by one step on ties. Here the
//! result is always the correctly rounded `acc · mult / 2^t`. The fused
//! activation is the clamp: none = `[-128, 127]`, ReLU = `[z_out, 127]`,
//! ReLU6 = `[z_out, min(127, z_out + round(6 / s_out))]` ([`OutputQuant`]).
//!
//! # Accumulator bound
//!
//! Accumulators are i32 and add with wrapping arithmetic. For every output
//! channel `|acc| <= |bias| + 255 · Σ|w|` ([`acc_worst_case`]); the compiler
//! checks that this stays below `2^31` ([`acc_fits`]). With `|w| <= 127`
//! that allows about 66 000 taps per output even with a zero bias, far more
//! than any layer this crate targets.
//!
//! # Hot loops and what they should compile to
//!
//! A convolution handles one output pixel at a time: it gathers the
//! receptive field into the caller's `patch` (the im2col buffer of one
//! pixel, `&mut [i16]` of [`conv_patch_len`] elements), applying padding
//! and any fused input transform once, then runs every output channel's dot
//! product over the contiguous patch and the contiguous weight row. The
//! patch is stored **widened to 16 bits**: it is reused by all `C_out`
//! rows, so widening it once per pixel removes half of the sign extensions
//! from the inner loop, and it is the operand format of a 16-bit dual MAC.
//!
//! The inner loop therefore runs over *contiguous input channels* (the
//! innermost axis of both the HWC patch and the `[O][kh][kw][I]` weights),
//! never over the kernel window or over output channels: contiguous runs
//! are what allow wide loads and multiply-accumulate over channel pairs.
//! Its shape is chosen for that: fixed 16-lane chunks (`chunks_exact`), a
//! `[i32; 16]` lane accumulator per weight row, one horizontal sum per row
//! at the end, four (then two, then one) weight rows per pass over the
//! patch, and a scalar channel-pair tail. No bounds checks remain in the
//! loop and lanes carry no dependency on each other.
//!
//! * On x86-64 with baseline SSE2 LLVM turns each row's lanes into
//!   `movdqu` loads, `punpck[lh]bw` + `psraw` to sign-extend 16 weights,
//!   `pmaddwd` (eight 16×16 products summed in pairs into four i32 lanes)
//!   and `paddd`: 47 instructions per 64 MACs (four rows × 16 channels) in
//!   the loop. The multi-row function takes the patch once per row (the
//!   caller passes the same slice four times): with one shared slice the
//!   SLP vectorizer's cost model rejects the reduction, with independent
//!   slices it costs each row like the single-row loop and emits `pmaddwd`.
//!   `benches/callgrind.sh` measures the result per kernel.
//! * On Cortex-M4/M7 (`thumbv7em`) the intended shape is the same pairing:
//!   one 32-bit load brings a channel pair of the widened patch, one 32-bit
//!   load brings four weights that `SXTB16` (and `SXTB16` with `ROR #8`)
//!   split into two 16-bit pairs, and `SMLAD` performs two 16×16 MACs into
//!   a 32-bit accumulator per instruction. Pairing consecutive channels is
//!   exactly the `acc += x[2k]·w[2k] + x[2k+1]·w[2k+1]` the loop and its
//!   tail express, and it is only possible because channels are innermost
//!   and contiguous; several rows per patch pass let one patch load feed
//!   several `SMLAD`s.
//!
//! Special paths: 1×1 pointwise (stride 1, no padding, one group) skips the
//! window logic (the patch is the input pixel, widened); with the word
//! layout and room for [`pointwise_patch_len`] values a 1×1 convolution
//! (any step, no padding, one group, no input transform) runs four output
//! pixels per pass over each weight row instead (module `pointwise`);
//! dense kernel rows inside the map are copied as one run of `kw·C_in`
//! values; a depthwise 3×3 convolution (a multiple of four channels, no
//! dilation or input transform) reads the int8 map in place, four
//! channels a word (module `depthwise`), and other depthwise ones
//! (`groups == C_in`, any channel multiplier) gather the window tap-major
//! like a dense convolution and let each output channel walk its input
//! channel's column; one input channel (the stem on a gray picture, one
//! group, no dilation or input transform, at most 32 taps) has a kernel of
//! its own on DSP cores and hosts (`stem.rs`): each pixel's taps packed
//! into 16-bit pairs once, weights widened per call into a table on the
//! stack (its frame about 1.1 KiB on the M4), four channels per pass of
//! `SMLAD`.
//! [`linear`] reads the input straight from the arena
//! with an all-int8 dot product (each weight is used once, so there is
//! nothing to amortize a widening over); on cores with the DSP extension
//! (and on hosts) four int8 values per word, widened in registers with
//! `sxtb16`, two weight rows per pass.
//!
//! # No panics
//!
//! Firmware that panics halts, so nothing the generated `run` reaches can
//! panic, and this is proven rather than hoped:
//!
//! * **Checked once, at compile time.** Every kernel has a checked form in
//!   [`checked`]: a type built only by a `const fn` that runs all of the
//!   kernel's checks (maps inside the arena, shapes, buffer lengths,
//!   parameter ranges) against the arena and patch lengths given as const
//!   parameters. Generated modules build each call in a `static`, so a call
//!   this crate would refuse is a compile error of the module
//!   ([`Error::refuse`]), not an error ignored at run time; `run` takes the
//!   arena as `&mut [i8; A]` and returns nothing. The `Result`-returning
//!   functions run the same checks at run time, for the compiler's integer
//!   simulator, which reports a refusal as an error.
//! * **No panic path in the bodies.** After the checks, kernel bodies reach
//!   memory only through iterators, `chunks_exact` with sizes written
//!   `n.max(1)`, `get`/`get_mut` and checked splits whose `None` arms return
//!   (unreachable after the checks); divisors are `NonZeroUsize` or checked
//!   (`checked_div_euclid`); there is no `clamp` (its assertion), no
//!   `copy_within`/`copy_from_slice` (their range checks) and no formatting.
//!   Chunk iterators are advanced by hand rather than zipped where `zip`
//!   could leave a division by the chunk size outside the optimiser's view.
//! * **Enforced at link time.** ingot's CI (`compiler/tests/it/panic_never.rs`)
//!   links the demo's module and every zoo network's module for
//!   `thumbv7em-none-eabihf` and `thumbv6m-none-eabi` in release with a
//!   panic handler that calls a function defined nowhere: one surviving
//!   panic path fails the link. `ingot check --on CORE` reports the count
//!   ("panic call sites") for the module it checks.
//!
//! The float helpers and [`pair_rows`] (meant for `const` evaluation, where
//! its panic is a compile error) are outside the inference path.
//!
//! One limit: the guarantee is for builds in which this crate is compiled
//! as one codegen unit or with LTO (the check runners and the probe use
//! both). With rustc's default of several codegen units and no LTO, up to
//! five `Zip::new` instances of the dot products' constant-size chunk
//! iterators can stay out of line in this crate's object code, each with a
//! division-by-zero check that never fires; firmware without LTO should
//! set `[profile.release.package.ingot-rt] codegen-units = 1`.
//!
//! # Kernels
//!
//! [`conv2d`], [`linear`], [`max_pool2d`], [`avg_pool2d`],
//! [`global_avg_pool`], [`add`], [`channel_transform`], [`copy_channels`], [`quantize_pixels`], [`copy_in`],
//! [`copy_out`], [`argmax`], [`dequantize`]; camera frames in:
//! [`convert_frame`] (see [`FrameConfig`]). Maps kept at 16 bits (int16
//! activations of chosen layers) have their own kernels in [`wide`].
#![no_std]
#![forbid(unsafe_code)]
#![deny(missing_docs)]

mod channel;
pub mod checked;
mod conv;
mod depthwise;
mod dot;
mod eltwise;
mod error;
mod frame;
mod io;
mod linear;
mod map;
mod pointwise;
mod pool;
mod requant;
mod stem;
mod transform;
pub mod wide;

pub use channel::{channel_transform, channel_transform_rows, copy_channels};
pub use conv::{
    conv2d, conv2d_paired, conv2d_paired_rows, conv2d_rows, conv2d_words, conv2d_words_rows,
    conv_patch_len, conv_rows_apply, conv_rows_apply_words, conv_rows_len, pair_rows,
    pair_rows_into, paired_len, window_out_len, word_rows_into, words_len, ConvParams, Padding,
    Window,
};
pub use eltwise::{add, add_rows, AddParams, ADD_LEFT_SHIFT};
pub use error::Error;
pub use frame::{
    convert_frame, FrameConfig, FrameError, FrameParams, Luma, PixelFormat, Resize, Roi,
};
pub use io::{argmax, copy_in, copy_out, dequantize, quantize_pixels};
pub use linear::linear;
pub use map::MapRef;
pub use pointwise::{pointwise_applies, pointwise_patch_len};
pub use pool::{
    avg_pool2d, avg_pool2d_rows, div_round, global_avg_pool, max_pool2d, max_pool2d_rows, PoolQuant,
};
pub use requant::{
    acc_fits, acc_worst_case, sat_i8, OutputQuant, Requant, MAX_TOTAL_SHIFT, MIN_TOTAL_SHIFT,
};
pub use transform::{AffineTransform, InputTransform};
