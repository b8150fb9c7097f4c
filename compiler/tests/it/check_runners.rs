//! The harness on the hand-written stand-in module: host and emulated
//! runners, instruction-count calibration, corrupted-module detection.
//! Emulator tests need `qemu-system-arm` and the thumb targets
//! (`.ci/install-emulation.sh`).

use ingot_compiler::check::compare::Thresholds;
use ingot_compiler::check::compare::{compare_outputs, first_differing_step};
use ingot_compiler::check::pipeline::{self, CheckData, CheckPlan, StepInfo};
use ingot_compiler::check::runner::{self, BuildConfig, TraceMode};
use ingot_compiler::check::size::Budget;
use ingot_compiler::check::{emulation_or_skip, icount, size, ModuleFiles, RunOn};
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
    if !emulation_or_skip(RunOn::M4) {
        return;
    }
    let inputs = images(6, il, 42);
    let c = cfg(TraceMode::Maps);

    let host = runner::build(&m, RunOn::Host, &c).unwrap();
    let h = host.run(&inputs, il, Some(ol), &c).unwrap();
    assert_eq!(h.outputs.len(), 6);
    assert_eq!(h.trace.len(), 6 * 3, "3 traced steps per image");
    assert!(h.counts.is_none());
    // Not all-equal outputs: the network actually depends on its input.
    assert!(
        h.outputs.iter().any(|o| o != &h.outputs[0]),
        "{:?}",
        h.outputs
    );

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
    assert!(share.ram >= 320 + 2 * 9 + 64, "{share:?}");
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
    if !emulation_or_skip(RunOn::M4) {
        return;
    }
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
    let reference = runner::build(&good, RunOn::Host, &c)
        .unwrap()
        .run(&inputs, il, Some(ol), &c)
        .unwrap();

    // (byte offset in the weights, expected first differing step)
    for (offset, step, name) in [(4usize, 0usize, "conv1"), (100, 2, "fc")] {
        let dir =
            std::env::temp_dir().join(format!("ingot-corrupt-{}-{offset}", std::process::id()));
        std::fs::create_dir_all(&dir).unwrap();
        std::fs::copy(&good.source, dir.join("standin.rs")).unwrap();
        let mut w = std::fs::read(fixture_dir().join("standin.weights.bin")).unwrap();
        w[offset] ^= 0x40;
        std::fs::write(dir.join("standin.weights.bin"), &w).unwrap();
        let bad = ModuleFiles::find(&dir, Some("standin")).unwrap();
        let out = runner::build(&bad, RunOn::Host, &c)
            .unwrap()
            .run(&inputs, il, Some(ol), &c)
            .unwrap();
        let diff =
            first_differing_step(&out.trace, &reference.trace).expect("corruption not detected");
        assert_eq!((diff.step, diff.name.as_str()), (step, name), "{diff:?}");
        assert!(diff.differing > 0);
        std::fs::remove_dir_all(&dir).unwrap();
    }
}

