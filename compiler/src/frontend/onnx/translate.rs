//! ONNX nodes to ingot layers.
//!
//! Nodes are visited in a topological order (the file's own order when it
//! already is one). Every value is either a constant (initializers,
//! `Constant` nodes, and whatever folds from them), or a runtime map held
//! by an ingot layer, with its ONNX dimensions (batch 1 first). Ops that
//! only rename a map (`Identity`, `Dropout`, unit-dimension reshapes) make
//! the new value an alias of the same layer; `Pad` is held back and merged
//! into the next convolution or pooling; constant `Sub`/`Add`/`Mul`/`Div`
//! right on the input are folded into the input's mean and std.

use super::fold::{self, Attrs};
use super::proto::{attr_type, AttributeProto, ModelProto, NodeProto, ValueInfoProto};
use super::tensor::{self, Const, Data};
use super::{ImportError, ImportOptions, Imported, Row, MAX_OPSET, MIN_OPSET, SUPPORTED_OPS};
use crate::frontend::{GraphFile, InputFile, LayerFile, TensorStore, FORMAT_V1};
use serde_json::{json, Value};
use std::collections::{BTreeMap, BinaryHeap, HashMap, HashSet};
use std::path::{Path, PathBuf};

/// Largest input image accepted, in values (a generous bound that keeps a
/// hostile header from driving later allocations).
const MAX_INPUT: usize = 1 << 26;

/// Largest output accepted, in values (classes): checked before a default
/// label is made for each, so a hostile shape cannot drive that allocation.
const MAX_OUTPUT: usize = 1 << 20;

#[derive(Debug, Clone)]
enum Val {
    Const(Const),
    Map(MapVal),
}

#[derive(Debug, Clone)]
struct MapVal {
    /// The ingot map: a layer's name or the input's name.
    map: String,
    /// ONNX dimensions, batch (1) first.
    dims: Vec<usize>,
    /// Zero padding `[top, left, bottom, right]` of a `Pad` not yet merged,
    /// and the index of the `Pad` node's row.
    pad: Option<([usize; 4], usize)>,
    /// Known to hold no negative value (after ReLU), so zero padding in
    /// front of a max pooling changes nothing.
    nonneg: bool,
    /// Still the graph input, up to a folded per-channel affine map.
    input_stage: bool,
}

impl MapVal {
    /// `[C, H, W]` as ingot stores the map, for ranks ingot can hold.
    fn chw(&self) -> Option<[usize; 3]> {
        match self.dims[..] {
            [1, c, h, w] => Some([c, h, w]),
            [1, n] => Some([n, 1, 1]),
            [n] => Some([n, 1, 1]),
            [1, n, 1, 1, ..] if self.dims[2..].iter().all(|&d| d == 1) => Some([n, 1, 1]),
            _ => None,
        }
    }
}

struct NodeAttrs<'a>(&'a [AttributeProto]);

impl NodeAttrs<'_> {
    fn get(&self, name: &str) -> Option<&AttributeProto> {
        self.0.iter().find(|a| a.name == name)
    }
    fn float(&self, name: &str) -> Option<f32> {
        self.get(name).map(|a| a.f)
    }
    fn string(&self, name: &str) -> Option<String> {
        self.get(name)
            .map(|a| String::from_utf8_lossy(&a.s).into_owned())
    }
}

impl Attrs for NodeAttrs<'_> {
    fn int(&self, name: &str) -> Option<i64> {
        self.get(name).map(|a| a.i)
    }
    fn ints(&self, name: &str) -> Option<Vec<i64>> {
        self.get(name).map(|a| a.ints.clone())
    }
}

struct Tx<'m> {
    path: PathBuf,
    dir: PathBuf,
    opset: i64,
    vals: HashMap<String, Val>,
    /// Number of node inputs and graph outputs reading each value.
    readers: HashMap<String, usize>,
    layers: Vec<LayerFile>,
    /// Layer index by layer name.
    layer_ix: HashMap<String, usize>,
    used_names: HashSet<String>,
    store: TensorStore,
    rows: Vec<Row>,
    input_name: String,
    /// Folded normalisation: the network sees `(x_raw - a[c]) / b[c]`.
    norm_a: Vec<f32>,
    norm_b: Vec<f32>,
    _model: std::marker::PhantomData<&'m ()>,
}

