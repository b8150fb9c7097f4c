//! The panic probe: a generated module's inference path linked alone for a
//! Cortex-M target, to count (or forbid) the panic call sites left in it.
//!
//! The probe is a `#![no_std]` binary whose entry point calls only
//! `quantize_pixels`, `run` and `argmax`; the linker drops everything else
//! (`--gc-sections`), so what remains is exactly the code firmware ships
//! for one inference. With [`Handler::Never`] its panic handler calls an
//! extern function that exists nowhere ([`UNDEFINED_SYMBOL`]): the link
//! succeeds only when no panic path is left, because any call into
//! `core::panicking` reaches the handler (the "panic never" technique,
//! common practice in embedded Rust). With [`Handler::Count`] the handler
//! is a loop, the link always succeeds, and [`panic_sites`] counts the
//! branches into the panic machinery in the ELF.

use super::runner::{fnv1a, nested_cargo, require_rust_target, write_if_changed, BuildConfig};
use super::{CheckError, ModuleFiles, Result};
use serde::Serialize;
use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use std::process::{Command, Stdio};

/// The extern function the [`Handler::Never`] panic handler calls. It is
/// defined nowhere, so the link fails while a panic path remains.
pub const UNDEFINED_SYMBOL: &str = "ingot_panic_path_left_in_binary";

/// What the probe's panic handler does.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Handler {
    /// Loops: the probe always links; count with [`panic_sites`].
    Count,
    /// Calls [`UNDEFINED_SYMBOL`]: the probe links only without panic paths.
    Never,
}

const PROBE: &str = r#"//! ingot panic probe (generated; do not edit): one inference, nothing else.
#![no_std]
#![no_main]

#[allow(dead_code, unused_imports, clippy::all)]
mod model {
    include!("@MODULE@.rs");
}

#[no_mangle]
pub extern "C" fn ingot_probe_entry() -> ! {
    let mut scratch = model::Scratch::new();
    let pixels = core::hint::black_box([0u8; model::INPUT_LEN]);
    let mut input = [0i8; model::INPUT_LEN];
    let mut output = [0i8; model::OUTPUT_LEN];
    loop {
        model::quantize_pixels(&pixels, &mut input);
        model::run(core::hint::black_box(&mut scratch), core::hint::black_box(&input), &mut output);
        core::hint::black_box(model::argmax(core::hint::black_box(&output)));
    }
}

@HANDLER@
"#;

const HANDLER_COUNT: &str = r#"#[panic_handler]
fn panic(_: &core::panic::PanicInfo) -> ! {
    loop {}
}
"#;

const HANDLER_NEVER: &str = r#"#[panic_handler]
fn panic(_: &core::panic::PanicInfo) -> ! {
    extern "C" {
        fn @SYMBOL@() -> !;
    }
    // Reached only if a panic path survived: then the link fails.
    unsafe { @SYMBOL@() }
}
"#;

