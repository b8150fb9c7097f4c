//! One `ingot check` run over a built module, with every comparison input
//! given as plain data, so the pieces from other passes (integer simulator,
//! float reference, QGraph) plug in as arrays.
//!
//! Order: the host runner always runs (with traced maps, to localise a
//! mismatch); an emulated core runs too when asked (outputs, per-inference
//! and per-step instruction counts, stack, ELF sizes). Module outputs are
//! compared with the simulator's (bit-exact) and with the emulated core's,
//! dequantized outputs with the float reference, predictions with labels.

use super::compare::{self, Accuracy, Thresholds};
use super::icount;
use super::io::TraceMap;
use super::panic_probe::{self, Handler};
use super::report::{self, CheckReport, InstructionFigures, LayerFigures};
use super::runner::{self, BuildConfig, TraceMode};
use super::size::{self, Budget};
use super::{CheckError, ModuleFiles, Result, RunOn};
use crate::lower::ir::{QGraph, QKernel};

/// Name, kind and MACs of one step, in the module's step order.
#[derive(Debug, Clone, Default, PartialEq, Eq)]
pub struct StepInfo {
    /// Step name.
    pub name: String,
    /// Kernel kind.
    pub kind: String,
    /// Multiply-accumulates.
    pub macs: u64,
}

/// Step information from a lowered graph: MACs are those of convolutions
/// (`H_out·W_out·C_out·kh·kw·C_in/groups`) and linear layers (`in·out`).
pub fn steps_of(q: &QGraph) -> Vec<StepInfo> {
    q.steps
        .iter()
        .map(|s| {
            let out = q.map(s.output).shape;
            let macs = match &s.kernel {
                QKernel::Conv2d(c) => {
                    (out.h
                        * out.w
                        * c.out_channels
                        * c.kernel[0]
                        * c.kernel[1]
                        * (c.in_channels / c.groups.max(1))) as u64
                }
                QKernel::Linear(l) => (l.in_features * l.out_features) as u64,
                _ => 0,
            };
            // Steps touching an int16 map are a kind of their own, so the
            // per-kind table shows what the int16 kernels cost.
            let kind = if q.step_is_wide(s) {
                format!("{} (int16)", s.kernel.kind())
            } else {
                s.kernel.kind().to_string()
            };
            StepInfo {
                name: s.name.clone(),
                kind,
                macs,
            }
        })
        .collect()
}

/// Everything a check compares against, as plain arrays.
#[derive(Debug, Clone, Default)]
pub struct CheckData {
    /// Network name for the report.
    pub model: String,
    /// The module's hash, if known.
    pub model_hash: Option<String>,
    /// The module's convolution weight form (`int8`, `pairs`), if known.
    pub weight_form: Option<String>,
    /// Quantized inputs, one per image (`INPUT_LEN` codes each).
    pub inputs: Vec<Vec<i8>>,
    /// Camera runs: the raw camera frame of each image (`frame_bytes`
    /// each). The runners then get these instead of `inputs`, call the
    /// module's `frame_to_input`, and the codes they make are compared with
    /// `inputs` (the host's `convert_frame`).
    pub frames: Option<Vec<Vec<u8>>>,
    /// Bytes of one camera frame (camera runs).
    pub frame_bytes: usize,
    /// Elements of one input.
    pub input_len: usize,
    /// Elements of one output.
    pub output_len: usize,
    /// Output quantization.
    pub output_scale: f32,
    /// Output zero point.
    pub output_zero_point: i32,
    /// Integer simulator outputs (must match bit for bit).
    pub sim_outputs: Option<Vec<Vec<i8>>>,
    /// Integer simulator per-step maps, in the module's trace numbering.
    pub sim_trace: Option<Vec<TraceMap>>,
    /// Float reference outputs (logits).
    pub float_outputs: Option<Vec<Vec<f32>>>,
    /// True class per image.
    pub labels: Option<Vec<usize>>,
    /// Class names.
    pub class_names: Vec<String>,
    /// Classes that mean "good part" (indices into `class_names`); empty:
    /// no escapes and overkill.
    pub good_classes: Vec<usize>,
    /// Image file names, in check order (for the changed-images list).
    pub image_names: Vec<String>,
    /// Steps (names, kinds, MACs).
    pub steps: Vec<StepInfo>,
    /// SQNR per step against the float reference, dB (computed by the
    /// caller from simulator and float maps, see [`sqnr_per_step`]).
    pub step_sqnr: Vec<Option<f64>>,
}

