//! Instruction counts of `ingot_rt::convert_frame` on emulated Cortex-M4
//! and Cortex-M0+ cores (QEMU `-icount shift=0`, SysTick ticks turned into
//! instructions by `ingot check`'s measured factor), with the device's
//! input bytes compared to the host's.
//!
//! `cargo run --release -p ingot-compiler --example bench_frame`
//!
//! Goal (issue 18): a whole 320×240 RGB565 frame to a 64×64 gray input
//! with area averaging in at most 1.0 M instructions on the M4 (about 13
//! per source pixel), the same for YUYV; no RAM beyond the input buffer.

mod harness;

use harness::Case;
use ingot_compiler::check::runner::BuildConfig;
use ingot_compiler::check::{emulation_ready, RunOn};
use ingot_rt::{FrameConfig, Luma, PixelFormat, Resize};

fn main() {
    let full = |f| FrameConfig::new(f, 320, 240, 64, 64, 1).roi(0, 0, 320, 240);
    let cases = vec![
        Case {
            name: "rgb565le 320x240 -> 64x64 gray, area, whole frame".into(),
            cfg: full(PixelFormat::Rgb565Le),
        },
        Case {
            name: "rgb565be 320x240 -> 64x64 gray, area, whole frame".into(),
            cfg: full(PixelFormat::Rgb565Be),
        },
        Case {
            name: "yuyv 320x240 -> 64x64 gray, area, whole frame".into(),
            cfg: full(PixelFormat::Yuyv),
        },
        Case {
            name: "gray8 320x240 -> 64x64, area, whole frame".into(),
            cfg: full(PixelFormat::Gray8),
        },
        Case {
            name: "rgb565le 320x240 -> 64x64 gray, area, centred 240x240".into(),
            cfg: FrameConfig::new(PixelFormat::Rgb565Le, 320, 240, 64, 64, 1),
        },
        Case {
            name: "rgb565le 320x240 -> 64x64 gray, bilinear, centred 240x240".into(),
            cfg: FrameConfig::new(PixelFormat::Rgb565Le, 320, 240, 64, 64, 1)
                .resize(Resize::Bilinear),
        },
        Case {
            name: "rgb565le 320x240 -> 64x64 gray, nearest, centred 240x240".into(),
            cfg: FrameConfig::new(PixelFormat::Rgb565Le, 320, 240, 64, 64, 1)
                .resize(Resize::Nearest),
        },
        Case {
            name: "rgb888 320x240 -> 64x64 RGB, area, whole frame, rotated+mirrored, BT.709".into(),
            cfg: FrameConfig::new(PixelFormat::Rgb888, 320, 240, 64, 64, 3)
                .roi(0, 0, 320, 240)
                .rotate180(true)
                .mirror(true)
                .luma(Luma::Bt709),
        },
    ];
    let cfg = BuildConfig::default();
    println!("| core | case | instructions | per source pixel read | stack bytes (upper bound) | static RAM | bit-identical to host |");
    println!("|---|---|---:|---:|---:|---:|---|");
    for on in [RunOn::M4, RunOn::M0plus] {
        if let Err(e) = emulation_ready(on, &cfg.qemu) {
            println!("| {} | not run: {e} | | | | | |", on.name());
            continue;
        }
        match harness::run(on, &cases, &cfg) {
            Ok(res) => {
                for (c, m) in cases.iter().zip(&res) {
                    let read = match c.cfg.resize {
                        Resize::Area => (c.cfg.roi.w * c.cfg.roi.h) as f64,
                        Resize::Bilinear => (c.cfg.out_w * c.cfg.out_h * 4) as f64,
                        _ => (c.cfg.out_w * c.cfg.out_h) as f64,
                    };
                    println!(
                        "| {} | {} | {} | {:.2} | {} | 0 | {} |",
                        on.name(),
                        c.name,
                        m.instructions,
                        m.instructions as f64 / read,
                        m.stack,
                        if m.device_hash == m.host_hash {
                            "yes"
                        } else {
                            "NO"
                        }
                    );
                }
            }
            Err(e) => println!("| {} | failed: {e} | | | | | |", on.name()),
        }
    }
    println!();
    println!("Static RAM: the kernel has no statics and no buffers; the caller owns the frame and the input.");
    println!("Area reads each pixel of the region once; bilinear reads 4 and nearest 1 source pixel per output.");
}
