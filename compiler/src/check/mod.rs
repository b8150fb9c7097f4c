//! The harness behind `ingot check`: build a generated module into a runner,
//! run it on the host or on an emulated Cortex-M core, and compare.
//!
//! * [`runner`] writes a small cargo project around a module (`NAME.rs` +
//!   `NAME.weights.bin`), builds it for the host or a Cortex-M target and
//!   runs it: as a subprocess on the host, under `qemu-system-arm` for the
//!   cores. The emulated runner reads its inputs and writes its outputs
//!   through semihosting files, and times every inference with SysTick
//!   under QEMU's `-icount shift=0`, where the virtual clock advances one
//!   nanosecond per executed instruction.
//! * [`icount`] calibrates SysTick ticks to executed instructions with a
//!   known instruction sequence.
//! * [`size`] reads section sizes of the firmware ELF.
//! * [`panic_probe`] links the inference path alone and counts (or forbids)
//!   its panic call sites.
//! * [`io`] holds the little binary file formats the runners exchange.
//! * [`compare`] and [`report`] turn outputs into figures, markdown, JSON
//!   and SVG; [`accuracy`] adds how sure the accuracy figures are
//!   (paired comparison, escapes and overkill, changed images).
//! * [`prepare`] gets a module and the comparison data ready (ranges,
//!   lowering, plan and generation through [`crate::driver`], then the
//!   integer simulator and the float reference on every image).
//! * [`pipeline`] runs a prepared module on its core and compares
//!   ([`pipeline::run_check`]).
//!
//! Instruction counts are counts of instructions the emulated core executed
//! (on its real instruction set), not cycles: QEMU does not model pipelines,
//! caches, wait states or multi-cycle instructions.

pub mod accuracy;
pub mod camera;
pub mod compare;
pub mod icount;
pub mod io;
pub mod panic_probe;
pub mod pipeline;
pub mod prepare;
pub mod report;
pub mod runner;
pub mod size;

use std::fmt;
use std::path::PathBuf;

/// Where a module runs.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, serde::Serialize)]
#[serde(rename_all = "lowercase")]
pub enum RunOn {
    /// A native std binary on the machine running `ingot`.
    Host,
    /// Cortex-M0+ code (`thumbv6m-none-eabi`), emulated on the Cortex-M3
    /// board `mps2-an385` (QEMU has no Cortex-M0+ board; ARMv6-M code runs
    /// unchanged on an ARMv7-M core, so instruction counts are those of the
    /// M0+ instruction set).
    M0plus,
    /// Cortex-M3 (`thumbv7m-none-eabi`) on `mps2-an385`.
    M3,
    /// Cortex-M4F (`thumbv7em-none-eabihf`) on `mps2-an386`.
    M4,
    /// Cortex-M7 (`thumbv7em-none-eabihf`) on `mps2-an500`.
    M7,
    /// Cortex-M33 (`thumbv8m.main-none-eabihf`) on `mps2-an505`, secure state.
    M33,
}

/// An emulated board: what QEMU calls it and where its memories are.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Board {
    /// `-machine` name.
    pub machine: &'static str,
    /// `-cpu` name.
    pub cpu: &'static str,
    /// Rust target triple of the firmware.
    pub triple: &'static str,
    /// Code memory origin (vector table) as QEMU maps it.
    pub flash_origin: u32,
    /// Code memory length used by the linker script.
    pub flash_len: u32,
    /// Data memory origin.
    pub ram_origin: u32,
    /// Data memory length used by the linker script.
    pub ram_len: u32,
    /// SysTick core clock of the board model, Hz (informative; the factor
    /// that matters is measured by [`icount::calibrate`]).
    pub core_clock_hz: u32,
}

const MIB: u32 = 1 << 20;

impl RunOn {
    /// Every value, host first.
    pub const ALL: [RunOn; 6] = [
        RunOn::Host,
        RunOn::M0plus,
        RunOn::M3,
        RunOn::M4,
        RunOn::M7,
        RunOn::M33,
    ];