/// What a node became, for its row.
enum Outcome {
    Layer(String, &'static str),
    Text(String),
}

pub(super) fn run(
    model: &ModelProto,
    path: &Path,
    opt: &ImportOptions,
) -> Result<Imported, ImportError> {
    let model_err = |m: String| ImportError::Model {
        path: path.to_path_buf(),
        message: m,
    };
    let opset = model
        .opset_import
        .iter()
        .find(|o| o.domain.is_empty() || o.domain == "ai.onnx")
        .map(|o| o.version)
        .ok_or_else(|| model_err("the model imports no default-domain (ai.onnx) opset".into()))?;
    if !(MIN_OPSET..=MAX_OPSET).contains(&opset) {
        return Err(model_err(format!(
            "the model uses opset {opset}; ingot imports opsets {MIN_OPSET} to {MAX_OPSET} (re-export with an opset in that range)"
        )));
    }
    let graph = model
        .graph
        .as_ref()
        .ok_or_else(|| model_err("the model holds no graph".into()))?;
    let dir = match path.parent() {
        Some(d) if !d.as_os_str().is_empty() => d.to_path_buf(),
        _ => PathBuf::from("."),
    };
    let mut tx = Tx {
        path: path.to_path_buf(),
        dir,
        opset,
        vals: HashMap::new(),
        readers: HashMap::new(),
        layers: Vec::new(),
        layer_ix: HashMap::new(),
        used_names: HashSet::new(),
        store: TensorStore::new(PathBuf::new()),
        rows: Vec::new(),
        input_name: String::new(),
        norm_a: Vec::new(),
        norm_b: Vec::new(),
        _model: std::marker::PhantomData,
    };
    for t in &graph.initializer {
        let c = tensor::decode(t, &tx.dir).map_err(|m| ImportError::Tensor {
            path: path.to_path_buf(),
            tensor: t.name.clone(),
            message: m,
        })?;
        tx.vals.insert(t.name.clone(), Val::Const(c));
    }
    // Older exporters list initializers among the inputs too.
    let inputs: Vec<&ValueInfoProto> = graph
        .input
        .iter()
        .filter(|i| !tx.vals.contains_key(&i.name))
        .collect();
    let [input] = inputs[..] else {
        return Err(model_err(format!(
            "the graph has {} inputs ({}); ingot imports networks with exactly one image input",
            inputs.len(),
            inputs
                .iter()
                .map(|i| format!("`{}`", i.name))
                .collect::<Vec<_>>()
                .join(", ")
        )));
    };
    let dims = tx.input_dims(input)?;
    tx.input_name = input.name.clone();
    tx.used_names.insert(input.name.clone());
    tx.norm_a = vec![0.0; dims[1]];
    tx.norm_b = vec![1.0; dims[1]];
    tx.vals.insert(
        input.name.clone(),
        Val::Map(MapVal {
            map: input.name.clone(),
            dims: dims.clone(),
            pad: None,
            nonneg: false,
            input_stage: true,
        }),
    );
    let Some(output) = graph.output.first() else {
        return Err(model_err("the graph has no output".into()));
    };
    if graph.output.len() > 1 {
        return Err(model_err(format!(
            "the graph has {} outputs; ingot imports networks with one output",
            graph.output.len()
        )));
    }
    for n in &graph.node {
        for i in n.input.iter().filter(|i| !i.is_empty()) {
            *tx.readers.entry(i.clone()).or_default() += 1;
        }
    }
    *tx.readers.entry(output.name.clone()).or_default() += 1;

    for ni in topo_order(&graph.node, &tx.vals, path)? {
        tx.node(&graph.node[ni])?;
    }

    let out = match tx.vals.get(&output.name) {
        Some(Val::Map(m)) if m.pad.is_none() && m.map != tx.input_name => m.clone(),
        Some(Val::Map(m)) if m.pad.is_some() => {
            return Err(model_err(format!(
                "the output `{}` is a padded map; a `Pad` must feed a convolution or pooling",
                output.name
            )))
        }
        Some(Val::Map(_)) => {
            return Err(model_err(format!(
            "the output `{}` is the input itself (up to normalisation); the graph computes nothing",
            output.name
        )))
        }
        Some(Val::Const(_)) => {
            return Err(model_err(format!(
                "the output `{}` is a constant; it does not depend on the input",
                output.name
            )))
        }
        None => {
            return Err(model_err(format!(
                "the output `{}` is not computed by any node",
                output.name
            )))
        }
    };
    let out_len = out
        .dims
        .iter()
        .try_fold(1usize, |a, &d| a.checked_mul(d))
        .filter(|&n| n <= MAX_OUTPUT)
        .ok_or_else(|| {
            model_err(format!(
                "the output `{}` has shape {:?}: more than {MAX_OUTPUT} values",
                output.name, out.dims
            ))
        })?;
    let meta: BTreeMap<&str, &str> = model
        .metadata_props
        .iter()
        .map(|e| (e.key.as_str(), e.value.as_str()))
        .collect();
    let mut notices = Vec::new();
    let name = opt.name.clone().unwrap_or_else(|| {
        path.file_stem()
            .map(|s| s.to_string_lossy().into_owned())
            .unwrap_or_else(|| "model".into())
    });
    let c = dims[1];
    let meta_list = |k: &str| -> Result<Option<Vec<f32>>, ImportError> {
        meta.get(k)
            .map(|v| {
                parse_floats(v).ok_or_else(|| {
                    model_err(format!(
                        "metadata_props `{k}` is `{v}`, not a list of numbers"
                    ))
                })
            })
            .transpose()
    };
    let labels = match (&opt.labels, meta.get("labels")) {
        (Some(l), _) => l.clone(),
        (None, Some(v)) => split_list(v),
        (None, None) => {
            notices.push(format!(
                "labels: none given (--labels or metadata_props `labels`); using 0..{}",
                out_len.saturating_sub(1)
            ));
            (0..out_len).map(|i| i.to_string()).collect()
        }
    };
    let pixel_scale = match (opt.pixel_scale, meta_list("pixel_scale")?) {
        (Some(s), _) => s,
        (None, Some(v)) if v.len() == 1 => v[0],
        (None, Some(_)) => {
            return Err(model_err(
                "metadata_props `pixel_scale` must be one number".into(),
            ))
        }
        (None, None) => {
            notices.push(
                "pixel scale: none given (--pixel-scale or metadata_props `pixel_scale`); using 1/255"
                    .into(),
            );
            1.0 / 255.0
        }
    };
    let per_channel = |v: Vec<f32>, what: &str| -> Result<Vec<f32>, ImportError> {
        match v.len() {
            1 => Ok(vec![v[0]; c]),
            n if n == c => Ok(v),
            n => Err(model_err(format!(
                "{what} has {n} values but the input has {c} channel(s)"
            ))),
        }
    };
    let mut stats = Vec::new();
    for (what, flag, default) in [("mean", &opt.mean, 0.0f32), ("std", &opt.std, 1.0)] {
        let v = match (flag, meta_list(what)?) {
            (Some(v), _) => per_channel(v.clone(), what)?,
            (None, Some(v)) => per_channel(v, what)?,
            (None, None) => {
                notices.push(format!(
                    "{what}: none given (--{what} or metadata_props `{what}`); using {default}"
                ));
                vec![default; c]
            }
        };
        stats.push(v);
    }
    let (mut mean, mut std) = (stats[0].clone(), stats[1].clone());
    if tx.norm_a.iter().any(|&a| a != 0.0) || tx.norm_b.iter().any(|&b| b != 1.0) {
        for ch in 0..c {
            mean[ch] += tx.norm_a[ch] * std[ch];
            std[ch] *= tx.norm_b[ch];
        }
        notices.push(format!(
            "input normalisation in the model folded into the preprocessing: mean {mean:?}, std {std:?}"
        ));
    }
    let color = match (&opt.color, meta.get("color")) {
        (Some(c), _) => Some(c.clone()),
        (None, Some(v)) => Some(v.to_string()),
        (None, None) => None,
    };
    let file = GraphFile {
        format: FORMAT_V1.into(),
        name: name.clone(),
        weights: format!("{name}.safetensors"),
        input: InputFile {
            name: tx.input_name.clone(),
            shape: dims[1..].to_vec(),
            pixel_scale: Some(pixel_scale),
            mean: Some(mean),
            std: Some(std),
            color,
        },
        labels: Some(labels),
        layers: tx.layers,
        output: out.map,
    };
    Ok(Imported {
        file,
        store: tx.store,
        rows: tx.rows,
        notices,
        opset,
    })
}

fn parse_floats(s: &str) -> Option<Vec<f32>> {
    let v: Vec<f32> = split_list(s)
        .iter()
        .map(|x| x.parse::<f32>().ok())
        .collect::<Option<_>>()?;
    (!v.is_empty()).then_some(v)
}

fn split_list(s: &str) -> Vec<String> {
    s.trim()
        .trim_start_matches('[')
        .trim_end_matches(']')
        .split(',')
        .map(|x| x.trim().trim_matches('"').to_string())
        .filter(|x| !x.is_empty())
        .collect()
}

fn node_name(n: &NodeProto) -> String {
    if !n.name.is_empty() {
        n.name.clone()
    } else {
        n.output.first().cloned().unwrap_or_default()
    }
}

/// Kahn's algorithm, always taking the earliest node of the file that is
/// ready, so a file already in order keeps its order; nodes left over form
/// a cycle and are named.
fn topo_order(
    nodes: &[NodeProto],
    known: &HashMap<String, Val>,
    path: &Path,
) -> Result<Vec<usize>, ImportError> {
    let mut producer: HashMap<&str, usize> = HashMap::new();
    for (i, n) in nodes.iter().enumerate() {
        for o in n.output.iter().filter(|o| !o.is_empty()) {
            if producer.insert(o, i).is_some() || known.contains_key(o) {
                return Err(ImportError::Model {
                    path: path.to_path_buf(),
                    message: format!(
                        "the value `{o}` is written twice (node `{}` and another node or initializer)",
                        node_name(n)
                    ),
                });
            }
        }
    }
    let mut indeg = vec![0usize; nodes.len()];
    let mut users: Vec<Vec<usize>> = vec![Vec::new(); nodes.len()];
    for (i, n) in nodes.iter().enumerate() {
        for inp in n.input.iter().filter(|x| !x.is_empty()) {
            match producer.get(inp.as_str()) {
                Some(&p) => {
                    indeg[i] += 1;
                    users[p].push(i);
                }
                None if known.contains_key(inp) => {}
                None => {
                    return Err(ImportError::Node {
                        path: path.to_path_buf(),
                        node: node_name(n),
                        op: n.op_type.clone(),
                        opset: 0,
                        message: format!(
                            "reads `{inp}`, which is neither the graph input, an initializer nor the output of a node (a missing initializer?)"
                        ),
                    })
                }
            }
        }
    }
    let mut ready: BinaryHeap<std::cmp::Reverse<usize>> = (0..nodes.len())
        .filter(|&i| indeg[i] == 0)
        .map(std::cmp::Reverse)
        .collect();
    let mut order = Vec::with_capacity(nodes.len());
    while let Some(std::cmp::Reverse(i)) = ready.pop() {
        order.push(i);
        for &u in &users[i] {
            indeg[u] -= 1;
            if indeg[u] == 0 {
                ready.push(std::cmp::Reverse(u));
            }
        }
    }
    if order.len() < nodes.len() {
        let stuck: Vec<String> = (0..nodes.len())
            .filter(|&i| indeg[i] > 0)
            .take(8)
            .map(|i| format!("`{}` ({})", node_name(&nodes[i]), nodes[i].op_type))
            .collect();
        return Err(ImportError::Model {
            path: path.to_path_buf(),
            message: format!(
                "the graph has a cycle: these nodes wait on each other's outputs: {}",
                stuck.join(", ")
            ),
        });
    }
    Ok(order)
}

fn fmt_pair(v: [usize; 2]) -> Value {
    if v[0] == v[1] {
        json!(v[0])
    } else {
        json!(v)
    }
}

fn fmt_pad(p: [usize; 4]) -> Value {
    if p.iter().all(|&x| x == p[0]) {
        json!(p[0])
    } else {
        json!(p)
    }
}

/// One axis of a window: pads `(lo, hi)` for `auto_pad` SAME_UPPER /
/// SAME_LOWER, from the ONNX operator specification of `Conv`.
fn same_pads(input: usize, k: usize, s: usize, d: usize, upper: bool) -> (usize, usize) {
    let out = input.div_ceil(s);
    let total = ((out - 1) * s + d * (k - 1) + 1).saturating_sub(input);
    if upper {
        (total / 2, total - total / 2)
    } else {
        (total - total / 2, total / 2)
    }
}

impl Tx<'_> {
    fn input_err(&self, input: &str, m: String) -> ImportError {
        ImportError::Input {
            path: self.path.clone(),
            input: input.into(),
            message: m,
        }
    }

