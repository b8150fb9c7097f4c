//! int16 (`--wide`) layers on the demo network, measured with the integer
//! simulator against the float reference on the demo's evaluation images
//! (the committed min/max ranges): top-1 accuracy against the labels, the
//! lowest per-layer SQNR, the logit SQNR and error, and the planned arena
//! for the Cortex-M4 target's weight form.
//!
//! `cargo run --release -p ingot-compiler --example wide_demo`

use ingot_compiler::agree::mixed::Mixed;
use ingot_compiler::agree::sensitivity::measure_inputs;
use ingot_compiler::calibrate::ImageSet;
use ingot_compiler::driver::{self, WideChoice};
use ingot_compiler::lower::{lower, LowerOptions, QMapId, SimInput, Simulator};
use ingot_compiler::ranges::Ranges;
use ingot_compiler::reference::Reference;
use std::path::PathBuf;

fn db(s: f64, e: f64) -> f64 {
    10.0 * (s / e).log10()
}

fn main() {
    let root = PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("../examples/demo");
    let g = ingot_compiler::load(&root.join("model/brackets.graph.json")).unwrap();
    let r = Ranges::load(&g, &root.join("model/brackets.ranges.json"), None).unwrap();
    let target = driver::load_target(&root.join("../../targets/stm32l4r9ai.toml")).unwrap();
    let form = driver::weight_form_for(None, Some(&target));
    let eval = ImageSet::open(&root.join("data/eval"), &g).unwrap();
    let calib = ImageSet::open(&root.join("data/calibration"), &g).unwrap();
    let q8 = lower(&g, &r, &LowerOptions::default()).unwrap();
    // `auto:N` ranks on the calibration images, as `calibrate --wide auto:N`.
    let inputs: Vec<Vec<f32>> = (0..calib.len())
        .map(|i| calib.load(i).unwrap().input)
        .collect();
    let ranking = measure_inputs(&Mixed::new(&g, &q8, &r), &inputs);
    let auto2 = driver::wide_layers(&WideChoice::Auto(2), Some(&ranking), &q8).unwrap();
    let reference = Reference::new(&g);
    println!(
        "| --wide | int16 maps | int8 accuracy | lowest per-layer SQNR | logit SQNR | logit error mean / max | arena |"
    );
    println!("|---|---|---|---|---|---|---|");
    for (label, layers) in [
        ("–".to_string(), vec![]),
        ("t1.conv".to_string(), vec!["t1.conv".to_string()]),
        ("b2.l0.conv".to_string(), vec!["b2.l0.conv".to_string()]),
        (format!("auto:2 ({})", auto2.join(", ")), auto2.clone()),
    ] {
        let opts = LowerOptions {
            wide: layers,
            ..LowerOptions::default()
        };
        let (q, p) = driver::lower_and_plan(&g, &r, &opts, form, true).unwrap();
        let mut sim = Simulator::new(&q);
        let mut sums = vec![(0f64, 0f64); q.maps.len()];
        let (mut logit, mut err_sum, mut err_max, mut hits, mut n, mut outs) =
            ((0f64, 0f64), 0f64, 0f32, 0usize, 0usize, 0usize);
        for i in 0..eval.len() {
            let s = eval.load(i).unwrap();
            let mut float = vec![Vec::new(); g.map_count()];
            let out = reference
                .run_with(&s.input, |m, v| float[m.index()] = v.to_vec())
                .unwrap();
            match &s.pixels {
                Some(px) => sim.run(SimInput::Pixels(px)).unwrap(),
                None => sim.run(SimInput::Chw(&s.input)).unwrap(),
            };
            for (k, m) in q.maps.iter().enumerate().skip(1) {
                let y = sim.map_chw_f32(QMapId(k as u32));
                for (a, b) in float[m.float_map.index()].iter().zip(&y) {
                    sums[k].0 += (*a as f64).powi(2);
                    sums[k].1 += (*a as f64 - *b as f64).powi(2);
                }
            }
            let y = sim.map_chw_f32(q.output);
            for (a, b) in out.iter().zip(&y) {
                logit.0 += (*a as f64).powi(2);
                logit.1 += (*a as f64 - *b as f64).powi(2);
                err_sum += (a - b).abs() as f64;
                err_max = err_max.max((a - b).abs());
                outs += 1;
            }
            hits += (s.label == Some(ingot_compiler::measure::argmax_f32(&y))) as usize;
            n += 1;
        }
        let (low, low_db) = q
            .maps
            .iter()
            .zip(&sums)
            .skip(1)
            .map(|(m, &(s, e))| (m.name.clone(), db(s, e)))
            .min_by(|a, b| a.1.total_cmp(&b.1))
            .unwrap();
        println!(
            "| {label} | {} | {:.2}% | {low_db:.1} dB ({low}) | {:.1} dB | {:.3} / {:.2} | {} B |",
            q.wide.len(),
            100.0 * hits as f64 / n as f64,
            db(logit.0, logit.1),
            err_sum / outs as f64,
            err_max,
            p.arena_bytes
        );
    }
    println!(
        "\n{} evaluation images; sensitivity ranking on {} calibration images, first rows: {}",
        eval.len(),
        calib.len(),
        ranking
            .rows
            .iter()
            .take(4)
            .map(|r| r.name.as_str())
            .collect::<Vec<_>>()
            .join(", ")
    );
}