/// Aggregated SQNR per step over images: `float_map(image, step)` gives the
/// float map in the trace's element order (HWC), `qparams[step]` the step
/// output's `(scale, zero_point)`. Signal and noise are summed over all
/// images before taking the ratio.
pub fn sqnr_per_step(
    trace: &[TraceMap],
    steps: usize,
    qparams: &[(f32, i32)],
    mut float_map: impl FnMut(usize, usize) -> Option<Vec<f32>>,
) -> Vec<Option<f64>> {
    let mut acc = vec![(0f64, 0f64, false); steps];
    for m in trace {
        let (Some(&(scale, zp)), Some(slot)) = (qparams.get(m.step), acc.get_mut(m.step)) else {
            continue;
        };
        let Some(f) = float_map(m.image, m.step) else {
            continue;
        };
        for (&r, &q) in f.iter().zip(&m.data) {
            let d = scale as f64 * (q as i32 - zp) as f64;
            slot.0 += (r as f64).powi(2);
            slot.1 += (r as f64 - d).powi(2);
        }
        slot.2 = true;
    }
    acc.into_iter()
        .map(|(s, n, seen)| seen.then(|| crate::measure::sqnr_db(s, n).unwrap_or(f64::INFINITY)))
        .collect()
}

/// Where and how to check.
#[derive(Debug, Clone)]
pub struct CheckPlan {
    /// Emulated core to run on besides the host (`Host` = host only).
    pub on: RunOn,
    /// Build settings.
    pub build: BuildConfig,
    /// Flash/RAM budget of the target profile.
    pub budget: Budget,
    /// Pass/fail thresholds.
    pub thresholds: Thresholds,
}

/// Builds and runs `module` and compares it with `data`.
pub fn run_check(module: &ModuleFiles, data: &CheckData, plan: &CheckPlan) -> Result<CheckReport> {
    if data.inputs.is_empty() {
        return Err(CheckError::Module("no images to check".into()));
    }
    let frames = data.frames.is_some();
    // Camera runs hand the runner raw frames; without a camera, codes.
    let run = |r: &runner::Runner, cfg: &BuildConfig| match &data.frames {
        Some(f) => r.run_frames(
            f,
            data.frame_bytes,
            data.input_len,
            Some(data.output_len),
            cfg,
        ),
        None => r.run(&data.inputs, data.input_len, Some(data.output_len), cfg),
    };
    let mut frame_runs = Vec::new();
    let host_cfg = BuildConfig {
        trace: TraceMode::Maps,
        frames,
        ..plan.build.clone()
    };
    let host = run(&runner::build(module, RunOn::Host, &host_cfg)?, &host_cfg)?;
    if let Some(c) = &host.codes {
        frame_runs.push(("host".to_string(), c.clone()));
    }

    let mut report = CheckReport {
        model: data.model.clone(),
        model_hash: data.model_hash.clone(),
        weight_form: data.weight_form.clone(),
        run_on: plan.on.describe(),
        images: data.inputs.len(),
        labels: data.class_names.clone(),
        thresholds: plan.thresholds,
        ..CheckReport::default()
    };

    let mut emulated_outputs = None;
    if plan.on != RunOn::Host {
        // Two firmware builds: the plain one links only `run`, as an
        // application would, and gives the per-inference count, the sizes
        // and the stack; the traced one links `run_traced` too and gives
        // the per-step split. Their code differs (the compiler specialises
        // `run` differently when `run_traced` is also used), so the split is
        // reported with its own total.
        let plain_cfg = BuildConfig {
            trace: TraceMode::Off,
            frames,
            ..plan.build.clone()
        };
        let fw = runner::build(module, plan.on, &plain_cfg)?;
        let out = run(&fw, &plain_cfg)?;
        if let Some(c) = &out.codes {
            frame_runs.push((plan.on.to_string(), c.clone()));
        }
        let cal = icount::calibrate(plan.on, &plain_cfg)?;
        let counts = out.counts.clone().unwrap_or_default();
        let per: Vec<u64> = counts
            .run_ticks
            .iter()
            .map(|&t| cal.instructions(t))
            .collect();
        let mean = per.iter().sum::<u64>() / per.len().max(1) as u64;
        let macs: u64 = data.steps.iter().map(|s| s.macs).sum();
        let sections = size::elf_sizes(&fw.binary)?;
        let share = size::module_share(&fw.binary)?;
        report.sizes = Some(size::size_report(
            sections,
            share,
            counts.stack_bytes,
            plan.budget,
        ));
        // The inference path alone, linked as firmware links it: the
        // runner's own code (semihosting, formatting) is not counted.
        if let (Some(b), Some(z)) = (plan.on.board(), report.sizes.as_mut()) {
            let probe = panic_probe::build_probe(module, b.triple, Handler::Count, &plain_cfg)?;
            z.panic_sites = Some(panic_probe::panic_sites(&probe)?);
        }

        let traced_cfg = BuildConfig {
            trace: TraceMode::Counts,
            frames,
            ..plan.build.clone()
        };
        let tfw = runner::build(module, plan.on, &traced_cfg)?;
        let tout = run(&tfw, &traced_cfg)?;
        let tcounts = tout.counts.unwrap_or_default();
        let images = tcounts.step_ticks.len().max(1) as u64;
        let steps_n = tcounts.step_ticks.iter().map(Vec::len).max().unwrap_or(0);
        let step_instr: Vec<u64> = (0..steps_n)
            .map(|s| {
                let total: u64 = tcounts
                    .step_ticks
                    .iter()
                    .map(|v| v.get(s).copied().unwrap_or(0))
                    .sum();
                cal.instructions(total) / images
            })
            .collect();
        let traced_mean = cal.instructions(tcounts.traced_ticks.iter().sum::<u64>()) / images;
        report.instructions = Some(InstructionFigures {
            per_inference_mean: mean,
            per_inference_min: per.iter().copied().min().unwrap_or(0),
            per_inference_max: per.iter().copied().max().unwrap_or(0),
            macs,
            per_mac: (macs > 0).then(|| mean as f64 / macs as f64),
            traced_per_inference_mean: Some(traced_mean),
            frame_to_input_mean: (!counts.frame_ticks.is_empty()).then(|| {
                cal.instructions(counts.frame_ticks.iter().sum::<u64>())
                    / counts.frame_ticks.len() as u64
            }),
            calibration: cal.clone(),
            per_kind: Vec::new(),
        });
        report.layers = layer_rows(data, &step_instr);
        if let Some(i) = &mut report.instructions {
            i.per_kind = report::per_kind(&report.layers);
        }
        for (what, outputs) in [("", &out.outputs), (" (traced build)", &tout.outputs)] {
            let d = compare::compare_outputs(outputs, &host.outputs);
            if !d.identical() {
                report.failures.push(format!(
                    "host vs {}{what}: {} of {} images differ (same module, different machine: a bug)",
                    plan.on,
                    d.mismatched_images.len(),
                    d.images
                ));
            }
        }
        emulated_outputs = Some(out.outputs);
    } else {
        report.layers = layer_rows(data, &[]);
    }

    if frames {
        let step = super::camera::frame_step(&frame_runs, &data.inputs);
        report.failures.extend(step.failures());
        report.frame_step = Some(step);
    }

    if let Some(sim) = &data.sim_outputs {
        let module_out = emulated_outputs.as_ref().unwrap_or(&host.outputs);
        let exact = compare::compare_outputs(module_out, sim);
        if let Some(t) = &data.sim_trace {
            report.first_differing_layer = compare::first_differing_step(&host.trace, t);
        }
        report.bit_exact = Some(exact);
    }
    let module_out = emulated_outputs.as_ref().unwrap_or(&host.outputs);
    if let Some(f) = &data.float_outputs {
        report.float = Some(compare::compare_float(
            module_out,
            data.output_scale,
            data.output_zero_point,
            f,
        ));
    }
    if let (Some(labels), Some(f)) = (&data.labels, &data.float_outputs) {
        report.accuracy = Some(accuracy_of(
            module_out,
            f,
            labels,
            data.class_names.len().max(data.output_len),
        ));
    }
    super::accuracy::add_statistics(&mut report, data, module_out);
    let mut fails = compare::check_thresholds(
        report.bit_exact.as_ref(),
        report.float.as_ref(),
        report.accuracy.as_ref(),
        &plan.thresholds,
    );
    if let Some(z) = &report.sizes {
        fails.extend(z.over_budget.iter().cloned());
    }
    report.failures.extend(fails);
    Ok(report)
}

