//! ONNX import: reads a model in the ONNX open standard (IR and operator
//! specifications, opsets 11 to 21) and turns it into an `ingot.graph.v1`
//! [`GraphFile`] and its tensors, as training frameworks export them.
//!
//! The importer sits in front of the rest of the frontend: what it produces
//! is checked by the same validator as a hand-written graph
//! ([`Imported::validate`]) before anything is written, so a written graph
//! always loads.
//!
//! - [`proto`]: the protobuf messages read (derived `prost` messages);
//! - [`tensor`]: constants from raw bytes, typed fields or external files;
//! - [`fold`]: constant folding of shape computations;
//! - [`translate`]: ONNX nodes to ingot layers, with one [`Row`] per node.

#![allow(clippy::result_large_err)]

mod error;
pub mod fold;
pub mod proto;
pub mod tensor;
mod translate;

pub use error::ImportError;

use super::{GraphFile, TensorStore};
use std::fmt::Write as _;
use std::path::Path;

/// Lowest default-domain opset imported.
pub const MIN_OPSET: i64 = 11;
/// Highest default-domain opset imported.
pub const MAX_OPSET: i64 = 21;

/// ONNX op types the importer understands (as layers, folded constants, or
/// merged into a neighbour).
pub const SUPPORTED_OPS: &[&str] = &[
    "Add",
    "AveragePool",
    "BatchNormalization",
    "Cast",
    "Clip",
    "Concat",
    "Constant",
    "ConstantOfShape",
    "Conv",
    "Div",
    "Dropout",
    "Flatten",
    "Gather",
    "Gemm",
    "GlobalAveragePool",
    "Identity",
    "MatMul",
    "MaxPool",
    "Mul",
    "Neg",
    "Pad",
    "ReduceMean",
    "Relu",
    "Reshape",
    "Shape",
    "Slice",
    "Softmax",
    "Squeeze",
    "Sub",
    "Unsqueeze",
];

/// Preprocessing and naming the ONNX file does not hold; every field left
/// `None` is taken from the model's `metadata_props` (keys `labels`,
/// `pixel_scale`, `mean`, `std`, `color`) or else from defaults.
#[derive(Debug, Clone, Default)]
pub struct ImportOptions {
    /// Network name (default: the model file's stem).
    pub name: Option<String>,
    /// Class names, one per output value.
    pub labels: Option<Vec<String>>,
    /// Factor applied to camera bytes.
    pub pixel_scale: Option<f32>,
    /// Per-channel mean (one value is repeated over the channels).
    pub mean: Option<Vec<f32>>,
    /// Per-channel standard deviation (one value is repeated).
    pub std: Option<Vec<f32>>,
    /// `gray` or `rgb`.
    pub color: Option<String>,
}

/// One row of the import table: what became of one ONNX node.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Row {
    /// The node's name (its first output when unnamed).
    pub node: String,
    /// Its op type.
    pub op: String,
    /// The ingot layer it became, or what it was folded into.
    pub result: String,
}

/// A model turned into an ingot graph and its tensors.
#[derive(Debug, Clone)]
pub struct Imported {
    /// The graph file (its `weights` is `{name}.safetensors`).
    pub file: GraphFile,
    /// The tensors the graph names.
    pub store: TensorStore,
    /// One row per ONNX node, in execution order.
    pub rows: Vec<Row>,
    /// Defaults taken and other things a user should know.
    pub notices: Vec<String>,
    /// The model's default-domain opset.
    pub opset: i64,
}

/// Reads and imports the model at `path`.
pub fn import(path: &Path, opt: &ImportOptions) -> Result<Imported, ImportError> {
    let bytes = std::fs::read(path).map_err(|source| ImportError::Io {
        path: path.to_path_buf(),
        source,
    })?;
    import_bytes(&bytes, path, opt)
}

/// Imports model bytes; `path` names the model in errors, and its folder is
/// where external data files are looked for.
pub fn import_bytes(
    bytes: &[u8],
    path: &Path,
    opt: &ImportOptions,
) -> Result<Imported, ImportError> {
    use prost::Message;
    let model = proto::ModelProto::decode(bytes).map_err(|e| ImportError::Decode {
        path: path.to_path_buf(),
        message: e.to_string(),
    })?;
    translate::run(&model, path, opt)
}

impl Imported {
    /// Checks the result with ingot's own loader, as if it were the graph
    /// file `graph_path`, and returns the checked graph.
    pub fn validate(&self, graph_path: &Path) -> Result<crate::graph::Graph, ImportError> {
        let mut store = self.store.clone();
        store.path = super::resolve_weights(graph_path, &self.file.weights);
        super::validate(&self.file, &store, graph_path).map_err(|e| ImportError::Graph {
            path: graph_path.to_path_buf(),
            source: Box::new(e),
        })
    }

    /// The graph file's JSON text, as written to disk.
    pub fn graph_json(&self) -> String {
        let mut json = serde_json::to_string_pretty(&self.file).expect("graph files serialise");
        json.push('\n');
        json
    }

    /// The import table: one row per ONNX node.
    pub fn table(&self) -> String {
        let w_node = self
            .rows
            .iter()
            .map(|r| r.node.len())
            .max()
            .unwrap_or(0)
            .max(4);
        let w_op = self
            .rows
            .iter()
            .map(|r| r.op.len())
            .max()
            .unwrap_or(0)
            .max(7);
        let mut s = String::new();
        let _ = writeln!(s, "{:<w_node$}  {:<w_op$}  result", "node", "op type");
        for r in &self.rows {
            let _ = writeln!(s, "{:<w_node$}  {:<w_op$}  {}", r.node, r.op, r.result);
        }
        s
    }
}