    /// The CLI name.
    pub fn name(self) -> &'static str {
        match self {
            RunOn::Host => "host",
            RunOn::M0plus => "m0plus",
            RunOn::M3 => "m3",
            RunOn::M4 => "m4",
            RunOn::M7 => "m7",
            RunOn::M33 => "m33",
        }
    }

    /// Parses a CLI name.
    pub fn parse(s: &str) -> Option<RunOn> {
        RunOn::ALL.into_iter().find(|r| r.name() == s)
    }

    /// The emulated board, `None` for the host.
    ///
    /// Memory maps follow QEMU's models: on AN385/AN386/AN500 ZBT SSRAM1
    /// (4 MiB at 0) holds code and ZBT SSRAM2/3 (4 MiB at `0x2000_0000`)
    /// data. AN505 boots the Cortex-M33 in secure state with its vector
    /// table at `0x1000_0000` (the secure alias of SSRAM1); data goes to the
    /// secure alias of SSRAM2 at `0x3800_0000` (2 MiB).
    pub fn board(self) -> Option<Board> {
        let mps2 = |machine, cpu, triple| Board {
            machine,
            cpu,
            triple,
            flash_origin: 0,
            flash_len: 4 * MIB,
            ram_origin: 0x2000_0000,
            ram_len: 4 * MIB,
            core_clock_hz: 25_000_000,
        };
        match self {
            RunOn::Host => None,
            RunOn::M0plus => Some(mps2("mps2-an385", "cortex-m3", "thumbv6m-none-eabi")),
            RunOn::M3 => Some(mps2("mps2-an385", "cortex-m3", "thumbv7m-none-eabi")),
            RunOn::M4 => Some(mps2("mps2-an386", "cortex-m4", "thumbv7em-none-eabihf")),
            RunOn::M7 => Some(mps2("mps2-an500", "cortex-m7", "thumbv7em-none-eabihf")),
            RunOn::M33 => Some(Board {
                machine: "mps2-an505",
                cpu: "cortex-m33",
                triple: "thumbv8m.main-none-eabihf",
                flash_origin: 0x1000_0000,
                flash_len: 4 * MIB,
                ram_origin: 0x3800_0000,
                ram_len: 2 * MIB,
                core_clock_hz: 20_000_000,
            }),
        }
    }

    /// A sentence for reports saying what actually ran.
    pub fn describe(self) -> String {
        match self.board() {
            None => "host (native std binary)".to_string(),
            Some(b) => {
                let stand_in = if self == RunOn::M0plus {
                    " (Cortex-M3 board standing in for a Cortex-M0+; the code is ARMv6-M)"
                } else {
                    ""
                };
                format!(
                    "{} code ({}) on QEMU {} / {}{}",
                    self.name(),
                    b.triple,
                    b.machine,
                    b.cpu,
                    stand_in
                )
            }
        }
    }
}

impl fmt::Display for RunOn {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.name())
    }
}

/// Why the harness failed.
#[derive(Debug, thiserror::Error)]
pub enum CheckError {
    /// A tool or a Rust target is not installed.
    #[error("{what} is not available: {install}")]
    Missing {
        /// What was looked for.
        what: String,
        /// The command that installs it.
        install: String,
    },
    /// Reading or writing a file failed.
    #[error("{context}: {source}")]
    Io {
        /// What was being done.
        context: String,
        /// The underlying error.
        source: std::io::Error,
    },
    /// A build of a runner crate failed.
    #[error("building the {what} runner failed ({command}):\n{stderr}")]
    Build {
        /// Which runner.
        what: String,
        /// The command line.
        command: String,
        /// The tail of cargo's output.
        stderr: String,
    },
    /// A runner ran but failed or timed out.
    #[error("running the {what} runner failed: {detail}")]
    Run {
        /// Which runner.
        what: String,
        /// Exit status, timeout or output.
        detail: String,
    },
    /// A runner produced a malformed file.
    #[error("malformed {file}: {detail}")]
    Format {
        /// Which file.
        file: String,
        /// What is wrong.
        detail: String,
    },
    /// The module directory does not hold a module.
    #[error("module: {0}")]
    Module(String),
    /// The report folder exists and ingot did not create it, so replacing
    /// it could delete a user's files.
    #[error("{0}: exists and is not a report folder written by ingot (no {marker} inside); choose a new folder or remove it yourself", marker = report::REPORT_MARKER)]
    ForeignReport(PathBuf),
}