    fn input_dims(&self, vi: &ValueInfoProto) -> Result<Vec<usize>, ImportError> {
        let tt = vi
            .r#type
            .as_ref()
            .and_then(|t| t.tensor_type.as_ref())
            .ok_or_else(|| self.input_err(&vi.name, "is not a tensor".into()))?;
        use super::proto::data_type as dt;
        if ![dt::FLOAT, dt::FLOAT16, dt::DOUBLE, dt::BFLOAT16].contains(&tt.elem_type) {
            return Err(self.input_err(
                &vi.name,
                format!(
                    "has element type {}; ingot takes a floating-point image",
                    dt::name(tt.elem_type)
                ),
            ));
        }
        let shape = tt.shape.as_ref().ok_or_else(|| {
            self.input_err(
                &vi.name,
                "has no declared shape; ingot needs [N, C, H, W] with fixed C, H and W".into(),
            )
        })?;
        let desc: Vec<String> = shape
            .dim
            .iter()
            .map(|d| match (&d.dim_value, &d.dim_param) {
                (Some(v), _) => v.to_string(),
                (None, Some(p)) => format!("`{p}`"),
                _ => "?".into(),
            })
            .collect();
        let found = format!("[{}]", desc.join(", "));
        if shape.dim.len() != 4 {
            return Err(self.input_err(
                &vi.name,
                format!("has shape {found}; ingot expects an NCHW image [N, C, H, W] (N may be dynamic)"),
            ));
        }
        let mut dims = vec![1usize];
        for (i, d) in shape.dim.iter().enumerate().skip(1) {
            match d.dim_value {
                Some(v) if v > 0 && v <= MAX_INPUT as i64 => dims.push(v as usize),
                Some(v) if v > 0 => {
                    return Err(self.input_err(
                        &vi.name,
                        format!("has shape {found}: dimension {i} ({v}) is far larger than any image ingot can place in a microcontroller's RAM"),
                    ))
                }
                _ => {
                    return Err(self.input_err(
                        &vi.name,
                        format!("has shape {found}: dimension {i} is dynamic or not positive; only the batch dimension may be dynamic (ingot needs fixed C, H and W; re-export with a fixed input size)"),
                    ))
                }
            }
        }
        if let Some(b) = shape.dim[0].dim_value {
            if b != 1 && b > 0 {
                return Err(self.input_err(
                    &vi.name,
                    format!("has shape {found}: batch {b}; ingot runs one image at a time (batch 1 or dynamic)"),
                ));
            }
        }
        let total = dims[1..]
            .iter()
            .try_fold(1usize, |a, &d| a.checked_mul(d))
            .filter(|&n| n <= MAX_INPUT);
        if total.is_none() {
            return Err(self.input_err(
                &vi.name,
                format!("has shape {found}: more than {MAX_INPUT} values"),
            ));
        }
        let (c, w) = (dims[1], dims[3]);
        if c != 1 && c != 3 {
            let hint = if w == 1 || w == 3 {
                " (this looks like channels-last [N, H, W, C]; export the model with channels-first NCHW input)"
            } else {
                ""
            };
            return Err(self.input_err(
                &vi.name,
                format!("has shape {found}: {c} channels; ingot expects NCHW with 1 (gray) or 3 (RGB) channels{hint}"),
            ));
        }
        Ok(dims)
    }

    fn node_err(&self, n: &NodeProto, m: impl Into<String>) -> ImportError {
        ImportError::Node {
            path: self.path.clone(),
            node: node_name(n),
            op: n.op_type.clone(),
            opset: self.opset,
            message: m.into(),
        }
    }

    fn unsupported(&self, n: &NodeProto) -> ImportError {
        ImportError::Unsupported {
            path: self.path.clone(),
            node: node_name(n),
            op: if n.domain.is_empty() || n.domain == "ai.onnx" {
                n.op_type.clone()
            } else {
                format!("{}::{}", n.domain, n.op_type)
            },
            opset: self.opset,
            supported: SUPPORTED_OPS.join(", "),
        }
    }

    fn unique_name(&mut self, base: &str) -> String {
        let base = if base.is_empty() { "layer" } else { base };
        let mut name = base.to_string();
        let mut k = 1;
        while self.used_names.contains(&name) {
            name = format!("{base}_{k}");
            k += 1;
        }
        self.used_names.insert(name.clone());
        name
    }

    /// Stores a tensor under `want` (or a variant of it when that name holds
    /// other values) and returns the name used.
    fn tensor(&mut self, want: &str, dims: Vec<usize>, data: Vec<f32>) -> String {
        let mut name = want.to_string();
        let mut k = 1;
        loop {
            match self.store.tensors.get(&name) {
                Some(t) if t.shape == dims && t.data == data => return name,
                Some(_) => {
                    name = format!("{want}_{k}");
                    k += 1;
                }
                None => {
                    self.store.insert(name.clone(), dims, data);
                    return name;
                }
            }
        }
    }

    fn push_layer(&mut self, n: &NodeProto, layer: LayerFile) -> String {
        let name = layer.name.clone();
        self.layer_ix.insert(name.clone(), self.layers.len());
        self.layers.push(layer);
        let _ = n;
        name
    }

    fn set_out(&mut self, n: &NodeProto, v: Val) {
        if let Some(o) = n.output.first() {
            self.vals.insert(o.clone(), v);
        }
    }

    fn new_map(&mut self, n: &NodeProto, map: String, dims: Vec<usize>, nonneg: bool) {
        self.set_out(
            n,
            Val::Map(MapVal {
                map,
                dims,
                pad: None,
                nonneg,
                input_stage: false,
            }),
        );
    }

    /// Extra outputs (batch-norm statistics, pooling indices, dropout masks)
    /// must not be read.
    fn only_first_output(&self, n: &NodeProto) -> Result<(), ImportError> {
        for o in n.output.iter().skip(1).filter(|o| !o.is_empty()) {
            if self.readers.get(o).copied().unwrap_or(0) > 0 {
                return Err(self.node_err(
                    n,
                    format!("its extra output `{o}` is read; ingot computes only the first output at inference"),
                ));
            }
        }
        Ok(())
    }

