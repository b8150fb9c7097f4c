//! The per-layer summary shared by the module's docs and the reports.

use super::blob::{Blob, Section};
use super::calls::{map_ref, StepCalls};
use super::names::for_doc;
use super::{GenOptions, Schedule};
use crate::lower::{QGraph, QKernel};
use serde::Serialize;

/// One executed step.
#[derive(Debug, Clone, Serialize)]
pub struct LayerRow {
    /// Position in the schedule.
    pub index: usize,
    /// Layer name.
    pub name: String,
    /// Kernel kind.
    pub kind: String,
    /// Output `[H, W, C]`.
    pub output: [usize; 3],
    /// Stored parameters (weights, biases).
    pub params: usize,
    /// Multiply-accumulates per inference.
    pub macs: u64,
    /// Arena offset of the output view.
    pub offset: usize,
    /// Pixel stride of the output view.
    pub stride: usize,
    /// Kernel calls emitted (0 for an in-place concatenation).
    pub calls: usize,
    /// The weight form the compiler chose for this layer (convolutions:
    /// `int8`, `words` or `pairs`; `None` for other kinds).
    pub weight_form: Option<&'static str>,
}

/// Everything in `NAME.report.json`.
#[derive(Debug, Clone, Serialize)]
pub struct Report {
    /// Format tag.
    pub format: &'static str,
    /// Network name.
    pub network: String,
    /// Module name.
    pub module: String,
    /// Target name, if any.
    pub target: Option<String>,
    /// Model hash.
    pub model_hash: String,
    /// ingot version.
    pub ingot_version: &'static str,
    /// Input `[H, W, C]`.
    pub input: [usize; 3],
    /// Output length.
    pub output_len: usize,
    /// Arena bytes.
    pub arena_bytes: usize,
    /// Patch bytes.
    pub patch_bytes: usize,
    /// Total scratch RAM.
    pub scratch_bytes: usize,
    /// Weights file size.
    pub weights_bytes: usize,
    /// How convolution weights are stored in the module.
    pub weight_form: &'static str,
    /// Flash the module's tensors take: the weights file's bytes, plus the
    /// growth of paired convolution weights.
    pub weights_flash_bytes: usize,
    /// Weights file bytes by section.
    pub weights_sections: Vec<(Section, usize)>,
    /// Parameters (weights + biases).
    pub params: usize,
    /// MACs per inference.
    pub macs: u64,
    /// Per step.
    pub layers: Vec<LayerRow>,
}