impl CheckError {
    pub(crate) fn io(context: impl Into<String>, source: std::io::Error) -> Self {
        CheckError::Io {
            context: context.into(),
            source,
        }
    }
}

/// Shorthand result.
pub type Result<T> = std::result::Result<T, CheckError>;

/// A generated module on disk: `dir/NAME.rs` and `dir/NAME.weights.bin`.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct ModuleFiles {
    /// The `.rs` file.
    pub source: PathBuf,
    /// Every other file of the module directory the source may
    /// `include_bytes!` (the weights), copied next to it.
    pub extra: Vec<PathBuf>,
    /// The module name (file stem).
    pub name: String,
}

impl ModuleFiles {
    /// Finds the module in `dir`: `NAME.rs` (or exactly one `.rs` file when
    /// `name` is `None`) and every `NAME.*` sibling.
    pub fn find(dir: &std::path::Path, name: Option<&str>) -> Result<ModuleFiles> {
        let entries = std::fs::read_dir(dir)
            .map_err(|e| CheckError::io(format!("reading {}", dir.display()), e))?;
        let mut files: Vec<PathBuf> = entries
            .filter_map(|e| e.ok().map(|e| e.path()))
            .filter(|p| p.is_file())
            .collect();
        files.sort();
        let rs: Vec<&PathBuf> = files
            .iter()
            .filter(|p| p.extension().is_some_and(|e| e == "rs"))
            .filter(|p| name.is_none_or(|n| p.file_stem().is_some_and(|s| s == n)))
            .collect();
        let source = match rs.as_slice() {
            [one] => (*one).clone(),
            [] => {
                return Err(CheckError::Module(format!(
                    "no {}.rs in {}",
                    name.unwrap_or("*"),
                    dir.display()
                )))
            }
            _ => {
                return Err(CheckError::Module(format!(
                    "several .rs files in {}; name the module",
                    dir.display()
                )))
            }
        };
        let stem = source
            .file_stem()
            .map(|s| s.to_string_lossy().into_owned())
            .unwrap_or_default();
        let prefix = format!("{stem}.");
        let extra = files
            .iter()
            .filter(|p| **p != source)
            .filter(|p| {
                p.file_name()
                    .is_some_and(|f| f.to_string_lossy().starts_with(&prefix))
            })
            .cloned()
            .collect();
        Ok(ModuleFiles {
            source,
            extra,
            name: stem,
        })
    }
}

/// Whether the emulated runs of `on` can happen here: `Ok` when QEMU and
/// the Rust target are installed, else the error naming what to install.
pub fn emulation_ready(on: RunOn, qemu: &std::path::Path) -> Result<()> {
    let Some(b) = on.board() else {
        return Ok(());
    };
    runner::require_qemu(qemu)?;
    runner::require_rust_target(b.triple)
}

/// For tests: true when `on` can be emulated here. When it cannot, prints
/// why and returns false, unless `INGOT_REQUIRE_EMULATION=1` (set by CI),
/// in which case it panics with the install command.
pub fn emulation_or_skip(on: RunOn) -> bool {
    match emulation_ready(on, std::path::Path::new("qemu-system-arm")) {
        Ok(()) => true,
        Err(e) if std::env::var("INGOT_REQUIRE_EMULATION").is_ok_and(|v| v == "1") => {
            panic!("emulation required (INGOT_REQUIRE_EMULATION=1): {e}")
        }
        Err(e) => {
            eprintln!("skipping the {on} emulator check: {e}");
            false
        }
    }
}
