//! The lowered int8 graph: what the planner, the integer simulator and the
//! code generator take.
//!
//! Compared with the float [`Graph`](crate::graph::Graph): batch norm is folded
//! into convolutions or fused into a convolution's input read, ReLU/ReLU6 are
//! clamps, `flatten` and `dropout` are gone (the linear layer's weights are
//! permuted to the HWC order instead), softmax is dropped (it does not change
//! the arg-max; [`QGraph::softmax_dropped`] says so), and every map carries
//! int8 quantization parameters. Maps are laid out channels-last (HWC), as
//! `ingot-rt` expects.
//!
//! Quantities are stored as plain integers in the conventions of `ingot-rt`
//! (a [`Multiplier`] is an `ingot_rt::Requant`), so the simulator and the
//! generated code apply exactly the same arithmetic.

use crate::graph::{LayerId, MapId, Padding, Shape};
use serde::Serialize;

/// Index of a map in [`QGraph::maps`].
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord, Hash, Serialize)]
pub struct QMapId(pub u32);

/// Index of a step in [`QGraph::steps`].
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord, Hash, Serialize)]
pub struct StepId(pub u32);

impl QMapId {
    /// The index as `usize`.
    pub fn index(self) -> usize {
        self.0 as usize
    }
}

impl StepId {
    /// The index as `usize`.
    pub fn index(self) -> usize {
        self.0 as usize
    }
}

/// Affine int8 quantization of one map: `real = scale * (q - zero_point)`.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct QParams {
    /// Real value of one step.
    pub scale: f32,
    /// The int8 code of real zero, in `-128..=127`.
    pub zero_point: i32,
}

/// Quantization of one stored map: one parameter set, or one per run of
/// channels.
///
/// A map is per slice when it is the output of a concatenation whose
/// members keep their own producers' parameters (a concatenation region
/// whose every reader can absorb per-channel input parameters), or the
/// output of a convolution with one scale per output channel at one zero
/// point, or of a pooling passing such parameters on (see
/// `lower/classes.rs`). Every other map, and the network's input and
/// output, is per tensor. There is no "the" scale of a per-slice map:
/// [`MapQuant::tensor`] is `None` for it, so a reader that needs one
/// parameter set must say what it does otherwise.
///
/// Serialized as the [`QParams`] itself (per tensor) or as the list of
/// slices, so graphs without regions serialize as before.
#[derive(Debug, Clone, PartialEq, Serialize)]
#[serde(untagged)]
pub enum MapQuant {
    /// One parameter set for every channel.
    Tensor(QParams),
    /// Consecutive runs of channels with their own parameters, in channel
    /// order; at least two runs, neighbours differ, channels add up to the
    /// map's.
    Slices(Vec<QSlice>),
}

/// A run of channels of a per-slice map sharing one parameter set.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct QSlice {
    /// Channels in the run.
    pub channels: usize,
    /// Their quantization.
    pub qp: QParams,
}

impl From<QParams> for MapQuant {
    fn from(qp: QParams) -> Self {
        MapQuant::Tensor(qp)
    }
}

impl MapQuant {
    /// Per-channel parameters, neighbouring equal channels merged into
    /// runs; one run is [`MapQuant::Tensor`]. `None` for no channels.
    pub fn from_channels(qps: &[QParams]) -> Option<MapQuant> {
        let mut runs: Vec<QSlice> = Vec::new();
        for &qp in qps {
            match runs.last_mut() {
                Some(r) if r.qp == qp => r.channels += 1,
                _ => runs.push(QSlice { channels: 1, qp }),
            }
        }
        match runs.len() {
            0 => None,
            1 => Some(MapQuant::Tensor(runs[0].qp)),
            _ => Some(MapQuant::Slices(runs)),
        }
    }

    /// The one parameter set of a per-tensor map; `None` per slice.
    pub fn tensor(&self) -> Option<QParams> {
        match self {
            MapQuant::Tensor(qp) => Some(*qp),
            MapQuant::Slices(_) => None,
        }
    }

    /// True for a per-slice map.
    pub fn is_sliced(&self) -> bool {
        matches!(self, MapQuant::Slices(_))
    }

