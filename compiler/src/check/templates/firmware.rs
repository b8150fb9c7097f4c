//! ingot check runner for an emulated Cortex-M core (generated; do not edit).
//!
//! Reads `input.bin` and writes `output.bin`, `counts.bin` (and `trace.bin`)
//! through semihosting, in QEMU's working directory. Times each inference
//! with SysTick on the core clock; under `-icount shift=0` that clock counts
//! executed instructions. With the `ingot-camera` feature `input.bin` holds
//! raw camera frames: each goes through the module's `frame_to_input` (timed
//! too), the codes it made are written to `codes.bin`, then `run`.
#![no_std]
#![no_main]

#[allow(dead_code, unused_imports, clippy::all)]
mod model {
    include!("@MODULE@.rs");
}

use core::sync::atomic::{AtomicU32, Ordering};
use cortex_m::peripheral::syst::SystClkSource;
use cortex_m::peripheral::{SCB, SYST};
use cortex_m_rt::{entry, exception};
use cortex_m_semihosting::{debug, hprintln, syscall};

const TRACE: bool = @TRACE@;
const TRACE_MAPS: bool = @TRACE_MAPS@;
const RELOAD: u32 = 0x00FF_FFFF;
const PAINT: u32 = 0xA5C3_5A3C;

static mut SCRATCH: model::Scratch = model::Scratch::new();
static mut INPUT: [i8; model::INPUT_LEN] = [0; model::INPUT_LEN];
static mut OUTPUT: [i8; model::OUTPUT_LEN] = [0; model::OUTPUT_LEN];
static mut OUTPUT2: [i8; model::OUTPUT_LEN] = [0; model::OUTPUT_LEN];
#[cfg(feature = "ingot-camera")]
static mut FRAME: [u8; model::FRAME_BYTES] = [0; model::FRAME_BYTES];

/// Magic and per-item length `input.bin` must announce.
#[cfg(not(feature = "ingot-camera"))]
const IN_HEADER: (&[u8], usize) = (b"INGI", model::INPUT_LEN);
#[cfg(feature = "ingot-camera")]
const IN_HEADER: (&[u8], usize) = (b"INGF", model::FRAME_BYTES);

@SYSTICK@

fn fail(what: &str) -> ! {
    hprintln!("ingot-runner: {}", what);
    debug::exit(debug::EXIT_FAILURE);
    loop {}
}

/// SYS_OPEN; `name` ends with a NUL. Modes: 1 = "rb", 5 = "wb".
fn open(name: &[u8], mode: usize) -> usize {
    let fd = unsafe { syscall!(OPEN, name.as_ptr(), mode, name.len() - 1) };
    if fd == usize::MAX {
        fail("cannot open a semihosting file");
    }
    fd
}

fn read_exact(fd: usize, ptr: *mut u8, len: usize) {
    // SYS_READ returns the number of bytes *not* read.
    let left = unsafe { syscall!(READ, fd, ptr, len) };
    if left != 0 {
        fail("short read from input.bin");
    }
}

fn write_all(fd: usize, bytes: &[u8]) {
    let left = unsafe { syscall!(WRITE, fd, bytes.as_ptr(), bytes.len()) };
    if left != 0 {
        fail("short semihosting write");
    }
}

fn record(fd: usize, tag: u32, image: u32, step: u32, value: u64) {
    let mut r = [0u8; 24];
    r[0..4].copy_from_slice(&tag.to_le_bytes());
    r[4..8].copy_from_slice(&image.to_le_bytes());
    r[8..12].copy_from_slice(&step.to_le_bytes());
    r[16..24].copy_from_slice(&value.to_le_bytes());
    write_all(fd, &r);
}

fn bytes_of(v: &[i8]) -> &[u8] {
    // i8 and u8 have the same size and alignment.
    unsafe { core::slice::from_raw_parts(v.as_ptr() as *const u8, v.len()) }
}

extern "C" {
    static _stack_start: u32;
    static _stack_end: u32;
}

fn stack_bounds() -> (usize, usize) {
    unsafe {
        (
            core::ptr::addr_of!(_stack_end) as usize,
            core::ptr::addr_of!(_stack_start) as usize,
        )
    }
}

/// Fills the unused stack below the current frame with a pattern.
#[inline(never)]
fn paint_stack() {
    let (bottom, _) = stack_bounds();
    let sp = cortex_m::register::msp::read() as usize;
    let mut p = bottom;
    while p + 4 <= sp - 256 {
        unsafe { core::ptr::write_volatile(p as *mut u32, PAINT) };
        p += 4;
    }
}

/// Bytes of stack used so far: from the top down to the lowest overwritten word.
fn stack_used() -> u64 {
    let (bottom, top) = stack_bounds();
    let mut p = bottom;
    while p < top && unsafe { core::ptr::read_volatile(p as *const u32) } == PAINT {
        p += 4;
    }
    (top - p) as u64
}

