//! ingot check instruction-count calibration (generated; do not edit).
//!
//! Times loops of a known instruction sequence with SysTick on the core
//! clock and prints `INGOT-CAL ITERATIONS TICKS` lines. Each iteration is
//! exactly 102 instructions: 100 `nop`, one `subs`, one `bne`.
#![no_std]
#![no_main]

use core::sync::atomic::{AtomicU32, Ordering};
use cortex_m::peripheral::syst::SystClkSource;
use cortex_m::peripheral::{SCB, SYST};
use cortex_m_rt::{entry, exception};
use cortex_m_semihosting::{debug, hprintln};

// A short period (65 536 ticks) so that the longer loops below span
// several wraps and exercise the wrap counting the runner relies on.
const RELOAD: u32 = 0x0000_FFFF;

@SYSTICK@

/// `n` iterations (n >= 1) of 102 instructions each.
#[inline(never)]
fn known_block(n: u32) {
    unsafe {
        core::arch::asm!(
            "2:",
            ".rept 100",
            "nop",
            ".endr",
            "subs r0, r0, #1",
            "bne 2b",
            inout("r0") n => _,
            options(nomem, nostack)
        );
    }
}

#[entry]
fn main() -> ! {
    let mut cp = cortex_m::Peripherals::take().unwrap();
    cp.SYST.set_clock_source(SystClkSource::Core);
    cp.SYST.set_reload(RELOAD);
    cp.SYST.clear_current();
    cp.SYST.enable_interrupt();
    cp.SYST.enable_counter();
    let a = now();
    let b = now();
    hprintln!("INGOT-CAL-OVERHEAD {}", b - a);
    for n in [1_000u32, 10_000, 100_000, 200_000] {
        let t0 = now();
        known_block(n);
        let t1 = now();
        hprintln!("INGOT-CAL {} {}", n, t1 - t0);
    }
    debug::exit(debug::EXIT_SUCCESS);
    loop {}
}

#[panic_handler]
fn panic(_: &core::panic::PanicInfo) -> ! {
    debug::exit(debug::EXIT_FAILURE);
    loop {}
}
