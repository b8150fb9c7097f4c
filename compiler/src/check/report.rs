//! The `ingot check` report: `report.md`, `report.json`, and SVG charts
//! (`sqnr.svg`: per-layer SQNR bars; `confusion_float.svg`,
//! `confusion_int8.svg`: confusion matrices as heatmaps), written into a
//! staging directory that is renamed into place, so a report directory is
//! never half-written.

use super::compare::{Accuracy, BitExact, FloatAgreement, LayerDiff, Thresholds};
use super::icount::Calibration;
use super::runner::unique_suffix;
use super::size::SizeReport;
use super::{CheckError, Result};
use crate::measure::format_db as db;
use crate::util::{group_digits as thousands, MISSING};
use serde::Serialize;
use std::fmt::Write as _;
use std::path::Path;

mod charts;

pub use charts::{confusion_svg, sqnr_svg};

/// Figures of one step.
#[derive(Debug, Clone, Default, PartialEq, Serialize)]
pub struct LayerFigures {
    /// Step index.
    pub step: usize,
    /// Step name.
    pub name: String,
    /// Kernel kind (`conv2d`, `linear`, ...), if known.
    pub kind: String,
    /// Multiply-accumulates of the step (0 for steps without any).
    pub macs: u64,
    /// SQNR of the step's output against the float reference, dB.
    pub sqnr_db: Option<f64>,
    /// Mean executed instructions of the step on the emulated core.
    pub instructions: Option<u64>,
}

/// Instruction counts of the emulated runs.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct InstructionFigures {
    /// Mean instructions per inference (`run`).
    pub per_inference_mean: u64,
    /// Smallest over the images.
    pub per_inference_min: u64,
    /// Largest over the images.
    pub per_inference_max: u64,
    /// Total MACs of the network.
    pub macs: u64,
    /// `per_inference_mean / macs`.
    pub per_mac: Option<f64>,
    /// Mean instructions of `run_traced` (hook time excluded) in the
    /// traced build the per-layer figures come from.
    pub traced_per_inference_mean: Option<u64>,
    /// Camera runs: mean instructions of the module's `frame_to_input`
    /// (camera frame to input codes), on top of `run`.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub frame_to_input_mean: Option<u64>,
    /// The calibration used.
    pub calibration: Calibration,
    /// Per-layer figures summed by kernel kind (from the traced build).
    pub per_kind: Vec<KindFigures>,
}

/// Instructions of the steps of one kernel kind, summed.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct KindFigures {
    /// Kernel kind (`conv2d`, `linear`, ...).
    pub kind: String,
    /// Steps of this kind.
    pub steps: usize,
    /// Their MACs.
    pub macs: u64,
    /// Their mean instructions per inference.
    pub instructions: u64,
    /// `instructions / macs`, for kinds with MACs.
    pub per_mac: Option<f64>,
    /// Share of all traced instructions.
    pub share: f64,
}

/// Sums per-layer instruction counts by kernel kind, in order of first
/// appearance; layers without a count are left out.
pub fn per_kind(layers: &[LayerFigures]) -> Vec<KindFigures> {
    let total: u64 = layers.iter().filter_map(|l| l.instructions).sum();
    let mut out: Vec<KindFigures> = Vec::new();
    for l in layers {
        let Some(i) = l.instructions else { continue };
        let k = match out.iter_mut().position(|k| k.kind == l.kind) {
            Some(p) => &mut out[p],
            None => {
                out.push(KindFigures {
                    kind: l.kind.clone(),
                    steps: 0,
                    macs: 0,
                    instructions: 0,
                    per_mac: None,
                    share: 0.0,
                });
                out.last_mut().expect("just pushed")
            }
        };
        k.steps += 1;
        k.macs += l.macs;
        k.instructions += i;
    }
    for k in &mut out {
        k.per_mac = (k.macs > 0).then(|| k.instructions as f64 / k.macs as f64);
        k.share = if total > 0 {
            k.instructions as f64 / total as f64
        } else {
            0.0
        };
    }
    out
}

