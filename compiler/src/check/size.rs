//! Flash and RAM of a firmware ELF, from `arm-none-eabi-size -A` (or
//! `llvm-size -A`) and, for the part the module accounts for, from symbol
//! sizes (`nm --print-size`).

use super::{CheckError, Result};
use serde::Serialize;
use std::path::{Path, PathBuf};
use std::process::Command;

/// Section sizes of one ELF, bytes.
#[derive(Debug, Clone, Default, PartialEq, Eq, Serialize)]
pub struct ElfSizes {
    /// `.vector_table`.
    pub vector_table: u64,
    /// `.text` (plus `.ARM.exidx`/`.ARM.extab`/`.gnu.sgstubs` if present).
    pub text: u64,
    /// `.rodata`.
    pub rodata: u64,
    /// `.data` (counted in flash as its load image and in RAM).
    pub data: u64,
    /// `.bss`.
    pub bss: u64,
    /// `.uninit`.
    pub uninit: u64,
}

impl ElfSizes {
    /// Flash: vector table + text + rodata + the `.data` load image.
    pub fn flash(&self) -> u64 {
        self.vector_table + self.text + self.rodata + self.data
    }

    /// Static RAM: `.data` + `.bss` + `.uninit` (the stack comes on top).
    pub fn static_ram(&self) -> u64 {
        self.data + self.bss + self.uninit
    }
}

/// Parses `size -A` output (GNU and LLVM print the same layout).
pub fn parse_size_a(text: &str) -> Result<ElfSizes> {
    let mut s = ElfSizes::default();
    let mut seen = false;
    for line in text.lines() {
        let mut it = line.split_whitespace();
        let (Some(name), Some(size)) = (it.next(), it.next()) else {
            continue;
        };
        let Ok(size) = size.parse::<u64>() else {
            continue;
        };
        seen = true;
        match name {
            ".vector_table" => s.vector_table += size,
            ".text" | ".ARM.exidx" | ".ARM.extab" | ".gnu.sgstubs" => s.text += size,
            ".rodata" => s.rodata += size,
            ".data" => s.data += size,
            ".bss" => s.bss += size,
            ".uninit" => s.uninit += size,
            _ => {}
        }
    }
    if !seen || s.text == 0 {
        return Err(CheckError::Format {
            file: "size -A output".into(),
            detail: format!("no .text section found in:\n{text}"),
        });
    }
    Ok(s)
}

fn first_working(candidates: &[&str]) -> Option<PathBuf> {
    candidates.iter().map(PathBuf::from).find(|c| {
        Command::new(c)
            .arg("--version")
            .output()
            .is_ok_and(|o| o.status.success())
    })
}

fn tool(kind: &str) -> Result<PathBuf> {
    let gnu = format!("arm-none-eabi-{kind}");
    let llvm = format!("llvm-{kind}");
    first_working(&[gnu.as_str(), llvm.as_str()]).ok_or_else(|| CheckError::Missing {
        what: format!("{gnu} (or {llvm})"),
        install: "apt-get install binutils-arm-none-eabi".into(),
    })
}

fn run_tool(tool: &Path, args: &[&str], elf: &Path) -> Result<String> {
    let out = Command::new(tool)
        .args(args)
        .arg(elf)
        .output()
        .map_err(|e| CheckError::io(format!("running {}", tool.display()), e))?;
    if !out.status.success() {
        return Err(CheckError::Run {
            what: tool.display().to_string(),
            detail: String::from_utf8_lossy(&out.stderr).into_owned(),
        });
    }
    Ok(String::from_utf8_lossy(&out.stdout).into_owned())
}

/// Section sizes of `elf`.
pub fn elf_sizes(elf: &Path) -> Result<ElfSizes> {
    parse_size_a(&run_tool(&tool("size")?, &["-A"], elf)?)
}

/// What the module itself accounts for, by symbol.
#[derive(Debug, Clone, Default, PartialEq, Eq, Serialize)]
pub struct ModuleShare {
    /// Code and constants of symbols in the module or in `ingot-rt`
    /// (weights included). Code that LTO inlined into the runner's `main`
    /// is not counted here; it shows in the ELF total.
    pub flash: u64,
    /// The runner's static buffers for the module: `Scratch`, input and
    /// output.
    pub ram: u64,
}

