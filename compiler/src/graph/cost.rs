//! Parameter and work counts per layer, for `ingot inspect` and the reports.
//!
//! Convention: *parameters* are trained values (convolution and linear
//! weights and biases, batch-norm scale and shift); batch-norm running mean
//! and variance are buffers and counted apart. *MACs* count the
//! multiply-accumulates of convolutions and linear layers only, which is the
//! figure frameworks commonly publish; pooling, batch-norm and element-wise
//! work is reported separately as `other_ops`.
//!
//! With this convention DenseNet-121 (Huang et al. 2017) counts 7,978,856
//! parameters and 2,834,161,664 MACs, the figures common framework
//! implementations publish for it (the test `densenet121` checks both).
//! Counting the running statistics as parameters would add 83,648 (the
//! batch-norm buffers), and counting a MAC as two FLOPs doubles the second
//! figure; both are common sources of disagreement between published tables.

use super::{Graph, LayerId, Op};
use serde::Serialize;

/// Counts for one layer.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq, Serialize)]
pub struct LayerCost {
    /// Trained parameters.
    pub params: u64,
    /// Non-trained buffers (batch-norm running statistics).
    pub buffers: u64,
    /// Multiply-accumulates of convolution and linear layers.
    pub macs: u64,
    /// Other arithmetic: one per pooled tap, per normalised or added element.
    pub other_ops: u64,
}

impl std::ops::AddAssign for LayerCost {
    fn add_assign(&mut self, o: LayerCost) {
        self.params += o.params;
        self.buffers += o.buffers;
        self.macs += o.macs;
        self.other_ops += o.other_ops;
    }
}

/// Counts of one layer of a checked graph.
pub fn layer_cost(g: &Graph, id: LayerId) -> LayerCost {
    let layer = g.layer(id);
    let out = g.shape(id.output());
    let out_len = out.len() as u64;
    let in_shape = layer.inputs.first().map(|&m| g.shape(m));
    match &layer.op {
        Op::Conv2d(c) => {
            let per_out = (c.in_channels / c.groups * c.kernel[0] * c.kernel[1]) as u64;
            LayerCost {
                params: (c.weight.len() + c.bias.as_ref().map_or(0, |b| b.len())) as u64,
                macs: out_len * per_out,
                ..LayerCost::default()
            }
        }
        Op::Linear(l) => LayerCost {
            params: (l.weight.len() + l.bias.as_ref().map_or(0, |b| b.len())) as u64,
            macs: (l.out_features * l.in_features) as u64,
            ..LayerCost::default()
        },
        Op::BatchNorm(b) => LayerCost {
            params: (b.gamma.len() + b.beta.len()) as u64,
            buffers: (b.mean.len() + b.var.len()) as u64,
            other_ops: out_len,
            ..LayerCost::default()
        },
        Op::MaxPool2d(p) | Op::AvgPool2d(p) => LayerCost {
            other_ops: out_len * (p.kernel[0] * p.kernel[1]) as u64,
            ..LayerCost::default()
        },
        Op::GlobalAvgPool => LayerCost {
            other_ops: in_shape.map_or(0, |s| s.len() as u64),
            ..LayerCost::default()
        },
        Op::Relu | Op::Relu6 | Op::Add | Op::Softmax => {
            LayerCost { other_ops: out_len, ..LayerCost::default() }
        }
        Op::Flatten | Op::Concat | Op::Dropout => LayerCost::default(),
    }
}

/// Sum over all layers.
pub fn total_cost(g: &Graph) -> LayerCost {
    let mut t = LayerCost::default();
    for id in g.layer_ids() {
        t += layer_cost(g, id);
    }
    t
}
