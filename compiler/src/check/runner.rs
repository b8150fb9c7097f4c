//! Runner crates: a small cargo project around a generated module, built
//! for the host or for a Cortex-M target, and run as a subprocess or under
//! QEMU.
//!
//! Project contents are a pure function of the module files, the runner
//! kind and the [`BuildConfig`]; the project lives in
//! `BUILD_DIR/runners/KIND-HASH/` and every project shares one cargo target
//! directory `BUILD_DIR/target`, so `ingot-rt`, `cortex-m-rt` and friends
//! compile once per target and profile. Files are rewritten only when their
//! contents change, so a rerun does not rebuild.

use super::io::{self, CountRecord, CountTag, TraceMap};
use super::{Board, CheckError, ModuleFiles, Result, RunOn};
use std::path::{Path, PathBuf};
use std::process::{Command, Stdio};
use std::sync::atomic::{AtomicU64, Ordering};
use std::time::{Duration, Instant};

const FIRMWARE_TEMPLATE: &str = include_str!("templates/firmware.rs");
const HOST_TEMPLATE: &str = include_str!("templates/host.rs");
const CALIB_TEMPLATE: &str = include_str!("templates/calib.rs");
/// The SysTick wrap counter and clock both Cortex-M runners use, spliced in
/// at `@SYSTICK@`.
const SYSTICK_TEMPLATE: &str = include_str!("templates/systick.rs");

/// Exact versions of the firmware-side crates (runner crates only).
const CORTEX_M: &str = "=0.7.10";
const CORTEX_M_RT: &str = "=0.7.7";
const CORTEX_M_SEMIHOSTING: &str = "=0.6.0";

/// What the runner records besides outputs.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub enum TraceMode {
    /// Outputs only (and, emulated, the instruction count of each `run`).
    Off,
    /// Emulated: also time each step of `run_traced`. Host: same as `Maps`.
    #[default]
    Counts,
    /// Also write every step's output map.
    Maps,
}

/// How runners are built and run.
#[derive(Debug, Clone)]
pub struct BuildConfig {
    /// Root of runner projects and of their shared cargo target directory.
    pub build_dir: PathBuf,
    /// The `ingot-rt` crate (`runtime-nostd/`).
    pub ingot_rt: PathBuf,
    /// `opt-level` of the runner's release profile (`"3"`, `"s"`, `"z"`).
    pub opt_level: String,
    /// Longest a run may take (wall clock) before it is killed.
    pub timeout: Duration,
    /// What to record.
    pub trace: TraceMode,
    /// The `cargo` to call.
    pub cargo: PathBuf,
    /// The `qemu-system-arm` to call.
    pub qemu: PathBuf,
    /// Camera runs: the runner reads raw camera frames and calls the
    /// module's `frame_to_input` before `run` (see [`Runner::run_frames`]).
    pub frames: bool,
}

impl Default for BuildConfig {
    fn default() -> Self {
        BuildConfig {
            build_dir: default_build_dir(),
            ingot_rt: default_ingot_rt(),
            opt_level: "3".into(),
            timeout: Duration::from_secs(120),
            trace: TraceMode::default(),
            cargo: std::env::var_os("CARGO")
                .map(PathBuf::from)
                .unwrap_or_else(|| "cargo".into()),
            qemu: "qemu-system-arm".into(),
            frames: false,
        }
    }
}

/// `$INGOT_CHECK_DIR`, else `$CARGO_TARGET_DIR/ingot-check`, else
/// `TMP/ingot-check`.
pub fn default_build_dir() -> PathBuf {
    if let Some(d) = std::env::var_os("INGOT_CHECK_DIR") {
        return d.into();
    }
    if let Some(d) = std::env::var_os("CARGO_TARGET_DIR") {
        return PathBuf::from(d).join("ingot-check");
    }
    std::env::temp_dir().join("ingot-check")
}

/// `$INGOT_RT_DIR`, else the `runtime-nostd/` next to this compiler's sources.
pub fn default_ingot_rt() -> PathBuf {
    if let Some(d) = std::env::var_os("INGOT_RT_DIR") {
        return d.into();
    }
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .parent()
        .unwrap_or(Path::new("."))
        .join("runtime-nostd")
}

/// A built runner.
#[derive(Debug, Clone)]
pub struct Runner {
    /// Where it runs.
    pub on: RunOn,
    /// The executable or ELF.
    pub binary: PathBuf,
    /// Its cargo project.
    pub project: PathBuf,
    /// What it records.
    pub trace: TraceMode,
}