    /// The parameters of channel `c` (a channel past the last run gets the
    /// last run's).
    pub fn channel(&self, c: usize) -> QParams {
        match self {
            MapQuant::Tensor(qp) => *qp,
            MapQuant::Slices(runs) => {
                let mut end = 0;
                for r in runs {
                    end += r.channels;
                    if c < end {
                        return r.qp;
                    }
                }
                runs.last().map_or(
                    QParams {
                        scale: 1.0,
                        zero_point: 0,
                    },
                    |r| r.qp,
                )
            }
        }
    }

    /// The parameters of each of `channels` channels.
    pub fn per_channel(&self, channels: usize) -> Vec<QParams> {
        match self {
            MapQuant::Tensor(qp) => vec![*qp; channels],
            MapQuant::Slices(_) => (0..channels).map(|c| self.channel(c)).collect(),
        }
    }

    /// Every distinct run's parameters (one for a per-tensor map).
    pub fn runs(&self) -> Vec<QParams> {
        match self {
            MapQuant::Tensor(qp) => vec![*qp],
            MapQuant::Slices(runs) => runs.iter().map(|r| r.qp).collect(),
        }
    }

    /// Channels the runs add up to (`None` per tensor).
    fn slice_channels(&self) -> Option<usize> {
        match self {
            MapQuant::Tensor(_) => None,
            MapQuant::Slices(runs) => Some(runs.iter().map(|r| r.channels).sum()),
        }
    }
}

/// A real multiplier `M ≈ mult · 2^-(31 + shift)` with `mult` in
/// `[2^30, 2^31)`; the convention of `ingot_rt::Requant`.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize)]
pub struct Multiplier {
    /// Q31 mantissa.
    pub mult: i32,
    /// Extra right shift (negative: left).
    pub shift: i32,
}

/// Output clamp in int8 codes: the fused activation.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize)]
pub struct Clamp {
    /// Smallest code written.
    pub min: i8,
    /// Largest code written.
    pub max: i8,
}

/// A per-channel int8 → int8 map applied while reading a map (batch norm and
/// ReLU of pre-activation networks), or as a step of its own.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub enum ChannelTransform {
    /// `q' = clamp(zp_out + ((x - zp_in) * mul[c] + add[c] + round) >> shift)`.
    Affine {
        /// Per-channel multiplier.
        mul: Vec<i32>,
        /// Per-channel additive term in units of `2^-shift` output steps.
        add: Vec<i32>,
        /// Common right shift.
        shift: u32,
        /// Zero point of the stored input.
        zp_in: i32,
        /// Zero point of the transformed values.
        zp_out: i32,
        /// Clamp of the transformed values.
        clamp: Clamp,
    },
    /// `q' = table[c * 256 + (x as u8)]`, 256 entries per channel.
    Table(Vec<i8>),
}

/// A convolution with int8 weights.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct QConv {
    /// Output channels.
    pub out_channels: usize,
    /// Input channels.
    pub in_channels: usize,
    /// `[kH, kW]`.
    pub kernel: [usize; 2],
    /// `[sH, sW]`.
    pub stride: [usize; 2],
    /// `[dH, dW]`.
    pub dilation: [usize; 2],
    /// Explicit padding.
    pub padding: Padding,
    /// Channel groups.
    pub groups: usize,
    /// Weights `[O][kH][kW][I/groups]`, symmetric per output channel in `-127..=127`.
    pub weights: Vec<i8>,
    /// Real scale of each output channel's weights.
    pub weight_scales: Vec<f32>,
    /// Bias at scale `s_in * s_w[o]`, already folded with the input zero
    /// point: `bias_q[o] - zp_in * Σ w[o]`.
    pub bias: Vec<i32>,
    /// Per output channel `s_in * s_w[o] / s_out`.
    pub requant: Vec<Multiplier>,
    /// Zero point of the convolution's input domain (after `transform`, if
    /// any): the value padded taps take.
    pub input_zp: i32,
    /// Fused activation.
    pub clamp: Clamp,
    /// Batch norm (+ ReLU) applied on the input read, if fused here.
    pub transform: Option<ChannelTransform>,
}

