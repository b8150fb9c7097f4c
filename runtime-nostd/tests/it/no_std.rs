//! The crate builds as a plain `no_std` library without std or alloc.
//!
//! When the bare-metal target `thumbv7em-none-eabihf` (Cortex-M4F/M7) is
//! installed, this test cross-compiles the library for it: a target without
//! `std` or `alloc`, so any accidental use fails to link or resolve. It uses
//! its own target directory so it never waits on the lock of the `cargo
//! test` that runs it. Without the target it only checks the crate
//! attributes and says so; `check-no-std.sh` (run by CI, which installs the
//! target) always does the cross build.

use std::path::Path;
use std::process::Command;

const TARGET: &str = "thumbv7em-none-eabihf";

#[test]
fn crate_attributes() {
    let lib =
        std::fs::read_to_string(Path::new(env!("CARGO_MANIFEST_DIR")).join("src/lib.rs")).unwrap();
    for attr in [
        "#![no_std]",
        "#![forbid(unsafe_code)]",
        "#![deny(missing_docs)]",
    ] {
        assert!(lib.contains(attr), "lib.rs lacks {attr}");
    }
    let src = Path::new(env!("CARGO_MANIFEST_DIR")).join("src");
    for entry in std::fs::read_dir(src).unwrap() {
        let text = std::fs::read_to_string(entry.unwrap().path()).unwrap();
        assert!(!text.contains("extern crate alloc"), "alloc is not allowed");
        assert!(!text.contains("extern crate std"), "std is not allowed");
    }
}

/// A missing tool skips this test, except under `INGOT_REQUIRE_EMULATION=1`
/// (set by CI), where it is a failure: a broken install must not pass.
fn skip_unless_required(why: &str) {
    if std::env::var("INGOT_REQUIRE_EMULATION").is_ok_and(|v| v == "1") {
        panic!("INGOT_REQUIRE_EMULATION=1, but {why}");
    }
    eprintln!("skipping: {why}");
}

#[test]
fn builds_for_bare_metal_cortex_m() {
    let installed = Command::new("rustup")
        .args(["target", "list", "--installed"])
        .output()
        .map(|o| {
            String::from_utf8_lossy(&o.stdout)
                .lines()
                .any(|l| l.trim() == TARGET)
        })
        .unwrap_or(false);
    if !installed {
        skip_unless_required(&format!(
            "{TARGET} is not installed (check-no-std.sh covers it in CI)"
        ));
        return;
    }
    let manifest = Path::new(env!("CARGO_MANIFEST_DIR"));
    let target_dir = manifest.join("../target/ingot-rt-no-std");
    let status = Command::new(env!("CARGO"))
        .current_dir(manifest)
        .args([
            "build",
            "-p",
            "ingot-rt",
            "--lib",
            "--release",
            "--target",
            TARGET,
        ])
        .env("CARGO_TARGET_DIR", &target_dir)
        .status()
        .expect("run cargo");
    assert!(status.success(), "ingot-rt does not build for {TARGET}");
}
