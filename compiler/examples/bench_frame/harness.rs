//! Runs `ingot_rt::convert_frame` on an emulated Cortex-M core: writes a
//! small firmware project (the kernel plus the SysTick clock of `ingot
//! check`'s runners), builds it, runs it under QEMU with `-icount shift=0`
//! and turns SysTick ticks into instructions with `ingot check`'s measured
//! factor ([`icount::calibrate`]). Shared by the `bench_frame` example and
//! the `frame_emulated` test.

use ingot_compiler::check::icount;
use ingot_compiler::check::runner::{self, BuildConfig};
use ingot_compiler::check::RunOn;
use ingot_rt::{convert_frame, FrameConfig};
use std::process::{Command, Stdio};

const FIRMWARE: &str = include_str!("firmware.rs");
const SYSTICK: &str = include_str!("../../src/check/templates/systick.rs");

/// One conversion to measure.
pub struct Case {
    /// Row label.
    pub name: String,
    /// The camera and input.
    pub cfg: FrameConfig,
}

/// What the device did for one case.
pub struct Measured {
    /// Instructions of the `convert_frame` call (timer overhead removed).
    pub instructions: u64,
    /// FNV-1a of the device's input bytes.
    pub device_hash: u64,
    /// The same on the host.
    pub host_hash: u64,
    /// Stack bytes the call touched (upper bound).
    pub stack: u64,
}

/// The firmware's pattern for case `k`.
pub fn frame(bytes: usize, k: usize) -> Vec<u8> {
    let mut s = (1 + k as u64) | 1;
    (0..bytes)
        .map(|_| {
            s ^= s << 13;
            s ^= s >> 7;
            s ^= s << 17;
            (s >> 56) as u8
        })
        .collect()
}

/// The host's hash of case `k` (same frame, same table, same kernel).
pub fn host_hash(cfg: &FrameConfig, k: usize) -> u64 {
    let p = cfg.validate().expect("valid case");
    let table: Vec<i8> = (0..768i32).map(|i| (i % 256 - 128) as i8).collect();
    let mut input = vec![0i8; p.input_len()];
    convert_frame(&frame(p.frame_bytes(), k), &p, &table, &mut input).expect("host kernel");
    let mut h: u64 = 0xcbf2_9ce4_8422_2325;
    for &b in &input {
        h ^= b as u8 as u64;
        h = h.wrapping_mul(0x0000_0100_0000_01b3);
    }
    h
}

fn rust_expr(c: &FrameConfig) -> String {
    format!(
        "    match FrameConfig::new(PixelFormat::{:?}, {}, {}, {}, {}, {}).roi({}, {}, {}, {}).resize(Resize::{:?}).rotate180({}).mirror({}).luma(Luma::{:?}).validate() {{ Ok(p) => p, Err(_) => panic!(\"bad case\") }},\n",
        c.format, c.frame_w, c.frame_h, c.out_w, c.out_h, c.out_c, c.roi.x, c.roi.y, c.roi.w, c.roi.h,
        c.resize, c.rotate180, c.mirror, c.luma
    )
}

