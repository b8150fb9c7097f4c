//! `ingot-dsp`: safe wrappers around single Arm DSP instructions, each with
//! a portable twin that gives the same result bit for bit.
//!
//! This is the one place of the ingot runtime with `unsafe` code, kept
//! apart so that `ingot-rt` stays `#![forbid(unsafe_code)]` (a crate-level
//! `forbid` cannot be lifted for one module). Every wrapper is one
//! instruction in a `core::arch::asm!` block on cores with the DSP
//! extension, and plain Rust everywhere else:
//!
//! | wrapper | instruction | result |
//! |---|---|---|
//! | [`smlad`] | `SMLAD` | `acc + lo(x)·lo(y) + hi(x)·hi(y)` |
//! | [`smladx`] | `SMLADX` | `acc + lo(x)·hi(y) + hi(x)·lo(y)` |
//! | [`smlabb`] | `SMLABB` | `acc + lo(x)·lo(y)` |
//! | [`smlatt`] | `SMLATT` | `acc + hi(x)·hi(y)` |
//! | [`sxtb16`] | `SXTB16` | bytes 0 and 2 of `x`, sign-extended into the two halves |
//! | [`sxtb16_ror8`] | `SXTB16 …, ROR #8` | bytes 1 and 3 of `x`, sign-extended into the two halves |
//! | [`pkhbt`] | `PKHBT` | low half of `a`, high half of `b` |
//! | [`pkhbt_lsl16`] | `PKHBT …, LSL #16` | low half of `a`, low half of `b` on top |
//! | [`pkhtb`] | `PKHBT` (operands swapped) | high half of `a`, low half of `b` |
//! | [`pkhtb_asr16`] | `PKHTB …, ASR #16` | high half of `a`, high half of `b` below |
//!
//! `lo`/`hi` are the signed 16-bit halves of a word (bits 0–15, 16–31).
//! Sums wrap modulo 2³² like the hardware's 32-bit destination
//! (`i32::wrapping_add`); the twins live in [`portable`].
//!
//! # When the instructions are used
//!
//! When `cfg(ingot_dsp)` is set by this crate's build script: Arm targets
//! `thumbv7em-*` (Cortex-M4/M7), and other Arm targets built with
//! `-C target-feature=+dsp` (Cortex-M33 with the DSP extension). On stable
//! Rust, `cfg(target_feature = "dsp")` cannot be used for this: the Arm
//! `dsp` feature is unstable and rustc does not report it to `cfg`. On
//! every other target (hosts, Cortex-M0+/M3) the wrappers are their
//! portable twins. [`NATIVE`] says which one a build got.
//!
//! # Safety argument (all wrappers)
//!
//! Each `asm!` block is a single data-processing instruction on registers:
//! it reads only its input registers, writes only its output register,
//! touches no memory and no stack (`nomem`, `nostack`), and its result
//! depends only on its inputs (`pure`). The instructions exist on every
//! core `cfg(ingot_dsp)` is set for, so none can fault.
//!
//! Flags: `SXTB16`, `PKHBT` and `PKHTB` change no flag, so their blocks
//! declare `preserves_flags`. The multiply-accumulates `SMLAD`, `SMLADX`,
//! `SMLABB` and `SMLATT` set the sticky saturation flag `Q` of the APSR
//! when the 32-bit accumulation overflows (they never clear it, and leave
//! N, Z, C, V and GE alone). The Rust reference lists `Q` among the flags
//! a block with `preserves_flags` must leave unchanged ("Rules for inline
//! assembly", Arm: condition flags, saturation flag `Q`, GE), so those
//! four blocks do **not** declare it: the compiler then assumes the flags
//! are changed, which is correct and costs nothing in the kernels (no
//! flag result lives across a multiply-accumulate). Nothing in ingot reads
//! `Q`: the kernels want the wrapped sum, and the compiler bounds the
//! accumulators so that they do not overflow in the first place
//! (`ingot_rt::acc_worst_case`).
#![no_std]
#![deny(missing_docs)]
#![deny(unsafe_op_in_unsafe_fn)]
#![cfg_attr(not(ingot_dsp), forbid(unsafe_code))]

