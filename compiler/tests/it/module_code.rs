//! A generated module's own code stays a list of kernel calls.
//!
//! rustc copies functions it may inline across crates into every call site
//! of `forward`, specialised to the call's constant maps: that is what made
//! the 121-layer network's module 350 KB of code and most of its release
//! build time (`ingot_rt`'s channel copy, a small leaf loop, once per copied
//! map). The module of that network, with every concatenation copied
//! (`Schedule::naive`, so 116 channel copies), is compiled in release for
//! the host with its optimised LLVM IR written out, and its functions
//! (`forward` inlined into `run`) must stay within a line or two of IR per
//! kernel call.

use ingot_compiler::codegen::{generate, GenOptions, Schedule};
use ingot_testkit::testnets;
use std::path::Path;
use std::process::Command;

fn put(path: &Path, bytes: &[u8]) {
    std::fs::create_dir_all(path.parent().unwrap()).unwrap();
    std::fs::write(path, bytes).unwrap();
}

/// Lines of the bodies of all functions the IR defines.
fn body_lines(ir: &str) -> usize {
    let mut lines = 0;
    let mut inside = false;
    for l in ir.lines() {
        if inside {
            if l == "}" {
                inside = false;
            } else {
                lines += 1;
            }
        } else if l.starts_with("define ") {
            inside = true;
        }
    }
    lines
}

#[test]
fn forward_is_calls_only_with_a_copy_at_every_concatenation() {
    let q = testnets::densenet121(32);
    let s = Schedule::naive(&q);
    let g = generate(
        &q,
        &s,
        &GenOptions {
            module: "m".into(),
            ..GenOptions::default()
        },
    )
    .unwrap();
    let calls = g.module.matches(".run(arena").count();
    let copies = g.module.matches("CopyChannels::new").count();
    assert_eq!(copies, 116, "the naive schedule copies every concatenation");

    let root = Path::new(env!("CARGO_TARGET_TMPDIR")).join("module-code");
    let dir = root.join("crate");
    let rt = Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("../runtime-nostd")
        .canonicalize()
        .unwrap();
    put(
        &dir.join("Cargo.toml"),
        format!(
            "[package]\nname = \"module-code\"\nversion = \"0.0.0\"\nedition = \"2021\"\npublish = false\n\n[dependencies]\ningot-rt = {{ path = {:?} }}\n\n[features]\ningot-trace = []\n\n[workspace]\n\n[profile.release]\ndebug = false\ncodegen-units = 1\n",
            rt.display().to_string()
        )
        .as_bytes(),
    );
    put(
        &dir.join("src/lib.rs"),
        b"#![no_std]\n#![forbid(unsafe_code)]\npub mod m {\n    include!(\"m.rs\");\n}\n",
    );
    put(&dir.join("src/m.rs"), g.module.as_bytes());
    put(&dir.join("src/m.weights.bin"), &g.weights);
    let ir_dir = root.join("ir");
    let _ = std::fs::remove_dir_all(&ir_dir);
    std::fs::create_dir_all(&ir_dir).unwrap();
    let out = Command::new(std::env::var("CARGO").unwrap_or_else(|_| "cargo".into()))
        .args(["rustc", "--release", "--offline", "--lib", "--", "--emit"])
        .arg(format!("llvm-ir={}", ir_dir.join("m.ll").display()))
        .current_dir(&dir)
        .env("CARGO_TARGET_DIR", root.join("target"))
        .output()
        .expect("cargo runs");
    assert!(
        out.status.success(),
        "the module does not build:\n{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let ir = std::fs::read_to_string(ir_dir.join("m.ll")).unwrap();
    let lines = body_lines(&ir);
    assert!(lines > calls, "the module's IR lacks its kernel calls");
    // A call is a line or two of IR (the call, an address); an inlined copy
    // loop is dozens of lines, its vectorised form hundreds. The rest of
    // the module (`run`'s copies in and out, `quantize_pixels`, `argmax`,
    // `dequantize`) is a few hundred lines.
    assert!(
        lines <= 2 * calls + 600,
        "the module's functions are {lines} IR lines for {calls} kernel calls: a kernel body was inlined into the module"
    );
    eprintln!("module: {lines} IR lines for {calls} kernel calls");
}
