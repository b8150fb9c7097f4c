//! Why a graph could not be lowered.

use super::MAX_POOL_TAPS;
use crate::graph::{Graph, LayerId, Shape};

/// Why a graph could not be lowered.
#[derive(Debug, thiserror::Error)]
pub enum LowerError {
    /// A `--wide` layer cannot have its output stored as int16: no such
    /// layer, no output map of its own, or an output no int16 kernel
    /// writes.
    #[error("--wide `{layer}`: {message}")]
    Wide {
        /// The layer as given.
        layer: String,
        /// Why not.
        message: String,
    },
    /// The ranges do not cover every map of the graph.
    #[error("no calibrated range for map `{map}` (the ranges have {got} maps, graph `{graph}` has {expected}); recalibrate")]
    MissingRange {
        /// Graph name.
        graph: String,
        /// First map without a range.
        map: String,
        /// Maps in the ranges.
        got: usize,
        /// Maps in the graph.
        expected: usize,
    },
    /// A range is not finite, has `min > max`, or an end beyond
    /// [`MAX_RANGE_ABS`].
    #[error("map `{map}`: calibrated range [{min}, {max}] is not usable")]
    BadRange {
        /// Map name.
        map: String,
        /// Lower end.
        min: f32,
        /// Upper end.
        max: f32,
    },
    /// A bias correction of the ranges does not fit its layer: no such
    /// convolution or linear layer, a length other than its output
    /// channels, or a value that is not finite.
    #[error("bias shifts for `{layer}`: {message}")]
    BadBiasShift {
        /// Layer name as the ranges give it.
        layer: String,
        /// What is wrong.
        message: String,
    },
    /// Every map's range is a single value.
    #[error("graph `{graph}`: every calibrated range is a single value (min = max); the calibration images or the ranges file carry no information")]
    DegenerateRanges {
        /// Graph name.
        graph: String,
    },
    /// A scale ratio cannot be expressed as a fixed-point multiplier.
    #[error("layer `{layer}` ({op}): {what} = {value:e} cannot be represented as a fixed-point multiplier (needs 2^-32 <= |M| < 2^30); check the calibrated ranges of its input and output")]
    Multiplier {
        /// Layer name.
        layer: String,
        /// Op name.
        op: &'static str,
        /// Which multiplier.
        what: String,
        /// Its real value.
        value: f64,
    },
    /// A quantized bias does not fit in i32.
    #[error("layer `{layer}` ({op}): bias of output channel {channel} is {value:e} input·weight steps, beyond int32 (weights or input scale too small for this bias)")]
    BiasOverflow {
        /// Layer name.
        layer: String,
        /// Op name.
        op: &'static str,
        /// Output channel.
        channel: usize,
        /// Bias in units of `s_in · s_w`.
        value: f64,
    },
    /// The worst-case int32 accumulation of a layer could overflow.
    #[error("layer `{layer}` ({op}, input {input}, output {output}): output channel {channel} may accumulate up to {worst} (|bias| + 255·Σ|w|), beyond int32; split the layer or reduce its fan-in")]
    AccumulatorOverflow {
        /// Layer name.
        layer: String,
        /// Op name.
        op: &'static str,
        /// Input shape.
        input: Shape,
        /// Output shape.
        output: Shape,
        /// Output channel.
        channel: usize,
        /// Worst-case accumulator magnitude.
        worst: i64,
    },
    /// An average pool's window is so large that the int32 sum of its
    /// centred taps (each up to 255 in magnitude) could overflow.
    #[error("layer `{layer}` ({op}): a window of {taps} taps may sum to 255·{taps}, beyond int32; at most {max} taps are supported (use a smaller window or pool in stages)", max = MAX_POOL_TAPS)]
    PoolOverflow {
        /// Layer name.
        layer: String,
        /// Op name.
        op: &'static str,
        /// Taps in one window (`kh·kw`, or `h·w` for a global pool).
        taps: usize,
    },
    /// A pattern the int8 lowering does not handle.
    #[error("layer `{layer}` ({op}): {message}")]
    Unsupported {
        /// Layer name.
        layer: String,
        /// Op name.
        op: &'static str,
        /// What is not supported.
        message: String,
    },
    /// A bug in the lowering (a broken invariant), not a problem of the model.
    #[error("internal error in lowering (please report): {0}")]
    Internal(String),
}

pub(super) fn unsupported(g: &Graph, id: LayerId, message: impl Into<String>) -> LowerError {
    let l = g.layer(id);
    LowerError::Unsupported {
        layer: l.name.clone(),
        op: l.op.kind(),
        message: message.into(),
    }
}
