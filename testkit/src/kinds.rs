//! Instructions per MAC by layer kind: one `ingot check` run of a network
//! on one core, condensed into a row of the per-kind table the bench
//! `bench_kinds` prints.
//!
//! The figures are the check report's own (`InstructionFigures`, the
//! per-step counts of the traced build, and `check::report::per_kind`);
//! this module only names the kinds more finely than the report does —
//! the convolution that reads the network input is the `stem`, other
//! non-depthwise k×k convolutions are `conv KxK` — and lays the rows out.

use ingot_compiler::calibrate::Method;
use ingot_compiler::check::compare::Thresholds;
use ingot_compiler::check::pipeline::{self, CheckPlan};
use ingot_compiler::check::prepare::{self, PrepareOptions};
use ingot_compiler::check::report::{self, KindFigures, LayerFigures};
use ingot_compiler::check::runner::BuildConfig;
use ingot_compiler::check::size::Budget;
use ingot_compiler::check::RunOn;
use ingot_compiler::codegen::WeightForm;
use ingot_compiler::driver::{self, RangesSource};
use ingot_compiler::lower::ir::{QGraph, QKernel};
use std::fmt::Write as _;
use std::path::Path;
use std::time::Duration;

/// The columns of the table, in order: kinds with MACs first (shown as
/// instructions per MAC), then kinds without (shown as their share of the
/// traced instructions).
pub const COLUMNS: [&str; 8] = [
    "stem",
    "depthwise",
    "pointwise",
    "conv 3x3",
    "linear",
    "add",
    "pool",
    "other",
];

/// One network on one core.
#[derive(Debug, Clone, PartialEq)]
pub struct KindRow {
    /// Core (`m4`, `m33+dsp`, `host`, ...).
    pub core: String,
    /// Convolution weight form of the module (`int8`, `pairs`).
    pub weight_form: String,
    /// MACs of one inference.
    pub macs: u64,
    /// Mean instructions per inference (emulated cores only).
    pub instructions: Option<u64>,
    /// `instructions / macs`.
    pub per_mac: Option<f64>,
    /// Figures per kind, named as in [`COLUMNS`] (empty on the host).
    pub kinds: Vec<KindFigures>,
    /// Firmware flash, bytes (emulated cores only).
    pub flash: Option<u64>,
    /// Firmware RAM (static + measured stack), bytes.
    pub ram: Option<u64>,
    /// Module output identical to the integer simulator's on every image.
    pub bit_identical: Option<bool>,
}

/// The column a step's figures go to: the report's kind, with the
/// convolution that reads the network input called `stem`, other k×k
/// convolutions `conv KxK`, and every pooling `pool`.
pub fn column_of(q: &QGraph, step: usize, kind: &str) -> String {
    let Some(s) = q.steps.get(step) else {
        return kind.to_string();
    };
    match &s.kernel {
        QKernel::Conv2d(_) if s.inputs.first() == Some(&q.input) => "stem".into(),
        QKernel::Conv2d(c) if kind == "conv2d" => format!("conv {}x{}", c.kernel[0], c.kernel[1]),
        QKernel::MaxPool(_) | QKernel::AvgPool(_) | QKernel::GlobalAvgPool(_) => "pool".into(),
        _ => kind.to_string(),
    }
}

/// The report's per-step figures summed by [`column_of`], through the
/// report's own [`report::per_kind`].
pub fn kinds_of(q: &QGraph, layers: &[LayerFigures]) -> Vec<KindFigures> {
    let named: Vec<LayerFigures> = layers
        .iter()
        .map(|l| LayerFigures {
            kind: column_of(q, l.step, &l.kind),
            ..l.clone()
        })
        .collect();
    report::per_kind(&named)
}

/// Why a measurement failed, in words (the stage first).
#[derive(Debug)]
pub struct BenchError(pub String);

impl std::fmt::Display for BenchError {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(&self.0)
    }
}

impl std::error::Error for BenchError {}

/// What a measurement may change from `ingot check`'s defaults.
#[derive(Clone, Copy, Debug)]
pub struct Setup {
    /// One convolution weight form for every layer (default: the core's).
    pub weight_form: Option<WeightForm>,
    /// Row streaming (default on, as `check`; off is `check --no-stream`).
    /// A row pipeline's instructions are counted against its first step,
    /// so per-kind figures are only per kind with streaming off.
    pub stream: bool,
}

impl Default for Setup {
    fn default() -> Self {
        Setup {
            weight_form: None,
            stream: true,
        }
    }
}