/// Sums symbol sizes from `nm -C --print-size --radix=d` output.
pub fn parse_nm(text: &str) -> ModuleShare {
    let mut share = ModuleShare::default();
    for line in text.lines() {
        let mut it = line.split_whitespace();
        let (Some(_addr), Some(size), Some(kind)) = (it.next(), it.next(), it.next()) else {
            continue;
        };
        let name: String = it.collect::<Vec<_>>().join(" ");
        let Ok(size) = size.parse::<u64>() else {
            continue;
        };
        let in_module = name.contains("::model::")
            || name.starts_with("ingot_rt::")
            || name.contains("<ingot_rt::");
        match kind {
            "t" | "T" | "r" | "R" if in_module => share.flash += size,
            "b" | "B" | "d" | "D"
                if ["::SCRATCH", "::INPUT", "::OUTPUT", "::OUTPUT2"]
                    .iter()
                    .any(|s| name.ends_with(s)) =>
            {
                share.ram += size
            }
            _ => {}
        }
    }
    share
}

/// The module's share of `elf`.
pub fn module_share(elf: &Path) -> Result<ModuleShare> {
    Ok(parse_nm(&run_tool(
        &tool("nm")?,
        &["-C", "--print-size", "--radix=d"],
        elf,
    )?))
}

/// Flash and RAM limits of a target profile (`None` = unchecked).
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq, Serialize)]
pub struct Budget {
    /// Flash bytes.
    pub flash: Option<u64>,
    /// RAM bytes.
    pub ram: Option<u64>,
}

/// Sizes of a firmware build compared with a budget.
#[derive(Debug, Clone, PartialEq, Eq, Serialize)]
pub struct SizeReport {
    /// Sections.
    pub sections: ElfSizes,
    /// Module share by symbol.
    pub module: ModuleShare,
    /// Measured stack high-water mark of the runner, bytes.
    pub stack_used: Option<u64>,
    /// Flash total.
    pub flash: u64,
    /// RAM total: static RAM + measured stack.
    pub ram: u64,
    /// The budget compared with.
    pub budget: Budget,
    /// Over-budget messages (empty = within budget).
    pub over_budget: Vec<String>,
    /// Panic call sites of the inference path linked alone in release (the
    /// counting panic probe, `check::panic_probe`); `None` when not built.
    pub panic_sites: Option<super::panic_probe::PanicSites>,
}

/// Builds the size report.
pub fn size_report(
    sections: ElfSizes,
    module: ModuleShare,
    stack_used: Option<u64>,
    budget: Budget,
) -> SizeReport {
    let flash = sections.flash();
    let ram = sections.static_ram() + stack_used.unwrap_or(0);
    let mut over = Vec::new();
    if let Some(b) = budget.flash {
        if flash > b {
            over.push(format!("flash {flash} B exceeds the budget of {b} B"));
        }
    }
    if let Some(b) = budget.ram {
        if ram > b {
            over.push(format!(
                "RAM {ram} B (static + measured stack) exceeds the budget of {b} B"
            ));
        }
    }
    SizeReport {
        sections,
        module,
        stack_used,
        flash,
        ram,
        budget,
        over_budget: over,
        panic_sites: None,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    const SIZE_A: &str = "runner  :\nsection              size         addr\n.vector_table        1024            0\n.text                9000         1024\n.rodata               700        10024\n.data                  16    536870912\n.bss                 1200    536870928\n.uninit                 0    536872128\n.debug_info         99999            0\n.ARM.attributes        56            0\nTotal              111995\n";

    #[test]
    fn size_a_sections_add_up_and_debug_sections_are_ignored() {
        let s = parse_size_a(SIZE_A).unwrap();
        assert_eq!(s.flash(), 1024 + 9000 + 700 + 16);
        assert_eq!(s.static_ram(), 16 + 1200);
        assert!(parse_size_a("nothing here").is_err());
    }

    #[test]
    fn budget_violations_name_the_figure() {
        let s = parse_size_a(SIZE_A).unwrap();
        let r = size_report(
            s.clone(),
            ModuleShare::default(),
            Some(800),
            Budget {
                flash: Some(10_000),
                ram: Some(4096),
            },
        );
        assert_eq!(r.ram, 2016);
        assert_eq!(r.over_budget.len(), 1);
        assert!(
            r.over_budget[0].starts_with("flash 10740 B"),
            "{:?}",
            r.over_budget
        );
        let ok = size_report(s, ModuleShare::default(), None, Budget::default());
        assert!(ok.over_budget.is_empty());
    }

    #[test]
    fn nm_attribution_picks_module_symbols() {
        let nm = "00001000 00000400 T ingot_runner_m4_1::model::run_traced\n00002000 00000100 T ingot_rt::conv::conv2d\n00003000 00000050 T main\n00004000 00000200 r ingot_runner_m4_1::model::CONV_W\n536870912 00000320 b ingot_runner_m4_1::SCRATCH\n536871300 00000064 b ingot_runner_m4_1::INPUT\n";
        let s = parse_nm(nm);
        assert_eq!(s.flash, 400 + 100 + 200);
        assert_eq!(s.ram, 320 + 64);
    }
}