/// Instruction-count material of an emulated run, in SysTick ticks.
#[derive(Debug, Clone, Default, PartialEq, Eq)]
pub struct Counts {
    /// Ticks of each image's `run` call.
    pub run_ticks: Vec<u64>,
    /// Per image, ticks of each step of `run_traced` (hook time excluded),
    /// indexed by step number.
    pub step_ticks: Vec<Vec<u64>>,
    /// Per image, ticks of the whole `run_traced` call (hook time excluded).
    pub traced_ticks: Vec<u64>,
    /// Ticks between two back-to-back timer reads.
    pub timer_overhead_ticks: u64,
    /// Highest stack use seen, bytes (painted stack).
    pub stack_bytes: Option<u64>,
    /// Camera runs: ticks of each image's `frame_to_input` call.
    pub frame_ticks: Vec<u64>,
}

impl Counts {
    /// Groups the records of a counts file.
    pub fn from_records(records: &[CountRecord], images: usize) -> Counts {
        let mut c = Counts {
            run_ticks: vec![0; images],
            step_ticks: vec![Vec::new(); images],
            traced_ticks: vec![0; images],
            ..Counts::default()
        };
        for r in records {
            match r.tag {
                CountTag::Run if r.image < images => c.run_ticks[r.image] = r.value,
                CountTag::TracedRun if r.image < images => c.traced_ticks[r.image] = r.value,
                CountTag::FrameToInput if r.image < images => {
                    if c.frame_ticks.len() < images {
                        c.frame_ticks.resize(images, 0);
                    }
                    c.frame_ticks[r.image] = r.value;
                }
                CountTag::Step if r.image < images => {
                    let v = &mut c.step_ticks[r.image];
                    if v.len() <= r.step {
                        v.resize(r.step + 1, 0);
                    }
                    v[r.step] = r.value;
                }
                CountTag::Stack => c.stack_bytes = Some(r.value),
                CountTag::TimerOverhead => c.timer_overhead_ticks = r.value,
                _ => {}
            }
        }
        c
    }
}

/// What a run produced.
#[derive(Debug, Clone, Default)]
pub struct RunOutput {
    /// One int8 output vector per input.
    pub outputs: Vec<Vec<i8>>,
    /// Traced maps (empty unless asked for).
    pub trace: Vec<TraceMap>,
    /// Emulated runs only.
    pub counts: Option<Counts>,
    /// Camera runs: the input codes the runner's `frame_to_input` made,
    /// one vector per frame.
    pub codes: Option<Vec<Vec<i8>>>,
    /// Whatever the runner printed (QEMU's semihosting console included).
    pub console: String,
    /// Wall-clock time of the run.
    pub wall: Duration,
}

/// 64-bit FNV-1a; names runner projects after their contents.
pub(crate) fn fnv1a(parts: &[&[u8]]) -> u64 {
    let mut h = crate::util::FNV_BASIS;
    for p in parts {
        h = crate::util::fnv1a(h, p);
        // Separator so ("ab","c") and ("a","bc") differ.
        h = crate::util::fnv1a(h, &[0xff]);
    }
    h
}

static UNIQUE: AtomicU64 = AtomicU64::new(0);

/// A name no other thread or process of this machine is using right now.
pub(crate) fn unique_suffix() -> String {
    format!(
        "{}-{}",
        std::process::id(),
        UNIQUE.fetch_add(1, Ordering::Relaxed)
    )
}

/// Writes `bytes` unless the file already holds exactly them (so cargo's
/// mtime-based fingerprints stay fresh); atomic via rename.
pub(crate) fn write_if_changed(path: &Path, bytes: &[u8]) -> Result<()> {
    if std::fs::read(path).is_ok_and(|old| old == bytes) {
        return Ok(());
    }
    let dir = path.parent().unwrap_or(Path::new("."));
    std::fs::create_dir_all(dir)
        .map_err(|e| CheckError::io(format!("creating {}", dir.display()), e))?;
    let tmp = dir.join(format!(".write-{}.tmp", unique_suffix()));
    std::fs::write(&tmp, bytes)
        .and_then(|_| std::fs::rename(&tmp, path))
        .map_err(|e| {
            let _ = std::fs::remove_file(&tmp);
            CheckError::io(format!("writing {}", path.display()), e)
        })
}

