//! Every `ingot-dsp` wrapper equals its portable twin on the emulated
//! cores: Cortex-M4 and M7 (`thumbv7em`, the DSP instructions), Cortex-M33
//! built with `-C target-feature=+dsp` (the instructions), and Cortex-M0+,
//! M3 and M33 without `+dsp` (the twins: they must build and agree too).
//! A fixed table of seeded random and edge operands (int8 and int16
//! extremes, accumulators at the i32 limits so the sums wrap) goes
//! through a small no_std program under QEMU; the device compares each
//! wrapper with its twin, and the hash of the device's results must equal
//! the host's twins' hash. A missing QEMU or thumb target skips, or fails
//! under `INGOT_REQUIRE_EMULATION=1`.

use ingot_compiler::check::runner::{self, BuildConfig};
use ingot_compiler::check::{emulation_or_skip, RunOn};
use ingot_dsp::portable as p;
use std::path::Path;
use std::process::{Command, Stdio};
use std::time::{Duration, Instant};

const FIRMWARE: &str = include_str!("../dsp/firmware.rs");

/// Seeded random words plus every pairing of edge words, with edge and
/// random accumulators.
fn table() -> Vec<(u32, u32, i32)> {
    let halves: [i16; 7] = [-32768, 32767, -128, 127, -1, 0, 1];
    let bytes: [i8; 4] = [-128, 127, -1, 0];
    let accs: [i32; 5] = [i32::MIN, i32::MAX, -1, 0, 1 << 30];
    let mut words = Vec::new();
    for &l in &halves {
        for &h in &halves {
            words.push(p::pack(l, h));
        }
    }
    for &a in &bytes {
        for &b in &bytes {
            words.push(u32::from_le_bytes([a as u8, b as u8, b as u8, a as u8]));
        }
    }
    let mut s: u64 = 0x9E37_79B9_7F4A_7C15;
    let mut next = move || {
        s ^= s << 13;
        s ^= s >> 7;
        s ^= s << 17;
        (s >> 32) as u32
    };
    let mut t = Vec::new();
    for (i, &x) in words.iter().enumerate() {
        for (j, &y) in words.iter().enumerate() {
            // Every pair once with an accumulator from the edge list (in
            // turn) keeps the table small: 65² pairs.
            t.push((x, y, accs[(i + j) % accs.len()]));
        }
    }
    for _ in 0..1000 {
        let (x, y, a) = (next(), next(), next() as i32);
        t.push((x, y, a));
    }
    t
}

fn host_hash(t: &[(u32, u32, i32)]) -> u64 {
    let mut h: u64 = 0xcbf2_9ce4_8422_2325;
    for &(x, y, a) in t {
        for v in [
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
        ] {
            for b in v.to_le_bytes() {
                h ^= b as u64;
                h = h.wrapping_mul(0x0000_0100_0000_01b3);
            }
        }
    }
    h
}

