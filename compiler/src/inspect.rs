//! The report of `ingot inspect`: per-layer shapes and counts and the
//! network's totals, built here so tests and build scripts can use it; the
//! command line only prints it.
//!
//! Counting follows [`crate::graph::cost`]. Weight bytes are estimates of
//! what the weights occupy:
//! - *f32*: four bytes per stored value, parameters and buffers (what an F32
//!   weights file holds);
//! - *int8*: one byte per convolution and linear weight plus four bytes (an
//!   int32 bias) per output channel of every convolution and linear layer,
//!   which is what remains once each batch norm is folded into the
//!   convolution before it (Jacob et al. 2018, "Quantization and Training of
//!   Neural Networks for Efficient Integer-Arithmetic-Only Inference").

use crate::graph::cost::{layer_cost, LayerCost};
use crate::graph::{Color, Graph, Op, Shape};
pub use crate::util::group_digits;
use serde::Serialize;
use std::fmt::Write as _;

/// One row of the report.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct LayerRow {
    /// Position in execution order.
    pub index: usize,
    /// Layer name.
    pub name: String,
    /// Op name as in the graph format.
    pub op: String,
    /// Names of the maps read.
    pub inputs: Vec<String>,
    /// Output shape `[C, H, W]`.
    pub output: Shape,
    /// Trained parameters.
    pub params: u64,
    /// Non-trained buffers (batch-norm running statistics).
    pub buffers: u64,
    /// Multiply-accumulates (convolution and linear only).
    pub macs: u64,
    /// Other arithmetic (pooling taps, normalised, activated, added elements).
    pub other_ops: u64,
}

/// Totals over the network.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
pub struct Totals {
    /// Trained parameters.
    pub params: u64,
    /// Batch-norm running statistics (buffers, not parameters).
    pub buffers: u64,
    /// Multiply-accumulates of convolutions and linear layers.
    pub macs: u64,
    /// Other arithmetic.
    pub other_ops: u64,
    /// Bytes of all stored values at f32.
    pub weight_bytes_f32: u64,
    /// Bytes of int8 weights and int32 biases after batch-norm folding.
    pub weight_bytes_int8: u64,
}

/// What `ingot inspect` shows.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Report {
    /// Network name.
    pub name: String,
    /// Name of the input map.
    pub input_name: String,
    /// Input shape.
    pub input: Shape,
    /// `gray` or `rgb`.
    pub color: String,
    /// Name and shape of the output map.
    pub output_name: String,
    /// Output shape.
    pub output: Shape,
    /// One row per layer, in execution order.
    pub layers: Vec<LayerRow>,
    /// Totals.
    pub totals: Totals,
}

/// Builds the report of a checked graph.
pub fn report(g: &Graph) -> Report {
    let mut sum = LayerCost::default();
    let mut int8 = 0u64;
    let mut layers = Vec::with_capacity(g.layers().len());
    for id in g.layer_ids() {
        let l = g.layer(id);
        let c = layer_cost(g, id);
        sum += c;
        int8 += match &l.op {
            Op::Conv2d(cv) => (cv.weight.len() + 4 * cv.out_channels) as u64,
            Op::Linear(li) => (li.weight.len() + 4 * li.out_features) as u64,
            _ => 0,
        };
        layers.push(LayerRow {
            index: id.index(),
            name: l.name.clone(),
            op: l.op.kind().to_string(),
            inputs: l
                .inputs
                .iter()
                .map(|m| g.map_name(*m).to_string())
                .collect(),
            output: g.shape(id.output()),
            params: c.params,
            buffers: c.buffers,
            macs: c.macs,
            other_ops: c.other_ops,
        });
    }
    Report {
        name: g.name().to_string(),
        input_name: g.input().name.clone(),
        input: g.input().shape,
        color: match g.input().color {
            Color::Gray => "gray",
            Color::Rgb => "rgb",
        }
        .to_string(),
        output_name: g.map_name(g.output()).to_string(),
        output: g.shape(g.output()),
        layers,
        totals: Totals {
            params: sum.params,
            buffers: sum.buffers,
            macs: sum.macs,
            other_ops: sum.other_ops,
            weight_bytes_f32: 4 * (sum.params + sum.buffers),
            weight_bytes_int8: int8,
        },
    }
}

impl Report {
    /// The report as an aligned text table followed by the totals.
    pub fn to_text(&self) -> String {
        let head = ["#", "name", "op", "output", "params", "MACs"];
        let rows: Vec<[String; 6]> = self
            .layers
            .iter()
            .map(|r| {
                [
                    r.index.to_string(),
                    r.name.clone(),
                    r.op.clone(),
                    r.output.to_string(),
                    group_digits(r.params),
                    group_digits(r.macs),
                ]
            })
            .collect();
        let mut width = head.map(str::len);
        for r in &rows {
            for (w, cell) in width.iter_mut().zip(r) {
                *w = (*w).max(cell.len());
            }
        }
        // Columns 0, 4 and 5 are numbers: right-aligned.
        let line = |cells: [&str; 6]| -> String {
            let mut s = String::new();
            for (i, (cell, w)) in cells.iter().zip(width).enumerate() {
                if i > 0 {
                    s.push_str("  ");
                }
                if matches!(i, 0 | 4 | 5) {
                    let _ = write!(s, "{cell:>w$}");
                } else {
                    let _ = write!(s, "{cell:<w$}");
                }
            }
            s.trim_end().to_string()
        };
        let mut out = String::new();
        let _ = writeln!(out, "network  {}", self.name);
        let _ = writeln!(
            out,
            "input    {} {} {}",
            self.input_name, self.input, self.color
        );
        let _ = writeln!(out, "output   {} {}", self.output_name, self.output);
        out.push('\n');
        out.push_str(&line(head));
        out.push('\n');
        for r in &rows {
            out.push_str(&line([&r[0], &r[1], &r[2], &r[3], &r[4], &r[5]]));
            out.push('\n');
        }
        out.push('\n');
        let t = &self.totals;
        let totals = [
            ("layers", group_digits(self.layers.len() as u64), ""),
            (
                "parameters",
                group_digits(t.params),
                "trained: conv/linear weights and biases, batch-norm scale and shift",
            ),
            (
                "buffers",
                group_digits(t.buffers),
                "batch-norm running mean and variance (not parameters)",
            ),
            (
                "MACs",
                group_digits(t.macs),
                "multiply-accumulates of convolutions and linear layers",
            ),
            (
                "other ops",
                group_digits(t.other_ops),
                "pooling taps, batch-norm, activation and add elements",
            ),
            (
                "weights f32",
                format!("{} B", group_digits(t.weight_bytes_f32)),
                "4 bytes per parameter and buffer",
            ),
            (
                "weights int8",
                format!("{} B", group_digits(t.weight_bytes_int8)),
                "1 byte per conv/linear weight + int32 bias per output channel, batch norms folded",
            ),
        ];
        let vw = totals.iter().map(|(_, v, _)| v.len()).max().unwrap_or(0);
        for (k, v, note) in totals {
            let _ = writeln!(out, "{k:<12}  {v:>vw$}  {note}");
        }
        out.lines()
            .map(str::trim_end)
            .collect::<Vec<_>>()
            .join("\n")
            + "\n"
    }
}