#[entry]
fn main() -> ! {
    paint_stack();
    let mut cp = match cortex_m::Peripherals::take() {
        Some(p) => p,
        None => fail("core peripherals taken twice"),
    };
    cp.SYST.set_clock_source(SystClkSource::Core);
    cp.SYST.set_reload(RELOAD);
    cp.SYST.clear_current();
    cp.SYST.enable_interrupt();
    cp.SYST.enable_counter();

    let scratch = unsafe { &mut *core::ptr::addr_of_mut!(SCRATCH) };
    let input = unsafe { &mut *core::ptr::addr_of_mut!(INPUT) };
    let output = unsafe { &mut *core::ptr::addr_of_mut!(OUTPUT) };
    let output2 = unsafe { &mut *core::ptr::addr_of_mut!(OUTPUT2) };

    let fin = open(b"input.bin\0", 1);
    let fout = open(b"output.bin\0", 5);
    let fcount = open(b"counts.bin\0", 5);
    let ftrace = if TRACE_MAPS { open(b"trace.bin\0", 5) } else { 0 };
    #[cfg(feature = "ingot-camera")]
    let fcodes = open(b"codes.bin\0", 5);
    #[cfg(feature = "ingot-camera")]
    let frame = unsafe { &mut *core::ptr::addr_of_mut!(FRAME) };

    let mut header = [0u8; 12];
    read_exact(fin, header.as_mut_ptr(), 12);
    if &header[0..4] != IN_HEADER.0 {
        fail("input.bin has the wrong header");
    }
    let count = u32::from_le_bytes([header[4], header[5], header[6], header[7]]);
    let len = u32::from_le_bytes([header[8], header[9], header[10], header[11]]) as usize;
    if len != IN_HEADER.1 {
        fail("input.bin has the wrong input length");
    }
    let mut oh = [0u8; 12];
    oh[0..4].copy_from_slice(b"INGO");
    oh[4..8].copy_from_slice(&count.to_le_bytes());
    oh[8..12].copy_from_slice(&(model::OUTPUT_LEN as u32).to_le_bytes());
    write_all(fout, &oh);
    write_all(fcount, b"INGC");
    if TRACE_MAPS {
        write_all(ftrace, b"INGT");
    }
    #[cfg(feature = "ingot-camera")]
    {
        let mut ch = [0u8; 12];
        ch[0..4].copy_from_slice(b"INGI");
        ch[4..8].copy_from_slice(&count.to_le_bytes());
        ch[8..12].copy_from_slice(&(model::INPUT_LEN as u32).to_le_bytes());
        write_all(fcodes, &ch);
    }

    let a = now();
    let b = now();
    record(fcount, 4, 0, 0, b - a);

    for image in 0..count {
        #[cfg(not(feature = "ingot-camera"))]
        read_exact(fin, input.as_mut_ptr() as *mut u8, model::INPUT_LEN);
        #[cfg(feature = "ingot-camera")]
        {
            read_exact(fin, frame.as_mut_ptr(), model::FRAME_BYTES);
            let f0 = now();
            model::frame_to_input(frame, input);
            let f1 = now();
            record(fcount, 6, image, 0, f1 - f0);
            write_all(fcodes, bytes_of(&input[..]));
        }
        let t0 = now();
        model::run(scratch, input, output);
        let t1 = now();
        write_all(fout, bytes_of(&output[..]));
        record(fcount, 1, image, 0, t1 - t0);

        if TRACE {
            let start = now();
            let mut last = start;
            let mut hook = 0u64;
            model::run_traced(scratch, input, output2, &mut |step: usize, name: &str, map: &[i8]| {
                let t = now();
                record(fcount, 2, image, step as u32, t - last);
                if TRACE_MAPS {
                    let mut h = [0u8; 12];
                    h[0..4].copy_from_slice(&image.to_le_bytes());
                    h[4..8].copy_from_slice(&(step as u32).to_le_bytes());
                    h[8..12].copy_from_slice(&(name.len() as u32).to_le_bytes());
                    write_all(ftrace, &h);
                    write_all(ftrace, name.as_bytes());
                    write_all(ftrace, &(map.len() as u32).to_le_bytes());
                    write_all(ftrace, bytes_of(map));
                }
                last = now();
                hook += last - t;
            });
            let end = now();
            record(fcount, 5, image, 0, end - start - hook);
            if output2[..] != output[..] {
                fail("run_traced and run disagree");
            }
        }
    }
    record(fcount, 3, 0, 0, stack_used());
    for fd in [fin, fout, fcount] {
        unsafe { syscall!(CLOSE, fd) };
    }
    #[cfg(feature = "ingot-camera")]
    unsafe {
        syscall!(CLOSE, fcodes)
    };
    if TRACE_MAPS {
        unsafe { syscall!(CLOSE, ftrace) };
    }
    debug::exit(debug::EXIT_SUCCESS);
    loop {}
}

#[panic_handler]
fn panic(info: &core::panic::PanicInfo) -> ! {
    hprintln!("ingot-runner: panic: {}", info);
    debug::exit(debug::EXIT_FAILURE);
    loop {}
}