/// One file of a runner project.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct ProjectFile {
    /// Path relative to the project root.
    pub path: String,
    /// Contents.
    pub bytes: Vec<u8>,
}

/// What kind of runner project.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(crate) enum Kind {
    Host,
    Firmware(RunOn),
    Calibration(RunOn),
}

fn memory_x(b: &Board) -> String {
    format!(
        "/* {} ({}) as modelled by QEMU */\nMEMORY\n{{\n  FLASH : ORIGIN = 0x{:08X}, LENGTH = {}K\n  RAM : ORIGIN = 0x{:08X}, LENGTH = {}K\n}}\n",
        b.machine,
        b.cpu,
        b.flash_origin,
        b.flash_len / 1024,
        b.ram_origin,
        b.ram_len / 1024
    )
}

const BUILD_RS: &str = r#"// Puts memory.x where cortex-m-rt's link.x finds it.
fn main() {
    let out = std::path::PathBuf::from(std::env::var_os("OUT_DIR").unwrap());
    std::fs::copy("memory.x", out.join("memory.x")).unwrap();
    println!("cargo:rustc-link-search={}", out.display());
    println!("cargo:rerun-if-changed=memory.x");
    println!("cargo:rerun-if-changed=build.rs");
}
"#;

fn toml_path(p: &Path) -> String {
    p.display()
        .to_string()
        .replace('\\', "\\\\")
        .replace('"', "\\\"")
}

/// The files of a runner project (without the module, which
/// [`project_files`] adds).
pub(crate) fn runner_files(kind: Kind, module_name: &str, cfg: &BuildConfig) -> Vec<ProjectFile> {
    let profile = format!(
        "[profile.release]\nopt-level = {}\ndebug = false\nlto = true\ncodegen-units = 1\npanic = \"abort\"\n",
        if cfg.opt_level.chars().all(|c| c.is_ascii_digit()) {
            cfg.opt_level.clone()
        } else {
            format!("\"{}\"", cfg.opt_level)
        }
    );
    let rt = format!("ingot-rt = {{ path = \"{}\" }}\n", toml_path(&cfg.ingot_rt));
    let fw_deps = format!(
        "cortex-m = {{ version = \"{CORTEX_M}\", features = [\"critical-section-single-core\"] }}\ncortex-m-rt = \"{CORTEX_M_RT}\"\ncortex-m-semihosting = \"{CORTEX_M_SEMIHOSTING}\"\n"
    );
    let (main, deps, board) = match kind {
        Kind::Host => (HOST_TEMPLATE.replace("@MODULE@", module_name), rt, None),
        Kind::Firmware(on) => (
            FIRMWARE_TEMPLATE
                .replace("@SYSTICK@", SYSTICK_TEMPLATE)
                .replace("@MODULE@", module_name)
                .replace(
                    "@TRACE@",
                    if cfg.trace == TraceMode::Off {
                        "false"
                    } else {
                        "true"
                    },
                )
                .replace(
                    "@TRACE_MAPS@",
                    if cfg.trace == TraceMode::Maps {
                        "true"
                    } else {
                        "false"
                    },
                ),
            format!("{rt}{fw_deps}"),
            on.board(),
        ),
        Kind::Calibration(on) => (
            CALIB_TEMPLATE.replace("@SYSTICK@", SYSTICK_TEMPLATE),
            fw_deps,
            on.board(),
        ),
    };
    let mut files = vec![ProjectFile {
        path: "src/main.rs".into(),
        bytes: main.into_bytes(),
    }];
    if let Some(b) = board {
        files.push(ProjectFile {
            path: "memory.x".into(),
            bytes: memory_x(&b).into_bytes(),
        });
        files.push(ProjectFile {
            path: "build.rs".into(),
            bytes: BUILD_RS.as_bytes().to_vec(),
        });
    }
    // Camera runs (host and firmware runners): the runner reads frames and
    // calls `frame_to_input`.
    let features = if cfg.frames && !matches!(kind, Kind::Calibration(_)) {
        "default = [\"ingot-trace\", \"ingot-camera\"]\ningot-trace = []\n# The runner reads camera frames and calls `frame_to_input`.\ningot-camera = []\n"
    } else {
        "default = [\"ingot-trace\"]\ningot-trace = []\n"
    };
    // The package name is filled in by project_files (it carries the hash).
    files.push(ProjectFile {
        path: "Cargo.toml".into(),
        bytes: format!(
            "[package]\nname = \"@NAME@\"\nversion = \"0.0.0\"\nedition = \"2021\"\npublish = false\n\n[dependencies]\n{deps}\n# Generated modules gate `run_traced` behind this feature.\n[features]\n{features}\n{profile}\n# Its own workspace: never part of an enclosing one.\n[workspace]\n"
        )
        .into_bytes(),
    });
    files
}