/// Everything `ingot check` found.
#[derive(Debug, Clone, Default, PartialEq, Serialize)]
pub struct CheckReport {
    /// Network name.
    pub model: String,
    /// The module's `MODEL_HASH`, if known.
    pub model_hash: Option<String>,
    /// The module's convolution weight form (`int8`, `pairs`), if known.
    pub weight_form: Option<String>,
    /// What ran where (board and stand-ins spelled out).
    pub run_on: String,
    /// Images checked.
    pub images: usize,
    /// Module vs integer simulator.
    pub bit_exact: Option<BitExact>,
    /// First step whose map differs from the simulator's.
    pub first_differing_layer: Option<LayerDiff>,
    /// Dequantized output vs float reference.
    pub float: Option<FloatAgreement>,
    /// With labels: accuracies and confusion matrices.
    pub accuracy: Option<Accuracy>,
    /// Class names.
    pub labels: Vec<String>,
    /// Per step.
    pub layers: Vec<LayerFigures>,
    /// Emulated runs only.
    pub instructions: Option<InstructionFigures>,
    /// Emulated runs only.
    pub sizes: Option<SizeReport>,
    /// With labels: float against int8 on the same images (discordant
    /// pairs, McNemar, intervals, images needed).
    pub paired: Option<crate::stats::PairedAccuracy>,
    /// With labels and good classes: escapes and overkill.
    pub escapes: Option<crate::stats::Escapes>,
    /// Images float and int8 classify differently.
    pub changed: Vec<super::accuracy::ChangedImage>,
    /// Thresholds checked.
    pub thresholds: Thresholds,
    /// Gates on the statistics (interval, escapes).
    pub gates: crate::stats::Gates,
    /// Threshold and bit-exactness failures (empty = pass).
    pub failures: Vec<String>,
    /// With a camera: the device path against host-resized pictures.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub camera: Option<super::camera::CameraFigures>,
    /// Camera runs: the input codes each runner's `frame_to_input` made
    /// against the host's `convert_frame`.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub frame_step: Option<super::camera::FrameStep>,
    /// With `--sensitivity`: per layer, the output figures with only that
    /// layer in int8 and with all but that layer in int8, on the checked
    /// images.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub sensitivity: Option<crate::agree::sensitivity::Sensitivity>,
    /// With `--wide`: the int16 maps and the arena with and without them.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub wide: Option<WideArena>,
}

/// The int16 maps of a `--wide` check and what they cost in RAM.
#[derive(Debug, Clone, PartialEq, Eq, Serialize)]
pub struct WideArena {
    /// `(map, the --wide layer that made it wide)`, in map order.
    pub maps: Vec<(String, String)>,
    /// Arena of the checked module, bytes.
    pub arena_bytes: usize,
    /// Arena of the same network all int8, bytes.
    pub arena_bytes_int8: usize,
}

/// The int16 section of the markdown report.
fn wide_markdown(w: &WideArena) -> String {
    let mut s = String::new();
    let _ = writeln!(s, "## int16 maps (--wide)\n");
    for (m, because) in &w.maps {
        if m == because {
            let _ = writeln!(s, "- `{m}`");
        } else {
            let _ = writeln!(s, "- `{m}` (region of `{because}`)");
        }
    }
    let _ = writeln!(
        s,
        "\nArena {} B with the int16 maps, {} B all int8 ({}{} B). Steps that read or write one are marked `(int16)` in the layer table.\n",
        thousands(w.arena_bytes as u64),
        thousands(w.arena_bytes_int8 as u64),
        if w.arena_bytes >= w.arena_bytes_int8 { "+" } else { "−" },
        thousands(w.arena_bytes.abs_diff(w.arena_bytes_int8) as u64),
    );
    s
}

