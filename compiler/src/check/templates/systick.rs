// Shared by the firmware and calibration runners (spliced in by the
// generator); the including file defines `RELOAD`.

static WRAPS: AtomicU32 = AtomicU32::new(0);

#[exception]
fn SysTick() {
    // Single core, and the only writer: load + store is enough (ARMv6-M has
    // no atomic read-modify-write).
    WRAPS.store(WRAPS.load(Ordering::Relaxed).wrapping_add(1), Ordering::Relaxed);
}

/// Ticks since the timer started: wraps · period + elapsed in this period.
#[inline(never)]
fn now() -> u64 {
    cortex_m::interrupt::free(|_| {
        let v = SYST::get_current();
        let w = WRAPS.load(Ordering::Relaxed) as u64;
        if SCB::is_pendst_pending() {
            // Wrapped, handler not run yet: re-read inside the new period.
            let v2 = SYST::get_current();
            (w + 1) * (RELOAD as u64 + 1) + u64::from(RELOAD - v2)
        } else {
            w * (RELOAD as u64 + 1) + u64::from(RELOAD - v)
        }
    })
}