fn kind_tag(kind: Kind) -> String {
    match kind {
        Kind::Host => "host".into(),
        Kind::Firmware(on) => on.name().into(),
        Kind::Calibration(on) => format!("calib-{}", on.name()),
    }
}

/// All files of a runner project for `module` (copied into `src/`), and
/// the package name (`ingot-runner-KIND-HASH`).
pub(crate) fn project_files(
    kind: Kind,
    module: Option<&ModuleFiles>,
    cfg: &BuildConfig,
) -> Result<(String, Vec<ProjectFile>)> {
    let module_name = module.map(|m| m.name.as_str()).unwrap_or("none");
    let mut files = runner_files(kind, module_name, cfg);
    if let Some(m) = module {
        for src in std::iter::once(&m.source).chain(&m.extra) {
            let bytes = std::fs::read(src)
                .map_err(|e| CheckError::io(format!("reading {}", src.display()), e))?;
            let name = src
                .file_name()
                .map(|n| n.to_string_lossy().into_owned())
                .unwrap_or_default();
            if name == "main.rs" {
                return Err(CheckError::Module(
                    "a module may not be called `main`".into(),
                ));
            }
            files.push(ProjectFile {
                path: format!("src/{name}"),
                bytes,
            });
        }
    }
    files.sort_by(|a, b| a.path.cmp(&b.path));
    let mut parts: Vec<&[u8]> = Vec::new();
    for f in &files {
        parts.push(f.path.as_bytes());
        parts.push(&f.bytes);
    }
    let hash = fnv1a(&parts);
    let name = format!(
        "ingot-runner-{}-{:012x}",
        kind_tag(kind),
        hash & 0xffff_ffff_ffff
    );
    for f in &mut files {
        if f.path == "Cargo.toml" {
            f.bytes = String::from_utf8_lossy(&f.bytes)
                .replace("@NAME@", &name)
                .into_bytes();
        }
    }
    Ok((name, files))
}

/// The sysroot of the `rustc` cargo will use.
fn rustc_sysroot() -> Option<PathBuf> {
    let rustc = std::env::var_os("RUSTC").unwrap_or_else(|| "rustc".into());
    let out = Command::new(rustc)
        .args(["--print", "sysroot"])
        .output()
        .ok()?;
    out.status
        .success()
        .then(|| PathBuf::from(String::from_utf8_lossy(&out.stdout).trim()))
}

/// Errors with the exact install command when the Rust target of `on` is
/// missing.
pub fn require_rust_target(triple: &str) -> Result<()> {
    let installed = rustc_sysroot()
        .map(|s| s.join("lib/rustlib").join(triple).join("lib").is_dir())
        .unwrap_or(false);
    if installed {
        Ok(())
    } else {
        Err(CheckError::Missing {
            what: format!("the Rust target {triple}"),
            install: format!("rustup target add {triple}"),
        })
    }
}

/// Errors with the install command when `qemu-system-arm` cannot be run.
pub fn require_qemu(qemu: &Path) -> Result<()> {
    let ok = Command::new(qemu)
        .arg("--version")
        .stdout(Stdio::null())
        .stderr(Stdio::null())
        .status()
        .is_ok_and(|s| s.success());
    if ok {
        Ok(())
    } else {
        Err(CheckError::Missing {
            what: format!("{} (the Cortex-M emulator)", qemu.display()),
            install: "apt-get install qemu-system-arm".into(),
        })
    }
}

pub(crate) fn nested_cargo(cfg: &BuildConfig) -> Command {
    let mut c = Command::new(&cfg.cargo);
    // The runner is its own build: flags meant for the enclosing one (or a
    // host-only RUSTFLAGS) must not leak into a Cortex-M build.
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
        c.env_remove(v);
    }
    c
}

fn tail(s: &str, lines: usize) -> String {
    let v: Vec<&str> = s.lines().collect();
    v[v.len().saturating_sub(lines)..].join("\n")
}