    fn node(&mut self, n: &NodeProto) -> Result<(), ImportError> {
        if !(n.domain.is_empty() || n.domain == "ai.onnx") {
            return Err(self.unsupported(n));
        }
        let op = n.op_type.as_str();
        if !SUPPORTED_OPS.contains(&op) {
            if op == "Transpose" {
                if let Some(Val::Map(m)) = n.input.first().and_then(|i| self.vals.get(i)) {
                    if m.input_stage {
                        return Err(self.input_err(
                            &self.input_name,
                            format!(
                                "is followed by Transpose (node `{}`): the model takes channels-last (NHWC) input; ingot expects NCHW [N, C, H, W] (export with channels-first input)",
                                node_name(n)
                            ),
                        ));
                    }
                }
            }
            return Err(self.unsupported(n));
        }
        let attrs = NodeAttrs(&n.attribute);
        for a in &n.attribute {
            if !a.ref_attr_name.is_empty() {
                return Err(self.node_err(n, format!("attribute `{}` refers to a function's attribute; ingot imports plain graphs", a.name)));
            }
        }
        let ins: Vec<Option<Val>> = n
            .input
            .iter()
            .map(|i| {
                if i.is_empty() {
                    Ok(None)
                } else {
                    self.vals.get(i).cloned().map(Some).ok_or_else(|| {
                        self.node_err(n, format!("reads `{i}`, which is not computed"))
                    })
                }
            })
            .collect::<Result<_, _>>()?;
        let outcome = if op == "Constant" {
            let c = self.constant(n, &attrs)?;
            self.set_out(n, Val::Const(c));
            Outcome::Text("constant".into())
        } else if op == "Shape" {
            let dims = match ins.first().cloned().flatten() {
                Some(Val::Map(m)) => m.dims,
                Some(Val::Const(c)) => c.dims,
                None => return Err(self.node_err(n, "has no input")),
            };
            let r = dims.len() as i64;
            let clampi = |v: i64| (if v < 0 { v + r } else { v }).clamp(0, r) as usize;
            let s = clampi(attrs.int("start").unwrap_or(0));
            let e = clampi(attrs.int("end").unwrap_or(r));
            let v: Vec<i64> = dims[s..e.max(s)].iter().map(|&d| d as i64).collect();
            self.set_out(n, Val::Const(Const::int_vec(v)));
            Outcome::Text("constant (shape of a map, batch 1)".into())
        } else if !ins.is_empty()
            && ins
                .iter()
                .all(|v| v.as_ref().is_none_or(|v| matches!(v, Val::Const(_))))
            && fold::FOLDABLE.contains(&op)
        {
            let cs: Vec<Option<&Const>> = ins
                .iter()
                .map(|v| match v {
                    Some(Val::Const(c)) => Some(c),
                    _ => None,
                })
                .collect();
            let mut cs = cs;
            let value_attr;
            if op == "ConstantOfShape" {
                if let Some(t) = attrs.get("value").and_then(|a| a.t.as_ref()) {
                    value_attr = self.decode_attr_tensor(n, t)?;
                    cs.push(Some(&value_attr));
                }
            }
            let c = fold::eval(op, &cs, &attrs, self.opset).map_err(|m| self.node_err(n, m))?;
            self.set_out(n, Val::Const(c));
            Outcome::Text("constant (folded)".into())
        } else {
            self.translate(n, op, &attrs, &ins)?
        };
        let result = match outcome {
            Outcome::Layer(name, kind) => format!("layer `{name}` ({kind})"),
            Outcome::Text(t) => t,
        };
        self.rows.push(Row {
            node: node_name(n),
            op: n.op_type.clone(),
            result,
        });
        Ok(())
    }

    fn decode_attr_tensor(
        &self,
        n: &NodeProto,
        t: &super::proto::TensorProto,
    ) -> Result<Const, ImportError> {
        tensor::decode(t, &self.dir).map_err(|m| ImportError::Tensor {
            path: self.path.clone(),
            tensor: if t.name.is_empty() {
                format!("{} (attribute of node `{}`)", n.op_type, node_name(n))
            } else {
                t.name.clone()
            },
            message: m,
        })
    }

