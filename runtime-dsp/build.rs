//! Decides whether the DSP instructions may be emitted (`cfg(ingot_dsp)`).
//!
//! `cfg(target_feature = "dsp")` cannot decide it: on stable Rust the Arm
//! `dsp` feature is unstable, so rustc never reports it to `cfg` (not even
//! for `thumbv7em-*`, whose cores always have it; `rustc --print cfg
//! --target thumbv7em-none-eabihf` lists no target feature). So this
//! script reads the target triple and the flags cargo passes to rustc:
//!
//! * `thumbv7em-*` (Cortex-M4/M7): on, the architecture includes the DSP
//!   extension;
//! * any other Arm target (`thumbv8m.main-*` for Cortex-M33/M35P/M55,
//!   ...) only with `-C target-feature=+dsp` in the rustflags, because the
//!   extension is optional there and the instructions fault without it;
//! * `-C target-feature=-dsp` always turns it off; so does the
//!   environment variable `INGOT_DSP=0` (to measure the portable twins on
//!   a DSP core);
//! * a `dsp` feature rustc does report (a future stable rustc) turns it on.
//!
//! Everything else (hosts, Cortex-M0+/M3) uses the portable twins.

use std::env;

fn main() {
    println!("cargo::rustc-check-cfg=cfg(ingot_dsp)");
    println!("cargo::rustc-check-cfg=cfg(ingot_v6m)");
    println!("cargo::rerun-if-env-changed=INGOT_DSP");
    println!("cargo::rerun-if-changed=build.rs");
    let arch = env::var("CARGO_CFG_TARGET_ARCH").unwrap_or_default();
    let target = env::var("TARGET").unwrap_or_default();
    let reported = env::var("CARGO_CFG_TARGET_FEATURE").unwrap_or_default();
    let flags = env::var("CARGO_ENCODED_RUSTFLAGS").unwrap_or_default();
    let features = target_features(&flags);
    let plus = features.iter().any(|f| f == "+dsp");
    let minus = features.iter().any(|f| f == "-dsp");
    let off = env::var("INGOT_DSP").is_ok_and(|v| v == "0");
    let on = arch == "arm"
        && !minus
        && !off
        && (target.starts_with("thumbv7em") || plus || reported.split(',').any(|f| f == "dsp"));
    if on {
        println!("cargo::rustc-cfg=ingot_dsp");
    }
    // ARMv6-M (Cortex-M0/M0+/M1) has no 32×32→64 multiply: an `i64`
    // product is a call to `__aeabi_lmul` (about 40 instructions there).
    if arch == "arm" && target.starts_with("thumbv6m") {
        println!("cargo::rustc-cfg=ingot_v6m");
    }
}

/// Every `+name`/`-name` of the `-C target-feature=` flags, in order.
fn target_features(encoded: &str) -> Vec<String> {
    let args: Vec<&str> = encoded.split('\x1f').collect();
    let mut out = Vec::new();
    let mut i = 0;
    while i < args.len() {
        let a = args[i];
        let value = if let Some(v) = a.strip_prefix("-Ctarget-feature=") {
            Some(v.to_string())
        } else if (a == "-C" || a == "--codegen") && i + 1 < args.len() {
            i += 1;
            args[i].strip_prefix("target-feature=").map(str::to_string)
        } else {
            a.strip_prefix("--codegen=target-feature=")
                .map(str::to_string)
        };
        if let Some(v) = value {
            out.extend(v.split(',').map(|f| f.trim().to_string()));
        }
        i += 1;
    }
    out
}