/// Writes and builds a runner project; returns the binary.
pub(crate) fn build_project(
    kind: Kind,
    module: Option<&ModuleFiles>,
    cfg: &BuildConfig,
) -> Result<Runner> {
    let on = match kind {
        Kind::Host => RunOn::Host,
        Kind::Firmware(on) | Kind::Calibration(on) => on,
    };
    let triple = on.board().map(|b| b.triple);
    if let Some(t) = triple {
        require_rust_target(t)?;
    }
    let (name, files) = project_files(kind, module, cfg)?;
    let project = cfg.build_dir.join("runners").join(&name);
    for f in &files {
        write_if_changed(&project.join(&f.path), &f.bytes)?;
    }
    let target_dir = cfg.build_dir.join("target");
    let mut cmd = nested_cargo(cfg);
    cmd.current_dir(&project)
        .arg(if triple.is_some() { "rustc" } else { "build" })
        .args(["--release", "--quiet", "--manifest-path"])
        .arg(project.join("Cargo.toml"))
        .arg("--target-dir")
        .arg(&target_dir);
    if let Some(t) = triple {
        cmd.args(["--target", t, "--", "-C", "link-arg=-Tlink.x"]);
    }
    let shown = format!("{cmd:?}");
    let out = cmd
        .stdin(Stdio::null())
        .output()
        .map_err(|e| CheckError::io(format!("starting {}", cfg.cargo.display()), e))?;
    if !out.status.success() {
        return Err(CheckError::Build {
            what: kind_tag(kind),
            command: shown,
            stderr: tail(&String::from_utf8_lossy(&out.stderr), 60),
        });
    }
    let binary = match triple {
        Some(t) => target_dir.join(t).join("release").join(&name),
        None => target_dir
            .join("release")
            .join(format!("{name}{}", std::env::consts::EXE_SUFFIX)),
    };
    if !binary.is_file() {
        return Err(CheckError::Build {
            what: kind_tag(kind),
            command: shown,
            stderr: format!("cargo succeeded but {} is missing", binary.display()),
        });
    }
    Ok(Runner {
        on,
        binary,
        project,
        trace: cfg.trace,
    })
}

/// Builds the runner of `module` for `on`.
pub fn build(module: &ModuleFiles, on: RunOn, cfg: &BuildConfig) -> Result<Runner> {
    let kind = match on {
        RunOn::Host => Kind::Host,
        other => {
            require_qemu(&cfg.qemu)?;
            Kind::Firmware(other)
        }
    };
    build_project(kind, Some(module), cfg)
}

/// A scratch directory removed on drop.
pub(crate) struct RunDir(pub PathBuf);

impl RunDir {
    pub(crate) fn new(cfg: &BuildConfig) -> Result<RunDir> {
        let d = cfg.build_dir.join("runs").join(unique_suffix());
        std::fs::create_dir_all(&d)
            .map_err(|e| CheckError::io(format!("creating {}", d.display()), e))?;
        Ok(RunDir(d))
    }
}

impl Drop for RunDir {
    fn drop(&mut self) {
        let _ = std::fs::remove_dir_all(&self.0);
    }
}

/// Runs `cmd` in `dir` with a wall-clock limit; stdout and stderr go to
/// files there (no pipe can fill up). Returns (success, console text).
pub(crate) fn run_with_timeout(
    mut cmd: Command,
    dir: &Path,
    timeout: Duration,
    what: &str,
) -> Result<(bool, String)> {
    let out_path = dir.join("console.out");
    let err_path = dir.join("console.err");
    let open = |p: &Path| {
        std::fs::File::create(p).map_err(|e| CheckError::io(format!("creating {}", p.display()), e))
    };
    let mut child = cmd
        .current_dir(dir)
        .stdin(Stdio::null())
        .stdout(open(&out_path)?)
        .stderr(open(&err_path)?)
        .spawn()
        .map_err(|e| CheckError::Run {
            what: what.into(),
            detail: format!("cannot start {:?}: {e}", cmd.get_program()),
        })?;
    let start = Instant::now();
    let status = loop {
        match child.try_wait() {
            Ok(Some(s)) => break s,
            Ok(None) if start.elapsed() > timeout => {
                let _ = child.kill();
                let _ = child.wait();
                return Err(CheckError::Run {
                    what: what.into(),
                    detail: format!("timed out after {:.0} s", timeout.as_secs_f64()),
                });
            }
            Ok(None) => std::thread::sleep(Duration::from_millis(10)),
            Err(e) => return Err(CheckError::io(format!("waiting for {what}"), e)),
        }
    };
    let mut console = std::fs::read_to_string(&out_path).unwrap_or_default();
    let err = std::fs::read_to_string(&err_path).unwrap_or_default();
    if !err.is_empty() {
        console.push_str(&err);
    }
    Ok((status.success(), console))
}