    fn constant(&self, n: &NodeProto, attrs: &NodeAttrs) -> Result<Const, ImportError> {
        let a = n
            .attribute
            .first()
            .ok_or_else(|| self.node_err(n, "has no value attribute"))?;
        let wrong = |want: &str| {
            self.node_err(
                n,
                format!(
                    "attribute `{}` has attribute type {}, expected {want}",
                    a.name, a.r#type
                ),
            )
        };
        let _ = attrs;
        Ok(match a.name.as_str() {
            "value" => {
                let t = a.t.as_ref().ok_or_else(|| wrong("TENSOR"))?;
                if a.r#type != attr_type::TENSOR && a.r#type != 0 {
                    return Err(wrong("TENSOR"));
                }
                self.decode_attr_tensor(n, t)?
            }
            "value_float" => Const {
                dims: vec![],
                data: Data::F(vec![a.f]),
            },
            "value_floats" => Const {
                dims: vec![a.floats.len()],
                data: Data::F(a.floats.clone()),
            },
            "value_int" => Const {
                dims: vec![],
                data: Data::I(vec![a.i]),
            },
            "value_ints" => Const::int_vec(a.ints.clone()),
            o => {
                return Err(self.node_err(
                    n,
                    format!(
                    "value attribute `{o}` is not supported (value, value_float(s), value_int(s))"
                ),
                ))
            }
        })
    }

    fn map_in(&self, n: &NodeProto, ins: &[Option<Val>], i: usize) -> Result<MapVal, ImportError> {
        match ins.get(i).cloned().flatten() {
            Some(Val::Map(m)) => Ok(m),
            Some(Val::Const(_)) => Err(self.node_err(
                n,
                format!("input {i} is a constant where ingot needs a map computed from the image"),
            )),
            None => Err(self.node_err(n, format!("input {i} is missing"))),
        }
    }

    fn const_in(&self, n: &NodeProto, ins: &[Option<Val>], i: usize) -> Result<Const, ImportError> {
        match ins.get(i).cloned().flatten() {
            Some(Val::Const(c)) => Ok(c),
            Some(Val::Map(_)) => Err(self.node_err(
                n,
                format!("input {i} (`{}`) is computed from the image; ingot needs a constant (an initializer) there", n.input[i]),
            )),
            None => Err(self.node_err(n, format!("input {i} is missing"))),
        }
    }

    fn opt_const(
        &self,
        n: &NodeProto,
        ins: &[Option<Val>],
        i: usize,
    ) -> Result<Option<Const>, ImportError> {
        match ins.get(i).cloned().flatten() {
            None => Ok(None),
            Some(_) => self.const_in(n, ins, i).map(Some),
        }
    }

    fn no_pad(&self, n: &NodeProto, m: &MapVal) -> Result<(), ImportError> {
        if m.pad.is_some() {
            return Err(self.node_err(
                n,
                "reads the output of a Pad; ingot merges zero padding only into a following Conv, MaxPool or AveragePool",
            ));
        }
        Ok(())
    }

    /// Mark a pending `Pad` as merged into `layer`.
    fn merged_pad(&mut self, m: &MapVal, layer: &str) {
        if let Some((_, row)) = m.pad {
            self.rows[row].result = format!("padding, merged into `{layer}`");
        }
    }

    /// Base map of a value read by a layer: the pre-pad map, with the
    /// input's affine stage ended.
    fn read(&self, n: &NodeProto, m: &MapVal) -> Result<String, ImportError> {
        if m.input_stage && m.map == self.input_name {
            // Fine: the layer reads the normalised input.
        }
        let _ = n;
        Ok(m.map.clone())
    }

    fn spatial(&self, n: &NodeProto, m: &MapVal) -> Result<[usize; 3], ImportError> {
        match m.dims[..] {
            [1, c, h, w] => Ok([c, h, w]),
            _ => Err(self.node_err(n, format!("needs a 4-D map [1, C, H, W], got {:?}", m.dims))),
        }
    }

    fn pair_attr(
        &self,
        n: &NodeProto,
        attrs: &NodeAttrs,
        name: &str,
        default: usize,
    ) -> Result<[usize; 2], ImportError> {
        match attrs.ints(name) {
            None => Ok([default; 2]),
            Some(v) if v.len() == 2 && v.iter().all(|&x| x >= 1) => {
                Ok([v[0] as usize, v[1] as usize])
            }
            Some(v) => Err(self.node_err(
                n,
                format!("`{name}` is {v:?}; ingot imports 2-D windows with two positive values"),
            )),
        }
    }

    /// Padding `[top, left, bottom, right]` of a window op from `auto_pad`
    /// and `pads`.
    #[allow(clippy::too_many_arguments)]
    fn window_pads(
        &self,
        n: &NodeProto,
        attrs: &NodeAttrs,
        hw: [usize; 2],
        k: [usize; 2],
        s: [usize; 2],
        d: [usize; 2],
    ) -> Result<[usize; 4], ImportError> {
        let auto = attrs.string("auto_pad").unwrap_or_default();
        match auto.as_str() {
            "" | "NOTSET" => match attrs.ints("pads") {
                None => Ok([0; 4]),
                Some(p) if p.len() == 4 && p.iter().all(|&x| x >= 0) => {
                    Ok([p[0] as usize, p[1] as usize, p[2] as usize, p[3] as usize])
                }
                Some(p) => Err(self.node_err(
                    n,
                    format!("`pads` is {p:?}; expected four non-negative values [top, left, bottom, right]"),
                )),
            },
            "VALID" => Ok([0; 4]),
            "SAME_UPPER" | "SAME_LOWER" => {
                let up = auto == "SAME_UPPER";
                let (t, b) = same_pads(hw[0], k[0], s[0], d[0], up);
                let (l, r) = same_pads(hw[1], k[1], s[1], d[1], up);
                Ok([t, l, b, r])
            }
            o => Err(self.node_err(n, format!("`auto_pad` is `{o}`; expected NOTSET, VALID, SAME_UPPER or SAME_LOWER"))),
        }
    }

    #[allow(clippy::too_many_arguments)]
    fn out_size(
        &self,
        n: &NodeProto,
        input: usize,
        lo: usize,
        hi: usize,
        k: usize,
        s: usize,
        d: usize,
    ) -> Result<usize, ImportError> {
        let span = d * (k - 1) + 1;
        let padded = input + lo + hi;
        if padded < span {
            return Err(self.node_err(
                n,
                format!("the window ({span}) does not fit the padded input ({padded})"),
            ));
        }
        Ok((padded - span) / s + 1)
    }

    fn translate(
        &mut self,
        n: &NodeProto,
        op: &str,
        attrs: &NodeAttrs,
        ins: &[Option<Val>],
    ) -> Result<Outcome, ImportError> {
        let base = node_name(n);
        match op {
            "Conv" => {
                let x = self.map_in(n, ins, 0)?;
                let [c, h, w] = self.spatial(n, &x)?;
                let wt = self.const_in(n, ins, 1)?;
                let [o, cg, kh, kw] = wt.dims[..] else {
                    return Err(self.node_err(n, format!("weight `{}` has shape {:?}; ingot imports 2-D convolutions (weight [O, C/group, kH, kW])", n.input[1], wt.dims)));
                };
                if let Some(ks) = attrs.ints("kernel_shape") {
                    if ks != [kh as i64, kw as i64] {
                        return Err(self.node_err(
                            n,
                            format!("`kernel_shape` {ks:?} differs from the weight's {kh}x{kw}"),
                        ));
                    }
                }
                let group = attrs.int("group").unwrap_or(1);
                if group < 1 || c % group as usize != 0 || cg * group as usize != c {
                    return Err(self.node_err(
                        n,
                        format!(
                            "group {group} does not fit {c} input channels and weight {:?}",
                            wt.dims
                        ),
                    ));
                }
                let s = self.pair_attr(n, attrs, "strides", 1)?;
                let d = self.pair_attr(n, attrs, "dilations", 1)?;
                let mut p = self.window_pads(n, attrs, [h, w], [kh, kw], s, d)?;
                if let Some((pp, _)) = x.pad {
                    for i in 0..4 {
                        p[i] += pp[i];
                    }
                }
                let (h0, w0) = match x.pad {
                    Some((pp, _)) => (h - pp[0] - pp[2], w - pp[1] - pp[3]),
                    None => (h, w),
                };
                let oh = self.out_size(n, h0, p[0], p[2], kh, s[0], d[0])?;
                let ow = self.out_size(n, w0, p[1], p[3], kw, s[1], d[1])?;
                let name = self.unique_name(&base);
                let wname = self.tensor(&n.input[1], wt.dims.clone(), wt.floats());
                let mut l =
                    LayerFile::new(&name, "conv2d", self.read(n, &x)?).attr("weight", wname);
                if let Some(b) = self.opt_const(n, ins, 2)? {
                    if b.len() != o {
                        return Err(self.node_err(
                            n,
                            format!("bias has {} values for {o} output channels", b.len()),
                        ));
                    }
                    let bname = self.tensor(&n.input[2], vec![o], b.floats());
                    l = l.attr("bias", bname);
                }
                if s != [1, 1] {
                    l = l.attr("stride", fmt_pair(s));
                }
                if p != [0; 4] {
                    l = l.attr("padding", fmt_pad(p));
                }
                if d != [1, 1] {
                    l = l.attr("dilation", fmt_pair(d));
                }
                if group != 1 {
                    l = l.attr("groups", group);
                }
                self.merged_pad(&x, &name);
                self.push_layer(n, l);
                self.new_map(n, name.clone(), vec![1, o, oh, ow], false);
                Ok(Outcome::Layer(name, "conv2d"))
            }
            "BatchNormalization" => {
                let x = self.map_in(n, ins, 0)?;
                self.no_pad(n, &x)?;
                if attrs.int("training_mode").unwrap_or(0) != 0 {
                    return Err(self.node_err(n, "`training_mode` is 1; ingot imports the inference form (running statistics)"));
                }
                self.only_first_output(n)?;
                let c = x.dims.get(1).copied().unwrap_or(0);
                let mut ts = Vec::new();
                for i in 1..5 {
                    let t = self.const_in(n, ins, i)?;
                    if t.len() != c {
                        return Err(self.node_err(
                            n,
                            format!("`{}` has {} values for {c} channels", n.input[i], t.len()),
                        ));
                    }
                    ts.push(t);
                }
                let name = self.unique_name(&base);
                // Exporters keep a framework's tensor names
                // (`P.weight`, `P.bias`, `P.running_mean`, `P.running_var`);
                // ingot's batch_norm names its tensors by such a prefix.
                const SUFFIXES: [&str; 4] = [".weight", ".bias", ".running_mean", ".running_var"];
                let common = n.input[1]
                    .strip_suffix(SUFFIXES[0])
                    .filter(|p| (1..4).all(|i| n.input[i + 1] == format!("{p}{}", SUFFIXES[i])))
                    .map(str::to_string);
                let prefix = match common {
                    Some(p)
                        if (0..4).all(|i| {
                            let t = &ts[i];
                            self.store
                                .tensors
                                .get(&format!("{p}{}", SUFFIXES[i]))
                                .is_none_or(|s| s.data == t.floats())
                        }) =>
                    {
                        p
                    }
                    _ => {
                        let mut p = name.clone();
                        let mut k = 1;
                        while (0..4).any(|i| {
                            self.store
                                .tensors
                                .contains_key(&format!("{p}{}", SUFFIXES[i]))
                        }) {
                            p = format!("{name}_{k}");
                            k += 1;
                        }
                        p
                    }
                };
                for i in 0..4 {
                    self.store
                        .insert(format!("{prefix}{}", SUFFIXES[i]), vec![c], ts[i].floats());
                }
                let mut l =
                    LayerFile::new(&name, "batch_norm", self.read(n, &x)?).attr("prefix", prefix);
                let eps = attrs.float("epsilon").unwrap_or(1e-5);
                l = l.attr("eps", eps as f64);
                self.push_layer(n, l);
                self.new_map(n, name.clone(), x.dims.clone(), false);
                Ok(Outcome::Layer(name, "batch_norm"))
            }
            "Relu" | "Clip" => {
                let x = self.map_in(n, ins, 0)?;
                self.no_pad(n, &x)?;
                let kind = if op == "Relu" {
                    "relu"
                } else {
                    let (lo, hi) = if self.opset >= 11 {
                        let get = |i: usize| -> Result<Option<f32>, ImportError> {
                            self.opt_const(n, ins, i)?
                                .map(|c| {
                                    c.floats().first().copied().ok_or_else(|| {
                                        self.node_err(n, format!("input {i} (min or max) is empty"))
                                    })
                                })
                                .transpose()
                        };
                        (get(1)?, get(2)?)
                    } else {
                        (attrs.float("min"), attrs.float("max"))
                    };
                    match (lo, hi) {
                        (Some(l), Some(h)) if l == 0.0 && h == 6.0 => "relu6",
                        (Some(0.0), None) => "relu",
                        (Some(l), Some(h)) if l == 0.0 && h == f32::INFINITY => "relu",
                        _ => {
                            return Err(self.node_err(
                                n,
                                format!("bounds [{}, {}]: ingot imports Clip to [0, 6] (ReLU6) or [0, +inf) (ReLU)",
                                    lo.map_or("-inf".into(), |v| v.to_string()),
                                    hi.map_or("+inf".into(), |v| v.to_string())),
                            ))
                        }
                    }
                };
                let name = self.unique_name(&base);
                let l = LayerFile::new(&name, kind, self.read(n, &x)?);
                self.push_layer(n, l);
                self.new_map(n, name.clone(), x.dims.clone(), true);
                Ok(Outcome::Layer(name, kind))
            }
            "MaxPool" | "AveragePool" => {
                let x = self.map_in(n, ins, 0)?;
                let [c, h, w] = self.spatial(n, &x)?;
                self.only_first_output(n)?;
                let ks = attrs
                    .ints("kernel_shape")
                    .ok_or_else(|| self.node_err(n, "`kernel_shape` is missing"))?;
                let [kh, kw] = ks[..] else {
                    return Err(self.node_err(
                        n,
                        format!("`kernel_shape` {ks:?}: ingot imports 2-D pooling"),
                    ));
                };
                if kh < 1 || kw < 1 {
                    return Err(self.node_err(n, format!("`kernel_shape` {ks:?} is not positive")));
                }
                let k = [kh as usize, kw as usize];
                let s = self.pair_attr(n, attrs, "strides", 1)?;
                let d = self.pair_attr(n, attrs, "dilations", 1)?;
                if d != [1, 1] {
                    return Err(self.node_err(
                        n,
                        format!("`dilations` {d:?}: ingot's pooling has no dilation"),
                    ));
                }
                let (h0, w0) = match x.pad {
                    Some((pp, _)) => (h - pp[0] - pp[2], w - pp[1] - pp[3]),
                    None => (h, w),
                };
                let mut p = self.window_pads(n, attrs, [h, w], k, s, d)?;
                let is_max = op == "MaxPool";
                let include = attrs.int("count_include_pad").unwrap_or(0) != 0;
                if !is_max && !include && p != [0; 4] {
                    return Err(self.node_err(
                        n,
                        format!("`count_include_pad` is 0 with padding {p:?}: ingot's average pooling counts padded taps as zeros (count_include_pad=1); export with count_include_pad=1 or without padding"),
                    ));
                }
                if let Some((pp, _)) = x.pad {
                    if is_max && !x.nonneg {
                        return Err(self.node_err(
                            n,
                            "reads a zero-padded map that may hold negative values: zero padding changes a max pooling there, and ingot's max pooling ignores padded taps",
                        ));
                    }
                    for i in 0..4 {
                        p[i] += pp[i];
                    }
                }
                let mut oh = self.out_size(n, h0, p[0], p[2], k[0], s[0], 1)?;
                let mut ow = self.out_size(n, w0, p[1], p[3], k[1], s[1], 1)?;
                if attrs.int("ceil_mode").unwrap_or(0) != 0 {
                    // Ceil mode adds a last window that may hang over the
                    // bottom/right border, unless it would start in the
                    // padding (the rule of the ONNX reference and the
                    // common frameworks).
                    let ceil = |input: usize, lo: usize, hi: usize, k: usize, s: usize| {
                        let span = input + lo + hi - k;
                        let mut o = span.div_ceil(s) + 1;
                        if (o - 1) * s >= input + lo {
                            o -= 1;
                        }
                        o
                    };
                    let ch = ceil(h0, p[0], p[2], k[0], s[0]);
                    let cw = ceil(w0, p[1], p[3], k[1], s[1]);
                    if (ch, cw) != (oh, ow) {
                        if !is_max {
                            return Err(self.node_err(
                                n,
                                "`ceil_mode` 1 adds a partial window here, whose divisor ingot's average pooling cannot express; export with ceil_mode=0 or an input size where it makes no difference",
                            ));
                        }
                        // Max pooling ignores padded taps, so the partial
                        // window is the same as extra bottom/right padding.
                        p[2] += (ch - 1) * s[0] + k[0] - (h0 + p[0] + p[2]);
                        p[3] += (cw - 1) * s[1] + k[1] - (w0 + p[1] + p[3]);
                        oh = ch;
                        ow = cw;
                    }
                }
                let kind = if is_max { "max_pool2d" } else { "avg_pool2d" };
                let name = self.unique_name(&base);
                let mut l = LayerFile::new(&name, kind, self.read(n, &x)?)
                    .attr("kernel", fmt_pair(k))
                    .attr("stride", fmt_pair(s));
                if p != [0; 4] {
                    l = l.attr("padding", fmt_pad(p));
                }
                self.merged_pad(&x, &name);
                self.push_layer(n, l);
                self.new_map(n, name.clone(), vec![1, c, oh, ow], x.nonneg);
                Ok(Outcome::Layer(name, kind))
            }
            "GlobalAveragePool" | "ReduceMean" => {
                let x = self.map_in(n, ins, 0)?;
                self.no_pad(n, &x)?;
                let [c, _, _] = self.spatial(n, &x)?;
                let mut dims = vec![1, c, 1, 1];
                if op == "ReduceMean" {
                    let axes = fold::axes_of(
                        &ins.iter()
                            .map(|v| match v {
                                Some(Val::Const(c)) => Some(c),
                                _ => None,
                            })
                            .collect::<Vec<_>>(),
                        attrs,
                        self.opset,
                        18,
                    )
                    .map_err(|m| self.node_err(n, m))?;
                    let mut axes: Vec<i64> = axes
                        .unwrap_or_default()
                        .iter()
                        .map(|&a| if a < 0 { a + 4 } else { a })
                        .collect();
                    axes.sort_unstable();
                    if axes != [2, 3] {
                        return Err(self.node_err(n, format!("reduces axes {axes:?}; ingot imports ReduceMean over H and W (axes [2, 3]) only")));
                    }
                    if attrs.int("keepdims").unwrap_or(1) == 0 {
                        dims = vec![1, c];
                    }
                }
                let name = self.unique_name(&base);
                let l = LayerFile::new(&name, "global_avg_pool", self.read(n, &x)?);
                self.push_layer(n, l);
                self.new_map(n, name.clone(), dims, x.nonneg);
                Ok(Outcome::Layer(name, "global_avg_pool"))
            }
            "Flatten" | "Reshape" | "Squeeze" | "Unsqueeze" => {
                let x = self.map_in(n, ins, 0)?;
                self.no_pad(n, &x)?;
                let cs: Vec<Option<&Const>> = ins
                    .iter()
                    .map(|v| match v {
                        Some(Val::Const(c)) => Some(c),
                        _ => None,
                    })
                    .collect();
                let target: Vec<usize> = match op {
                    "Flatten" => {
                        let axis = attrs.int("axis").unwrap_or(1);
                        let axis = if axis < 0 {
                            axis + x.dims.len() as i64
                        } else {
                            axis
                        };
                        if axis != 0 && axis != 1 {
                            return Err(self.node_err(n, format!("`axis` {axis}: ingot flattens everything after the batch (axis 1)")));
                        }
                        vec![1, x.dims[1..].iter().product()]
                    }
                    "Reshape" => {
                        let shape = self.const_in(n, ins, 1)?.ints();
                        fold::reshape_dims(
                            &x.dims,
                            &shape,
                            attrs.int("allowzero").unwrap_or(0) != 0,
                        )
                        .map_err(|m| self.node_err(n, m))?
                    }
                    "Squeeze" => fold::squeeze_dims(
                        &x.dims,
                        fold::axes_of(&cs, attrs, self.opset, 13)
                            .map_err(|m| self.node_err(n, m))?,
                    )
                    .map_err(|m| self.node_err(n, m))?,
                    _ => {
                        let c = fold::eval(
                            "Unsqueeze",
                            &[Some(&Const {
                                dims: x.dims.clone(),
                                data: Data::I(vec![]),
                            })]
                            .into_iter()
                            .chain(cs.iter().skip(1).copied())
                            .collect::<Vec<_>>(),
                            attrs,
                            self.opset,
                        );
                        c.map_err(|m| self.node_err(n, m))?.dims
                    }
                };
                let new = MapVal {
                    dims: target.clone(),
                    ..x.clone()
                };
                let (old_chw, new_chw) = (x.chw(), new.chw());
                let flat_new = matches!(target[..], [1, _] | [_]);
                if matches!(x.dims[..], [1, _, h, w] if h * w > 1) && flat_new {
                    let name = self.unique_name(&base);
                    let l = LayerFile::new(&name, "flatten", self.read(n, &x)?);
                    self.push_layer(n, l);
                    self.new_map(n, name.clone(), target, x.nonneg);
                    return Ok(Outcome::Layer(name, "flatten"));
                }
                if old_chw.is_some() && old_chw == new_chw {
                    let map = x.map.clone();
                    self.set_out(n, Val::Map(new));
                    return Ok(Outcome::Text(format!(
                        "removed (same values as `{map}`, dimensions {target:?})"
                    )));
                }
                Err(self.node_err(n, format!("changes dimensions {:?} to {target:?}; ingot imports flattening [1, C, H, W] to [1, C*H*W] and adding or removing unit dimensions", x.dims)))
            }
            "Gemm" | "MatMul" => {
                let x = self.map_in(n, ins, 0)?;
                self.no_pad(n, &x)?;
                let Some([nin, 1, 1]) = x.chw() else {
                    return Err(self.node_err(n, format!("input has dimensions {:?}; ingot imports {op} on a flat [1, N] input (flatten first)", x.dims)));
                };
                if x.dims.len() != 2 {
                    return Err(self.node_err(
                        n,
                        format!(
                            "input has dimensions {:?}; ingot imports {op} on [1, N]",
                            x.dims
                        ),
                    ));
                }
                let b = self.const_in(n, ins, 1)?;
                let [r, cc] = b.dims[..] else {
                    return Err(self.node_err(
                        n,
                        format!(
                            "weight `{}` has shape {:?}; expected a matrix",
                            n.input[1], b.dims
                        ),
                    ));
                };
                let (trans_b, alpha, beta) = if op == "Gemm" {
                    if attrs.int("transA").unwrap_or(0) != 0 {
                        return Err(self.node_err(n, "`transA` is 1; ingot imports Gemm with the image input as A, untransposed"));
                    }
                    (
                        attrs.int("transB").unwrap_or(0) != 0,
                        attrs.float("alpha").unwrap_or(1.0),
                        attrs.float("beta").unwrap_or(1.0),
                    )
                } else {
                    (false, 1.0, 1.0)
                };
                let (out, k) = if trans_b { (r, cc) } else { (cc, r) };
                if k != nin {
                    return Err(self.node_err(
                        n,
                        format!("weight {:?} does not fit an input of {nin} values", b.dims),
                    ));
                }
                let bf = b.floats();
                let weight: Vec<f32> = if trans_b {
                    bf.iter().map(|v| v * alpha).collect()
                } else {
                    (0..out)
                        .flat_map(|o| (0..k).map(move |i| (o, i)))
                        .map(|(o, i)| bf[i * out + o] * alpha)
                        .collect()
                };
                let name = self.unique_name(&base);
                let wname = if trans_b && alpha == 1.0 {
                    n.input[1].clone()
                } else {
                    format!("{name}.weight")
                };
                let wname = self.tensor(&wname, vec![out, k], weight);
                let mut l =
                    LayerFile::new(&name, "linear", self.read(n, &x)?).attr("weight", wname);
                if op == "Gemm" {
                    if let Some(c) = self.opt_const(n, ins, 2)? {
                        let bias = self.broadcast_bias(n, &c, out)?;
                        let bias: Vec<f32> = bias.iter().map(|v| v * beta).collect();
                        let bname = if beta == 1.0 && c.dims == [out] {
                            n.input[2].clone()
                        } else {
                            format!("{name}.bias")
                        };
                        let bname = self.tensor(&bname, vec![out], bias);
                        l = l.attr("bias", bname);
                    }
                }
                self.push_layer(n, l);
                self.new_map(n, name.clone(), vec![1, out], false);
                Ok(Outcome::Layer(name, "linear"))
            }
            "Concat" => {
                let mut maps = Vec::new();
                for i in 0..ins.len() {
                    let m = self.map_in(n, ins, i)?;
                    self.no_pad(n, &m)?;
                    maps.push(m);
                }
                let Some(first) = maps.first() else {
                    return Err(self.node_err(n, "has no inputs"));
                };
                let rank = first.dims.len();
                let axis = attrs
                    .int("axis")
                    .ok_or_else(|| self.node_err(n, "`axis` is missing"))?;
                let axis = if axis < 0 { axis + rank as i64 } else { axis };
                if axis != 1 || !(rank == 4 || rank == 2) {
                    return Err(self.node_err(n, format!("concatenates along axis {axis} of rank-{rank} maps; ingot concatenates channels (axis 1)")));
                }
                for m in &maps {
                    if m.dims.len() != rank || m.dims[2..] != maps[0].dims[2..] {
                        return Err(self.node_err(
                            n,
                            format!(
                                "inputs of dimensions {:?} and {:?} differ beyond the channels",
                                maps[0].dims, m.dims
                            ),
                        ));
                    }
                }
                let name = self.unique_name(&base);
                let names: Vec<String> = maps
                    .iter()
                    .map(|m| self.read(n, m))
                    .collect::<Result<_, _>>()?;
                let refs: Vec<&str> = names.iter().map(String::as_str).collect();
                let l = LayerFile::multi(&name, "concat", &refs);
                self.push_layer(n, l);
                let mut dims = maps[0].dims.clone();
                dims[1] = maps.iter().map(|m| m.dims[1]).sum();
                let nonneg = maps.iter().all(|m| m.nonneg);
                self.new_map(n, name.clone(), dims, nonneg);
                Ok(Outcome::Layer(name, "concat"))
            }
            "Add" | "Sub" | "Mul" | "Div" => self.arith(n, op, ins),
            "Softmax" => {
                let x = self.map_in(n, ins, 0)?;
                self.no_pad(n, &x)?;
                let rank = x.dims.len() as i64;
                let default = if self.opset >= 13 { -1 } else { 1 };
                let axis = attrs.int("axis").unwrap_or(default);
                let axis = if axis < 0 { axis + rank } else { axis };
                let over_channels = match x.dims[..] {
                    [1, _] => axis == 1,
                    [1, _, h, w] => {
                        axis == 1 && (self.opset >= 13 || h * w == 1) || (h * w == 1 && axis >= 1)
                    }
                    _ => false,
                };
                if !over_channels {
                    return Err(self.node_err(n, format!("softmax over axis {axis} of {:?}; ingot's softmax runs over the channels", x.dims)));
                }
                let name = self.unique_name(&base);
                let l = LayerFile::new(&name, "softmax", self.read(n, &x)?);
                self.push_layer(n, l);
                self.new_map(n, name.clone(), x.dims.clone(), true);
                Ok(Outcome::Layer(name, "softmax"))
            }
            "Dropout" | "Identity" | "Cast" => {
                let x = self.map_in(n, ins, 0)?;
                if op == "Cast" {
                    use super::proto::data_type as dt;
                    let to = attrs.int("to").unwrap_or(0) as i32;
                    if to != dt::FLOAT {
                        return Err(self.node_err(
                            n,
                            format!("casts a map to {}; ingot computes in FLOAT", dt::name(to)),
                        ));
                    }
                }
                if op == "Dropout" {
                    self.only_first_output(n)?;
                    if let Some(Some(Val::Const(t))) = ins.get(2) {
                        if t.ints().first().copied().unwrap_or(0) != 0 {
                            return Err(self.node_err(
                                n,
                                "`training_mode` is true; ingot imports inference graphs",
                            ));
                        }
                    }
                }
                let map = x.map.clone();
                self.set_out(n, Val::Map(x));
                Ok(Outcome::Text(match op {
                    "Dropout" => {
                        format!("removed (dropout is the identity at inference; reads `{map}`)")
                    }
                    _ => format!("removed (identity of `{map}`)"),
                }))
            }
            "Pad" => {
                let x = self.map_in(n, ins, 0)?;
                self.no_pad(n, &x)?;
                let mode = attrs.string("mode").unwrap_or_else(|| "constant".into());
                if mode != "constant" {
                    return Err(self.node_err(
                        n,
                        format!("mode `{mode}`: ingot merges zero (constant) padding only"),
                    ));
                }
                let pads = if self.opset >= 11 {
                    self.const_in(n, ins, 1)?.ints()
                } else {
                    attrs.ints("pads").unwrap_or_default()
                };
                let value = if self.opset >= 11 {
                    self.opt_const(n, ins, 2)?
                        .map_or(0.0, |c| c.floats().first().copied().unwrap_or(0.0))
                } else {
                    attrs.float("value").unwrap_or(0.0)
                };
                if value != 0.0 {
                    return Err(self.node_err(
                        n,
                        format!("pads with {value}; ingot merges zero padding only"),
                    ));
                }
                let rank = x.dims.len();
                let mut full = vec![0i64; 2 * rank];
                match self.opt_const(n, ins, 3)? {
                    Some(axes) => {
                        let axes = axes.ints();
                        if pads.len() != 2 * axes.len() {
                            return Err(self.node_err(n, "`pads` does not match `axes`"));
                        }
                        for (j, &a) in axes.iter().enumerate() {
                            let a = if a < 0 { a + rank as i64 } else { a } as usize;
                            if a >= rank {
                                return Err(self.node_err(n, format!("axis {a} out of range")));
                            }
                            full[a] = pads[j];
                            full[a + rank] = pads[j + axes.len()];
                        }
                    }
                    None if pads.len() == 2 * rank => full = pads.clone(),
                    None => {
                        return Err(self.node_err(
                            n,
                            format!("`pads` has {} values for a rank-{rank} map", pads.len()),
                        ))
                    }
                }
                if rank != 4
                    || full[0] != 0
                    || full[1] != 0
                    || full[4] != 0
                    || full[5] != 0
                    || full.iter().any(|&p| p < 0)
                {
                    return Err(self.node_err(n, format!("pads {full:?}: ingot merges non-negative padding of H and W of a [1, C, H, W] map only")));
                }
                let p = [
                    full[2] as usize,
                    full[3] as usize,
                    full[6] as usize,
                    full[7] as usize,
                ];
                let mut dims = x.dims.clone();
                dims[2] += p[0] + p[2];
                dims[3] += p[1] + p[3];
                self.set_out(
                    n,
                    Val::Map(MapVal {
                        dims,
                        pad: Some((p, self.rows.len())),
                        ..x
                    }),
                );
                Ok(Outcome::Text(
                    "padding (not merged: nothing reads it)".into(),
                ))
            }
            _ => Err(self.unsupported(n)),
        }
    }

    fn broadcast_bias(
        &self,
        n: &NodeProto,
        c: &Const,
        out: usize,
    ) -> Result<Vec<f32>, ImportError> {
        let v = c.floats();
        if v.len() == out && c.dims.iter().filter(|&&d| d != 1).count() <= 1 {
            Ok(v)
        } else if v.len() == 1 {
            Ok(vec![v[0]; out])
        } else {
            Err(self.node_err(
                n,
                format!(
                    "bias of shape {:?} does not broadcast to {out} outputs",
                    c.dims
                ),
            ))
        }
    }

    /// Per-channel values of a constant broadcast against `[1, C, H, W]`
    /// (scalar, `[C]`-like with unit dimensions around the channel axis).
    fn per_channel(&self, c: &Const, ch: usize) -> Option<Vec<f32>> {
        let v = c.floats();
        if v.len() == 1 {
            return Some(vec![v[0]; ch]);
        }
        let nonunit: Vec<(usize, usize)> = c
            .dims
            .iter()
            .enumerate()
            .filter(|(_, &d)| d != 1)
            .map(|(i, &d)| (i, d))
            .collect();
        // The channel axis is the third from the end of a rank-3 or
        // rank-4 broadcast shape.
        match nonunit[..] {
            [(i, d)] if d == ch && c.dims.len() >= 3 && i == c.dims.len() - 3 => Some(v),
            _ => None,
        }
    }

    fn arith(
        &mut self,
        n: &NodeProto,
        op: &str,
        ins: &[Option<Val>],
    ) -> Result<Outcome, ImportError> {
        let (a, b) = (
            ins.first().cloned().flatten(),
            ins.get(1).cloned().flatten(),
        );
        match (a, b) {
            (Some(Val::Map(x)), Some(Val::Map(y))) if op == "Add" => {
                self.no_pad(n, &x)?;
                self.no_pad(n, &y)?;
                if x.dims != y.dims {
                    return Err(self.node_err(n, format!("adds maps of dimensions {:?} and {:?}; ingot adds maps of equal shape", x.dims, y.dims)));
                }
                let name = self.unique_name(&node_name(n));
                let l = LayerFile::multi(&name, "add", &[&self.read(n, &x)?, &self.read(n, &y)?]);
                self.push_layer(n, l);
                self.new_map(n, name.clone(), x.dims.clone(), false);
                Ok(Outcome::Layer(name, "add"))
            }
            (Some(Val::Map(x)), Some(Val::Const(k))) | (Some(Val::Const(k)), Some(Val::Map(x)))
                if x.input_stage && (op == "Add" || op == "Mul" || matches!(ins[0], Some(Val::Map(_)))) =>
            {
                if self.readers.get(&n.input[ins.iter().position(|v| matches!(v, Some(Val::Map(_)))).unwrap_or(0)]).copied().unwrap_or(0) != 1 {
                    return Err(self.node_err(n, "normalises the input, which is also read elsewhere; ingot folds input normalisation only when nothing reads the raw input"));
                }
                let ch = x.dims[1];
                let kv = self.per_channel(&k, ch).ok_or_else(|| self.node_err(n, format!("constant of shape {:?} is not per-channel for {ch} channels; cannot fold it into the input's mean and std", k.dims)))?;
                for (c, &kc) in kv.iter().enumerate() {
                    match op {
                        "Sub" => self.norm_a[c] += kc * self.norm_b[c],
                        "Add" => self.norm_a[c] -= kc * self.norm_b[c],
                        _ => {
                            if !(kc > 0.0 && kc.is_finite()) {
                                return Err(self.node_err(n, format!("{op} by {kc}: only positive factors fold into the input's std")));
                            }
                            if op == "Mul" { self.norm_b[c] /= kc } else { self.norm_b[c] *= kc }
                        }
                    }
                }
                self.set_out(n, Val::Map(x));
                Ok(Outcome::Text("input normalisation (folded into mean/std)".into()))
            }
            (Some(Val::Map(x)), Some(Val::Const(k))) | (Some(Val::Const(k)), Some(Val::Map(x))) if op == "Add" => {
                // A bias added after MatMul (or a bias-free convolution).
                let ix = self.layer_ix.get(&x.map).copied();
                let single = self.readers.get(&n.input[ins.iter().position(|v| matches!(v, Some(Val::Map(_)))).unwrap_or(0)]).copied() == Some(1);
                let cands = ix.filter(|&i| {
                    let l = &self.layers[i];
                    single && (l.op == "linear" || l.op == "conv2d") && !l.attrs.contains_key("bias")
                        && !self.layers.iter().any(|o| o.input.as_deref() == Some(&l.name) || o.inputs.as_ref().is_some_and(|v| v.contains(&l.name)))
                });
                let Some(i) = cands else {
                    return Err(self.node_err(n, "adds a constant to a map; ingot imports that only as the bias of a MatMul or bias-free Conv right before it, or as input normalisation"));
                };
                let out = x.dims[1];
                let bias = if self.layers[i].op == "linear" { self.broadcast_bias(n, &k, out)? } else {
                    self.per_channel(&k, out).ok_or_else(|| self.node_err(n, format!("constant of shape {:?} is not a per-channel bias", k.dims)))?
                };
                let lname = self.layers[i].name.clone();
                let cname = if ins[1].is_some() && matches!(ins[1], Some(Val::Const(_))) { n.input[1].clone() } else { n.input[0].clone() };
                let want = if k.dims == [out] { cname } else { format!("{lname}.bias") };
                let bname = self.tensor(&want, vec![out], bias);
                self.layers[i].attrs.insert("bias".into(), Value::String(bname));
                self.set_out(n, Val::Map(x));
                Ok(Outcome::Text(format!("bias of `{lname}`")))
            }
            (Some(Val::Map(_)), _) | (_, Some(Val::Map(_))) => Err(self.node_err(
                n,
                format!("{op} on a map: ingot imports {op} with a constant only as input normalisation right after the input{}", if op == "Add" { ", as a bias, or Add of two maps (residual)" } else { "" }),
            )),
            _ => Err(self.node_err(n, "has a missing input")),
        }
    }
}
