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
    let (console, cal) = build_and_run(on, "frame-bench", main, &[], cfg)?;
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

/// The firmware that calls a generated module's `frame_to_input`
/// (module `name`, its files in `src/`) on the pattern of case 0 and
/// prints `INGOT-MODULE-FRAME TICKS HASH`.
#[allow(dead_code)] // used by tests/frame_emulated.rs, not the bench
const MODULE_MAIN: &str = r#"#![no_std]
#![no_main]

#[allow(dead_code, unused_imports, clippy::all)]
mod model {
    include!("@MODULE@.rs");
}

use core::sync::atomic::{AtomicU32, Ordering};
use cortex_m::peripheral::syst::SystClkSource;
use cortex_m::peripheral::{SCB, SYST};
use cortex_m_rt::{entry, exception};
use cortex_m_semihosting::{debug, hprintln};

const RELOAD: u32 = 0x00FF_FFFF;

@SYSTICK@

static mut FRAME: [u8; model::FRAME_BYTES] = [0; model::FRAME_BYTES];
static mut INPUT: [i8; model::INPUT_LEN] = [0; model::INPUT_LEN];

#[entry]
fn main() -> ! {
    let mut cp = cortex_m::Peripherals::take().unwrap();
    cp.SYST.set_clock_source(SystClkSource::Core);
    cp.SYST.set_reload(RELOAD);
    cp.SYST.clear_current();
    cp.SYST.enable_interrupt();
    cp.SYST.enable_counter();
    let frame = unsafe { &mut *core::ptr::addr_of_mut!(FRAME) };
    let input = unsafe { &mut *core::ptr::addr_of_mut!(INPUT) };
    let mut s: u64 = 1;
    for b in frame.iter_mut() {
        s ^= s << 13;
        s ^= s >> 7;
        s ^= s << 17;
        *b = (s >> 56) as u8;
    }
    let t0 = now();
    model::frame_to_input(frame, input);
    let t1 = now();
    let mut h: u64 = 0xcbf2_9ce4_8422_2325;
    for &b in input.iter() {
        h ^= b as u8 as u64;
        h = h.wrapping_mul(0x0000_0100_0000_01b3);
    }
    hprintln!("INGOT-MODULE-FRAME {} {:016x}", t1 - t0, h);
    debug::exit(debug::EXIT_SUCCESS);
    loop {}
}

#[panic_handler]
fn panic(_: &core::panic::PanicInfo) -> ! {
    debug::exit(debug::EXIT_FAILURE);
    loop {}
}
"#;

/// A generated module's `frame_to_input` on `on`, on the pattern
/// [`frame`]`(FRAME_BYTES, 0)`: `(instructions, FNV-1a of the input
/// codes)`. `files` are the module's files (`Generated::files`).
#[allow(dead_code)] // used by tests/frame_emulated.rs, not the bench
pub fn run_module(
    on: RunOn,
    module: &str,
    files: &[(String, Vec<u8>)],
    cfg: &BuildConfig,
) -> Result<(u64, u64), String> {
    let main = MODULE_MAIN
        .replace("@SYSTICK@", SYSTICK)
        .replace("@MODULE@", module);
    let extra: Vec<(String, Vec<u8>)> = files
        .iter()
        .map(|(n, b)| (format!("src/{n}"), b.clone()))
        .collect();
    let (console, cal) = build_and_run(on, "frame-module", main, &extra, cfg)?;
    for line in console.lines() {
        let f: Vec<&str> = line.split_whitespace().collect();
        if f.first() == Some(&"INGOT-MODULE-FRAME") && f.len() == 3 {
            let ticks: u64 = f[1].parse().map_err(|_| line.to_string())?;
            let hash = u64::from_str_radix(f[2], 16).map_err(|_| line.to_string())?;
            return Ok((cal.instructions(ticks), hash));
        }
    }
    Err(format!("no result in:\n{console}"))
}

/// FNV-1a of input codes, as the firmware computes it.
#[allow(dead_code)] // used by tests/frame_emulated.rs, not the bench
pub fn fnv(codes: &[i8]) -> u64 {
    let mut h: u64 = 0xcbf2_9ce4_8422_2325;
    for &b in codes {
        h ^= b as u8 as u64;
        h = h.wrapping_mul(0x0000_0100_0000_01b3);
    }
    h
}

/// Writes the firmware project `kind` for `on` (its `main.rs` and extra
/// files), builds it, runs it under QEMU; the console and the tick
/// calibration.
fn build_and_run(
    on: RunOn,
    kind: &str,
    main: String,
    extra: &[(String, Vec<u8>)],
    cfg: &BuildConfig,
) -> Result<(String, icount::Calibration), String> {
    let board = on.board().ok_or("the host has no instruction counter")?;
    let project = cfg.build_dir.join(kind).join(on.name());
    let rt = cfg.ingot_rt.display().to_string();
    let package = format!("ingot-{kind}-{}", on.name());
    let files = [
        ("src/main.rs", main),
        (
            "Cargo.toml",
            format!(
                "[package]\nname = \"{package}\"\nversion = \"0.0.0\"\nedition = \"2021\"\npublish = false\n\n\
                 [features]\ningot-trace = []\n\n[dependencies]\ningot-rt = {{ path = {rt:?} }}\ncortex-m = {{ version = \"=0.7.10\", features = [\"critical-section-single-core\"] }}\n\
                 cortex-m-rt = \"=0.7.7\"\ncortex-m-semihosting = \"=0.6.0\"\n\n\
                 [profile.release]\nopt-level = 3\ndebug = false\nlto = true\ncodegen-units = 1\npanic = \"abort\"\n\n[workspace]\n",
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
    let all = files
        .iter()
        .map(|(n, t)| (n.to_string(), t.as_bytes()))
        .chain(extra.iter().map(|(n, b)| (n.clone(), b.as_slice())));
    for (name, bytes) in all {
        let p = project.join(name);
        std::fs::create_dir_all(p.parent().unwrap()).map_err(|e| e.to_string())?;
        if std::fs::read(&p).ok().as_deref() != Some(bytes) {
            std::fs::write(&p, bytes).map_err(|e| format!("{}: {e}", p.display()))?;
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
    let elf = target_dir.join(board.triple).join("release").join(&package);
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
    Ok((console, cal))
}