/// The QEMU command line for `elf` on `board` (icount: one virtual
/// nanosecond per instruction).
pub fn qemu_command(qemu: &Path, board: &Board, elf: &Path) -> Command {
    let mut c = Command::new(qemu);
    c.args(["-machine", board.machine, "-cpu", board.cpu])
        .args(["-nographic", "-monitor", "none", "-serial", "none"])
        .args(["-semihosting-config", "enable=on,target=native"])
        .args(["-icount", "shift=0"])
        .arg("-kernel")
        .arg(elf);
    c
}

impl Runner {
    /// Runs every input through the module.
    pub fn run(
        &self,
        inputs: &[Vec<i8>],
        input_len: usize,
        output_len: Option<usize>,
        cfg: &BuildConfig,
    ) -> Result<RunOutput> {
        let bytes = io::encode_batch(io::INPUTS_MAGIC, input_len, inputs)?;
        self.run_file(&bytes, inputs.len(), None, output_len, cfg)
    }

    /// Runs every raw camera frame through the module's `frame_to_input`
    /// and then `run` (a runner built with [`BuildConfig::frames`]); the
    /// output's `codes` are the input codes the runner computed.
    pub fn run_frames(
        &self,
        frames: &[Vec<u8>],
        frame_bytes: usize,
        input_len: usize,
        output_len: Option<usize>,
        cfg: &BuildConfig,
    ) -> Result<RunOutput> {
        let bytes = io::encode_frames(frame_bytes, frames)?;
        self.run_file(&bytes, frames.len(), Some(input_len), output_len, cfg)
    }

    /// Runs the runner on an `input.bin` of `count` items; `codes_len`:
    /// a camera run, whose runner writes `codes.bin` too.
    fn run_file(
        &self,
        input_bin: &[u8],
        count: usize,
        codes_len: Option<usize>,
        output_len: Option<usize>,
        cfg: &BuildConfig,
    ) -> Result<RunOutput> {
        let dir = RunDir::new(cfg)?;
        let in_path = dir.0.join("input.bin");
        std::fs::write(&in_path, input_bin)
            .map_err(|e| CheckError::io(format!("writing {}", in_path.display()), e))?;
        let start = Instant::now();
        let what = format!("{} ({})", self.on, self.binary.display());
        let (ok, console) = match self.on.board() {
            None => {
                let mut cmd = Command::new(&self.binary);
                cmd.args(["input.bin", "output.bin"]);
                if self.trace != TraceMode::Off {
                    cmd.arg("trace.bin");
                }
                run_with_timeout(cmd, &dir.0, cfg.timeout, &what)?
            }
            Some(board) => run_with_timeout(
                qemu_command(&cfg.qemu, &board, &self.binary),
                &dir.0,
                cfg.timeout,
                &what,
            )?,
        };
        let wall = start.elapsed();
        if !ok {
            return Err(CheckError::Run {
                what,
                detail: format!("non-zero exit; output:\n{}", tail(&console, 40)),
            });
        }
        let outputs = io::read_outputs(&dir.0.join("output.bin"), output_len)?;
        if outputs.len() != count {
            return Err(CheckError::Format {
                file: "outputs".into(),
                detail: format!("{} outputs for {count} inputs", outputs.len()),
            });
        }
        let codes = match codes_len {
            Some(len) => {
                let p = dir.0.join("codes.bin");
                let bytes = std::fs::read(&p)
                    .map_err(|e| CheckError::io(format!("reading {}", p.display()), e))?;
                let (got, codes) = io::decode_batch(io::INPUTS_MAGIC, &bytes, "codes")?;
                if got != len || codes.len() != count {
                    return Err(CheckError::Format {
                        file: "codes".into(),
                        detail: format!(
                            "{} × {got} codes for {count} frames of {len} codes",
                            codes.len()
                        ),
                    });
                }
                Some(codes)
            }
            None => None,
        };
        let trace_path = dir.0.join("trace.bin");
        let trace = if trace_path.exists() {
            io::read_trace(&trace_path)?
        } else {
            Vec::new()
        };
        let counts = if self.on.board().is_some() {
            let p = dir.0.join("counts.bin");
            let bytes = std::fs::read(&p)
                .map_err(|e| CheckError::io(format!("reading {}", p.display()), e))?;
            Some(Counts::from_records(&io::decode_counts(&bytes)?, count))
        } else {
            None
        };
        Ok(RunOutput {
            outputs,
            trace,
            counts,
            codes,
            console,
            wall,
        })
    }
}