/// A fully connected layer with int8 weights.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct QLinear {
    /// Output features.
    pub out_features: usize,
    /// Input features.
    pub in_features: usize,
    /// Weights `[out][in]`, the input in HWC order of the producer's map.
    pub weights: Vec<i8>,
    /// Real scale of each output row's weights.
    pub weight_scales: Vec<f32>,
    /// Folded bias, as for [`QConv::bias`].
    pub bias: Vec<i32>,
    /// Per output feature `s_in * s_w[o] / s_out`.
    pub requant: Vec<Multiplier>,
    /// Fused activation.
    pub clamp: Clamp,
}

/// A pooling window (max or average) or the global average.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct QPool {
    /// `[kH, kW]` (the whole map for the global average).
    pub kernel: [usize; 2],
    /// `[sH, sW]`.
    pub stride: [usize; 2],
    /// Explicit padding.
    pub padding: Padding,
    /// Rescaling (for averages it includes the `1 / count`); `None` when
    /// input and output quantization are equal (max pooling only).
    pub requant: Option<Multiplier>,
    /// Fused activation.
    pub clamp: Clamp,
}

/// Element-wise sum of two maps with their own scales.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct QAdd {
    /// Input `a` to the shared scale.
    pub a: Multiplier,
    /// Input `b` to the shared scale.
    pub b: Multiplier,
    /// Shared scale to the output.
    pub out: Multiplier,
    /// Headroom shift applied before the input multipliers.
    pub left_shift: u32,
    /// Fused activation.
    pub clamp: Clamp,
}

/// What a step computes.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub enum QKernel {
    /// Convolution.
    Conv2d(QConv),
    /// Fully connected.
    Linear(QLinear),
    /// Max pooling.
    MaxPool(QPool),
    /// Average pooling.
    AvgPool(QPool),
    /// Global average pooling to `[C, 1, 1]`.
    GlobalAvgPool(QPool),
    /// Element-wise add.
    Add(QAdd),
    /// Channel concatenation. Inputs share the output's quantization, so it
    /// is a plain copy, and free when the planner lets producers write into
    /// the output directly.
    Concat,
    /// A per-channel transform as a step of its own (batch norm or ReLU that
    /// could not be fused). Element-wise: may run in place.
    Channel(ChannelTransform),
}

impl QKernel {
    /// Short name for reports.
    pub fn kind(&self) -> &'static str {
        match self {
            QKernel::Conv2d(c) if c.groups > 1 && c.groups == c.in_channels => "depthwise",
            QKernel::Conv2d(c) if c.kernel == [1, 1] => "pointwise",
            QKernel::Conv2d(_) => "conv2d",
            QKernel::Linear(_) => "linear",
            QKernel::MaxPool(_) => "max_pool",
            QKernel::AvgPool(_) => "avg_pool",
            QKernel::GlobalAvgPool(_) => "global_avg_pool",
            QKernel::Add(_) => "add",
            QKernel::Concat => "concat",
            QKernel::Channel(_) => "channel_transform",
        }
    }
}

/// One int8 map.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct QMap {
    /// Name (of the float layer whose value it holds, or the input's).
    pub name: String,
    /// `[C, H, W]`; stored HWC.
    pub shape: Shape,
    /// Quantization: per tensor, or per slice for a concatenation region's
    /// output ([`MapQuant`]).
    pub qp: MapQuant,
    /// The float map it approximates (for error reports).
    pub float_map: MapId,
}

/// One kernel call of the schedule.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct QStep {
    /// Name (of the float layer that produces the output).
    pub name: String,
    /// Float layers folded into this step, first the main one.
    pub layers: Vec<LayerId>,
    /// Maps read, in order.
    pub inputs: Vec<QMapId>,
    /// Map written.
    pub output: QMapId,
    /// The computation.
    pub kernel: QKernel,
}

