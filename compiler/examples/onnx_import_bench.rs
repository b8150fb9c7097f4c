//! ONNX import benchmark: the 121-layer densely connected network (Huang et
//! al. 2017, [`zoo::densenet121`]) written as an ONNX model the way tracing
//! exporters write it (one `Concat` per dense layer, `/features/.../Conv`
//! node names, batch norms with their running statistics, `Flatten` +
//! `Gemm` classifier, dynamic batch), then imported five times.
//!
//! `cargo run --release -p ingot-compiler --example onnx_import_bench [OUT_DIR]`
//!
//! Prints a table: model size, import time (decode + translate + validate
//! by the loader + serialise, as `ingot import` does), parameters and MACs
//! of the imported graph as `ingot inspect` reports them. The ONNX file is
//! left in `OUT_DIR` (default `target/onnx-bench`) so that the CLI can be
//! timed on it too: `time ingot import OUT_DIR/densenet121.onnx --out DIR`.

use ingot_compiler::frontend::onnx::proto::{
    AttributeProto, Dimension, GraphProto, ModelProto, NodeProto, OperatorSetIdProto, TensorProto,
    TensorShapeProto, TypeProto, TypeProtoTensor, ValueInfoProto,
};
use ingot_compiler::frontend::onnx::{self, ImportOptions};
use ingot_compiler::frontend::{LayerFile, TensorStore};
use ingot_testkit::zoo;
use prost::Message;
use serde_json::Value;
use std::collections::HashSet;
use std::path::PathBuf;
use std::time::Instant;

fn ints(name: &str, v: Vec<i64>) -> AttributeProto {
    AttributeProto {
        name: name.into(),
        r#type: 7,
        ints: v,
        ..Default::default()
    }
}

fn pair(v: Option<&Value>, default: i64) -> Vec<i64> {
    match v {
        None => vec![default; 2],
        Some(Value::Number(n)) => vec![n.as_i64().unwrap(); 2],
        Some(Value::Array(a)) => a.iter().map(|x| x.as_i64().unwrap()).collect(),
        Some(o) => panic!("unexpected attribute {o}"),
    }
}

fn node_name(layer: &str, op: &str) -> String {
    format!("/{}/{op}", layer.replace('.', "/"))
}

fn tensor(store: &TensorStore, name: &str) -> TensorProto {
    let t = &store.tensors[name];
    TensorProto {
        dims: t.shape.iter().map(|&d| d as i64).collect(),
        data_type: 1,
        name: name.into(),
        raw_data: t.data.iter().flat_map(|v| v.to_le_bytes()).collect(),
        ..Default::default()
    }
}