/// Builds and runs the cases on `on`; `Err` says what failed.
pub fn run(on: RunOn, cases: &[Case], cfg: &BuildConfig) -> Result<Vec<Measured>, String> {
    let board = on.board().ok_or("the host has no instruction counter")?;
    let params: Vec<_> = cases
        .iter()
        .map(|c| c.cfg.validate().map_err(|e| format!("{}: {e:?}", c.name)))
        .collect::<Result<_, _>>()?;
    let max_frame = params.iter().map(|p| p.frame_bytes()).max().unwrap_or(1);
    let max_input = params.iter().map(|p| p.input_len()).max().unwrap_or(1);
    let main = FIRMWARE
        .replace("@SYSTICK@", SYSTICK)
        .replace("@MAX_FRAME@", &max_frame.to_string())
        .replace("@MAX_INPUT@", &max_input.to_string())
        .replace(
            "@CASES@",
            &cases.iter().map(|c| rust_expr(&c.cfg)).collect::<String>(),
        );
    let project = cfg.build_dir.join("frame-bench").join(on.name());
    let rt = cfg.ingot_rt.display().to_string();
    let files = [
        ("src/main.rs", main),
        (
            "Cargo.toml",
            format!(
                "[package]\nname = \"ingot-frame-bench-{}\"\nversion = \"0.0.0\"\nedition = \"2021\"\npublish = false\n\n\
                 [dependencies]\ningot-rt = {{ path = {rt:?} }}\ncortex-m = {{ version = \"=0.7.10\", features = [\"critical-section-single-core\"] }}\n\
                 cortex-m-rt = \"=0.7.7\"\ncortex-m-semihosting = \"=0.6.0\"\n\n\
                 [profile.release]\nopt-level = 3\ndebug = false\nlto = true\ncodegen-units = 1\npanic = \"abort\"\n\n[workspace]\n",
                on.name()
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
    for (name, text) in &files {
        let p = project.join(name);
        std::fs::create_dir_all(p.parent().unwrap()).map_err(|e| e.to_string())?;
        if std::fs::read_to_string(&p).ok().as_deref() != Some(text) {
            std::fs::write(&p, text).map_err(|e| format!("{}: {e}", p.display()))?;
        }
    }
    let target_dir = cfg.build_dir.join("target");
    let mut cmd = Command::new(&cfg.cargo);
    for v in [
        "RUSTFLAGS",
        "CARGO_ENCODED_RUSTFLAGS",
        "CARGO_BUILD_RUSTFLAGS",
        "CARGO_BUILD_TARGET",
        "CARGO_TARGET_DIR",
        "CARGO_BUILD_TARGET_DIR",
        "CARGO_PRIMARY_PACKAGE",
        "CARGO_MANIFEST_DIR",
    ] {
        cmd.env_remove(v);
    }
    let out = cmd
        .current_dir(&project)
        .args(["rustc", "--release", "--quiet", "--manifest-path"])
        .arg(project.join("Cargo.toml"))
        .arg("--target-dir")
        .arg(&target_dir)
        .args(["--target", board.triple, "--", "-C", "link-arg=-Tlink.x"])
        .stdin(Stdio::null())
        .output()
        .map_err(|e| format!("starting cargo: {e}"))?;
    if !out.status.success() {
        return Err(format!(
            "building the frame firmware failed:\n{}",
            String::from_utf8_lossy(&out.stderr)
        ));
    }
    let elf = target_dir
        .join(board.triple)
        .join("release")
        .join(format!("ingot-frame-bench-{}", on.name()));
    let cal = icount::calibrate(on, cfg).map_err(|e| e.to_string())?;
    let log = project.join("console.out");
    let mut child = runner::qemu_command(&cfg.qemu, &board, &elf)
        .current_dir(&project)
        .stdin(Stdio::null())
        .stdout(std::fs::File::create(&log).map_err(|e| format!("{}: {e}", log.display()))?)
        .spawn()
        .map_err(|e| format!("starting QEMU: {e}"))?;
    let start = std::time::Instant::now();
    let status = loop {
        match child.try_wait() {
            Ok(Some(s)) => break s,
            Ok(None) if start.elapsed() > cfg.timeout => {
                let _ = child.kill();
                let _ = child.wait();
                return Err(format!(
                    "the frame firmware timed out after {:?}",
                    cfg.timeout
                ));
            }
            Ok(None) => std::thread::sleep(std::time::Duration::from_millis(20)),
            Err(e) => return Err(format!("waiting for QEMU: {e}")),
        }
    };
    let console = std::fs::read_to_string(&log).unwrap_or_default();
    if !status.success() {
        return Err(format!("the frame firmware failed:\n{console}"));
    }
    let mut overhead = 0;
    let mut res = Vec::new();
    for line in console.lines() {
        let f: Vec<&str> = line.split_whitespace().collect();
        match f.first() {
            Some(&"INGOT-FRAME-OVERHEAD") => overhead = f[1].parse().unwrap_or(0),
            Some(&"INGOT-FRAME") if f.len() == 5 => {
                let k: usize = f[1].parse().map_err(|_| line.to_string())?;
                let ticks: u64 = f[2].parse().map_err(|_| line.to_string())?;
                res.push(Measured {
                    instructions: cal.instructions(ticks.saturating_sub(overhead)),
                    device_hash: u64::from_str_radix(f[3], 16).map_err(|_| line.to_string())?,
                    host_hash: host_hash(&cases[k].cfg, k),
                    stack: f[4].parse().map_err(|_| line.to_string())?,
                });
            }
            _ => {}
        }
    }
    if res.len() != cases.len() {
        return Err(format!("expected {} results in:\n{console}", cases.len()));
    }
    Ok(res)
}