/// The lowered int8 network.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct QGraph {
    /// Network name.
    pub name: String,
    /// Class names.
    pub labels: Vec<String>,
    /// All maps; side tables of later passes are indexed by [`QMapId`].
    pub maps: Vec<QMap>,
    /// Steps in a valid execution order.
    pub steps: Vec<QStep>,
    /// The input map.
    pub input: QMapId,
    /// Camera bytes to input codes: 256 entries per input channel, folding
    /// pixel scale, mean, std and the input quantization.
    pub pixel_table: Vec<i8>,
    /// The output map.
    pub output: QMapId,
    /// True when the float graph ended in a softmax that was dropped: the
    /// module returns the logits before it.
    pub softmax_dropped: bool,
    /// The maps stored as int16 (`--wide`), in map order; empty (and not
    /// serialized) for an all-int8 graph.
    #[serde(skip_serializing_if = "Vec::is_empty")]
    pub wide: Vec<WideMap>,
}

/// A map stored as int16 ("wide", `--wide`): two bytes per value in the
/// arena, quantized symmetrically per tensor (`zero_point` 0,
/// `scale = max(|min|, |max|) / 32767` of its range, or of its
/// concatenation region's union range). A wide map is never per slice or
/// per channel. Its producer's clamp in int8 codes ([`Clamp`]) does not
/// apply; [`WideMap::min`] and [`WideMap::max`] do.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct WideMap {
    /// The map.
    pub map: QMapId,
    /// Smallest int16 code its producer writes (the fused activation).
    pub min: i32,
    /// Largest int16 code its producer writes.
    pub max: i32,
    /// The layer named with `--wide` that made it wide: its own name, or
    /// another member of the same concatenation region.
    pub because: String,
}

/// The first inconsistency [`QGraph::verify`] found, naming the step or
/// map.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
#[non_exhaustive]
pub enum QGraphError {
    /// The input or output map id is out of range.
    #[error("input or output map out of range")]
    EndsOutOfRange,
    /// The pixel table's length is not 256 per input channel.
    #[error("pixel table is not 256 entries per input channel")]
    PixelTable,
    /// A step names a map id out of range.
    #[error("step `{step}`: map {map} out of range")]
    MapOutOfRange {
        /// Step name.
        step: String,
        /// The map id.
        map: u32,
    },
    /// A step reads a map no earlier step wrote.
    #[error("step `{step}` reads `{map}` before it is written")]
    ReadBeforeWrite {
        /// Step name.
        step: String,
        /// Map name.
        map: String,
    },
    /// Two steps write one map.
    #[error("step `{step}` writes `{map}` a second time")]
    WrittenTwice {
        /// Step name.
        step: String,
        /// Map name.
        map: String,
    },
    /// A map's zero point or scale is unusable.
    #[error("map `{map}` has invalid quantization {qp:?}")]
    Quantization {
        /// Map name.
        map: String,
        /// Its parameters.
        qp: QParams,
    },
    /// A layer's tensors do not match its shape.
    #[error("step `{step}`: {kind} tensors do not match its shape")]
    Tensors {
        /// Step name.
        step: String,
        /// `convolution` or `linear`.
        kind: &'static str,
    },
    /// A concatenation's inputs do not add up to its output.
    #[error("step `{0}`: concat inputs must add up to the output and carry its quantization of their channels")]
    Concat(String),
    /// A per-slice map's runs do not add up to its channels.
    #[error("map `{0}`: quantization slices do not add up to its channels")]
    Slices(String),
    /// A step other than a concatenation writes a per-slice map, or a step
    /// that cannot absorb per-channel input parameters reads one.
    #[error("step `{step}` cannot read or write the per-slice map `{map}`")]
    SlicedAccess {
        /// Step name.
        step: String,
        /// Map name.
        map: String,
    },
    /// The network's input or output map is per slice.
    #[error("the network's input or output map `{0}` must be quantized per tensor")]
    SlicedEnd(String),
    /// No step writes the output map.
    #[error("output map is never written")]
    OutputNeverWritten,
    /// A wide map is listed twice, out of order, is the network's input or
    /// output, is not symmetric per tensor, has a clamp outside int16, or
    /// is read or written by a step that cannot handle it.
    #[error("wide (int16) map `{map}`: {why}")]
    Wide {
        /// Map name (or id when out of range).
        map: String,
        /// What is wrong.
        why: &'static str,
    },
}

impl QGraph {
    /// One map.
    pub fn map(&self, id: QMapId) -> &QMap {
        &self.maps[id.index()]
    }