/// Builds the probe of `module` for the Rust target `triple` in release
/// (LTO, one codegen unit, `panic = "abort"`, the runner's opt-level);
/// returns the ELF. With [`Handler::Never`] a surviving panic path is a
/// [`CheckError::Build`] whose message says so.
pub fn build_probe(
    module: &ModuleFiles,
    triple: &str,
    handler: Handler,
    cfg: &BuildConfig,
) -> Result<PathBuf> {
    require_rust_target(triple)?;
    let handler_text = match handler {
        Handler::Count => HANDLER_COUNT.to_string(),
        Handler::Never => HANDLER_NEVER.replace("@SYMBOL@", UNDEFINED_SYMBOL),
    };
    let main = PROBE
        .replace("@MODULE@", &module.name)
        .replace("@HANDLER@", &handler_text);
    let mut files: Vec<(String, Vec<u8>)> = vec![("src/main.rs".into(), main.into_bytes())];
    for src in std::iter::once(&module.source).chain(&module.extra) {
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
        files.push((format!("src/{name}"), bytes));
    }
    let opt = if cfg.opt_level.chars().all(|c| c.is_ascii_digit()) {
        cfg.opt_level.clone()
    } else {
        format!("\"{}\"", cfg.opt_level)
    };
    let rt = cfg
        .ingot_rt
        .display()
        .to_string()
        .replace('\\', "\\\\")
        .replace('"', "\\\"");
    let mut parts: Vec<&[u8]> = vec![triple.as_bytes(), rt.as_bytes(), opt.as_bytes()];
    for (p, b) in &files {
        parts.push(p.as_bytes());
        parts.push(b);
    }
    let tag = match handler {
        Handler::Count => "count",
        Handler::Never => "never",
    };
    let name = format!(
        "ingot-probe-{tag}-{:012x}",
        fnv1a(&parts) & 0xffff_ffff_ffff
    );
    files.push((
        "Cargo.toml".into(),
        format!(
            "[package]\nname = \"{name}\"\nversion = \"0.0.0\"\nedition = \"2021\"\npublish = false\n\n[dependencies]\ningot-rt = {{ path = \"{rt}\" }}\n\n# Generated modules gate `run_traced` behind this feature (off here).\n[features]\ningot-trace = []\n\n[profile.release]\nopt-level = {opt}\ndebug = false\nlto = true\ncodegen-units = 1\npanic = \"abort\"\n\n# Its own workspace: never part of an enclosing one.\n[workspace]\n"
        )
        .into_bytes(),
    ));
    let project = cfg.build_dir.join("probes").join(&name);
    for (p, b) in &files {
        write_if_changed(&project.join(p), b)?;
    }
    let target_dir = cfg.build_dir.join("target");
    let mut cmd = nested_cargo(cfg);
    cmd.current_dir(&project)
        .args(["rustc", "--release", "--quiet", "--manifest-path"])
        .arg(project.join("Cargo.toml"))
        .arg("--target-dir")
        .arg(&target_dir)
        .args(["--target", triple, "--"])
        .args(["-C", "link-arg=--entry=ingot_probe_entry"]);
    let shown = format!("{cmd:?}");
    let out = cmd
        .stdin(Stdio::null())
        .output()
        .map_err(|e| CheckError::io(format!("starting {}", cfg.cargo.display()), e))?;
    if !out.status.success() {
        let stderr = String::from_utf8_lossy(&out.stderr);
        let lines: Vec<&str> = stderr.lines().collect();
        let mut tail = lines[lines.len().saturating_sub(40)..].join("\n");
        if stderr.contains(UNDEFINED_SYMBOL) {
            tail = format!(
                "a panic path is left in the inference path of module `{}` for {triple} \
                 (the panic handler's undefined `{UNDEFINED_SYMBOL}` is referenced); \
                 find it with `ingot check --on CORE` (\"panic call sites\") or \
                 `arm-none-eabi-objdump -d` on a probe built with the counting handler\n{tail}",
                module.name
            );
        }
        return Err(CheckError::Build {
            what: format!("panic probe ({tag}, {triple})"),
            command: shown,
            stderr: tail,
        });
    }
    let elf = target_dir.join(triple).join("release").join(&name);
    if !elf.is_file() {
        return Err(CheckError::Build {
            what: format!("panic probe ({tag}, {triple})"),
            command: shown,
            stderr: format!("cargo succeeded but {} is missing", elf.display()),
        });
    }
    Ok(elf)
}

/// Panic call sites of an ELF.
#[derive(Debug, Clone, Default, PartialEq, Eq, Serialize)]
pub struct PanicSites {
    /// Branches into the panic machinery from code outside it.
    pub total: usize,
    /// The same, by panic function (demangled name).
    pub by_target: BTreeMap<String, usize>,
}

/// True for the functions a panic goes through: `core::panicking::*`, the
/// slice index failures, `unwrap`/`expect` failures and the handler.
fn is_panic_fn(name: &str) -> bool {
    name.starts_with("core::panicking::")
        || name.starts_with("core::slice::index::")
        || name.contains("::copy_from_slice_impl::len_mismatch_fail")
        || name.starts_with("core::option::unwrap_failed")
        || name.starts_with("core::option::expect_failed")
        || name.starts_with("core::result::unwrap_failed")
        || name == "rust_begin_unwind"
        || name.ends_with("::panic")
}

