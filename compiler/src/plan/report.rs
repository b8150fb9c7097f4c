//! The planning report: what `ingot plan` prints, as text or JSON.

use super::target::{budget, Budget, Target};
use super::Plan;
use crate::lower::{QGraph, QKernel};
use serde::Serialize;
use std::fmt;

/// One step of the order.
#[derive(Debug, Clone, Serialize)]
pub struct StepRow {
    /// Position in the order.
    pub position: usize,
    /// Step name.
    pub name: String,
    /// Kernel kind.
    pub kind: String,
    /// What the step does to memory: `compute`, `in-place`, `no-op` (in-place
    /// concatenation) or `copy` (copying concatenation).
    pub memory: String,
}

/// One map.
#[derive(Debug, Clone, Serialize)]
pub struct MapRow {
    /// Map name.
    pub name: String,
    /// `[c, h, w]`.
    pub shape: [usize; 3],
    /// Arena offset of element (0,0,0).
    pub offset: usize,
    /// Pixel stride.
    pub stride: usize,
    /// Bytes of the map.
    pub bytes: usize,
    /// Live interval of the buffer holding it (positions), if any.
    pub alive: Option<[usize; 2]>,
}

/// One row pipeline of the plan.
#[derive(Debug, Clone, Serialize)]
pub struct PipelineRow {
    /// Its steps, in order.
    pub steps: Vec<String>,
    /// Its rings.
    pub rings: Vec<RingRow>,
}

/// One map stored as a ring.
#[derive(Debug, Clone, Serialize)]
pub struct RingRow {
    /// Map name.
    pub map: String,
    /// Rows stored.
    pub rows: usize,
    /// Rows of the map.
    pub height: usize,
    /// Bytes stored (`rows · w · c`).
    pub bytes: usize,
    /// Bytes of the whole map.
    pub map_bytes: usize,
}

/// Everything `ingot plan` reports.
#[derive(Debug, Clone, Serialize)]
pub struct PlanReport {
    /// Network name.
    pub network: String,
    /// Arena bytes.
    pub arena_bytes: usize,
    /// Patch bytes (outside the arena).
    pub patch_bytes: usize,
    /// Convolution weight form the patch and flash figures assume.
    pub weight_form: &'static str,
    /// Lower bound of the plan (row pipelines counted with their rings).
    pub lower_bound: usize,
    /// Lower bound without row streaming (every map stored whole).
    pub unfused_bound: usize,
    /// Row pipelines.
    pub pipelines: Vec<PipelineRow>,
    /// Arena / lower bound.
    pub ratio: f64,
    /// No reuse at all.
    pub naive_bytes: usize,
    /// Best plan with copying concatenations.
    pub copying_bytes: usize,
    /// Peak of live bytes in file order and in the chosen order.
    pub order_peak_before: usize,
    /// See `order_peak_before`.
    pub order_peak_after: usize,
    /// Exhaustive order search.
    pub order_exact: bool,
    /// Placement heuristic kept.
    pub heuristic: String,
    /// Position of the peak.
    pub peak_step: usize,
    /// Planning time.
    pub seconds: f64,
    /// The order.
    pub steps: Vec<StepRow>,
    /// Every map.
    pub maps: Vec<MapRow>,
    /// Budget, when a target was given.
    pub budget: Option<Budget>,
}

/// Builds the report of `plan` for `q`, with a budget check when `target`
/// is given.
pub fn report(q: &QGraph, plan: &Plan, target: Option<&Target>) -> PlanReport {
    let mut alive = vec![None; q.maps.len()];
    for b in &plan.buffers {
        for m in &b.maps {
            alive[m.index()] = Some([b.first, b.last]);
        }
    }
    let steps = plan
        .order
        .iter()
        .enumerate()
        .map(|(i, &s)| {
            let st = q.step(s);
            let memory = match st.kernel {
                QKernel::Concat if plan.copy_concat.contains(&s) => "copy",
                QKernel::Concat => "no-op",
                _ if plan.in_place.contains(&s) => "in-place",
                _ => "compute",
            };
            StepRow {
                position: i,
                name: st.name.clone(),
                kind: st.kernel.kind().into(),
                memory: memory.into(),
            }
        })
        .collect();
    let maps = q
        .maps
        .iter()
        .enumerate()
        .map(|(i, m)| MapRow {
            name: m.name.clone(),
            shape: [m.shape.c, m.shape.h, m.shape.w],
            offset: plan.map_views[i].offset,
            stride: plan.map_views[i].stride,
            bytes: m.shape.len(),
            alive: alive[i],
        })
        .collect();
    PlanReport {
        network: q.name.clone(),
        arena_bytes: plan.arena_bytes,
        patch_bytes: plan.patch_bytes,
        weight_form: plan.weight_form.name(),
        lower_bound: plan.lower_bound,
        unfused_bound: plan.unfused_bound,
        pipelines: plan
            .pipelines
            .iter()
            .map(|p| PipelineRow {
                steps: p.steps.iter().map(|&s| q.step(s).name.clone()).collect(),
                rings: p
                    .rings
                    .iter()
                    .map(|r| {
                        let sh = q.map(r.map).shape;
                        RingRow {
                            map: q.map(r.map).name.clone(),
                            rows: r.rows,
                            height: sh.h,
                            bytes: r.rows * sh.w * sh.c,
                            map_bytes: sh.len(),
                        }
                    })
                    .collect(),
            })
            .collect(),
        ratio: plan.ratio(),
        naive_bytes: plan.naive_bytes,
        copying_bytes: plan.copying_bytes,
        order_peak_before: plan.order_peak_before,
        order_peak_after: plan.order_peak_after,
        order_exact: plan.order_exact,
        heuristic: plan.heuristic.clone(),
        peak_step: plan.peak_step,
        seconds: plan.seconds,
        steps,
        maps,
        budget: target.map(|t| budget(q, plan, t)),
    }
}

