//! Errors of importing an ONNX model. Each names the model file and, where
//! it applies, the node (name, op type, the model's opset), the tensor or
//! the graph input.

use std::path::PathBuf;
use thiserror::Error;

/// Why an ONNX model could not be imported.
#[derive(Debug, Error)]
#[non_exhaustive]
pub enum ImportError {
    /// The model file could not be read.
    #[error("{path}: cannot read: {source}")]
    Io {
        /// The model file.
        path: PathBuf,
        /// The OS error.
        source: std::io::Error,
    },
    /// The bytes are not a protobuf `ModelProto` (truncated, wrong field
    /// types, not an ONNX file).
    #[error("{path}: not a readable ONNX model (protobuf decoding failed: {message})")]
    Decode {
        /// The model file.
        path: PathBuf,
        /// What the decoder said.
        message: String,
    },
    /// A problem with the model as a whole (opset, graph inputs and outputs,
    /// a cycle, duplicate names).
    #[error("{path}: {message}")]
    Model {
        /// The model file.
        path: PathBuf,
        /// What is wrong.
        message: String,
    },
    /// The graph input is not what ingot takes (one NCHW image of fixed size).
    #[error("{path}: input `{input}`: {message}")]
    Input {
        /// The model file.
        path: PathBuf,
        /// The graph input's name.
        input: String,
        /// What was found and what is expected.
        message: String,
    },
    /// A constant tensor cannot be decoded.
    #[error("{path}: tensor `{tensor}`: {message}")]
    Tensor {
        /// The model file.
        path: PathBuf,
        /// The tensor (initializer or attribute) name.
        tensor: String,
        /// What is wrong.
        message: String,
    },
    /// A node of a supported op uses a form ingot cannot express.
    #[error("{path}: node `{node}` ({op}, opset {opset}): {message}")]
    Node {
        /// The model file.
        path: PathBuf,
        /// Node name (or its first output when the node is unnamed).
        node: String,
        /// Op type.
        op: String,
        /// The model's default-domain opset.
        opset: i64,
        /// What is wrong.
        message: String,
    },
    /// A node's op is not one ingot imports.
    #[error("{path}: node `{node}`: op {op} (opset {opset}) is not supported; ingot imports: {supported}")]
    Unsupported {
        /// The model file.
        path: PathBuf,
        /// Node name (or its first output when the node is unnamed).
        node: String,
        /// Op type, with its domain when not the default one.
        op: String,
        /// The model's default-domain opset.
        opset: i64,
        /// The op types ingot imports.
        supported: String,
    },
    /// The import produced a graph ingot's own loader refuses; the message
    /// names the layer. Nothing is written in that case.
    #[error("{path}: the imported graph is refused: {source}")]
    Graph {
        /// The model file.
        path: PathBuf,
        /// The loader's error.
        source: Box<crate::frontend::LoadError>,
    },
}
