//! Frontend: reads a graph file (`ingot.graph.v1`) and its safetensors
//! weights, and validates them once into a checked [`Graph`].
//!
//! Every problem becomes a [`LoadError`] naming the file, layer, op and
//! tensor; nothing is silently fixed.

// `LoadError` is large (file, layer, op, tensor and shapes, so a user can fix
// the input); it is built at most once per load, far off any hot path, so
// boxing it would cost readability for nothing.
#![allow(clippy::result_large_err)]

pub mod checks;
mod error;
pub mod format;
pub mod onnx;
mod ops;
pub mod weights;

pub use error::LoadError;
pub use format::{GraphFile, InputFile, LayerFile, FORMAT_V1};
pub use weights::{StoredTensor, TensorStore};

use crate::graph::shape::window_output;
use crate::graph::{
    BatchNorm, Color, Conv2d, Graph, InputSpec, Layer, LayerId, Linear, MapId, Op, Padding, Pool2d,
    Shape, Tensor, Window,
};
use serde_json::Value;
use std::collections::HashMap;
use std::path::{Path, PathBuf};

/// Ops of format version 1.
pub const OPS: &[&str] = &[
    "conv2d",
    "batch_norm",
    "relu",
    "relu6",
    "max_pool2d",
    "avg_pool2d",
    "global_avg_pool",
    "flatten",
    "linear",
    "concat",
    "add",
    "softmax",
    "dropout",
];

/// Smallest difference allowed between the preprocessed values of pixels 0
/// and 255. A usual normalisation spreads them over about 1 to 5; a spread
/// 20 orders of magnitude smaller (a `pixel_scale` of 1e-45, a `std` of
/// 1e38) leaves the network a constant input, and no int8 scale can
/// resolve it.
pub const MIN_INPUT_SPREAD: f32 = 1e-20;

/// Loads and validates a graph file and the weights file it names.
pub fn load(path: &Path) -> Result<Graph, LoadError> {
    let text =
        crate::guard::read_text_bounded(path, crate::guard::MAX_JSON_BYTES).map_err(|source| {
            LoadError::Io {
                path: path.to_path_buf(),
                source,
            }
        })?;
    let file = parse(&text, path)?;
    let weights_path = resolve_weights(path, &file.weights);
    let store = TensorStore::load(&weights_path)?;
    let g = validate(&file, &store, path)?;
    checks::check_memory(&g, path, crate::guard::memory_limit())?;
    Ok(g)
}

/// Parses graph JSON; `path` names it in errors.
pub fn parse(text: &str, path: &Path) -> Result<GraphFile, LoadError> {
    serde_json::from_str(text).map_err(|e| {
        // serde's message for valid JSON of the wrong kind names our struct
        // ("invalid length 0, expected struct GraphFile"); say it in words.
        let kind = match serde_json::from_str::<Value>(text) {
            Ok(Value::Object(_)) | Err(_) => None,
            Ok(Value::Array(_)) => Some("an array"),
            Ok(Value::String(_)) => Some("a string"),
            Ok(Value::Number(_)) => Some("a number"),
            Ok(Value::Bool(_)) => Some("a boolean"),
            Ok(Value::Null) => Some("null"),
        };
        match kind {
            Some(k) => LoadError::Graph {
                path: path.to_path_buf(),
                message: format!(
                    "the file holds {k}; a graph file is one JSON object {{\"format\": \"{FORMAT_V1}\", \"name\": ..., \"layers\": [...], ...}}"
                ),
            },
            None => LoadError::Json {
                path: path.to_path_buf(),
                line: e.line(),
                column: e.column(),
                message: e.to_string(),
            },
        }
    })
}

/// The weights path named in a graph file, relative to the graph file.
pub fn resolve_weights(graph_path: &Path, weights: &str) -> PathBuf {
    match graph_path.parent() {
        Some(dir) => dir.join(weights),
        None => PathBuf::from(weights),
    }
}

/// Validates a parsed graph file against its tensors into a checked graph.
/// `path` is the graph file's path, used for messages and to resolve the
/// weights path recorded in the graph.
pub fn validate(file: &GraphFile, store: &TensorStore, path: &Path) -> Result<Graph, LoadError> {
    Validator { path, store }.run(file)
}