/// Builds the report.
pub fn build(
    q: &QGraph,
    s: &Schedule,
    calls: &[StepCalls<'_>],
    blob: &Blob,
    opt: &GenOptions,
    hash: &str,
) -> Report {
    let mut layers = Vec::new();
    for (k, sc) in calls.iter().enumerate() {
        let st = q.step(sc.step);
        let o = q.map(st.output).shape;
        let (params, macs) = match &st.kernel {
            QKernel::Conv2d(c) => (
                c.weights.len() + c.bias.len(),
                (o.len() * c.kernel[0] * c.kernel[1] * (c.in_channels / c.groups.max(1))) as u64,
            ),
            QKernel::Linear(l) => (l.weights.len() + l.bias.len(), l.weights.len() as u64),
            _ => (0, 0),
        };
        let v = map_ref(q, s, st.output);
        layers.push(LayerRow {
            index: k,
            name: st.name.clone(),
            kind: st.kernel.kind().to_string(),
            output: [o.h, o.w, o.c],
            params,
            macs,
            offset: v.offset,
            stride: v.stride,
            calls: sc.calls.len(),
            weight_form: sc.calls.iter().find_map(|c| match c {
                super::calls::Call::Conv { form, .. } => Some(form.name()),
                _ => None,
            }),
        });
    }
    let i = q.map(q.input).shape;
    Report {
        format: "ingot.report.v1",
        network: q.name.clone(),
        module: opt.module.clone(),
        target: opt.target.as_ref().map(|t| t.name.clone()),
        model_hash: hash.to_string(),
        ingot_version: env!("CARGO_PKG_VERSION"),
        input: [i.h, i.w, i.c],
        output_len: q.map(q.output).shape.len(),
        arena_bytes: s.arena_bytes,
        patch_bytes: s.patch_bytes,
        scratch_bytes: s.arena_bytes + s.patch_bytes,
        weights_bytes: blob.bytes.len(),
        weight_form: opt.weight_form.name(),
        weights_flash_bytes: blob.bytes.len() + super::pair_growth(q, opt.weight_form),
        weights_sections: blob.section_bytes(),
        params: layers.iter().map(|l| l.params).sum(),
        macs: layers.iter().map(|l| l.macs).sum(),
        layers,
    }
}

impl Report {
    /// Summary lines (Markdown).
    pub fn figures(&self) -> Vec<String> {
        let mut v = vec![
            format!(
                "- network: `{}`, module `{}`",
                for_doc(&self.network),
                self.module
            ),
            format!(
                "- target: {}",
                self.target
                    .as_deref()
                    .map(for_doc)
                    .unwrap_or_else(|| "none given".into())
            ),
            format!(
                "- input {}×{}×{} (H×W×C), output {} values",
                self.input[0], self.input[1], self.input[2], self.output_len
            ),
            format!(
                "- RAM: scratch {} bytes (arena {} + patch {})",
                self.scratch_bytes, self.arena_bytes, self.patch_bytes
            ),
            if self.weights_flash_bytes == self.weights_bytes {
                format!(
                    "- flash for weights: {} bytes; parameters {}; {} MACs per inference",
                    self.weights_bytes, self.params, self.macs
                )
            } else {
                format!(
                    "- flash for weights: {} bytes (convolution weights in 16-bit pairs; \
                     weights file {} bytes); parameters {}; {} MACs per inference",
                    self.weights_flash_bytes, self.weights_bytes, self.params, self.macs
                )
            },
        ];
        let parts: Vec<String> = self
            .weights_sections
            .iter()
            .map(|(s, n)| format!("{s:?} {n}"))
            .collect();
        v.push(format!(
            "- weights file sections (bytes): {}",
            parts.join(", ")
        ));
        v.push(format!("- model hash `{}`", self.model_hash));
        v
    }

    /// The per-layer Markdown table.
    pub fn table(&self) -> Vec<String> {
        let mut v = vec![
            "| # | layer | kind | output H×W×C | params | MACs | arena offset | stride |"
                .to_string(),
            "|---:|---|---|---|---:|---:|---:|---:|".to_string(),
        ];
        for l in &self.layers {
            let kind = match (l.kind.as_str(), l.calls, l.weight_form) {
                ("concat", 0, _) => "concat (in place)".to_string(),
                // The packed forms are named; int8 is the plain kind.
                (k, _, Some(f)) if f != "int8" => format!("{k} ({f})"),
                (k, _, _) => k.to_string(),
            };
            v.push(format!(
                "| {} | {} | {} | {}×{}×{} | {} | {} | {} | {} |",
                l.index,
                for_doc(&l.name),
                kind,
                l.output[0],
                l.output[1],
                l.output[2],
                l.params,
                l.macs,
                l.offset,
                l.stride
            ));
        }
        v
    }

    /// `NAME.report.md`.
    pub fn markdown(&self) -> String {
        let mut s = String::new();
        s.push_str("<!-- @generated by ingot: do not edit -->\n");
        s.push_str(&format!("# ingot report: `{}`\n\n", for_doc(&self.network)));
        for l in self.figures() {
            s.push_str(&l);
            s.push('\n');
        }
        s.push('\n');
        for l in self.table() {
            s.push_str(&l);
            s.push('\n');
        }
        s
    }

    /// `NAME.report.json`.
    pub fn json(&self) -> String {
        let mut s = serde_json::to_string_pretty(self).expect("report serializes");
        s.push('\n');
        s
    }
}