/// `true` when this build uses the DSP instructions, `false` when the
/// wrappers are the portable twins.
pub const NATIVE: bool = cfg!(ingot_dsp);

/// `true` when the core multiplies two 32-bit values into a 64-bit
/// product in one instruction (`smull`: every Arm M-profile core from
/// ARMv7-M on, and every host); `false` on ARMv6-M (Cortex-M0/M0+,
/// `thumbv6m-*`), where an `i64` product is a library call and a product's
/// high word is cheaper from four 16-bit multiplies. Set by the build
/// script (`cfg(ingot_v6m)`), which reads the target triple.
pub const LONG_MULTIPLY: bool = !cfg!(ingot_v6m);

/// The portable definitions: plain Rust, the same result as the
/// instruction bit for bit. Used on every core without the DSP extension
/// and by the tests as the reference for the wrappers.
pub mod portable {
    /// The signed low half of `v` (bits 0–15).
    #[inline(always)]
    pub const fn lo(v: u32) -> i32 {
        v as u16 as i16 as i32
    }

    /// The signed high half of `v` (bits 16–31).
    #[inline(always)]
    pub const fn hi(v: u32) -> i32 {
        (v >> 16) as u16 as i16 as i32
    }

    /// Two signed 16-bit values as one word, `lo` in bits 0–15.
    #[inline(always)]
    pub const fn pack(lo: i16, hi: i16) -> u32 {
        (lo as u16 as u32) | ((hi as u16 as u32) << 16)
    }

    /// `acc + lo(x)·lo(y) + hi(x)·hi(y)`, wrapping (see [`crate::smlad`]).
    #[inline(always)]
    pub const fn smlad(x: u32, y: u32, acc: i32) -> i32 {
        // Each product fits in i32 (at most 2^30); only the sums can wrap,
        // and wrapping sums are the hardware's 32-bit result.
        acc.wrapping_add(lo(x) * lo(y)).wrapping_add(hi(x) * hi(y))
    }

    /// `acc + lo(x)·hi(y) + hi(x)·lo(y)`, wrapping (see [`crate::smladx`]).
    #[inline(always)]
    pub const fn smladx(x: u32, y: u32, acc: i32) -> i32 {
        acc.wrapping_add(lo(x) * hi(y)).wrapping_add(hi(x) * lo(y))
    }

    /// `acc + lo(x)·lo(y)`, wrapping (see [`crate::smlabb`]).
    #[inline(always)]
    pub const fn smlabb(x: u32, y: u32, acc: i32) -> i32 {
        acc.wrapping_add(lo(x) * lo(y))
    }

    /// `acc + hi(x)·hi(y)`, wrapping (see [`crate::smlatt`]).
    #[inline(always)]
    pub const fn smlatt(x: u32, y: u32, acc: i32) -> i32 {
        acc.wrapping_add(hi(x) * hi(y))
    }

    /// Bytes 0 and 2 of `x`, sign-extended to 16 bits, in the low and high
    /// half (see [`crate::sxtb16`]).
    #[inline(always)]
    pub const fn sxtb16(x: u32) -> u32 {
        pack(x as u8 as i8 as i16, (x >> 16) as u8 as i8 as i16)
    }

    /// Bytes 1 and 3 of `x`, sign-extended to 16 bits, in the low and high
    /// half (see [`crate::sxtb16_ror8`]).
    #[inline(always)]
    pub const fn sxtb16_ror8(x: u32) -> u32 {
        sxtb16(x.rotate_right(8))
    }

    /// The low half of `a` and the high half of `b` (see [`crate::pkhbt`]).
    #[inline(always)]
    pub const fn pkhbt(a: u32, b: u32) -> u32 {
        (a & 0xFFFF) | (b & 0xFFFF_0000)
    }

