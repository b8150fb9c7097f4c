//! The on-disk graph format `ingot.graph.v1`, as serde types.
//!
//! These types mirror the JSON one to one and carry no meaning checks; the
//! validator in [`super`] turns them into a [`crate::graph::Graph`]. They are
//! public so that exporters (training programs, tests) can write graphs
//! without hand-formatting JSON.

use serde::{Deserialize, Serialize};
use serde_json::{Map, Value};

/// The `format` string of this version.
pub const FORMAT_V1: &str = "ingot.graph.v1";

/// Top level of a graph file.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct GraphFile {
    /// Must be [`FORMAT_V1`].
    pub format: String,
    /// Network name.
    pub name: String,
    /// Path of the `.safetensors` file, relative to the graph file.
    pub weights: String,
    /// The input map and its preprocessing.
    pub input: InputFile,
    /// Class names, one per output channel.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub labels: Option<Vec<String>>,
    /// Layers in execution order.
    pub layers: Vec<LayerFile>,
    /// Name of the layer whose output the network returns.
    pub output: String,
}

/// The `input` object.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct InputFile {
    /// Name layers use to read the input.
    pub name: String,
    /// `[C, H, W]`.
    pub shape: Vec<usize>,
    /// Factor applied to 0..=255 pixel bytes (default 1/255).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub pixel_scale: Option<f32>,
    /// Per-channel mean (default 0).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub mean: Option<Vec<f32>>,
    /// Per-channel standard deviation (default 1).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub std: Option<Vec<f32>>,
    /// `gray` or `rgb` (default: `gray` for 1 channel, `rgb` for 3).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub color: Option<String>,
}

/// One entry of `layers`: name, op, inputs, and the op's attributes.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct LayerFile {
    /// Unique layer name.
    pub name: String,
    /// Op name, e.g. `conv2d`.
    pub op: String,
    /// The one map read (all ops but `concat` and `add`).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub input: Option<String>,
    /// The maps read by `concat` and `add`.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub inputs: Option<Vec<String>>,
    /// Every other key: the op's attributes.
    #[serde(flatten)]
    pub attrs: Map<String, Value>,
}

impl LayerFile {
    /// A layer with one input and no attributes.
    pub fn new(name: impl Into<String>, op: &str, input: impl Into<String>) -> Self {
        LayerFile { name: name.into(), op: op.into(), input: Some(input.into()), inputs: None, attrs: Map::new() }
    }

    /// A layer with several inputs (`concat`, `add`).
    pub fn multi(name: impl Into<String>, op: &str, inputs: &[&str]) -> Self {
        LayerFile {
            name: name.into(),
            op: op.into(),
            input: None,
            inputs: Some(inputs.iter().map(|s| s.to_string()).collect()),
            attrs: Map::new(),
        }
    }

    /// Adds an attribute.
    pub fn attr(mut self, key: &str, value: impl Into<Value>) -> Self {
        self.attrs.insert(key.to_string(), value.into());
        self
    }

    /// A `conv2d` reading `input`, with tensors `{name}.weight` and, if
    /// `bias`, `{name}.bias`; square stride and padding.
    pub fn conv2d(name: &str, input: &str, bias: bool, stride: usize, padding: usize) -> Self {
        let mut l = LayerFile::new(name, "conv2d", input).attr("weight", format!("{name}.weight"));
        if bias {
            l = l.attr("bias", format!("{name}.bias"));
        }
        if stride != 1 {
            l = l.attr("stride", stride);
        }
        if padding != 0 {
            l = l.attr("padding", padding);
        }
        l
    }

    /// A `batch_norm` whose tensors are `{name}.weight`, `.bias`,
    /// `.running_mean`, `.running_var`.
    pub fn batch_norm(name: &str, input: &str) -> Self {
        LayerFile::new(name, "batch_norm", input).attr("prefix", name)
    }

    /// A `linear` with tensors `{name}.weight` and, if `bias`, `{name}.bias`.
    pub fn linear(name: &str, input: &str, bias: bool) -> Self {
        let mut l = LayerFile::new(name, "linear", input).attr("weight", format!("{name}.weight"));
        if bias {
            l = l.attr("bias", format!("{name}.bias"));
        }
        l
    }

    /// A pooling layer (`max_pool2d` or `avg_pool2d`) with square kernel and stride.
    pub fn pool(name: &str, op: &str, input: &str, kernel: usize, stride: usize) -> Self {
        LayerFile::new(name, op, input).attr("kernel", kernel).attr("stride", stride)
    }
}