/// Reads `pub const NAME: usize = VALUE;` from a module's source (enough
/// for `INPUT_LEN` and `OUTPUT_LEN` when no QGraph is at hand).
pub fn module_const_usize(source: &str, name: &str) -> Option<usize> {
    let key = format!("const {name}: usize =");
    let at = source.find(&key)? + key.len();
    let rest = &source[at..];
    let end = rest.find(';')?;
    rest[..end].trim().replace('_', "").parse().ok()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn project_names_follow_contents_and_memory_x_matches_the_board() {
        let cfg = BuildConfig {
            build_dir: "/nonexistent".into(),
            ingot_rt: "/rt".into(),
            ..BuildConfig::default()
        };
        let dir = std::env::temp_dir().join(format!("ingot-runner-test-{}", unique_suffix()));
        std::fs::create_dir_all(&dir).unwrap();
        std::fs::write(dir.join("net.rs"), "pub const INPUT_LEN: usize = 1_024;").unwrap();
        std::fs::write(dir.join("net.weights.bin"), [1u8, 2, 3]).unwrap();
        let m = ModuleFiles::find(&dir, None).unwrap();
        assert_eq!(m.name, "net");
        assert_eq!(m.extra.len(), 1);
        let (a, fa) = project_files(Kind::Firmware(RunOn::M33), Some(&m), &cfg).unwrap();
        let (b, _) = project_files(Kind::Firmware(RunOn::M33), Some(&m), &cfg).unwrap();
        assert_eq!(a, b, "same inputs, same project");
        let mem = fa.iter().find(|f| f.path == "memory.x").unwrap();
        let mem = String::from_utf8_lossy(&mem.bytes);
        assert!(mem.contains("ORIGIN = 0x10000000"), "{mem}");
        assert!(mem.contains("ORIGIN = 0x38000000"), "{mem}");
        assert!(fa.iter().any(|f| f.path == "src/net.weights.bin"));

        std::fs::write(dir.join("net.weights.bin"), [1u8, 2, 4]).unwrap();
        let m2 = ModuleFiles::find(&dir, None).unwrap();
        let (c, _) = project_files(Kind::Firmware(RunOn::M33), Some(&m2), &cfg).unwrap();
        assert_ne!(a, c, "a changed weight byte makes another project");
        let (h, fh) = project_files(Kind::Host, Some(&m2), &cfg).unwrap();
        assert!(h.starts_with("ingot-runner-host-"));
        assert!(!fh.iter().any(|f| f.path == "memory.x"));
        assert_eq!(
            module_const_usize("pub const INPUT_LEN: usize = 1_024;", "INPUT_LEN"),
            Some(1024)
        );
        assert_eq!(
            module_const_usize("pub const INPUT_LEN: usize = 3;", "OUTPUT_LEN"),
            None
        );
        std::fs::remove_dir_all(&dir).unwrap();
    }

    #[test]
    fn missing_target_and_emulator_name_the_install_command() {
        let e = require_rust_target("thumbv99-none-nonsense").unwrap_err();
        assert!(
            e.to_string()
                .contains("rustup target add thumbv99-none-nonsense"),
            "{e}"
        );
        let e = require_qemu(Path::new("/nonexistent/qemu-system-arm")).unwrap_err();
        assert!(
            e.to_string().contains("apt-get install qemu-system-arm"),
            "{e}"
        );
    }

    #[test]
    fn a_hung_runner_is_killed_at_the_timeout() {
        let dir = std::env::temp_dir().join(format!("ingot-timeout-{}", unique_suffix()));
        std::fs::create_dir_all(&dir).unwrap();
        let mut cmd = Command::new("sleep");
        cmd.arg("30");
        let t = Instant::now();
        let e = run_with_timeout(cmd, &dir, Duration::from_millis(200), "sleep").unwrap_err();
        assert!(t.elapsed() < Duration::from_secs(10));
        assert!(e.to_string().contains("timed out"), "{e}");
        std::fs::remove_dir_all(&dir).unwrap();
    }
}