fn accuracy_of(int8: &[Vec<i8>], float: &[Vec<f32>], labels: &[usize], classes: usize) -> Accuracy {
    let ip: Vec<usize> = int8.iter().map(|v| compare::argmax_i8(v)).collect();
    let fp: Vec<usize> = float.iter().map(|v| compare::argmax_f32(v)).collect();
    compare::accuracy(&fp, &ip, labels, classes)
}

fn layer_rows(data: &CheckData, step_instr: &[u64]) -> Vec<LayerFigures> {
    let n = data.steps.len().max(step_instr.len());
    (0..n)
        .map(|i| {
            let s = data.steps.get(i).cloned().unwrap_or_default();
            LayerFigures {
                step: i,
                name: s.name,
                kind: s.kind,
                macs: s.macs,
                sqnr_db: data.step_sqnr.get(i).copied().flatten(),
                instructions: step_instr.get(i).copied(),
            }
        })
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn sqnr_is_aggregated_over_images_per_step() {
        let t = vec![
            TraceMap {
                image: 0,
                step: 0,
                name: "a".into(),
                data: vec![10, -10],
            },
            TraceMap {
                image: 1,
                step: 0,
                name: "a".into(),
                data: vec![11, -9],
            },
            TraceMap {
                image: 0,
                step: 1,
                name: "b".into(),
                data: vec![3],
            },
        ];
        let v = sqnr_per_step(
            &t,
            3,
            &[(0.1, 0), (1.0, 0), (1.0, 0)],
            |_, step| match step {
                0 => Some(vec![1.0, -1.0]),
                1 => Some(vec![3.0]),
                _ => None,
            },
        );
        // step 0: signal 4, noise 0.02 -> 23.01 dB
        assert!(
            (v[0].unwrap() - 10.0 * (4.0f64 / 0.02).log10()).abs() < 1e-3,
            "{v:?}"
        );
        assert_eq!(v[1], Some(f64::INFINITY));
        assert_eq!(v[2], None);
    }
}