/// The whole check over plain arrays: the stand-in's own host outputs play
/// the integer simulator, a float reference that disagrees on some images
/// plays the float model, and `--max-drop 0` must fail naming the figure.
#[test]
fn check_with_max_drop_zero_fails_on_a_model_that_loses_accuracy() {
    let m = ModuleFiles::find(&fixture_dir(), Some("standin")).unwrap();
    let (il, ol) = lens(&m);
    let inputs = images(10, il, 99);
    let c = cfg(TraceMode::Maps);
    let good = runner::build(&m, RunOn::Host, &c)
        .unwrap()
        .run(&inputs, il, Some(ol), &c)
        .unwrap();
    let int8_pred: Vec<usize> = good
        .outputs
        .iter()
        .map(|o| ingot_compiler::check::compare::argmax_i8(o))
        .collect();
    // The float model is right on every image; int8 is wrong where the
    // label was moved to another class.
    let labels: Vec<usize> = int8_pred
        .iter()
        .enumerate()
        .map(|(i, &p)| if i % 4 == 0 { (p + 1) % 3 } else { p })
        .collect();
    let float: Vec<Vec<f32>> = labels
        .iter()
        .map(|&l| (0..3).map(|k| if k == l { 5.0 } else { -5.0 }).collect())
        .collect();
    let data = CheckData {
        model: "standin".into(),
        inputs,
        input_len: il,
        output_len: ol,
        output_scale: 0.125,
        output_zero_point: 0,
        sim_outputs: Some(good.outputs.clone()),
        sim_trace: Some(good.trace.clone()),
        float_outputs: Some(float),
        labels: Some(labels),
        class_names: vec!["left".into(), "middle".into(), "right".into()],
        steps: vec![
            StepInfo {
                name: "conv1".into(),
                kind: "conv2d".into(),
                macs: 2304,
            },
            StepInfo {
                name: "pool1".into(),
                kind: "max_pool".into(),
                macs: 0,
            },
            StepInfo {
                name: "fc".into(),
                kind: "linear".into(),
                macs: 192,
            },
        ],
        ..CheckData::default()
    };
    let on = if emulation_or_skip(RunOn::M4) {
        RunOn::M4
    } else {
        RunOn::Host
    };
    let plan = CheckPlan {
        on,
        build: c.clone(),
        budget: Budget {
            flash: Some(1 << 20),
            ram: Some(64 << 10),
        },
        thresholds: Thresholds {
            max_drop_pp: Some(0.0),
            min_agreement: None,
        },
    };
    let r = pipeline::run_check(&m, &data, &plan).unwrap();
    assert!(r.bit_exact.as_ref().unwrap().identical());
    assert_eq!(r.first_differing_layer, None);
    let acc = r.accuracy.as_ref().unwrap();
    assert_eq!(acc.float_accuracy, 1.0);
    assert!((acc.drop_pp - 30.0).abs() < 1e-9, "{acc:?}");
    assert_eq!(r.failures.len(), 1, "{:?}", r.failures);
    assert!(
        r.failures[0].starts_with("accuracy drop: 30.00 pp"),
        "{:?}",
        r.failures
    );
    if on == RunOn::M4 {
        let i = r.instructions.as_ref().unwrap();
        assert!(
            i.per_inference_mean > 2496 && i.per_mac.unwrap() > 1.0,
            "{i:?}"
        );
        assert_eq!(r.layers.len(), 3);
        assert!(
            r.layers
                .iter()
                .all(|l| l.instructions.is_some_and(|n| n > 0)),
            "{:?}",
            r.layers
        );
        let z = r.sizes.as_ref().unwrap();
        assert!(z.over_budget.is_empty() && z.stack_used.is_some(), "{z:?}");
        eprintln!("{}", ingot_compiler::check::report::markdown(&r));
    }

    let lenient = CheckPlan {
        thresholds: Thresholds {
            max_drop_pp: Some(30.0),
            min_agreement: Some(0.7),
        },
        on: RunOn::Host,
        ..plan
    };
    let r = pipeline::run_check(&m, &data, &lenient).unwrap();
    assert!(r.failures.is_empty(), "{:?}", r.failures);
}

/// The other cores: the same module gives the same outputs everywhere, and
/// each core's calibration matches its board clock (25 MHz MPS2, 20 MHz
/// AN505: 40 and 50 instructions per tick).
#[test]
fn standin_is_bit_identical_on_m0plus_m3_m7_and_m33() {
    let m = ModuleFiles::find(&fixture_dir(), Some("standin")).unwrap();
    let (il, ol) = lens(&m);
    let inputs = images(3, il, 5);
    let c = cfg(TraceMode::Off);
    let host = runner::build(&m, RunOn::Host, &c)
        .unwrap()
        .run(&inputs, il, Some(ol), &c)
        .unwrap();
    for on in [RunOn::M0plus, RunOn::M3, RunOn::M7, RunOn::M33] {
        if !emulation_or_skip(on) {
            continue;
        }
        let fw = runner::build(&m, on, &c).unwrap();
        let out = fw.run(&inputs, il, Some(ol), &c).unwrap();
        let exact = compare_outputs(&out.outputs, &host.outputs);
        assert!(exact.identical(), "{on}: {exact:?}");
        let cal = icount::calibrate(on, &c).unwrap();
        let want = 1e9 / on.board().unwrap().core_clock_hz as f64;
        assert!(
            (cal.instructions_per_tick - want).abs() < 0.05,
            "{on}: {cal:?}"
        );
        let counts = out.counts.unwrap();
        let s = size::elf_sizes(&fw.binary).unwrap();
        eprintln!(
            "standin {on}: {} instructions/inference, stack {:?} B, flash {} B, static RAM {} B",
            cal.instructions(counts.run_ticks[0]),
            counts.stack_bytes,
            s.flash(),
            s.static_ram()
        );
    }
}
