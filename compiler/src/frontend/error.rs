//! Errors of loading and validating a graph. Each names the file, and where
//! it applies the layer, op and tensor, so a user can fix the input.

use std::path::PathBuf;
use thiserror::Error;

/// Why a graph could not be loaded.
#[derive(Debug, Error)]
pub enum LoadError {
    /// A file could not be read.
    #[error("{path}: cannot read: {source}")]
    Io {
        /// The file.
        path: PathBuf,
        /// The OS error.
        source: std::io::Error,
    },
    /// The graph file is not valid JSON or not of the expected structure.
    #[error("{path}:{line}:{column}: {message}")]
    Json {
        /// The graph file.
        path: PathBuf,
        /// 1-based line.
        line: usize,
        /// 1-based column.
        column: usize,
        /// What serde said.
        message: String,
    },
    /// A top-level problem (format string, input, output, labels).
    #[error("{path}: {message}")]
    Graph {
        /// The graph file.
        path: PathBuf,
        /// What is wrong.
        message: String,
    },
    /// The `op` of a layer is not one ingot knows.
    #[error("{path}: layer `{layer}`: unknown op `{op}` (known: {known})")]
    UnknownOp {
        /// The graph file.
        path: PathBuf,
        /// Layer name.
        layer: String,
        /// The op as written.
        op: String,
        /// The ops of this format version.
        known: String,
    },
    /// A layer carries an attribute its op does not take.
    #[error("{path}: layer `{layer}` ({op}): unknown attribute `{attr}` (allowed: {allowed})")]
    UnknownAttribute {
        /// The graph file.
        path: PathBuf,
        /// Layer name.
        layer: String,
        /// Op name.
        op: String,
        /// The attribute.
        attr: String,
        /// The attributes this op takes.
        allowed: String,
    },
    /// An attribute is missing or has a bad value.
    #[error("{path}: layer `{layer}` ({op}): attribute `{attr}`: {message}")]
    Attribute {
        /// The graph file.
        path: PathBuf,
        /// Layer name.
        layer: String,
        /// Op name.
        op: String,
        /// The attribute.
        attr: String,
        /// What is wrong.
        message: String,
    },
    /// Wrong inputs: missing, extra, unknown, duplicated names, or a
    /// reference to a later layer (which is how a cycle shows up in a list
    /// that must be in execution order).
    #[error("{path}: layer `{layer}` ({op}): {message}")]
    Inputs {
        /// The graph file.
        path: PathBuf,
        /// Layer name.
        layer: String,
        /// Op name.
        op: String,
        /// What is wrong.
        message: String,
    },
    /// A tensor a layer names is not in the weights file.
    #[error("{weights}: tensor `{tensor}` needed by layer `{layer}` ({op}) is missing")]
    MissingTensor {
        /// The weights file.
        weights: PathBuf,
        /// Layer name.
        layer: String,
        /// Op name.
        op: String,
        /// Tensor name.
        tensor: String,
    },
    /// A tensor's shape does not fit its op and input.
    #[error("{weights}: tensor `{tensor}` of layer `{layer}` ({op}) has shape {got:?}, expected {expected}")]
    TensorShape {
        /// The weights file.
        weights: PathBuf,
        /// Layer name.
        layer: String,
        /// Op name.
        op: String,
        /// Tensor name.
        tensor: String,
        /// Shape in the file.
        got: Vec<usize>,
        /// What the op needs, in words.
        expected: String,
    },
    /// A tensor holds NaN or an infinity.
    #[error("{weights}: tensor `{tensor}` of layer `{layer}` ({op}) holds a non-finite value ({value}) at flat index {index}")]
    NonFinite {
        /// The weights file.
        weights: PathBuf,
        /// Layer name.
        layer: String,
        /// Op name.
        op: String,
        /// Tensor name.
        tensor: String,
        /// Flat index of the first bad value.
        index: usize,
        /// The value.
        value: f32,
    },
    /// A tensor has a dtype ingot does not read.
    #[error("{weights}: tensor `{tensor}` has dtype {dtype}; ingot reads F32, F16 and BF16")]
    Dtype {
        /// The weights file.
        weights: PathBuf,
        /// Tensor name.
        tensor: String,
        /// The dtype in the file.
        dtype: String,
    },
    /// The weights file is truncated or not a safetensors file.
    #[error("{weights}: not a readable safetensors file: {message}")]
    Safetensors {
        /// The weights file.
        weights: PathBuf,
        /// What the parser said.
        message: String,
    },
    /// The commands would need more memory than allowed (an estimate from
    /// the shapes, made before allocating).
    #[error("{path}: the feature maps and weights of this graph need about {need} bytes, more than the limit of {limit} bytes (set {env} to raise it)")]
    TooLarge {
        /// The graph file.
        path: PathBuf,
        /// Estimated bytes.
        need: u64,
        /// The limit in force.
        limit: u64,
        /// The variable that sets the limit.
        env: &'static str,
    },
    /// The input shapes of a layer do not fit its op.
    #[error("{path}: layer `{layer}` ({op}): {message}")]
    Shape {
        /// The graph file.
        path: PathBuf,
        /// Layer name.
        layer: String,
        /// Op name.
        op: String,
        /// What is wrong, with the shapes involved.
        message: String,
    },
}