fn pct(x: f64) -> String {
    format!("{:.2}%", x * 100.0)
}

/// The sensitivity section of the markdown report.
fn sensitivity_markdown(x: &crate::agree::sensitivity::Sensitivity) -> String {
    let db = |v: Option<f64>| crate::measure::format_db(v);
    let mut s = String::new();
    let _ = writeln!(s, "## Sensitivity\n");
    let _ = writeln!(
        s,
        "On the {} {} images, logits against the float model (the fake-quantized network; every layer in int8: agreement {}, SQNR {} dB). Most sensitive first.\n",
        x.images,
        x.on,
        pct(x.all.agreement),
        db(x.all.sqnr_db)
    );
    let _ = writeln!(
        s,
        "| rank | layer | kind | only this in int8: agreement | only: SQNR (dB) | all but this: agreement | all but: SQNR (dB) |\n|---|---|---|---|---|---|---|"
    );
    for r in &x.rows {
        let _ = writeln!(
            s,
            "| {} | {} | {} | {} | {} | {} | {} |",
            r.rank,
            r.name,
            r.kind,
            pct(r.only.agreement),
            db(r.only.sqnr_db),
            pct(r.all_but.agreement),
            db(r.all_but.sqnr_db)
        );
    }
    s.push('\n');
    s
}