    /// The input map's quantization (per tensor, [`QGraph::verify`]
    /// checks it).
    pub fn input_qp(&self) -> QParams {
        self.map(self.input).qp.channel(0)
    }

    /// The output map's quantization (per tensor, [`QGraph::verify`]
    /// checks it).
    pub fn output_qp(&self) -> QParams {
        self.map(self.output).qp.channel(0)
    }

    /// One step.
    pub fn step(&self, id: StepId) -> &QStep {
        &self.steps[id.index()]
    }

    /// The wide (int16) entry of map `m`, if it is wide.
    pub fn wide_map(&self, m: QMapId) -> Option<&WideMap> {
        self.wide.iter().find(|w| w.map == m)
    }

    /// True when map `m` is stored as int16.
    pub fn is_wide(&self, m: QMapId) -> bool {
        self.wide_map(m).is_some()
    }

    /// The element type of map `m` in the arena.
    pub fn elem(&self, m: QMapId) -> ingot_rt::wide::Elem {
        if self.is_wide(m) {
            ingot_rt::wide::Elem::I16
        } else {
            ingot_rt::wide::Elem::I8
        }
    }

    /// Bytes one value of map `m` takes (2 for a wide map).
    pub fn value_bytes(&self, m: QMapId) -> usize {
        self.elem(m).bytes()
    }

    /// True when step `s` reads or writes a wide map.
    pub fn step_is_wide(&self, s: &QStep) -> bool {
        s.inputs.iter().chain([&s.output]).any(|&m| self.is_wide(m))
    }

    /// Ids of all steps in schedule order.
    pub fn step_ids(&self) -> impl ExactSizeIterator<Item = StepId> {
        (0..self.steps.len() as u32).map(StepId)
    }

    /// The step writing each map (`None` for the input), indexed by `QMapId`.
    pub fn producers(&self) -> Vec<Option<StepId>> {
        let mut p = vec![None; self.maps.len()];
        for (i, s) in self.steps.iter().enumerate() {
            p[s.output.index()] = Some(StepId(i as u32));
        }
        p
    }