/// Runs `ingot check` on `on` the way the command line does (ranges by
/// min/max calibration on `images`, the weight form `setup.weight_form`
/// or else the core's, no target profile, no accuracy gates), writing the
/// module under `work`, and condenses the report. `core` names the row.
pub fn measure(
    graph: &Path,
    images: &Path,
    on: RunOn,
    core: &str,
    setup: Setup,
    build: BuildConfig,
    work: &Path,
) -> Result<KindRow, BenchError> {
    let run_core = (on != RunOn::Host).then(|| on.name());
    let mut opts = PrepareOptions::default();
    opts.ranges = RangesSource::Images(images.to_path_buf(), Method::MinMax);
    opts.weight_form = driver::weight_form_for_run(setup.weight_form, false, run_core);
    opts.stream = setup.stream;
    let p = prepare::prepare(graph, images, &opts)
        .map_err(|e| BenchError(format!("prepare {}: {e}", graph.display())))?;
    let module_name = p.generated.report.module.clone();
    let dir = work.join(format!("module-{core}"));
    let module = prepare::write_module(&dir, &module_name, &p.generated)
        .map_err(|e| BenchError(format!("write module: {e}")))?;
    let macs: u64 = p.data.steps.iter().map(|s| s.macs).sum();
    // As `ingot check`'s default: 120 s plus 1 s per 2 million MACs of work.
    let secs = 120 + macs.saturating_mul(p.data.inputs.len() as u64) / 2_000_000;
    let plan = CheckPlan {
        on,
        build: BuildConfig {
            timeout: Duration::from_secs(secs),
            ..build
        },
        budget: Budget::default(),
        thresholds: Thresholds::default(),
    };
    let r = pipeline::run_check(&module, &p.data, &plan)
        .map_err(|e| BenchError(format!("check on {core}: {e}")))?;
    let kinds = match &r.instructions {
        Some(_) => kinds_of(&p.q, &r.layers),
        None => Vec::new(),
    };
    Ok(KindRow {
        core: core.to_string(),
        weight_form: r.weight_form.clone().unwrap_or_else(|| "?".into()),
        macs,
        instructions: r.instructions.as_ref().map(|i| i.per_inference_mean),
        per_mac: r.instructions.as_ref().and_then(|i| i.per_mac),
        kinds,
        flash: r.sizes.as_ref().map(|z| z.flash),
        ram: r.sizes.as_ref().map(|z| z.ram),
        bit_identical: r.bit_exact.as_ref().map(|b| b.identical()),
    })
}

const MISSING: &str = "–";

fn thousands(v: u64) -> String {
    ingot_compiler::inspect::group_digits(v)
}

/// The cell of one kind: instructions per MAC for kinds with MACs, the
/// share of the traced instructions (in %) for the others, `–` when the
/// network has no step of that kind.
fn cell(row: &KindRow, column: &str) -> String {
    let pick: Vec<&KindFigures> = if column == "other" {
        row.kinds
            .iter()
            .filter(|k| !COLUMNS[..7].contains(&k.kind.as_str()) && !k.kind.starts_with("conv "))
            .collect()
    } else if column == "conv 3x3" {
        // Other kernel sizes would be rare here; they share this column.
        row.kinds
            .iter()
            .filter(|k| k.kind.starts_with("conv "))
            .collect()
    } else {
        row.kinds.iter().filter(|k| k.kind == column).collect()
    };
    if pick.is_empty() {
        return MISSING.into();
    }
    let macs: u64 = pick.iter().map(|k| k.macs).sum();
    let instructions: u64 = pick.iter().map(|k| k.instructions).sum();
    let share: f64 = pick.iter().map(|k| k.share).sum();
    if macs > 0 {
        format!("{:.2}", instructions as f64 / macs as f64)
    } else if share < 0.01 {
        format!("{:.2}%", 100.0 * share)
    } else {
        format!("{:.1}%", 100.0 * share)
    }
}

