//! The harness on the hand-written stand-in module: host and emulated
//! runners, instruction-count calibration, corrupted-module detection.
//! Emulator tests need `qemu-system-arm` and the thumb targets
//! (`.ci/install-emulation.sh`).

use ingot_compiler::check::compare::{compare_outputs, first_differing_step};
use ingot_compiler::check::runner::{self, BuildConfig, TraceMode};
use ingot_compiler::check::{icount, size, ModuleFiles, RunOn};
use std::path::{Path, PathBuf};

fn fixture_dir() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/fixtures/standin")
}

fn cfg(trace: TraceMode) -> BuildConfig {
    BuildConfig {
        trace,
        ..BuildConfig::default()
    }
}

/// Deterministic pseudo-random int8 images (xorshift).
fn images(n: usize, len: usize, seed: u32) -> Vec<Vec<i8>> {
    let mut s = seed.max(1);
    (0..n)
        .map(|_| {
            (0..len)
                .map(|_| {
                    s ^= s << 13;
                    s ^= s >> 17;
                    s ^= s << 5;
                    (s >> 24) as u8 as i8
                })
                .collect()
        })
        .collect()
}

fn lens(m: &ModuleFiles) -> (usize, usize) {
    let src = std::fs::read_to_string(&m.source).unwrap();
    (
        runner::module_const_usize(&src, "INPUT_LEN").unwrap(),
        runner::module_const_usize(&src, "OUTPUT_LEN").unwrap(),
    )
}

#[test]
fn standin_on_host_and_emulated_m4_is_bit_identical() {
    let m = ModuleFiles::find(&fixture_dir(), Some("standin")).unwrap();
    let (il, ol) = lens(&m);
    assert_eq!((il, ol), (64, 3));
    let inputs = images(6, il, 42);
    let c = cfg(TraceMode::Maps);

    let host = runner::build(&m, RunOn::Host, &c).unwrap();
    let h = host.run(&inputs, il, Some(ol), &c).unwrap();
    assert_eq!(h.outputs.len(), 6);
    assert_eq!(h.trace.len(), 6 * 3, "3 traced steps per image");
    assert!(h.counts.is_none());
    // Not all-equal outputs: the network actually depends on its input.
    assert!(h.outputs.iter().any(|o| o != &h.outputs[0]), "{:?}", h.outputs);

    let fw = runner::build(&m, RunOn::M4, &c).unwrap();
    let e = fw.run(&inputs, il, Some(ol), &c).unwrap();
    let exact = compare_outputs(&e.outputs, &h.outputs);
    assert!(exact.identical(), "{exact:?}");
    assert_eq!(first_differing_step(&e.trace, &h.trace), None);

    let counts = e.counts.as_ref().unwrap();
    assert_eq!(counts.run_ticks.len(), 6);
    assert!(counts.run_ticks.iter().all(|&t| t > 0), "{counts:?}");
    assert_eq!(counts.step_ticks[0].len(), 3);
    let steps: u64 = counts.step_ticks[0].iter().sum();
    assert!(steps <= counts.traced_ticks[0] + 3, "{counts:?}");
    let stack = counts.stack_bytes.unwrap();
    assert!(stack > 0 && stack < 64 * 1024, "stack {stack}");

    let cal = icount::calibrate(RunOn::M4, &c).unwrap();
    let instr = cal.instructions(counts.run_ticks[0]);
    // conv 8·8·4·9 + linear 64·3 = 2496 MACs: at least one instruction each,
    // and well under 1000 each.
    assert!(instr > 2496 && instr < 2_496_000, "{instr} instructions");

    let s = size::elf_sizes(&fw.binary).unwrap();
    let share = size::module_share(&fw.binary).unwrap();
    assert!(s.flash() > 256 && s.flash() < 256 * 1024, "{s:?}");
    assert!(share.ram >= 320 + 18 + 64, "{share:?}");
    eprintln!(
        "standin m4: {} ticks = {} instructions/inference (calibration {:.3} instr/tick), steps {:?} ticks, stack {} B, flash {} B, static RAM {} B, module share {:?}",
        counts.run_ticks[0],
        instr,
        cal.instructions_per_tick,
        counts.step_ticks[0],
        stack,
        s.flash(),
        s.static_ram(),
        share
    );
}

#[test]
fn instruction_count_calibration_on_m4_recovers_the_known_sequence() {
    let c = cfg(TraceMode::Off);
    let cal = icount::calibrate(RunOn::M4, &c).unwrap();
    eprintln!("calibration: {cal:?}");
    // 25 MHz SysTick under one virtual ns per instruction: 40 instructions
    // per tick; measured, not assumed.
    assert!(
        (cal.instructions_per_tick - 40.0).abs() < 0.05,
        "{} instructions per tick",
        cal.instructions_per_tick
    );
    assert!(cal.points.len() >= 3);
    // Each point predicted within one tick plus the call overhead.
    assert!(
        cal.max_error_instructions <= 2.0 * cal.instructions_per_tick,
        "{cal:?}"
    );
    // The longest loop spans several 65 536-tick periods: wrap counting works.
    let longest = cal.points.iter().map(|p| p.ticks).max().unwrap();
    assert!(longest > 3 * 65_536, "{longest}");
}

#[test]
fn a_flipped_weight_byte_is_caught_and_its_layer_named() {
    let good = ModuleFiles::find(&fixture_dir(), Some("standin")).unwrap();
    let (il, ol) = lens(&good);
    let inputs = images(8, il, 7);
    let c = cfg(TraceMode::Maps);
    let reference = runner::build(&good, RunOn::Host, &c).unwrap().run(&inputs, il, Some(ol), &c).unwrap();

    // (byte offset in the weights, expected first differing step)
    for (offset, step, name) in [(4usize, 0usize, "conv1"), (100, 2, "fc")] {
        let dir = std::env::temp_dir().join(format!("ingot-corrupt-{}-{offset}", std::process::id()));
        std::fs::create_dir_all(&dir).unwrap();
        std::fs::copy(&good.source, dir.join("standin.rs")).unwrap();
        let mut w = std::fs::read(fixture_dir().join("standin.weights.bin")).unwrap();
        w[offset] ^= 0x40;
        std::fs::write(dir.join("standin.weights.bin"), &w).unwrap();
        let bad = ModuleFiles::find(&dir, Some("standin")).unwrap();
        let out = runner::build(&bad, RunOn::Host, &c).unwrap().run(&inputs, il, Some(ol), &c).unwrap();
        let diff = first_differing_step(&out.trace, &reference.trace).expect("corruption not detected");
        assert_eq!((diff.step, diff.name.as_str()), (step, name), "{diff:?}");
        assert!(diff.differing > 0);
        std::fs::remove_dir_all(&dir).unwrap();
    }
}
