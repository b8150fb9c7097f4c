//! Target profiles and the budget check.

use ingot_compiler::plan::target::{
    budget, FlashUse, Target, TargetError, RUNTIME_CODE_BYTES, STEP_CODE_BYTES,
};
use ingot_compiler::plan::{plan, PlanOptions};
use ingot_testkit::synth;
use std::path::{Path, PathBuf};

fn targets_dir() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("../targets")
}

#[test]
fn shipped_profiles_load_with_datasheets() {
    let mut names = Vec::new();
    for e in std::fs::read_dir(targets_dir()).expect("targets/") {
        let path = e.expect("entry").path();
        if path.extension().is_some_and(|x| x == "toml") {
            let t = Target::load(&path).unwrap_or_else(|e| panic!("{e}"));
            assert!(
                t.ram.reserve < t.ram.bytes && t.flash.reserve < t.flash.bytes,
                "{}",
                t.name
            );
            assert!(
                !t.datasheet.title.is_empty() && !t.datasheet.revision.is_empty(),
                "{}",
                t.name
            );
            names.push(
                path.file_stem()
                    .expect("stem")
                    .to_string_lossy()
                    .into_owned(),
            );
        }
    }
    names.sort();
    for want in [
        "esp32s3",
        "generic",
        "nrf5340",
        "rp2040",
        "stm32f446re",
        "stm32h743zi",
        "stm32u585ai",
    ] {
        assert!(
            names.iter().any(|n| n == want),
            "missing targets/{want}.toml"
        );
    }
    // Figures as printed in the vendors' documents (STM32F446xC/E datasheet
    // DS10693: 128 KiB SRAM, 512 KiB flash; RP2040 Datasheet: 264 KiB SRAM).
    let f4 = Target::load(targets_dir().join("stm32f446re.toml")).expect("load");
    assert_eq!(
        (f4.ram.bytes, f4.flash.bytes, f4.core.as_str()),
        (128 * 1024, 512 * 1024, "cortex-m4f")
    );
    let rp = Target::load(targets_dir().join("rp2040.toml")).expect("load");
    assert_eq!(
        (rp.ram.bytes, rp.triple.as_str()),
        (264 * 1024, "thumbv6m-none-eabi")
    );
    let esp = Target::load(targets_dir().join("esp32s3.toml")).expect("load");
    assert!(esp.budget_only);
}

#[test]
fn errors_name_file_and_key() {
    let p = Path::new("bad.toml");
    let missing = "name = \"x\"\ncore = \"c\"\ntriple = \"t\"\nclock_hz = 1\n[flash]\nbytes = 1\nreserve = 0\n[datasheet]\ntitle = \"d\"\nrevision = \"1\"\n";
    let e = Target::parse(missing, p).unwrap_err().to_string();
    assert!(e.contains("bad.toml") && e.contains("ram"), "{e}");
    let over = missing.replace("[flash]", "[ram]\nbytes = 10\nreserve = 20\n[flash]");
    let e = Target::parse(&over, p).unwrap_err();
    assert!(
        matches!(&e, TargetError::Value { key, .. } if key == "ram.reserve"),
        "{e}"
    );
    let typo = over.replace("reserve = 20", "reserve = 2\nreserv = 3");
    let e = Target::parse(&typo, p).unwrap_err().to_string();
    assert!(e.contains("reserv"), "{e}");
    let e = Target::load("no/such/file.toml").unwrap_err().to_string();
    assert!(e.contains("no/such/file.toml"), "{e}");
}

#[test]
fn budget_verdicts() {
    let opts = PlanOptions::default();
    let small = synth::dense(&synth::DenseCfg::small());
    let ps = plan(&small, &opts).expect("plan");
    let h7 = Target::load(targets_dir().join("stm32h743zi.toml")).expect("load");
    let b = budget(&small, &ps, &h7);
    assert!(b.fits, "{:?}", b.over);
    assert_eq!(
        b.ram_used,
        (ps.arena_bytes + ps.patch_bytes) as u64 + h7.ram.reserve
    );
    assert_eq!(b.ram_headroom, h7.ram.bytes as i64 - b.ram_used as i64);
    assert_eq!(
        b.flash.code,
        RUNTIME_CODE_BYTES + STEP_CODE_BYTES * small.steps.len() as u64
    );

    let big = synth::dense(&synth::DenseCfg::densenet121());
    let pb = plan(&big, &opts).expect("plan");
    let f4 = Target::load(targets_dir().join("stm32f446re.toml")).expect("load");
    let b = budget(&big, &pb, &f4);
    assert!(!b.fits);
    assert_eq!(b.over.len(), 2, "{:?}", b.over);
    assert!(
        b.over[0].starts_with(&format!("RAM over by {} bytes", -b.ram_headroom)),
        "{:?}",
        b.over
    );
    assert!(b.over[1].starts_with("flash over by"), "{:?}", b.over);
    // DenseNet-121 has about 8 M int8 weights (Huang et al. 2017: 8.0 M parameters).
    let f = FlashUse::of(&big);
    assert!((7_000_000..9_000_000).contains(&f.weights), "{}", f.weights);
}
