//! The `ingot-dsp` wrappers against their portable twins on an emulated
//! core (written by `compiler/tests/dsp_emulated.rs`; do not edit).
//!
//! For every operand triple of the table and every wrapper, compares the
//! wrapper's result with its twin's (mismatches are printed), and prints
//! `INGOT-DSP NATIVE n` (1 when the build uses the instructions) and
//! `INGOT-DSP DONE mismatches hash`, the FNV-1a hash of every wrapper
//! result, which the host recomputes with the twins.
#![no_std]
#![no_main]

use cortex_m as _; // the critical-section implementation semihosting needs
use cortex_m_rt::entry;
use cortex_m_semihosting::{debug, hprintln};
use ingot_dsp::portable as p;

static TABLE: [(u32, u32, i32); @N@] = [
@TABLE@
];

#[inline(never)]
fn fnv(h: u64, v: u32) -> u64 {
    let mut h = h;
    for b in v.to_le_bytes() {
        h ^= b as u64;
        h = h.wrapping_mul(0x0000_0100_0000_01b3);
    }
    h
}

/// Keeps the operands opaque, so the wrappers run on the core rather
/// than being folded by the compiler.
#[inline(always)]
fn opaque<T>(v: T) -> T {
    core::hint::black_box(v)
}

#[entry]
fn main() -> ! {
    hprintln!("INGOT-DSP NATIVE {}", ingot_dsp::NATIVE as u32);
    let mut bad = 0u32;
    let mut h: u64 = 0xcbf2_9ce4_8422_2325;
    for (k, &(x, y, a)) in TABLE.iter().enumerate() {
        let (x, y, a) = (opaque(x), opaque(y), opaque(a));
        let got: [u32; 10] = [
            ingot_dsp::smlad(x, y, a) as u32,
            ingot_dsp::smladx(x, y, a) as u32,
            ingot_dsp::smlabb(x, y, a) as u32,
            ingot_dsp::smlatt(x, y, a) as u32,
            ingot_dsp::sxtb16(x),
            ingot_dsp::sxtb16_ror8(x),
            ingot_dsp::pkhbt(x, y),
            ingot_dsp::pkhbt_lsl16(x, y),
            ingot_dsp::pkhtb(x, y),
            ingot_dsp::pkhtb_asr16(x, y),
        ];
        let (x, y, a) = (opaque(x), opaque(y), opaque(a));
        let want: [u32; 10] = [
            p::smlad(x, y, a) as u32,
            p::smladx(x, y, a) as u32,
            p::smlabb(x, y, a) as u32,
            p::smlatt(x, y, a) as u32,
            p::sxtb16(x),
            p::sxtb16_ror8(x),
            p::pkhbt(x, y),
            p::pkhbt_lsl16(x, y),
            p::pkhtb(x, y),
            p::pkhtb_asr16(x, y),
        ];
        for (op, (&g, &w)) in got.iter().zip(&want).enumerate() {
            h = fnv(h, g);
            if g != w {
                bad += 1;
                hprintln!("INGOT-DSP MISMATCH {} {} {:08x} {:08x}", k, op, g, w);
            }
        }
    }
    hprintln!("INGOT-DSP DONE {} {:016x}", bad, h);
    debug::exit(debug::EXIT_SUCCESS);
    loop {}
}

#[panic_handler]
fn panic(_: &core::panic::PanicInfo) -> ! {
    debug::exit(debug::EXIT_FAILURE);
    loop {}
}
