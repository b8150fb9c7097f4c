//! The checked float graph: the IR every later pass takes.
//!
//! Layers live in a `Vec` in execution order and are addressed by [`LayerId`];
//! feature maps are addressed by [`MapId`] (map 0 is the graph input, map
//! `i + 1` is the output of layer `i`). Facts about maps (shapes here; ranges,
//! offsets in later passes) are side tables indexed by `MapId`, never optional
//! fields on the nodes. A [`Graph`] can only be built by the frontend's
//! validator, so every pass may assume: names are unique, inputs refer to
//! earlier maps, tensor shapes match their ops, weights are finite and every
//! size product fits in `usize`.

pub mod cost;
pub mod equalize;
pub mod shape;

pub use shape::{Padding, Shape, Window};

use serde::{Deserialize, Serialize};
use std::fmt;
use std::path::{Path, PathBuf};

/// Index of a layer in [`Graph::layers`].
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord, Hash, Serialize, Deserialize)]
pub struct LayerId(pub u32);

/// Index of a feature map: 0 is the graph input, `i + 1` the output of layer `i`.
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord, Hash, Serialize, Deserialize)]
pub struct MapId(pub u32);

impl LayerId {
    /// The index as `usize`.
    pub fn index(self) -> usize {
        self.0 as usize
    }
    /// The map this layer writes.
    pub fn output(self) -> MapId {
        MapId(self.0 + 1)
    }
}

impl MapId {
    /// The graph input.
    pub const INPUT: MapId = MapId(0);
    /// The index as `usize`.
    pub fn index(self) -> usize {
        self.0 as usize
    }
    /// The layer that writes this map, or `None` for the graph input.
    pub fn producer(self) -> Option<LayerId> {
        self.0.checked_sub(1).map(LayerId)
    }
}

impl fmt::Display for LayerId {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "L{}", self.0)
    }
}
impl fmt::Display for MapId {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "M{}", self.0)
    }
}

/// A dense f32 tensor read from the weights file, row-major.
#[derive(Debug, Clone, PartialEq)]
pub struct Tensor {
    /// Name in the weights file.
    pub name: String,
    /// Dimensions, outermost first.
    pub shape: Vec<usize>,
    /// Values, row-major; `data.len()` is the product of `shape`.
    pub data: Vec<f32>,
}

impl Tensor {
    /// Number of elements.
    pub fn len(&self) -> usize {
        self.data.len()
    }
    /// True when the tensor holds no element.
    pub fn is_empty(&self) -> bool {
        self.data.is_empty()
    }
}

/// Colour handling of the camera image before preprocessing.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum Color {
    /// One channel, luminance.
    Gray,
    /// Three channels, red, green, blue.
    Rgb,
}

/// The graph input and the preprocessing that turns camera bytes into it:
/// `x[c] = (pixel * pixel_scale - mean[c]) / std[c]`.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct InputSpec {
    /// Name layers use to refer to the input.
    pub name: String,
    /// `[C, H, W]`.
    pub shape: Shape,
    /// Factor applied to 0..=255 pixel bytes first.
    pub pixel_scale: f32,
    /// Per-channel mean subtracted after scaling.
    pub mean: Vec<f32>,
    /// Per-channel standard deviation divided by last.
    pub std: Vec<f32>,
    /// Colour conversion of camera images.
    pub color: Color,
}

impl InputSpec {
    /// The float value one camera byte of channel `c` becomes.
    pub fn preprocess(&self, c: usize, pixel: u8) -> f32 {
        (pixel as f32 * self.pixel_scale - self.mean[c]) / self.std[c]
    }
}

/// 2-D convolution. Weight `[O, I/groups, kH, kW]`.
#[derive(Debug, Clone, PartialEq)]
pub struct Conv2d {
    /// Weight tensor `[O, I/groups, kH, kW]`.
    pub weight: Tensor,
    /// Optional bias `[O]`.
    pub bias: Option<Tensor>,
    /// Output channels.
    pub out_channels: usize,
    /// Input channels.
    pub in_channels: usize,
    /// `[kH, kW]`, from the weight shape.
    pub kernel: [usize; 2],
    /// `[sH, sW]`.
    pub stride: [usize; 2],
    /// Explicit padding ("same" is resolved at load time).
    pub padding: Padding,
    /// `[dH, dW]`.
    pub dilation: [usize; 2],
    /// Channel groups (`in_channels` for depthwise).
    pub groups: usize,
}

impl Conv2d {
    /// True for a depthwise convolution (one group per input channel).
    pub fn is_depthwise(&self) -> bool {
        self.groups == self.in_channels && self.groups > 1
    }
}

/// Inference-time batch normalisation with running statistics.
#[derive(Debug, Clone, PartialEq)]
pub struct BatchNorm {
    /// Tensor-name prefix (`prefix.weight`, `.bias`, `.running_mean`, `.running_var`).
    pub prefix: String,
    /// Scale (gamma) `[C]`.
    pub gamma: Tensor,
    /// Shift (beta) `[C]`.
    pub beta: Tensor,
    /// Running mean `[C]`.
    pub mean: Tensor,
    /// Running variance `[C]`.
    pub var: Tensor,
    /// Added to the variance.
    pub eps: f32,
}

impl BatchNorm {
    /// Per-channel `(scale, shift)` such that `bn(x) = scale * x + shift`.
    pub fn affine(&self) -> Vec<(f32, f32)> {
        (0..self.gamma.len())
            .map(|c| {
                let s = self.gamma.data[c] / (self.var.data[c] + self.eps).sqrt();
                (s, self.beta.data[c] - self.mean.data[c] * s)
            })
            .collect()
    }
}