    /// The low half of `a` below the low half of `b` (see
    /// [`crate::pkhbt_lsl16`]).
    #[inline(always)]
    pub const fn pkhbt_lsl16(a: u32, b: u32) -> u32 {
        (a & 0xFFFF) | (b << 16)
    }

    /// The high half of `a` above the low half of `b` (see
    /// [`crate::pkhtb`]).
    #[inline(always)]
    pub const fn pkhtb(a: u32, b: u32) -> u32 {
        (a & 0xFFFF_0000) | (b & 0xFFFF)
    }

    /// The high half of `a` above the high half of `b` (see
    /// [`crate::pkhtb_asr16`]).
    #[inline(always)]
    pub const fn pkhtb_asr16(a: u32, b: u32) -> u32 {
        (a & 0xFFFF_0000) | (b >> 16)
    }
}

/// One instruction `OP d, x, y, acc` (multiply-accumulate): may set `Q`,
/// so no `preserves_flags` (see the crate docs).
#[cfg(ingot_dsp)]
macro_rules! mac {
    ($op:literal, $x:expr, $y:expr, $acc:expr) => {{
        let d: i32;
        // SAFETY: one register-only multiply-accumulate of the DSP
        // extension, present on every core `cfg(ingot_dsp)` is set for:
        // no memory, no stack, result from the inputs only. It may set
        // the sticky Q flag, hence no `preserves_flags`. The accumulator
        // is read and written in one register (`inout`): with a separate
        // output register the allocator sometimes chose another one and
        // closed a kernel's loop with a register copy per accumulator.
        unsafe {
            core::arch::asm!(
                concat!($op, " {a}, {x}, {y}, {a}"),
                x = in(reg) $x,
                y = in(reg) $y,
                a = inout(reg) $acc => d,
                options(pure, nomem, nostack),
            );
        }
        d
    }};
}

/// One flag-preserving instruction `asm` on registers `a` (and `b`).
#[cfg(ingot_dsp)]
macro_rules! op {
    ($asm:literal, $a:expr) => {{
        let d: u32;
        // SAFETY: one register-only instruction of the DSP extension
        // (`SXTB16`), present on every core `cfg(ingot_dsp)` is set for:
        // no memory, no stack, no flags, result from the input only.
        unsafe {
            core::arch::asm!(
                $asm,
                d = lateout(reg) d,
                a = in(reg) $a,
                options(pure, nomem, nostack, preserves_flags),
            );
        }
        d
    }};
    ($asm:literal, $a:expr, $b:expr) => {{
        let d: u32;
        // SAFETY: one register-only pack instruction (`PKHBT`/`PKHTB`) of
        // the DSP extension, present on every core `cfg(ingot_dsp)` is set
        // for: no memory, no stack, no flags, result from the inputs only.
        unsafe {
            core::arch::asm!(
                $asm,
                d = lateout(reg) d,
                a = in(reg) $a,
                b = in(reg) $b,
                options(pure, nomem, nostack, preserves_flags),
            );
        }
        d
    }};
}

/// Dual signed 16-bit multiply-accumulate: `acc + lo(x)·lo(y) +
/// hi(x)·hi(y)`, wrapping modulo 2³² (`SMLAD`; two MACs in one
/// instruction).
#[inline(always)]
pub fn smlad(x: u32, y: u32, acc: i32) -> i32 {
    #[cfg(ingot_dsp)]
    {
        mac!("smlad", x, y, acc)
    }
    #[cfg(not(ingot_dsp))]
    {
        portable::smlad(x, y, acc)
    }
}

/// Dual signed 16-bit multiply-accumulate with the halves of `y`
/// exchanged: `acc + lo(x)·hi(y) + hi(x)·lo(y)`, wrapping (`SMLADX`).
#[inline(always)]
pub fn smladx(x: u32, y: u32, acc: i32) -> i32 {
    #[cfg(ingot_dsp)]
    {
        mac!("smladx", x, y, acc)
    }
    #[cfg(not(ingot_dsp))]
    {
        portable::smladx(x, y, acc)
    }
}