    /// Structural checks every pass may rely on; the planner and the
    /// generator run them (in release builds too). Returns the first
    /// inconsistency found.
    pub fn verify(&self) -> Result<(), QGraphError> {
        let n = self.maps.len();
        let mut written = vec![false; n];
        if self.input.index() >= n || self.output.index() >= n {
            return Err(QGraphError::EndsOutOfRange);
        }
        written[self.input.index()] = true;
        if self.pixel_table.len() != 256 * self.map(self.input).shape.c {
            return Err(QGraphError::PixelTable);
        }
        for s in &self.steps {
            for m in s.inputs.iter().chain([&s.output]) {
                if m.index() >= n {
                    return Err(QGraphError::MapOutOfRange {
                        step: s.name.clone(),
                        map: m.0,
                    });
                }
            }
            if let Some(m) = s.inputs.iter().find(|m| !written[m.index()]) {
                return Err(QGraphError::ReadBeforeWrite {
                    step: s.name.clone(),
                    map: self.map(*m).name.clone(),
                });
            }
            if written[s.output.index()] {
                return Err(QGraphError::WrittenTwice {
                    step: s.name.clone(),
                    map: self.map(s.output).name.clone(),
                });
            }
            written[s.output.index()] = true;
            let out = self.map(s.output);
            for m in s.inputs.iter().chain([&s.output]).map(|&m| self.map(m)) {
                if let Some(qp) = m.qp.runs().into_iter().find(|qp| {
                    !(-128..=127).contains(&qp.zero_point) || qp.scale.is_nan() || qp.scale <= 0.0
                }) {
                    return Err(QGraphError::Quantization {
                        map: m.name.clone(),
                        qp,
                    });
                }
                if m.qp.slice_channels().is_some_and(|c| c != m.shape.c) {
                    return Err(QGraphError::Slices(m.name.clone()));
                }
            }
            // Per-slice maps are written by a concatenation, or, with one
            // zero point for all channels (the kernels' output zero point
            // and clamp are scalar), by a convolution (one multiplier per
            // output channel) or a pooling that keeps its input's
            // parameters. They are read only where a per-channel transform
            // absorbs their parameters or a pooling passes them on.
            let pool = matches!(
                s.kernel,
                QKernel::MaxPool(_) | QKernel::AvgPool(_) | QKernel::GlobalAvgPool(_)
            );
            let passes = pool && s.inputs.first().is_some_and(|&m| self.map(m).qp == out.qp);
            let one_zero = out
                .qp
                .runs()
                .windows(2)
                .all(|w| w[0].zero_point == w[1].zero_point);
            let writes = match &s.kernel {
                QKernel::Concat => true,
                QKernel::Conv2d(_) => one_zero,
                _ => passes && one_zero,
            };
            if out.qp.is_sliced() && !writes {
                return Err(QGraphError::SlicedAccess {
                    step: s.name.clone(),
                    map: out.name.clone(),
                });
            }
            let absorbs = passes
                || match &s.kernel {
                    QKernel::Concat | QKernel::Channel(_) => true,
                    QKernel::Conv2d(c) => c.transform.is_some(),
                    _ => false,
                };
            if let Some(m) = s
                .inputs
                .iter()
                .map(|&m| self.map(m))
                .find(|m| m.qp.is_sliced() && !absorbs)
            {
                return Err(QGraphError::SlicedAccess {
                    step: s.name.clone(),
                    map: m.name.clone(),
                });
            }
            match &s.kernel {
                QKernel::Conv2d(c) => {
                    let per = c.kernel[0] * c.kernel[1] * (c.in_channels / c.groups);
                    if c.weights.len() != c.out_channels * per
                        || c.bias.len() != c.out_channels
                        || c.requant.len() != c.out_channels
                        || out.shape.c != c.out_channels
                    {
                        return Err(QGraphError::Tensors {
                            step: s.name.clone(),
                            kind: "convolution",
                        });
                    }
                }
                QKernel::Linear(l)
                    if l.weights.len() != l.out_features * l.in_features
                        || l.bias.len() != l.out_features
                        || l.requant.len() != l.out_features
                        || out.shape.len() != l.out_features =>
                {
                    return Err(QGraphError::Tensors {
                        step: s.name.clone(),
                        kind: "linear",
                    });
                }
                QKernel::Concat => {
                    let c: usize = s.inputs.iter().map(|&m| self.map(m).shape.c).sum();
                    // Each input must carry the output's parameters of its
                    // own channel slice, so the copy keeps every code.
                    let joined: Vec<QParams> = s
                        .inputs
                        .iter()
                        .flat_map(|&m| self.map(m).qp.per_channel(self.map(m).shape.c))
                        .collect();
                    if c != out.shape.c || joined != out.qp.per_channel(out.shape.c) {
                        return Err(QGraphError::Concat(s.name.clone()));
                    }
                }
                _ => {}
            }
        }
        if !written[self.output.index()] {
            return Err(QGraphError::OutputNeverWritten);
        }
        for m in [self.input, self.output] {
            if self.map(m).qp.is_sliced() {
                return Err(QGraphError::SlicedEnd(self.map(m).name.clone()));
            }
        }
        self.verify_wide()
    }