/// Renders the markdown report.
pub fn markdown(r: &CheckReport) -> String {
    let mut s = String::new();
    let _ = writeln!(s, "# ingot check: {}\n", r.model);
    if let Some(h) = &r.model_hash {
        let _ = writeln!(s, "Module hash `{h}`. ");
    }
    match r.weight_form.as_deref() {
        Some("pairs") => {
            let _ = writeln!(
                s,
                "Convolution weights in 16-bit pairs (`ingot_rt::conv2d_paired`). "
            );
        }
        Some("words") => {
            let _ = writeln!(
                s,
                "One-group convolution weights as int8 words, widened in registers \
                 (`ingot_rt::conv2d_words`); depthwise and grouped convolutions and \
                 linear layers int8. "
            );
        }
        Some(f) => {
            let _ = writeln!(s, "Convolution weights in {f}. ");
        }
        None => {}
    }
    let _ = writeln!(s, "Ran on {}; {} images.\n", r.run_on, r.images);
    if r.failures.is_empty() {
        let _ = writeln!(s, "**Result: pass.**\n");
    } else {
        let _ = writeln!(s, "**Result: FAIL.**\n");
        for f in &r.failures {
            let _ = writeln!(s, "- {f}");
        }
        s.push('\n');
    }

    let _ = writeln!(s, "## Module vs integer simulator\n");
    match &r.bit_exact {
        Some(b) if b.identical() => {
            let _ = writeln!(s, "Bit-identical on all {} images.\n", b.images);
        }
        Some(b) => {
            let _ = writeln!(
                s,
                "**Differs on {} of {} images: this is a bug.**",
                b.mismatched_images.len(),
                b.images
            );
            if let Some(m) = &b.first {
                let _ = writeln!(
                    s,
                    "First difference: image {}, output {}: module {} vs simulator {}.",
                    m.image, m.index, m.module, m.reference
                );
            }
            s.push('\n');
        }
        None => {
            let _ = writeln!(s, "Not compared.\n");
        }
    }
    if let Some(d) = &r.first_differing_layer {
        let _ = writeln!(
            s,
            "First differing layer: step {} `{}` (image {}, {} of {} values differ, first at {}, largest difference {}{}).\n",
            d.step,
            d.name,
            d.image,
            d.differing,
            d.len,
            d.first_index,
            d.max_abs_diff,
            if d.shape_mismatch { ", map missing or of another length" } else { "" }
        );
    }

    if let Some(f) = &r.float {
        let _ = writeln!(s, "## Against the float reference\n");
        let _ = writeln!(s, "| figure | value |\n|---|---|");
        let _ = writeln!(s, "| top-1 agreement | {} |", pct(f.top1_agreement));
        let _ = writeln!(s, "| mean abs. logit error | {:.4} |", f.mean_abs_error);
        let _ = writeln!(s, "| max abs. logit error | {:.4} |\n", f.max_abs_error);
    }
    if let Some(a) = &r.accuracy {
        let _ = writeln!(s, "## Accuracy ({} labelled images)\n", a.images);
        let _ = writeln!(s, "| float | int8 | drop |\n|---|---|---|");
        let _ = writeln!(
            s,
            "| {} | {} | {:.2} pp |\n",
            pct(a.float_accuracy),
            pct(a.int8_accuracy),
            a.drop_pp
        );
        let _ = writeln!(
            s,
            "Confusion matrices: `confusion_float.svg`, `confusion_int8.svg` (rows: true class, columns: predicted).\n"
        );
    }
    s.push_str(&super::accuracy::markdown(r));
    s.push_str(&super::camera::markdown(r.camera.as_ref()));
    s.push_str(&super::camera::frame_step_markdown(r.frame_step.as_ref()));
    if let Some(sens) = &r.sensitivity {
        s.push_str(&sensitivity_markdown(sens));
    }
    if let Some(w) = &r.wide {
        s.push_str(&wide_markdown(w));
    }

    if !r.layers.is_empty() {
        let _ = writeln!(s, "## Layers\n");
        let _ = writeln!(s, "| step | name | kind | MACs | SQNR (dB) | instructions | instr./MAC |\n|---|---|---|---|---|---|---|");
        for l in &r.layers {
            let per_mac = match (l.instructions, l.macs) {
                (Some(i), m) if m > 0 => format!("{:.2}", i as f64 / m as f64),
                _ => MISSING.into(),
            };
            let _ = writeln!(
                s,
                "| {} | {} | {} | {} | {} | {} | {} |",
                l.step,
                l.name,
                l.kind,
                thousands(l.macs),
                db(l.sqnr_db),
                l.instructions
                    .map(thousands)
                    .unwrap_or_else(|| MISSING.into()),
                per_mac
            );
        }
        if r.layers.iter().any(|l| l.sqnr_db.is_some()) {
            s.push_str("\nPer-layer SQNR chart: `sqnr.svg`.\n");
        }
        s.push('\n');
    }

    if let Some(i) = &r.instructions {
        let _ = writeln!(s, "## Instruction counts\n");
        let _ = writeln!(
            s,
            "Executed instructions per inference: mean {}, min {}, max {}; {} MACs{}.\n",
            thousands(i.per_inference_mean),
            thousands(i.per_inference_min),
            thousands(i.per_inference_max),
            thousands(i.macs),
            i.per_mac
                .map(|p| format!(", {p:.2} instructions per MAC"))
                .unwrap_or_default()
        );
        if let Some(f) = i.frame_to_input_mean {
            let _ = writeln!(
                s,
                "Camera frame to input codes (`frame_to_input`, before each inference): mean {} instructions; with the inference, {} per frame.\n",
                thousands(f),
                thousands(f + i.per_inference_mean)
            );
        }
        let _ = writeln!(
            s,
            "These are instructions executed by the emulated core (QEMU {}, `-icount shift=0`), not cycles: QEMU does not model pipelines, caches or wait states. SysTick ticks are converted with a measured {:.3} instructions per tick (resolution ±1 tick per measurement).\n",
            i.calibration.machine, i.calibration.instructions_per_tick
        );
        if !i.per_kind.is_empty() {
            let _ = writeln!(
                s,
                "| kind | steps | MACs | instructions | instr./MAC | share |\n|---|---|---|---|---|---|"
            );
            for k in &i.per_kind {
                let _ = writeln!(
                    s,
                    "| {} | {} | {} | {} | {} | {:.1}% |",
                    k.kind,
                    k.steps,
                    thousands(k.macs),
                    thousands(k.instructions),
                    k.per_mac.map_or(MISSING.into(), |p| format!("{p:.2}")),
                    100.0 * k.share
                );
            }
            s.push('\n');
        }
        if let Some(t) = i.traced_per_inference_mean {
            let _ = writeln!(
                s,
                "The per-layer column comes from a second build that also links `run_traced` (the hook's own time excluded); its code is specialised differently, so the layers add up to its total of {} instructions per inference rather than to the figure above.\n",
                thousands(t)
            );
        }
    }
    if let Some(z) = &r.sizes {
        let _ = writeln!(s, "## Sizes (firmware ELF)\n");
        let _ = writeln!(s, "| figure | bytes | budget |\n|---|---|---|");
        let b = |v: Option<u64>| v.map(thousands).unwrap_or_else(|| MISSING.into());
        let _ = writeln!(
            s,
            "| flash (vectors + .text + .rodata + .data image) | {} | {} |",
            thousands(z.flash),
            b(z.budget.flash)
        );
        let _ = writeln!(
            s,
            "| RAM (.data + .bss + measured stack) | {} | {} |",
            thousands(z.ram),
            b(z.budget.ram)
        );
        let _ = writeln!(
            s,
            "| measured stack high-water mark | {} | |",
            b(z.stack_used)
        );
        let _ = writeln!(
            s,
            "| module code + constants (by symbol) | {} | |",
            thousands(z.module.flash)
        );
        if let Some(p) = &z.panic_sites {
            let _ = writeln!(
                s,
                "| panic call sites: {} (inference path linked alone, release) | | |",
                p.total
            );
        }
        let _ = writeln!(
            s,
            "| module scratch + input + output | {} | |\n",
            thousands(z.module.ram)
        );
        let _ = writeln!(
            s,
            "The ELF is the whole check runner (startup code, semihosting I/O and timing included), so it is an upper bound for the module in an application.\n"
        );
        for o in &z.over_budget {
            let _ = writeln!(s, "- **{o}**");
        }
    }
    s
}
/// File ingot writes into every report folder; only a folder holding it
/// (or an empty one) is ever replaced.
pub const REPORT_MARKER: &str = ".ingot-report";
const REPORT_MARKER_TEXT: &str =
    "This folder was written by `ingot check --report`; the next run with the same --report replaces it as a whole.\n";