struct Validator<'a> {
    path: &'a Path,
    store: &'a TensorStore,
}

/// The layer being validated, for error messages.
struct Ctx<'a> {
    layer: &'a str,
    op: &'a str,
}

impl Validator<'_> {
    fn graph_err(&self, message: impl Into<String>) -> LoadError {
        LoadError::Graph {
            path: self.path.to_path_buf(),
            message: message.into(),
        }
    }

    fn attr_err(&self, cx: &Ctx, attr: &str, message: impl Into<String>) -> LoadError {
        LoadError::Attribute {
            path: self.path.to_path_buf(),
            layer: cx.layer.into(),
            op: cx.op.into(),
            attr: attr.into(),
            message: message.into(),
        }
    }

    fn inputs_err(&self, cx: &Ctx, message: impl Into<String>) -> LoadError {
        LoadError::Inputs {
            path: self.path.to_path_buf(),
            layer: cx.layer.into(),
            op: cx.op.into(),
            message: message.into(),
        }
    }

    fn shape_err(&self, cx: &Ctx, message: impl Into<String>) -> LoadError {
        LoadError::Shape {
            path: self.path.to_path_buf(),
            layer: cx.layer.into(),
            op: cx.op.into(),
            message: message.into(),
        }
    }

    fn run(&self, file: &GraphFile) -> Result<Graph, LoadError> {
        if file.format != FORMAT_V1 {
            return Err(self.graph_err(format!(
                "`format` is \"{}\"; this version of ingot reads \"{FORMAT_V1}\"",
                file.format
            )));
        }
        let input = self.input(&file.input)?;
        let mut names: HashMap<&str, MapId> = HashMap::new();
        names.insert(&file.input.name, MapId::INPUT);
        let mut shapes = vec![input.shape];
        let mut layers: Vec<Layer> = Vec::with_capacity(file.layers.len());
        // Every layer, including later ones, so a forward reference can be told
        // apart from a name that does not exist at all.
        let all_names: HashMap<&str, usize> = file
            .layers
            .iter()
            .enumerate()
            .map(|(i, l)| (l.name.as_str(), i))
            .collect();

        for (i, lf) in file.layers.iter().enumerate() {
            let cx = Ctx {
                layer: &lf.name,
                op: &lf.op,
            };
            if lf.name.is_empty() {
                return Err(self.graph_err(format!("layer #{i} has an empty name")));
            }
            if names.contains_key(lf.name.as_str()) {
                return Err(self.inputs_err(&cx, format!("the name `{}` is used twice", lf.name)));
            }
            if !OPS.contains(&lf.op.as_str()) {
                return Err(LoadError::UnknownOp {
                    path: self.path.to_path_buf(),
                    layer: lf.name.clone(),
                    op: lf.op.clone(),
                    known: OPS.join(", "),
                });
            }
            let input_names = self.input_names(&cx, lf)?;
            let mut inputs = Vec::with_capacity(input_names.len());
            for n in &input_names {
                match names.get(n.as_str()) {
                    Some(&m) => inputs.push(m),
                    None if *n == lf.name => {
                        return Err(
                            self.inputs_err(&cx, format!("reads its own output `{n}` (a cycle)"))
                        );
                    }
                    None if all_names.contains_key(n.as_str()) => {
                        return Err(self.inputs_err(
                            &cx,
                            format!("reads `{n}`, which comes later in `layers`; layers must be listed in execution order and may not form a cycle"),
                        ));
                    }
                    None => {
                        return Err(self.inputs_err(
                            &cx,
                            format!("reads `{n}`, which is neither the input nor a layer"),
                        ))
                    }
                }
            }
            let in_shapes: Vec<Shape> = inputs.iter().map(|m| shapes[m.index()]).collect();
            let (op, out) = self.layer(&cx, lf, &in_shapes)?;
            if out.checked_len().is_none() {
                return Err(self.shape_err(&cx, format!("output shape {out} overflows")));
            }
            if out.is_empty() {
                return Err(self.shape_err(&cx, format!("output shape {out} is empty")));
            }
            names.insert(&lf.name, MapId(i as u32 + 1));
            shapes.push(out);
            layers.push(Layer {
                name: lf.name.clone(),
                op,
                inputs,
            });
        }

        let output = *names.get(file.output.as_str()).ok_or_else(|| {
            self.graph_err(format!(
                "`output` names `{}`, which is not a layer",
                file.output
            ))
        })?;
        if output == MapId::INPUT {
            return Err(self.graph_err("`output` names the input; the graph computes nothing"));
        }
        for (i, l) in layers.iter().enumerate() {
            if matches!(l.op, Op::Softmax) && MapId(i as u32 + 1) != output {
                return Err(self.graph_err(format!(
                    "layer `{}`: softmax is only supported as the output layer",
                    l.name
                )));
            }
        }
        let out_shape = shapes[output.index()];
        let labels = file.labels.clone().unwrap_or_default();
        if !labels.is_empty() && labels.len() != out_shape.len() {
            return Err(self.graph_err(format!(
                "{} labels given but the output `{}` has {} values (shape {out_shape})",
                labels.len(),
                file.output,
                out_shape.len()
            )));
        }
        let mut consumers = vec![Vec::new(); shapes.len()];
        for (i, l) in layers.iter().enumerate() {
            for m in &l.inputs {
                let list: &mut Vec<LayerId> = &mut consumers[m.index()];
                if list.last() != Some(&LayerId(i as u32)) {
                    list.push(LayerId(i as u32));
                }
            }
        }
        Ok(Graph {
            name: file.name.clone(),
            source: self.path.to_path_buf(),
            weights_path: self.store.path.clone(),
            input,
            labels,
            layers,
            output,
            shapes,
            consumers,
        })
    }

    fn input(&self, f: &InputFile) -> Result<InputSpec, LoadError> {
        let bad = |m: String| self.graph_err(format!("input `{}`: {m}", f.name));
        if f.name.is_empty() {
            return Err(self.graph_err("the input has an empty name"));
        }
        let [c, h, w] = f.shape[..] else {
            return Err(bad(format!("`shape` must be [C, H, W], got {:?}", f.shape)));
        };
        let shape = Shape::new(c, h, w);
        if shape.checked_len().is_none_or(|n| n == 0) {
            return Err(bad(format!("`shape` {:?} is empty or overflows", f.shape)));
        }
        let color = match f.color.as_deref() {
            Some("gray") => Color::Gray,
            Some("rgb") => Color::Rgb,
            None if c == 3 => Color::Rgb,
            None => Color::Gray,
            Some(o) => return Err(bad(format!("`color` is \"{o}\"; use \"gray\" or \"rgb\""))),
        };
        let want_c = if color == Color::Gray { 1 } else { 3 };
        if c != want_c {
            return Err(bad(format!(
                "color {color:?} needs {want_c} channel(s) but the shape has {c}"
            )));
        }
        let per_channel =
            |v: &Option<Vec<f32>>, name: &str, default: f32| -> Result<Vec<f32>, LoadError> {
                match v {
                    None => Ok(vec![default; c]),
                    Some(v) if v.len() == c => {
                        if let Some(x) = v.iter().find(|x| !x.is_finite()) {
                            return Err(bad(format!("`{name}` holds {x}")));
                        }
                        Ok(v.clone())
                    }
                    Some(v) => Err(bad(format!(
                        "`{name}` has {} values for {c} channel(s)",
                        v.len()
                    ))),
                }
            };
        let mean = per_channel(&f.mean, "mean", 0.0)?;
        let std = per_channel(&f.std, "std", 1.0)?;
        if let Some(s) = std.iter().find(|s| **s <= 0.0) {
            return Err(bad(format!("`std` must be positive, got {s}")));
        }
        let pixel_scale = f.pixel_scale.unwrap_or(1.0 / 255.0);
        if !(pixel_scale.is_finite() && pixel_scale > 0.0) {
            return Err(bad(format!(
                "`pixel_scale` must be positive, got {pixel_scale}"
            )));
        }
        let spec = InputSpec {
            name: f.name.clone(),
            shape,
            pixel_scale,
            mean,
            std,
            color,
        };
        // A preprocessing that maps every pixel byte to the same float (a
        // tiny `pixel_scale`, a huge `std`) or past f32 leaves the network
        // a constant input: nothing to calibrate or classify.
        for ch in 0..c {
            let (lo, hi) = (spec.preprocess(ch, 0), spec.preprocess(ch, 255));
            if !(lo.is_finite() && hi.is_finite()) {
                return Err(bad(format!(
                    "channel {ch}: pixels 0 and 255 become {lo} and {hi}; `pixel_scale`, `mean` and `std` must keep them finite"
                )));
            }
            // `lo`, `hi` are finite here, so the spread is a number.
            if (hi - lo).abs() < MIN_INPUT_SPREAD {
                return Err(bad(format!(
                    "channel {ch}: pixels 0 and 255 become {lo} and {hi} (pixel_scale {pixel_scale}, mean {}, std {}): the input would be constant",
                    spec.mean[ch], spec.std[ch]
                )));
            }
        }
        Ok(spec)
    }

    fn input_names(&self, cx: &Ctx, lf: &LayerFile) -> Result<Vec<String>, LoadError> {
        let multi = matches!(lf.op.as_str(), "concat" | "add");
        match (&lf.input, &lf.inputs, multi) {
            (Some(_), Some(_), _) => {
                Err(self.inputs_err(cx, "give either `input` or `inputs`, not both"))
            }
            (None, None, false) => Err(self.inputs_err(cx, "missing `input`")),
            (None, None, true) => Err(self.inputs_err(cx, "missing `inputs`")),
            (Some(i), None, false) => Ok(vec![i.clone()]),
            (None, Some(_), false) => {
                Err(self.inputs_err(cx, "takes one map: use `input`, not `inputs`"))
            }
            (_, _, true) => {
                let list = match (&lf.input, &lf.inputs) {
                    (Some(i), None) => vec![i.clone()],
                    (None, Some(l)) => l.clone(),
                    _ => unreachable!(),
                };
                if list.is_empty() {
                    return Err(self.inputs_err(cx, "`inputs` is empty"));
                }
                if lf.op == "add" && list.len() != 2 {
                    return Err(self.inputs_err(
                        cx,
                        format!("`add` takes exactly 2 inputs, got {}", list.len()),
                    ));
                }
                Ok(list)
            }
        }
    }

    fn check_attrs(&self, cx: &Ctx, lf: &LayerFile, allowed: &[&str]) -> Result<(), LoadError> {
        for k in lf.attrs.keys() {
            if !allowed.contains(&k.as_str()) {
                return Err(LoadError::UnknownAttribute {
                    path: self.path.to_path_buf(),
                    layer: cx.layer.into(),
                    op: cx.op.into(),
                    attr: k.clone(),
                    allowed: if allowed.is_empty() {
                        "none".into()
                    } else {
                        allowed.join(", ")
                    },
                });
            }
        }
        Ok(())
    }

    fn tensor(&self, cx: &Ctx, name: &str) -> Result<Tensor, LoadError> {
        let t = self
            .store
            .tensors
            .get(name)
            .ok_or_else(|| LoadError::MissingTensor {
                weights: self.store.path.clone(),
                layer: cx.layer.into(),
                op: cx.op.into(),
                tensor: name.into(),
            })?;
        if let Some((index, &value)) = t.data.iter().enumerate().find(|(_, v)| !v.is_finite()) {
            return Err(LoadError::NonFinite {
                weights: self.store.path.clone(),
                layer: cx.layer.into(),
                op: cx.op.into(),
                tensor: name.into(),
                index,
                value,
            });
        }
        Ok(Tensor {
            name: name.into(),
            shape: t.shape.clone(),
            data: t.data.clone(),
        })
    }

    fn expect_shape(
        &self,
        cx: &Ctx,
        t: &Tensor,
        ok: bool,
        expected: impl Into<String>,
    ) -> Result<(), LoadError> {
        if ok {
            Ok(())
        } else {
            Err(LoadError::TensorShape {
                weights: self.store.path.clone(),
                layer: cx.layer.into(),
                op: cx.op.into(),
                tensor: t.name.clone(),
                got: t.shape.clone(),
                expected: expected.into(),
            })
        }
    }
}