/// Encodes a zoo network as an ONNX model (opset 17).
fn to_onnx(net: &zoo::Net) -> ModelProto {
    let mut nodes = Vec::new();
    let mut inits = Vec::new();
    let mut seen = HashSet::new();
    let mut add_init = |name: &str, inits: &mut Vec<TensorProto>| {
        if seen.insert(name.to_string()) {
            inits.push(tensor(&net.store, name));
        }
        name.to_string()
    };
    let out_of = |l: &LayerFile, op: &str| format!("{}_output_0", node_name(&l.name, op));
    let mut value = std::collections::HashMap::new();
    value.insert(net.file.input.name.clone(), "input".to_string());
    for l in &net.file.layers {
        let ins: Vec<String> = match (&l.input, &l.inputs) {
            (Some(i), _) => vec![value[i].clone()],
            (_, Some(v)) => v.iter().map(|i| value[i].clone()).collect(),
            _ => unreachable!(),
        };
        let s = |k: &str| l.attrs.get(k).and_then(Value::as_str).unwrap().to_string();
        let (op, inputs, attrs): (&str, Vec<String>, Vec<AttributeProto>) = match l.op.as_str() {
            "conv2d" => {
                let mut i = vec![ins[0].clone(), add_init(&s("weight"), &mut inits)];
                if l.attrs.contains_key("bias") {
                    i.push(add_init(&s("bias"), &mut inits));
                }
                let p = pair(l.attrs.get("padding"), 0);
                (
                    "Conv",
                    i,
                    vec![
                        ints("pads", vec![p[0], p[1], p[0], p[1]]),
                        ints("strides", pair(l.attrs.get("stride"), 1)),
                    ],
                )
            }
            "batch_norm" => {
                let p = s("prefix");
                let mut i = vec![ins[0].clone()];
                for suf in ["weight", "bias", "running_mean", "running_var"] {
                    i.push(add_init(&format!("{p}.{suf}"), &mut inits));
                }
                let eps = AttributeProto {
                    name: "epsilon".into(),
                    r#type: 1,
                    f: 1e-5,
                    ..Default::default()
                };
                ("BatchNormalization", i, vec![eps])
            }
            "relu" => ("Relu", ins, vec![]),
            "max_pool2d" | "avg_pool2d" => {
                let k = pair(l.attrs.get("kernel"), 1);
                let st = pair(l.attrs.get("stride"), k[0]);
                let p = pair(l.attrs.get("padding"), 0);
                (
                    if l.op == "max_pool2d" {
                        "MaxPool"
                    } else {
                        "AveragePool"
                    },
                    ins,
                    vec![
                        ints("kernel_shape", k),
                        ints("strides", st),
                        ints("pads", vec![p[0], p[1], p[0], p[1]]),
                    ],
                )
            }
            "global_avg_pool" => ("GlobalAveragePool", ins, vec![]),
            "flatten" => ("Flatten", ins, vec![]),
            "linear" => {
                let mut i = vec![ins[0].clone(), add_init(&s("weight"), &mut inits)];
                if l.attrs.contains_key("bias") {
                    i.push(add_init(&s("bias"), &mut inits));
                }
                let tb = AttributeProto {
                    name: "transB".into(),
                    r#type: 2,
                    i: 1,
                    ..Default::default()
                };
                ("Gemm", i, vec![tb])
            }
            "concat" => {
                let axis = AttributeProto {
                    name: "axis".into(),
                    r#type: 2,
                    i: 1,
                    ..Default::default()
                };
                ("Concat", ins, vec![axis])
            }
            "add" => ("Add", ins, vec![]),
            o => panic!("op {o} not exported"),
        };
        let out = out_of(l, op);
        nodes.push(NodeProto {
            input: inputs,
            output: vec![out.clone()],
            name: node_name(&l.name, op),
            op_type: op.into(),
            attribute: attrs,
            ..Default::default()
        });
        value.insert(l.name.clone(), out);
    }
    let dim = |v: Option<i64>, p: Option<&str>| Dimension {
        dim_value: v,
        dim_param: p.map(str::to_string),
        denotation: String::new(),
    };
    let s = &net.file.input.shape;
    let input = ValueInfoProto {
        name: "input".into(),
        r#type: Some(TypeProto {
            tensor_type: Some(TypeProtoTensor {
                elem_type: 1,
                shape: Some(TensorShapeProto {
                    dim: std::iter::once(dim(None, Some("batch_size")))
                        .chain(s.iter().map(|&d| dim(Some(d as i64), None)))
                        .collect(),
                }),
            }),
            denotation: String::new(),
        }),
        doc_string: String::new(),
    };
    let output = ValueInfoProto {
        name: value[&net.file.output].clone(),
        ..Default::default()
    };
    ModelProto {
        ir_version: 8,
        opset_import: vec![OperatorSetIdProto {
            domain: String::new(),
            version: 17,
        }],
        producer_name: "ingot onnx_import_bench".into(),
        graph: Some(GraphProto {
            node: nodes,
            name: net.file.name.clone(),
            initializer: inits,
            input: vec![input],
            output: vec![output],
            ..Default::default()
        }),
        ..Default::default()
    }
}

fn main() {
    let out_dir = std::env::args()
        .nth(1)
        .map(PathBuf::from)
        .unwrap_or_else(|| PathBuf::from("target/onnx-bench"));
    std::fs::create_dir_all(&out_dir).expect("output folder");
    let net = zoo::densenet121(1);
    let model = to_onnx(&net);
    let bytes = model.encode_to_vec();
    let path = out_dir.join("densenet121.onnx");
    std::fs::write(&path, &bytes).expect("write the model");
    let n_nodes = model.graph.as_ref().map_or(0, |g| g.node.len());
    let n_concat = model.graph.as_ref().map_or(0, |g| {
        g.node.iter().filter(|n| n.op_type == "Concat").count()
    });

    let mut times = Vec::new();
    let mut report = None;
    for _ in 0..5 {
        let t = Instant::now();
        let imported = onnx::import(&path, &ImportOptions::default()).expect("import");
        let graph = imported
            .validate(&out_dir.join("densenet121.graph.json"))
            .expect("the loader accepts the import");
        let json = imported.graph_json();
        let st = imported.store.to_bytes();
        times.push(t.elapsed().as_secs_f64());
        std::hint::black_box((json.len(), st.len()));
        report = Some(ingot_compiler::inspect::report(&graph));
    }
    times.sort_by(f64::total_cmp);
    let r = report.expect("ran");
    let g = ingot_compiler::inspect::group_digits;
    println!(
        "| network | ONNX file | nodes (Concat) | import, median of 5 | best | parameters | MACs |"
    );
    println!("|---|---|---|---|---|---|---|");
    println!(
        "| {} | {:.1} MB | {} ({}) | {:.3} s | {:.3} s | {} | {} |",
        net.file.name,
        bytes.len() as f64 / 1e6,
        n_nodes,
        n_concat,
        times[2],
        times[0],
        g(r.totals.params),
        g(r.totals.macs),
    );
    println!("model written to {}", path.display());
}