/// Builds and runs the firmware on `on` (with `+dsp` when `dsp`);
/// returns the console.
fn run(on: RunOn, dsp: bool, t: &[(u32, u32, i32)]) -> String {
    let cfg = BuildConfig::default();
    let board = on.board().expect("an emulated core");
    let name = format!("{}{}", on.name(), if dsp { "-dsp" } else { "" });
    let rows: String = t
        .iter()
        .map(|(x, y, a)| format!("    (0x{x:08x}, 0x{y:08x}, {a}),\n"))
        .collect();
    let main = FIRMWARE
        .replace("@N@", &t.len().to_string())
        .replace("@TABLE@", &rows);
    let dsp_crate = Path::new(env!("CARGO_MANIFEST_DIR")).join("../runtime-dsp");
    let project = cfg.build_dir.join("dsp-twins").join(&name);
    let files = [
        ("src/main.rs", main),
        (
            "Cargo.toml",
            format!(
                "[package]\nname = \"ingot-dsp-twins\"\nversion = \"0.0.0\"\nedition = \"2021\"\npublish = false\n\n\
                 [dependencies]\ningot-dsp = {{ path = {:?} }}\ncortex-m = {{ version = \"=0.7.10\", features = [\"critical-section-single-core\"] }}\n\
                 cortex-m-rt = \"=0.7.7\"\ncortex-m-semihosting = \"=0.6.0\"\n\n\
                 [profile.release]\nopt-level = 3\ndebug = false\nlto = true\ncodegen-units = 1\npanic = \"abort\"\n\n[workspace]\n",
                dsp_crate.display().to_string()
            ),
        ),
        (
            "memory.x",
            format!(
                "MEMORY\n{{\n  FLASH : ORIGIN = 0x{:08X}, LENGTH = {}K\n  RAM : ORIGIN = 0x{:08X}, LENGTH = {}K\n}}\n",
                board.flash_origin,
                board.flash_len / 1024,
                board.ram_origin,
                board.ram_len / 1024
            ),
        ),
        (
            "build.rs",
            "fn main() {\n    let out = std::path::PathBuf::from(std::env::var_os(\"OUT_DIR\").unwrap());\n    std::fs::copy(\"memory.x\", out.join(\"memory.x\")).unwrap();\n    println!(\"cargo:rustc-link-search={}\", out.display());\n    println!(\"cargo:rerun-if-changed=memory.x\");\n}\n".to_string(),
        ),
    ];
    for (f, text) in &files {
        let path = project.join(f);
        std::fs::create_dir_all(path.parent().unwrap()).unwrap();
        if std::fs::read_to_string(&path).ok().as_deref() != Some(text) {
            std::fs::write(&path, text).unwrap();
        }
    }
    // The flags reach every crate of the build (the `+dsp` must reach
    // `ingot-dsp`'s build script); a target directory per variant keeps
    // the variants from rebuilding each other.
    let mut flags = vec!["-Clink-arg=-Tlink.x"];
    if dsp {
        flags.push("-Ctarget-feature=+dsp");
    }
    let target_dir = project.join("target");
    let mut cmd = Command::new(&cfg.cargo);
    for v in [
        "RUSTFLAGS",
        "CARGO_BUILD_RUSTFLAGS",
        "CARGO_BUILD_TARGET",
        "CARGO_TARGET_DIR",
        "CARGO_BUILD_TARGET_DIR",
        "CARGO_PRIMARY_PACKAGE",
        "CARGO_MANIFEST_DIR",
        "INGOT_DSP",
    ] {
        cmd.env_remove(v);
    }
    let out = cmd
        .current_dir(&project)
        .env("CARGO_ENCODED_RUSTFLAGS", flags.join("\x1f"))
        .args(["build", "--release", "--quiet", "--manifest-path"])
        .arg(project.join("Cargo.toml"))
        .arg("--target-dir")
        .arg(&target_dir)
        .args(["--target", board.triple])
        .stdin(Stdio::null())
        .output()
        .expect("start cargo");
    assert!(
        out.status.success(),
        "{name}: building the firmware failed:\n{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let elf = target_dir
        .join(board.triple)
        .join("release")
        .join("ingot-dsp-twins");
    let log = project.join("console.out");
    let mut child = runner::qemu_command(&cfg.qemu, &board, &elf)
        .current_dir(&project)
        .stdin(Stdio::null())
        .stdout(std::fs::File::create(&log).unwrap())
        .spawn()
        .expect("start QEMU");
    let start = Instant::now();
    let status = loop {
        if let Some(s) = child.try_wait().unwrap() {
            break s;
        }
        if start.elapsed() > Duration::from_secs(120) {
            let _ = child.kill();
            let _ = child.wait();
            panic!("{name}: the firmware timed out");
        }
        std::thread::sleep(Duration::from_millis(20));
    };
    let console = std::fs::read_to_string(&log).unwrap_or_default();
    assert!(status.success(), "{name}: the firmware failed:\n{console}");
    console
}

#[test]
fn wrappers_equal_twins_on_emulated_cores() {
    let t = table();
    let want = format!("INGOT-DSP DONE 0 {:016x}", host_hash(&t));
    // (core, built with +dsp, uses the instructions)
    let cases = [
        (RunOn::M4, false, true),
        (RunOn::M7, false, true),
        (RunOn::M33, true, true),
        (RunOn::M33, false, false),
        (RunOn::M3, false, false),
        (RunOn::M0plus, false, false),
    ];
    for (on, dsp, native) in cases {
        if !emulation_or_skip(on) {
            continue;
        }
        let console = run(on, dsp, &t);
        let name = format!("{on}{}", if dsp { "+dsp" } else { "" });
        assert!(
            console.contains(&format!("INGOT-DSP NATIVE {}", native as u32)),
            "{name}: expected NATIVE {native}:\n{console}"
        );
        assert!(
            console.lines().any(|l| l.trim() == want),
            "{name}: wrappers differ from the twins (want `{want}`):\n{console}"
        );
        eprintln!("{name}: {} operand triples × 10 wrappers agree", t.len());
    }
}