/// Signed 16-bit multiply-accumulate of the low halves: `acc +
/// lo(x)·lo(y)`, wrapping (`SMLABB`).
#[inline(always)]
pub fn smlabb(x: u32, y: u32, acc: i32) -> i32 {
    #[cfg(ingot_dsp)]
    {
        mac!("smlabb", x, y, acc)
    }
    #[cfg(not(ingot_dsp))]
    {
        portable::smlabb(x, y, acc)
    }
}

/// Signed 16-bit multiply-accumulate of the high halves: `acc +
/// hi(x)·hi(y)`, wrapping (`SMLATT`).
#[inline(always)]
pub fn smlatt(x: u32, y: u32, acc: i32) -> i32 {
    #[cfg(ingot_dsp)]
    {
        mac!("smlatt", x, y, acc)
    }
    #[cfg(not(ingot_dsp))]
    {
        portable::smlatt(x, y, acc)
    }
}

/// Bytes 0 and 2 of `x` sign-extended into the two 16-bit halves
/// (`SXTB16`): an int8 word `[b0, b1, b2, b3]` gives the pair `(b0, b2)`.
#[inline(always)]
pub fn sxtb16(x: u32) -> u32 {
    #[cfg(ingot_dsp)]
    {
        op!("sxtb16 {d}, {a}", x)
    }
    #[cfg(not(ingot_dsp))]
    {
        portable::sxtb16(x)
    }
}

/// Bytes 1 and 3 of `x` sign-extended into the two 16-bit halves
/// (`SXTB16 d, x, ROR #8`): an int8 word `[b0, b1, b2, b3]` gives the
/// pair `(b1, b3)`.
#[inline(always)]
pub fn sxtb16_ror8(x: u32) -> u32 {
    #[cfg(ingot_dsp)]
    {
        op!("sxtb16 {d}, {a}, ror #8", x)
    }
    #[cfg(not(ingot_dsp))]
    {
        portable::sxtb16_ror8(x)
    }
}

/// The low half of `a` with the high half of `b` (`PKHBT`).
#[inline(always)]
pub fn pkhbt(a: u32, b: u32) -> u32 {
    #[cfg(ingot_dsp)]
    {
        op!("pkhbt {d}, {a}, {b}", a, b)
    }
    #[cfg(not(ingot_dsp))]
    {
        portable::pkhbt(a, b)
    }
}

/// The low half of `a` below the low half of `b` (`PKHBT d, a, b, LSL
/// #16`): packs two 16-bit values into one word.
#[inline(always)]
pub fn pkhbt_lsl16(a: u32, b: u32) -> u32 {
    #[cfg(ingot_dsp)]
    {
        op!("pkhbt {d}, {a}, {b}, lsl #16", a, b)
    }
    #[cfg(not(ingot_dsp))]
    {
        portable::pkhbt_lsl16(a, b)
    }
}

/// The high half of `a` with the low half of `b` (`PKHTB d, a, b` without
/// shift, which the architecture encodes as `PKHBT d, b, a`; written that
/// way here).
#[inline(always)]
pub fn pkhtb(a: u32, b: u32) -> u32 {
    #[cfg(ingot_dsp)]
    {
        op!("pkhbt {d}, {b}, {a}", a, b)
    }
    #[cfg(not(ingot_dsp))]
    {
        portable::pkhtb(a, b)
    }
}

/// The high half of `a` above the high half of `b` (`PKHTB d, a, b, ASR
/// #16`): the top halves of two words as one word.
#[inline(always)]
pub fn pkhtb_asr16(a: u32, b: u32) -> u32 {
    #[cfg(ingot_dsp)]
    {
        op!("pkhtb {d}, {a}, {b}, asr #16", a, b)
    }
    #[cfg(not(ingot_dsp))]
    {
        portable::pkhtb_asr16(a, b)
    }
}