/// The per-kind table of one network as markdown: a row per core with the
/// whole inference's instructions per MAC, each kind's (kinds without MACs
/// as their share of the instructions), flash and RAM of the firmware.
pub fn table(network: &str, rows: &[KindRow]) -> String {
    let mut s = String::new();
    let macs = rows.first().map_or(0, |r| r.macs);
    let _ = writeln!(s, "{network}: {} MACs per inference\n", thousands(macs));
    let _ = write!(s, "| core | weights | instructions | whole |");
    for c in COLUMNS {
        let _ = write!(s, " {c} |");
    }
    let _ = writeln!(s, " flash B | RAM B | bit-identical |");
    let _ = writeln!(
        s,
        "|---|---|---|---|{}---|---|---|",
        "---|".repeat(COLUMNS.len())
    );
    for r in rows {
        let opt = |v: Option<u64>| v.map_or(MISSING.to_string(), thousands);
        let _ = write!(
            s,
            "| {} | {} | {} | {} |",
            r.core,
            r.weight_form,
            opt(r.instructions),
            r.per_mac.map_or(MISSING.to_string(), |p| format!("{p:.2}"))
        );
        for c in COLUMNS {
            let _ = write!(s, " {} |", cell(r, c));
        }
        let _ = writeln!(
            s,
            " {} | {} | {} |",
            opt(r.flash),
            opt(r.ram),
            match r.bit_identical {
                Some(true) => "yes",
                Some(false) => "NO",
                None => MISSING,
            }
        );
    }
    s
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::zoo::{inverted_residual, write_gray_pictures, Bottleneck, InvertedResidualConfig};
    use ingot_compiler::check::pipeline::steps_of;
    use ingot_compiler::lower::{lower, LowerOptions};

    /// A small inverted-residual network: stem, a block without
    /// expansion, a block with expansion and a residual `add`, head, pool,
    /// linear.
    fn small() -> crate::zoo::Net {
        let cfg = InvertedResidualConfig {
            input: [1, 16, 16],
            stem: 8,
            groups: vec![
                Bottleneck {
                    expansion: 1,
                    channels: 8,
                    repeats: 1,
                    stride: 1,
                },
                Bottleneck {
                    expansion: 2,
                    channels: 8,
                    repeats: 1,
                    stride: 1,
                },
            ],
            head: 16,
            classes: 3,
        };
        inverted_residual(&cfg, 4)
    }

    #[test]
    fn steps_are_summed_by_column() {
        let net = small();
        let q = lower(&net.build(), &net.minmax_ranges(), &LowerOptions::default()).unwrap();
        let layers: Vec<LayerFigures> = steps_of(&q)
            .into_iter()
            .enumerate()
            .map(|(i, s)| LayerFigures {
                step: i,
                name: s.name,
                kind: s.kind,
                macs: s.macs,
                sqnr_db: None,
                instructions: Some(1_000 + i as u64),
            })
            .collect();
        let kinds = kinds_of(&q, &layers);
        let names: Vec<&str> = kinds.iter().map(|k| k.kind.as_str()).collect();
        assert_eq!(
            names,
            ["stem", "depthwise", "pointwise", "add", "pool", "linear"]
        );
        // The stem is the one convolution reading the input, 8 channels
        // 3×3/2 on 16×16 → 8×8·8·9 = 4,608 MACs (by hand).
        let stem = &kinds[0];
        assert_eq!(
            (stem.steps, stem.macs, stem.instructions),
            (1, 4_608, 1_000)
        );
        // Two depthwise layers, four pointwise (projection; expansion and
        // projection; the head's 1×1): every step lands in one column.
        assert_eq!(kinds[1].steps, 2);
        assert_eq!(kinds[2].steps, 4);
        let total: u64 = layers.iter().filter_map(|l| l.instructions).sum();
        assert_eq!(kinds.iter().map(|k| k.instructions).sum::<u64>(), total);

        let row = KindRow {
            core: "m4".into(),
            weight_form: "pairs".into(),
            macs: layers.iter().map(|l| l.macs).sum(),
            instructions: Some(total),
            per_mac: None,
            kinds,
            flash: Some(12_345),
            ram: None,
            bit_identical: Some(true),
        };
        let t = table("small", std::slice::from_ref(&row));
        // 1,000 instructions over 4,608 MACs.
        assert!(t.contains("| m4 | pairs | "), "{t}");
        assert!(t.contains(&format!(" {:.2} |", 1_000.0 / 4_608.0)), "{t}");
        assert!(t.contains("| 12,345 | – | yes |"), "{t}");
        // No k×k convolution but the stem: that column is empty.
        assert_eq!(cell(&row, "conv 3x3"), MISSING);
        assert_eq!(cell(&row, "other"), MISSING);
    }

    /// The whole path on the host (no instruction counts there): the
    /// network is written, calibrated, generated, built and run, and the
    /// table still builds.
    #[test]
    fn host_run_builds_a_table() {
        let dir = tempfile::tempdir().unwrap();
        let net = small();
        let graph = net.write(dir.path(), "small").unwrap();
        let images = dir.path().join("images");
        write_gray_pictures(&images, 16, 16, 2, 3).unwrap();
        let row = measure(
            &graph,
            &images,
            RunOn::Host,
            "host",
            Setup::default(),
            BuildConfig::default(),
            dir.path(),
        )
        .unwrap();
        assert_eq!(row.bit_identical, Some(true));
        assert_eq!(row.instructions, None);
        assert!(row.macs > 0);
        let t = table("small", &[row]);
        assert!(t.contains("| host | int8 | – | – |"), "{t}");
    }
}