    /// The checks of the wide maps (see [`QGraphError::Wide`]).
    fn verify_wide(&self) -> Result<(), QGraphError> {
        let err = |m: QMapId, why| QGraphError::Wide {
            map: self
                .maps
                .get(m.index())
                .map_or_else(|| format!("#{}", m.0), |x| x.name.clone()),
            why,
        };
        for (i, w) in self.wide.iter().enumerate() {
            if w.map.index() >= self.maps.len() {
                return Err(err(w.map, "out of range"));
            }
            if i > 0 && self.wide[i - 1].map >= w.map {
                return Err(err(w.map, "listed twice or out of map order"));
            }
            if w.map == self.input || w.map == self.output {
                return Err(err(w.map, "the network's input and output stay int8"));
            }
            match self.map(w.map).qp.tensor() {
                Some(qp) if qp.zero_point == 0 => {}
                _ => return Err(err(w.map, "must be symmetric (zero point 0) per tensor")),
            }
            if !(-32768..=32767).contains(&w.min)
                || !(-32768..=32767).contains(&w.max)
                || w.min > w.max
            {
                return Err(err(w.map, "clamp outside int16"));
            }
        }
        for s in &self.steps {
            if !self.step_is_wide(s) {
                continue;
            }
            let in_wide = s.inputs.first().is_some_and(|&m| self.is_wide(m));
            let ok = match &s.kernel {
                // A copy keeps codes: one element type on both sides.
                QKernel::Concat => s
                    .inputs
                    .iter()
                    .all(|&m| self.is_wide(m) == self.is_wide(s.output)),
                // The int8 → int8 transforms read an int8 map or, affine,
                // an int16 one; a channel step writes int8.
                QKernel::Channel(t) => {
                    let table = matches!(t, ChannelTransform::Table(_));
                    !(self.is_wide(s.output) || in_wide && table)
                }
                QKernel::Conv2d(c) => {
                    !(in_wide && matches!(c.transform, Some(ChannelTransform::Table(_))))
                }
                _ => true,
            };
            if !ok {
                let m = s
                    .inputs
                    .iter()
                    .chain([&s.output])
                    .find(|&&m| self.is_wide(m));
                return Err(err(
                    *m.unwrap_or(&s.output),
                    "read or written by a step that cannot handle it",
                ));
            }
        }
        Ok(())
    }
}

// Conversions to the runtime's parameter types, in one place, so the
// integer simulator and the code generator hand the kernels identical values.

impl From<Padding> for ingot_rt::Padding {
    fn from(p: Padding) -> Self {
        ingot_rt::Padding {
            top: p.top,
            left: p.left,
            bottom: p.bottom,
            right: p.right,
        }
    }
}

impl QConv {
    /// The kernel window in the runtime's terms.
    pub fn runtime_window(&self) -> ingot_rt::Window {
        ingot_rt::Window {
            kh: self.kernel[0],
            kw: self.kernel[1],
            step_y: self.stride[0],
            step_x: self.stride[1],
            dilation_y: self.dilation[0],
            dilation_x: self.dilation[1],
            pad: self.padding.into(),
        }
    }
}

impl QPool {
    /// The pooling window in the runtime's terms.
    pub fn runtime_window(&self) -> ingot_rt::Window {
        ingot_rt::Window {
            kh: self.kernel[0],
            kw: self.kernel[1],
            step_y: self.stride[0],
            step_x: self.stride[1],
            dilation_y: 1,
            dilation_x: 1,
            pad: self.padding.into(),
        }
    }
}

impl ChannelTransform {
    /// The runtime's borrowed view of this transform.
    pub fn runtime(&self) -> ingot_rt::InputTransform<'_> {
        match self {
            ChannelTransform::Affine {
                mul,
                add,
                shift,
                zp_in,
                zp_out,
                clamp,
            } => ingot_rt::InputTransform::Affine(ingot_rt::AffineTransform {
                mul,
                add,
                shift: *shift,
                zp_in: *zp_in,
                zp_out: *zp_out,
                min: clamp.min,
                max: clamp.max,
            }),
            ChannelTransform::Table(t) => ingot_rt::InputTransform::Table(t),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn per_channel_parameters_merge_into_runs() {
        let (a, b) = (
            QParams {
                scale: 0.1,
                zero_point: 0,
            },
            QParams {
                scale: 0.2,
                zero_point: -3,
            },
        );
        assert_eq!(MapQuant::from_channels(&[]), None);
        assert_eq!(
            MapQuant::from_channels(&[a, a, a]),
            Some(MapQuant::Tensor(a))
        );
        let q = MapQuant::from_channels(&[a, a, b, b, b, a]).unwrap();
        assert_eq!(
            q,
            MapQuant::Slices(vec![
                QSlice { channels: 2, qp: a },
                QSlice { channels: 3, qp: b },
                QSlice { channels: 1, qp: a },
            ])
        );
        assert_eq!(q.tensor(), None);
        assert_eq!((q.channel(1), q.channel(2), q.channel(5)), (a, b, a));
        assert_eq!(q.per_channel(6), vec![a, a, b, b, b, a]);
        // Per tensor serializes as before (the QParams itself).
        assert_eq!(
            serde_json::to_string(&MapQuant::Tensor(a)).unwrap(),
            serde_json::to_string(&a).unwrap()
        );
    }
}