/// Whether `dir` may be replaced as a whole: it does not exist, is an empty
/// folder, or holds the [`REPORT_MARKER`] of an earlier report.
pub fn replaceable(dir: &Path) -> bool {
    match std::fs::symlink_metadata(dir) {
        Err(_) => true,
        Ok(m) if m.is_dir() => {
            dir.join(REPORT_MARKER).is_file()
                || std::fs::read_dir(dir).is_ok_and(|mut d| d.next().is_none())
        }
        Ok(_) => false,
    }
}

/// Writes `report.md`, `report.json` and the charts into `dir`, replacing
/// a previous report there as a whole. A folder ingot did not write (no
/// [`REPORT_MARKER`], not empty) is refused and left untouched.
pub fn write_report(dir: &Path, r: &CheckReport) -> Result<()> {
    if !replaceable(dir) {
        return Err(CheckError::ForeignReport(dir.to_path_buf()));
    }
    let parent = dir
        .parent()
        .filter(|p| !p.as_os_str().is_empty())
        .unwrap_or(Path::new("."));
    std::fs::create_dir_all(parent)
        .map_err(|e| CheckError::io(format!("creating {}", parent.display()), e))?;
    let base = dir
        .file_name()
        .map(|n| n.to_string_lossy().into_owned())
        .unwrap_or_else(|| "report".into());
    let stage = parent.join(format!(".{base}.staging-{}", unique_suffix()));
    let result = (|| -> Result<()> {
        std::fs::create_dir_all(&stage)
            .map_err(|e| CheckError::io(format!("creating {}", stage.display()), e))?;
        let put = |name: &str, bytes: &[u8]| {
            std::fs::write(stage.join(name), bytes)
                .map_err(|e| CheckError::io(format!("writing {name}"), e))
        };
        put(REPORT_MARKER, REPORT_MARKER_TEXT.as_bytes())?;
        put("report.md", markdown(r).as_bytes())?;
        let json = serde_json::to_string_pretty(r).map_err(|e| CheckError::Format {
            file: "report.json".into(),
            detail: e.to_string(),
        })?;
        put("report.json", json.as_bytes())?;
        if r.layers.iter().any(|l| l.sqnr_db.is_some()) {
            put("sqnr.svg", sqnr_svg(&r.layers)?.as_bytes())?;
        }
        if !r.changed.is_empty() {
            let csv = super::accuracy::changed_csv(&r.changed, &r.labels);
            put("changed_images.csv", csv.as_bytes())?;
        }
        if let Some(a) = &r.accuracy {
            put(
                "confusion_float.svg",
                confusion_svg(
                    "Float reference: true vs predicted",
                    &a.confusion_float,
                    &r.labels,
                )?
                .as_bytes(),
            )?;
            put(
                "confusion_int8.svg",
                confusion_svg(
                    "int8 module: true vs predicted",
                    &a.confusion_int8,
                    &r.labels,
                )?
                .as_bytes(),
            )?;
        }
        let old = parent.join(format!(".{base}.old-{}", unique_suffix()));
        let had_old = dir.exists();
        if had_old {
            std::fs::rename(dir, &old)
                .map_err(|e| CheckError::io(format!("moving aside {}", dir.display()), e))?;
        }
        if let Err(e) = std::fs::rename(&stage, dir) {
            if had_old {
                let _ = std::fs::rename(&old, dir);
            }
            return Err(CheckError::io(
                format!("renaming the report into {}", dir.display()),
                e,
            ));
        }
        if had_old {
            let _ = std::fs::remove_dir_all(&old);
        }
        Ok(())
    })();
    if result.is_err() {
        let _ = std::fs::remove_dir_all(&stage);
    }
    result
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::check::compare;

    #[test]
    fn per_kind_sums_counted_layers_in_order_of_appearance() {
        let l = |kind: &str, macs, instructions| LayerFigures {
            kind: kind.into(),
            macs,
            instructions,
            ..LayerFigures::default()
        };
        let k = per_kind(&[
            l("conv2d", 1000, Some(2000)),
            l("max_pool", 0, Some(500)),
            l("conv2d", 3000, Some(2500)),
            l("linear", 10, None),
        ]);
        assert_eq!(k.len(), 2);
        assert_eq!((k[0].kind.as_str(), k[0].steps), ("conv2d", 2));
        assert_eq!((k[0].macs, k[0].instructions), (4000, 4500));
        assert_eq!(k[0].per_mac, Some(1.125));
        assert!((k[0].share - 0.9).abs() < 1e-12);
        assert_eq!((k[1].kind.as_str(), k[1].per_mac), ("max_pool", None));
    }

    fn sample() -> CheckReport {
        let acc = compare::accuracy(&[0, 1, 2, 1], &[0, 1, 1, 1], &[0, 1, 2, 1], 3);
        CheckReport {
            model: "tiny".into(),
            run_on: "host".into(),
            images: 4,
            bit_exact: Some(compare::compare_outputs(&[vec![1]], &[vec![1]])),
            labels: vec!["cat".into(), "dog".into(), "owl".into()],
            accuracy: Some(acc),
            layers: vec![
                LayerFigures {
                    step: 0,
                    name: "conv1".into(),
                    kind: "conv2d".into(),
                    macs: 2304,
                    sqnr_db: Some(31.5),
                    instructions: Some(118_720),
                },
                LayerFigures {
                    step: 1,
                    name: "pool1".into(),
                    kind: "max_pool".into(),
                    macs: 0,
                    sqnr_db: Some(f64::INFINITY),
                    instructions: None,
                },
            ],
            failures: vec![
                "accuracy drop: 25.00 pp (float 100.00% → int8 75.00%) exceeds --max-drop 0".into(),
            ],
            ..CheckReport::default()
        }
    }

    #[test]
    fn markdown_states_result_figures_and_layers() {
        let md = markdown(&sample());
        assert!(md.contains("**Result: FAIL.**"), "{md}");
        assert!(md.contains("accuracy drop: 25.00 pp"));
        assert!(md.contains("| 100.00% | 75.00% | 25.00 pp |"), "{md}");
        assert!(
            md.contains("| 0 | conv1 | conv2d | 2,304 | 31.5 | 118,720 | 51.53 |"),
            "{md}"
        );
        assert!(
            md.contains("| 1 | pool1 | max_pool | 0 | exact | – | – |"),
            "{md}"
        );
        assert!(md.contains("Bit-identical on all 1 images."));
    }

    #[test]
    fn report_dir_is_replaced_whole_with_charts() {
        let root = std::env::temp_dir().join(format!("ingot-report-{}", unique_suffix()));
        let dir = root.join("rep");
        std::fs::create_dir_all(&dir).unwrap();
        write_report(&dir, &sample()).unwrap();
        std::fs::write(dir.join("stale.txt"), "old").unwrap();
        write_report(&dir, &sample()).unwrap();
        assert!(dir.join(REPORT_MARKER).is_file());
        assert!(
            !dir.join("stale.txt").exists(),
            "old report replaced as a whole"
        );
        let json: serde_json::Value =
            serde_json::from_str(&std::fs::read_to_string(dir.join("report.json")).unwrap())
                .unwrap();
        assert_eq!(json["accuracy"]["confusion_int8"][2][1], 1);
        let sqnr = std::fs::read_to_string(dir.join("sqnr.svg")).unwrap();
        assert!(
            sqnr.starts_with("<svg") && sqnr.contains("0 conv1"),
            "{}",
            &sqnr[..200.min(sqnr.len())]
        );
        let conf = std::fs::read_to_string(dir.join("confusion_int8.svg")).unwrap();
        assert!(conf.contains("owl") && conf.contains("<rect"));
        let leftovers: Vec<_> = std::fs::read_dir(&root)
            .unwrap()
            .map(|e| e.unwrap().file_name())
            .collect();
        assert_eq!(leftovers.len(), 1, "{leftovers:?}");
        std::fs::remove_dir_all(&root).unwrap();
    }

    /// Issue 14, defect 1: a folder ingot did not write is never replaced.
    #[test]
    fn a_folder_without_the_marker_is_refused_and_kept() {
        let root = tempfile::tempdir().unwrap();
        let dir = root.path().join("work");
        std::fs::create_dir_all(dir.join("src")).unwrap();
        std::fs::write(dir.join("paper.tex"), "mine").unwrap();
        std::fs::write(dir.join("src/main.rs"), "fn main() {}").unwrap();
        let e = write_report(&dir, &sample()).unwrap_err();
        assert!(matches!(e, CheckError::ForeignReport(_)), "{e}");
        assert!(e.to_string().contains(REPORT_MARKER), "{e}");
        assert_eq!(
            std::fs::read_to_string(dir.join("paper.tex")).unwrap(),
            "mine"
        );
        assert!(dir.join("src/main.rs").is_file());
        assert!(!dir.join("report.md").exists());
        // A plain file in the report's place is not replaced either.
        let f = root.path().join("file");
        std::fs::write(&f, "x").unwrap();
        assert!(write_report(&f, &sample()).is_err());
        assert_eq!(std::fs::read_to_string(&f).unwrap(), "x");
    }
}