/// Max or average pooling window.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Pool2d {
    /// `[kH, kW]`.
    pub kernel: [usize; 2],
    /// `[sH, sW]` (defaults to the kernel).
    pub stride: [usize; 2],
    /// Explicit padding. Max pooling ignores padded taps; average pooling
    /// counts them as zeros and always divides by `kH * kW`.
    pub padding: Padding,
}

/// Fully connected layer. Weight `[out, in]`; the input is the producer's
/// map flattened in `[C, H, W]` order.
#[derive(Debug, Clone, PartialEq)]
pub struct Linear {
    /// Weight `[out, in]`.
    pub weight: Tensor,
    /// Optional bias `[out]`.
    pub bias: Option<Tensor>,
    /// Output features.
    pub out_features: usize,
    /// Input features.
    pub in_features: usize,
}

/// What a layer computes.
#[derive(Debug, Clone, PartialEq)]
pub enum Op {
    /// 2-D convolution.
    Conv2d(Conv2d),
    /// Batch normalisation (inference form).
    BatchNorm(BatchNorm),
    /// `max(x, 0)`.
    Relu,
    /// `min(max(x, 0), 6)`.
    Relu6,
    /// Max pooling.
    MaxPool2d(Pool2d),
    /// Average pooling.
    AvgPool2d(Pool2d),
    /// Mean over each channel's pixels: `[C, H, W]` to `[C, 1, 1]`.
    GlobalAvgPool,
    /// `[C, H, W]` to `[C*H*W, 1, 1]` in `C, H, W` order.
    Flatten,
    /// Fully connected.
    Linear(Linear),
    /// Channel concatenation of the inputs, in order.
    Concat,
    /// Element-wise sum of two maps of equal shape.
    Add,
    /// Softmax over channels; only as the last layer.
    Softmax,
    /// Identity at inference.
    Dropout,
}

impl Op {
    /// The op's name in the graph format.
    pub fn kind(&self) -> &'static str {
        match self {
            Op::Conv2d(_) => "conv2d",
            Op::BatchNorm(_) => "batch_norm",
            Op::Relu => "relu",
            Op::Relu6 => "relu6",
            Op::MaxPool2d(_) => "max_pool2d",
            Op::AvgPool2d(_) => "avg_pool2d",
            Op::GlobalAvgPool => "global_avg_pool",
            Op::Flatten => "flatten",
            Op::Linear(_) => "linear",
            Op::Concat => "concat",
            Op::Add => "add",
            Op::Softmax => "softmax",
            Op::Dropout => "dropout",
        }
    }
}

/// One layer: a name, an op and the maps it reads.
#[derive(Debug, Clone, PartialEq)]
pub struct Layer {
    /// Unique name from the graph file.
    pub name: String,
    /// The computation.
    pub op: Op,
    /// Maps read, in order (all earlier than this layer's output).
    pub inputs: Vec<MapId>,
}

/// A validated float network. Built only by [`crate::frontend`].
#[derive(Debug, Clone)]
pub struct Graph {
    pub(crate) name: String,
    pub(crate) source: PathBuf,
    pub(crate) weights_path: PathBuf,
    pub(crate) input: InputSpec,
    pub(crate) labels: Vec<String>,
    pub(crate) layers: Vec<Layer>,
    pub(crate) output: MapId,
    /// Side table: shape of every map, indexed by `MapId`.
    pub(crate) shapes: Vec<Shape>,
    /// Side table: layers reading each map, indexed by `MapId`.
    pub(crate) consumers: Vec<Vec<LayerId>>,
}

impl Graph {
    /// Network name.
    pub fn name(&self) -> &str {
        &self.name
    }
    /// Path of the graph file it was loaded from.
    pub fn source(&self) -> &Path {
        &self.source
    }
    /// Path of the weights file.
    pub fn weights_path(&self) -> &Path {
        &self.weights_path
    }
    /// Input description and preprocessing.
    pub fn input(&self) -> &InputSpec {
        &self.input
    }
    /// Class names (may be empty).
    pub fn labels(&self) -> &[String] {
        &self.labels
    }
    /// Layers in execution order.
    pub fn layers(&self) -> &[Layer] {
        &self.layers
    }
    /// One layer.
    pub fn layer(&self, id: LayerId) -> &Layer {
        &self.layers[id.index()]
    }
    /// Ids of all layers, in execution order.
    pub fn layer_ids(&self) -> impl ExactSizeIterator<Item = LayerId> + '_ {
        (0..self.layers.len() as u32).map(LayerId)
    }
    /// The map the network returns.
    pub fn output(&self) -> MapId {
        self.output
    }
    /// Number of maps (input plus one per layer).
    pub fn map_count(&self) -> usize {
        self.shapes.len()
    }
    /// Shape of a map.
    pub fn shape(&self, m: MapId) -> Shape {
        self.shapes[m.index()]
    }
    /// Layers that read a map, in execution order.
    pub fn consumers(&self, m: MapId) -> &[LayerId] {
        &self.consumers[m.index()]
    }
    /// Name of a map: the input's name or its producing layer's name.
    pub fn map_name(&self, m: MapId) -> &str {
        match m.producer() {
            None => &self.input.name,
            Some(l) => &self.layers[l.index()].name,
        }
    }
    /// Looks a layer up by name.
    pub fn find_layer(&self, name: &str) -> Option<LayerId> {
        self.layers
            .iter()
            .position(|l| l.name == name)
            .map(|i| LayerId(i as u32))
    }
}