fn kib(b: impl Into<f64>) -> String {
    format!("{:.1} KiB", b.into() / 1024.0)
}

impl fmt::Display for PlanReport {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        writeln!(f, "memory plan of `{}`", self.network)?;
        writeln!(f, "order ({} steps):", self.steps.len())?;
        for s in &self.steps {
            writeln!(
                f,
                "  {:>4}  {:<40} {:<16} {}",
                s.position, s.name, s.kind, s.memory
            )?;
        }
        writeln!(f, "maps:")?;
        writeln!(
            f,
            "  {:<40} {:>14} {:>9} {:>6} {:>9}  alive",
            "name", "shape c×h×w", "offset", "stride", "bytes"
        )?;
        for m in &self.maps {
            let alive = m.alive.map_or(crate::util::MISSING.to_string(), |[a, b]| {
                format!("{a}..={b}")
            });
            let shape = format!("{}×{}×{}", m.shape[0], m.shape[1], m.shape[2]);
            writeln!(
                f,
                "  {:<40} {:>14} {:>9} {:>6} {:>9}  {}",
                m.name, shape, m.offset, m.stride, m.bytes, alive
            )?;
        }
        writeln!(
            f,
            "arena        {:>10} B  ({})",
            self.arena_bytes,
            kib(self.arena_bytes as f64)
        )?;
        writeln!(
            f,
            "lower bound  {:>10} B  ratio {:.4}",
            self.lower_bound, self.ratio
        )?;
        if !self.pipelines.is_empty() {
            writeln!(
                f,
                "unfused      {:>10} B  (lower bound with every map stored whole; {} row pipelines, {} rings)",
                self.unfused_bound,
                self.pipelines.len(),
                self.pipelines.iter().map(|p| p.rings.len()).sum::<usize>()
            )?;
            for (k, p) in self.pipelines.iter().enumerate() {
                let rings: Vec<String> = p
                    .rings
                    .iter()
                    .map(|r| {
                        format!(
                            "`{}` ring {}/{} rows ({} of {} B)",
                            r.map, r.rows, r.height, r.bytes, r.map_bytes
                        )
                    })
                    .collect();
                writeln!(
                    f,
                    "  pipeline {:>3}  {}: {}",
                    k + 1,
                    p.steps
                        .iter()
                        .map(|s| format!("`{s}`"))
                        .collect::<Vec<_>>()
                        .join(" → "),
                    rings.join(", ")
                )?;
            }
        }
        writeln!(
            f,
            "naive        {:>10} B  (every map its own bytes)",
            self.naive_bytes
        )?;
        writeln!(
            f,
            "copying      {:>10} B  (concatenations copied; in place is {:.1}% of it)",
            self.copying_bytes,
            100.0 * self.arena_bytes as f64 / self.copying_bytes.max(1) as f64
        )?;
        writeln!(
            f,
            "patch        {:>10} B  (outside the arena; {})",
            self.patch_bytes,
            if self.weight_form == "pairs" {
                "row buffers of the paired convolutions"
            } else if self.weight_form == "words" {
                "row buffers of the word-form convolutions"
            } else {
                "int8 convolution patch"
            }
        )?;
        writeln!(
            f,
            "order peak   {:>10} B in file order, {} B chosen ({}), peak at position {}",
            self.order_peak_before,
            self.order_peak_after,
            if self.order_exact {
                "exact search"
            } else {
                "beam search"
            },
            self.peak_step
        )?;
        writeln!(
            f,
            "placement    {}; planned in {:.1} ms",
            self.heuristic,
            self.seconds * 1e3
        )?;
        if let Some(b) = &self.budget {
            writeln!(f, "budget on {}:", b.target)?;
            writeln!(
                f,
                "  RAM   {:>10} / {:>10} B (arena {} + patch {} + reserve {}), headroom {} B",
                b.ram_used, b.ram_total, b.arena, b.patch, b.ram_reserve, b.ram_headroom
            )?;
            writeln!(
                f,
                "  flash {:>10} / {:>10} B (weights {} + biases {} + multipliers {} + transforms {} + code ≈{} + reserve {}), headroom {} B",
                b.flash_used,
                b.flash_total,
                b.flash.weights,
                b.flash.biases,
                b.flash.multipliers,
                b.flash.transforms,
                b.flash.code,
                b.flash_reserve,
                b.flash_headroom
            )?;
            if b.fits {
                writeln!(f, "  fits")?;
            } else {
                for o in &b.over {
                    writeln!(f, "  DOES NOT FIT: {o}")?;
                }
            }
        }
        Ok(())
    }
}
