//! A counting global allocator: measures the peak heap of each case and
//! refuses any allocation that would take the process past a cap (2 GiB
//! by default), so a case that would exhaust the machine fails fast (the
//! process aborts with "memory allocation of N bytes failed"; the
//! supervisor records the case) instead of swapping.

use std::alloc::{GlobalAlloc, Layout, System};
use std::sync::atomic::{AtomicUsize, Ordering};

/// Default cap: 2 GiB.
pub const DEFAULT_CAP: usize = 2 << 30;

/// Counts live bytes and their peak.
#[derive(Debug)]
pub struct Counting {
    live: AtomicUsize,
    peak: AtomicUsize,
    cap: AtomicUsize,
}

impl Counting {
    /// A counter with the default cap.
    pub const fn new() -> Counting {
        Counting {
            live: AtomicUsize::new(0),
            peak: AtomicUsize::new(0),
            cap: AtomicUsize::new(DEFAULT_CAP),
        }
    }

    /// Bytes allocated now.
    pub fn live(&self) -> usize {
        self.live.load(Ordering::Relaxed)
    }

    /// Peak since the last [`Counting::reset_peak`].
    pub fn peak(&self) -> usize {
        self.peak.load(Ordering::Relaxed)
    }

    /// Starts a new peak measurement at the current level.
    pub fn reset_peak(&self) {
        self.peak.store(self.live(), Ordering::Relaxed);
    }

    /// Sets the cap in bytes.
    pub fn set_cap(&self, bytes: usize) {
        self.cap.store(bytes, Ordering::Relaxed);
    }
}

impl Default for Counting {
    fn default() -> Self {
        Counting::new()
    }
}

// The only unsafe code of the workspace outside dependencies: a global
// allocator must implement an unsafe trait. It forwards to `System` and
// only adds counting.
#[allow(unsafe_code)]
unsafe impl GlobalAlloc for Counting {
    unsafe fn alloc(&self, layout: Layout) -> *mut u8 {
        let size = layout.size();
        let now = self.live.fetch_add(size, Ordering::Relaxed) + size;
        if now > self.cap.load(Ordering::Relaxed) {
            self.live.fetch_sub(size, Ordering::Relaxed);
            return std::ptr::null_mut();
        }
        self.peak.fetch_max(now, Ordering::Relaxed);
        // SAFETY: forwarded with the caller's layout.
        let p = unsafe { System.alloc(layout) };
        if p.is_null() {
            self.live.fetch_sub(size, Ordering::Relaxed);
        }
        p
    }

    unsafe fn dealloc(&self, ptr: *mut u8, layout: Layout) {
        // SAFETY: `ptr` came from `alloc` with this layout.
        unsafe { System.dealloc(ptr, layout) };
        self.live.fetch_sub(layout.size(), Ordering::Relaxed);
    }

    unsafe fn realloc(&self, ptr: *mut u8, layout: Layout, new_size: usize) -> *mut u8 {
        let old = layout.size();
        if new_size > old {
            let grow = new_size - old;
            let now = self.live.fetch_add(grow, Ordering::Relaxed) + grow;
            if now > self.cap.load(Ordering::Relaxed) {
                self.live.fetch_sub(grow, Ordering::Relaxed);
                return std::ptr::null_mut();
            }
            self.peak.fetch_max(now, Ordering::Relaxed);
        } else {
            self.live.fetch_sub(old - new_size, Ordering::Relaxed);
        }
        // SAFETY: forwarded with the caller's arguments.
        let p = unsafe { System.realloc(ptr, layout, new_size) };
        if p.is_null() {
            // The old block stays allocated: undo the change.
            if new_size > old {
                self.live.fetch_sub(new_size - old, Ordering::Relaxed);
            } else {
                self.live.fetch_add(old - new_size, Ordering::Relaxed);
            }
        }
        p
    }
}