/// Counts panic call sites in `objdump -d -C` output of a linked ELF: every
/// branch (`bl`, `b`, `b.w`, conditional forms) whose target is a panic
/// function ([`is_panic_fn`]), made from a function that is not one itself.
pub fn parse_panic_sites(disasm: &str) -> PanicSites {
    let mut s = PanicSites::default();
    let mut current = String::new();
    for line in disasm.lines() {
        // Function header: `00012345 <name>:`.
        if let Some(name) = line
            .strip_suffix(">:")
            .and_then(|l| l.split_once(" <"))
            .map(|(_, n)| n)
        {
            current = name.to_string();
            continue;
        }
        let mut cols = line.split('\t').map(str::trim).filter(|c| !c.is_empty());
        let (Some(_addr), Some(op), Some(arg)) = (cols.next(), cols.next(), cols.next()) else {
            continue;
        };
        let op = op
            .strip_suffix(".w")
            .unwrap_or(op)
            .strip_suffix(".n")
            .unwrap_or(op);
        if !op.starts_with('b') || op.starts_with("bic") || op.starts_with("bfi") || op == "bx" {
            continue;
        }
        let Some(target) = arg
            .split_once('<')
            .and_then(|(_, t)| t.strip_suffix('>'))
            .map(|t| t.split_once("+0x").map_or(t, |(f, _)| f))
        else {
            continue;
        };
        if is_panic_fn(target) && !is_panic_fn(&current) {
            s.total += 1;
            *s.by_target.entry(target.to_string()).or_default() += 1;
        }
    }
    s
}

/// Panic call sites of `elf` (`arm-none-eabi-objdump`, else `llvm-objdump`).
pub fn panic_sites(elf: &Path) -> Result<PanicSites> {
    let tool = ["arm-none-eabi-objdump", "llvm-objdump"]
        .into_iter()
        .find(|t| {
            Command::new(t)
                .arg("--version")
                .output()
                .is_ok_and(|o| o.status.success())
        })
        .ok_or_else(|| CheckError::Missing {
            what: "arm-none-eabi-objdump (or llvm-objdump)".into(),
            install: "apt-get install binutils-arm-none-eabi".into(),
        })?;
    let out = Command::new(tool)
        .args(["-d", "-C", "--no-show-raw-insn"])
        .arg(elf)
        .output()
        .map_err(|e| CheckError::io(format!("running {tool}"), e))?;
    if !out.status.success() {
        return Err(CheckError::Run {
            what: tool.into(),
            detail: String::from_utf8_lossy(&out.stderr).into_owned(),
        });
    }
    Ok(parse_panic_sites(&String::from_utf8_lossy(&out.stdout)))
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A hand-written `arm-none-eabi-objdump -d -C --no-show-raw-insn`
    /// excerpt: two panic branches from `run`, one from inside the panic
    /// machinery (not counted), and ordinary branches.
    const DISASM: &str = "\
00008000 <model::run>:
    8000:\tpush\t{r4, r5, r7, lr}
    8002:\tcmp\tr0, r1
    8004:\tbhi.w\t8100 <core::panicking::panic_bounds_check>
    8008:\tbl\t8200 <ingot_rt::conv::conv_run>
    800c:\tbl\t8300 <core::slice::index::slice_index_fail>
    8010:\tbne.n\t8002 <model::run+0x2>
    8012:\tbic.w\tr0, r0, #1
00008100 <core::panicking::panic_bounds_check>:
    8100:\tbl\t8400 <core::panicking::panic_fmt>
";

    #[test]
    fn counts_branches_into_panic_functions_from_outside_them() {
        let s = parse_panic_sites(DISASM);
        assert_eq!(s.total, 2);
        assert_eq!(s.by_target["core::panicking::panic_bounds_check"], 1);
        assert_eq!(s.by_target["core::slice::index::slice_index_fail"], 1);
        assert_eq!(parse_panic_sites("").total, 0);
    }
}
