//! ONNX model files as a fuzz target.
//!
//! Seeds are the committed ONNX fixtures (`compiler/tests/fixtures/onnx/`).
//! A case decodes a seed with the importer's own `prost` messages, changes
//! fields the importer reads (dimensions, attributes, op types, input and
//! output names, initializer data and `raw_data` lengths, data types, opset
//! versions, node order, external data locations), and encodes it again;
//! some cases also flip, insert or cut raw bytes of the encoded file, so the
//! protobuf decoder itself is reached with broken input. [`run`] is the
//! whole import in memory: decode, fold, translate, and the validator every
//! graph goes through.

use crate::mutate::mutate_bytes;
use crate::rng::Rng;
use ingot_compiler::frontend::onnx::proto::{
    AttributeProto, Dimension, GraphProto, ModelProto, NodeProto, StringStringEntryProto,
    TensorProto, ValueInfoProto, DATA_LOCATION_EXTERNAL,
};
use ingot_compiler::frontend::onnx::{self, ImportOptions, SUPPORTED_OPS};
use prost::Message;
use std::path::PathBuf;

/// Folder of the ONNX fixtures: the seeds, and the model folder a case is
/// imported from, so the external data of `net_external.onnx` is found
/// (the importer only reads there; nothing is written).
pub fn fixtures_dir() -> PathBuf {
    crate::repo_root().join("compiler/tests/fixtures/onnx")
}

/// Every `*.onnx` file of the fixtures (its `roundtrip/` folder included),
/// sorted by path so a case rebuilds the same from `(seed, index)`.
pub fn seeds() -> Result<Vec<Vec<u8>>, String> {
    let mut files = Vec::new();
    for dir in [fixtures_dir(), fixtures_dir().join("roundtrip")] {
        let rd = std::fs::read_dir(&dir).map_err(|e| format!("{}: {e}", dir.display()))?;
        files.extend(
            rd.filter_map(|e| e.ok().map(|e| e.path()))
                .filter(|p| p.extension().is_some_and(|e| e == "onnx")),
        );
    }
    files.sort();
    if files.is_empty() {
        return Err("no ONNX seed files found".into());
    }
    files
        .iter()
        .map(|f| std::fs::read(f).map_err(|e| format!("{}: {e}", f.display())))
        .collect()
}

/// Imports one model file's bytes as `ingot import` does, in memory, and
/// checks the result with the graph validator. Errors are fine; a panic is
/// a bug.
pub fn run(bytes: &[u8]) {
    let path = fixtures_dir().join("fuzz.onnx");
    let Ok(imported) = onnx::import_bytes(bytes, &path, &ImportOptions::default()) else {
        return;
    };
    let _ = imported.table();
    let _ = imported.graph_json();
    if let Ok(g) = imported.validate(&path.with_extension("graph.json")) {
        let _ = ingot_compiler::frontend::checks::check_memory(
            &g,
            &path,
            ingot_compiler::guard::memory_limit(),
        );
        let _ = ingot_compiler::frontend::checks::warnings(&g);
    }
}

/// Integers at the edges of what the importer checks: zero and signs,
/// the limits of i32/u32/i64, huge dimensions, and small valid values.
const INTS: &[i64] = &[
    0,
    1,
    -1,
    2,
    3,
    -2,
    4,
    7,
    255,
    256,
    5000,
    65535,
    65536,
    100_000,
    i32::MAX as i64,
    i32::MIN as i64,
    i32::MAX as i64 + 1,
    u32::MAX as i64,
    1 << 40,
    i64::MAX,
    i64::MIN,
];

/// Floats at the edges: special values, subnormals, the f32 limits.
const FLOATS: &[f32] = &[
    0.0,
    -0.0,
    1.0,
    -1.0,
    0.5,
    6.0,
    1e-45,
    f32::MIN_POSITIVE,
    f32::MAX,
    f32::MIN,
    f32::NAN,
    f32::INFINITY,
    f32::NEG_INFINITY,
];

/// Op types beyond the supported list: unknown, empty, near misses.
const OTHER_OPS: &[&str] = &["", "Foo", "conv", "LSTM", "If", "Loop", "Resize"];

/// Attribute names the importer reads.
const ATTRS: &[&str] = &[
    "kernel_shape",
    "pads",
    "strides",
    "dilations",
    "group",
    "auto_pad",
    "axis",
    "axes",
    "keepdims",
    "epsilon",
    "alpha",
    "beta",
    "transA",
    "transB",
    "min",
    "max",
    "mode",
    "value",
    "to",
    "ceil_mode",
    "count_include_pad",
    "allowzero",
    "storage_order",
];

/// Strings for names, paths and attribute text.
const STRINGS: &[&str] = &[
    "",
    "x",
    "input",
    "output",
    "../../esc",
    "/dev/zero",
    "/etc/passwd",
    ".",
    "..",
    "net_external.weights",
    "expected.json",
    "roundtrip",
    "missing.bin",
    "NOTSET",
    "SAME_UPPER",
    "SAME_LOWER",
    "VALID",
    "constant",
    "reflect",
    "a\u{202e}b",
    "nul\u{0}",
    "line\nbreak",
];

/// ONNX data types, valid and not.
const DATA_TYPES: &[i32] = &[
    0, 1, 2, 3, 4, 5, 6, 7, 8, 9, 10, 11, 12, 13, 14, 16, 17, 99, -1,
];

/// A structure-aware mutation of an encoded model; cases whose seed does not
/// decode (none of the committed ones) get byte mutations.
pub fn mutate(seed: &[u8], r: &mut Rng) -> Vec<u8> {
    let model = match ModelProto::decode(seed) {
        Ok(m) if !r.one_in(6) => m,
        _ => {
            let mut b = seed.to_vec();
            for _ in 0..1 + r.below(3) {
                mutate_bytes(&mut b, r);
            }
            return b;
        }
    };
    let mut model = model;
    for _ in 0..1 + r.below(3) {
        mutate_model(&mut model, r);
    }
    let mut out = model.encode_to_vec();
    if r.one_in(10) {
        mutate_bytes(&mut out, r);
    }
    out
}

/// Every value name of the model (node inputs and outputs, initializers,
/// graph inputs and outputs), to rewire references, not only break them.
fn names(g: &GraphProto) -> Vec<String> {
    let mut v: Vec<String> = g
        .node
        .iter()
        .flat_map(|n| n.input.iter().chain(&n.output).cloned())
        .collect();
    v.extend(g.initializer.iter().map(|t| t.name.clone()));
    v.extend(g.input.iter().chain(&g.output).map(|i| i.name.clone()));
    v
}

fn a_name(r: &mut Rng, names: &[String]) -> String {
    if !names.is_empty() && !r.one_in(4) {
        r.pick(names).clone()
    } else {
        r.pick(STRINGS).to_string()
    }
}

fn int(r: &mut Rng, old: i64) -> i64 {
    match r.below(4) {
        0 => old.wrapping_add(1),
        1 => old.wrapping_sub(1),
        _ => *r.pick(INTS),
    }
}

fn mutate_model(m: &mut ModelProto, r: &mut Rng) {
    match r.below(12) {
        0 => {
            // Opset versions and domains.
            if m.opset_import.is_empty() || r.one_in(8) {
                m.opset_import.push(Default::default());
            }
            let i = r.below(m.opset_import.len());
            let o = &mut m.opset_import[i];
            match r.below(4) {
                0 => {
                    o.domain = r
                        .pick(&["", "ai.onnx", "com.example", "ai.onnx.ml"])
                        .to_string()
                }
                1 => {
                    m.opset_import.remove(i);
                }
                _ => o.version = *r.pick(&[0, 1, 7, 10, 11, 12, 13, 17, 21, 22, -1, i64::MAX]),
            }
        }
        1 => m.ir_version = int(r, m.ir_version),
        2 => {
            // Metadata the importer reads for preprocessing and labels.
            let key = r.pick(&["labels", "pixel_scale", "mean", "std", "color", "x"]);
            let value = r.pick(&[
                "",
                "0",
                "-1",
                "nan",
                "inf",
                "1e-45",
                "1e38",
                "0.5,0.5",
                "[]",
                "a,b,c",
                "rgb",
                "gray",
                "cmyk",
                "[0.5, 0.5, 0.5]",
                "[\"a\", 1]",
            ]);
            m.metadata_props.push(StringStringEntryProto {
                key: key.to_string(),
                value: value.to_string(),
            });
        }
        _ => {
            let g = m.graph.get_or_insert_with(Default::default);
            mutate_graph(g, r);
        }
    }
}

fn mutate_graph(g: &mut GraphProto, r: &mut Rng) {
    let names = names(g);
    match r.below(10) {
        0..=3 if !g.node.is_empty() => {
            let i = r.below(g.node.len());
            mutate_node(&mut g.node[i], r, &names);
        }
        4 if !g.node.is_empty() => {
            // Node order: swap, drop or repeat a node.
            let (i, j) = (r.below(g.node.len()), r.below(g.node.len()));
            match r.below(3) {
                0 => g.node.swap(i, j),
                1 => {
                    g.node.remove(i);
                }
                _ => {
                    let n = g.node[i].clone();
                    g.node.insert(j, n);
                }
            }
        }
        5..=7 if !g.initializer.is_empty() => {
            let i = r.below(g.initializer.len());
            if r.one_in(8) {
                g.initializer.remove(i);
            } else {
                let t = &mut g.initializer[i];
                if r.one_in(6) {
                    t.name = a_name(r, &names);
                } else {
                    mutate_tensor(t, r);
                }
            }
        }
        8 => {
            let list = if r.one_in(2) {
                &mut g.input
            } else {
                &mut g.output
            };
            if list.is_empty() || r.one_in(8) {
                list.push(ValueInfoProto {
                    name: a_name(r, &names),
                    ..Default::default()
                });
            }
            let i = r.below(list.len());
            mutate_value_info(list, i, r, &names);
        }
        _ => {
            g.value_info.clear();
            if !g.node.is_empty() {
                let i = r.below(g.node.len());
                mutate_node(&mut g.node[i], r, &names);
            }
        }
    }
}

fn mutate_value_info(list: &mut Vec<ValueInfoProto>, i: usize, r: &mut Rng, names: &[String]) {
    if r.one_in(8) {
        list.remove(i);
        return;
    }
    let v = &mut list[i];
    if r.one_in(5) {
        v.name = a_name(r, names);
        return;
    }
    let t = v
        .r#type
        .get_or_insert_with(Default::default)
        .tensor_type
        .get_or_insert_with(Default::default);
    if r.one_in(5) {
        t.elem_type = *r.pick(DATA_TYPES);
        return;
    }
    if r.one_in(10) {
        t.shape = None;
        return;
    }
    let dims = &mut t.shape.get_or_insert_with(Default::default).dim;
    match r.below(4) {
        0 => dims.push(Dimension {
            dim_value: Some(*r.pick(INTS)),
            ..Default::default()
        }),
        1 if !dims.is_empty() => {
            dims.remove(r.below(dims.len()));
        }
        _ if !dims.is_empty() => {
            let j = r.below(dims.len());
            let d = &mut dims[j];
            match r.below(4) {
                0 => {
                    d.dim_value = None;
                    d.dim_param = Some(r.pick(&["N", "batch", ""]).to_string());
                }
                1 => *d = Dimension::default(),
                _ => d.dim_value = Some(int(r, d.dim_value.unwrap_or(0))),
            }
        }
        _ => {}
    }
}

fn mutate_node(n: &mut NodeProto, r: &mut Rng, names: &[String]) {
    match r.below(8) {
        0 => {
            n.op_type = if r.one_in(3) {
                r.pick(OTHER_OPS).to_string()
            } else {
                r.pick(SUPPORTED_OPS).to_string()
            }
        }
        1 => n.domain = r.pick(&["", "ai.onnx", "com.microsoft", "x"]).to_string(),
        2 | 3 => {
            // Inputs or outputs: rename, drop, add, empty (optional) name.
            let list = if r.one_in(2) {
                &mut n.input
            } else {
                &mut n.output
            };
            match r.below(4) {
                0 if !list.is_empty() => {
                    list.remove(r.below(list.len()));
                }
                1 => list.push(a_name(r, names)),
                _ if !list.is_empty() => {
                    let i = r.below(list.len());
                    list[i] = if r.one_in(5) {
                        String::new()
                    } else {
                        a_name(r, names)
                    };
                }
                _ => {}
            }
        }
        _ => {
            if n.attribute.is_empty() || r.one_in(6) {
                n.attribute.push(AttributeProto {
                    name: r.pick(ATTRS).to_string(),
                    r#type: 2,
                    ..Default::default()
                });
            }
            let i = r.below(n.attribute.len());
            if r.one_in(10) {
                n.attribute.remove(i);
            } else {
                mutate_attr(&mut n.attribute[i], r);
            }
        }
    }
}

fn mutate_attr(a: &mut AttributeProto, r: &mut Rng) {
    match r.below(9) {
        0 => a.name = r.pick(ATTRS).to_string(),
        1 => a.r#type = *r.pick(&[0, 1, 2, 3, 4, 5, 6, 7, 8, 99]),
        2 => a.i = int(r, a.i),
        3 => a.f = *r.pick(FLOATS),
        4 => a.s = r.pick(STRINGS).as_bytes().to_vec(),
        5 => {
            // Integer lists: a value, the length, or both.
            match r.below(3) {
                0 if !a.ints.is_empty() => {
                    let i = r.below(a.ints.len());
                    a.ints[i] = int(r, a.ints[i]);
                }
                1 => a.ints.truncate(r.below(a.ints.len() + 1)),
                _ => a.ints.push(*r.pick(INTS)),
            }
        }
        6 => match r.below(2) {
            0 if !a.floats.is_empty() => {
                let i = r.below(a.floats.len());
                a.floats[i] = *r.pick(FLOATS);
            }
            _ => a.floats.push(*r.pick(FLOATS)),
        },
        _ => mutate_tensor(a.t.get_or_insert_with(Default::default), r),
    }
}

fn mutate_tensor(t: &mut TensorProto, r: &mut Rng) {
    match r.below(9) {
        0 | 1 => match r.below(3) {
            0 if !t.dims.is_empty() => {
                let i = r.below(t.dims.len());
                t.dims[i] = int(r, t.dims[i]);
            }
            1 if !t.dims.is_empty() => {
                t.dims.remove(r.below(t.dims.len()));
            }
            _ => t.dims.insert(r.below(t.dims.len() + 1), *r.pick(INTS)),
        },
        2 => t.data_type = *r.pick(DATA_TYPES),
        3 => {
            // raw_data length: cut, grow, empty.
            let n = t.raw_data.len();
            match r.below(3) {
                0 => t.raw_data.truncate(r.below(n + 1)),
                1 => t
                    .raw_data
                    .extend((0..1 + r.below(64)).map(|_| r.next_u64() as u8)),
                _ => t.raw_data.clear(),
            }
        }
        4 => {
            // Raw values: special floats in place.
            if t.raw_data.len() >= 4 {
                let i = 4 * r.below(t.raw_data.len() / 4);
                t.raw_data[i..i + 4].copy_from_slice(&r.pick(FLOATS).to_le_bytes());
            }
        }
        5 => {
            // Typed fields instead of, or besides, raw bytes.
            match r.below(4) {
                0 => t.float_data.push(*r.pick(FLOATS)),
                1 => t.int64_data.push(*r.pick(INTS)),
                2 => t.int32_data.push(*r.pick(INTS) as i32),
                _ => {
                    t.float_data.clear();
                    t.int64_data.clear();
                    t.int32_data.clear();
                }
            }
        }
        _ => {
            // External data: location, offset, length.
            t.data_location = if r.one_in(6) {
                *r.pick(&[0, 2, -1])
            } else {
                DATA_LOCATION_EXTERNAL
            };
            let key = *r.pick(&["location", "offset", "length", "checksum"]);
            let value = match key {
                "location" => r.pick(STRINGS).to_string(),
                _ => r
                    .pick(&[
                        "0",
                        "4",
                        "-1",
                        "x",
                        "",
                        "18446744073709551615",
                        "9223372036854775807",
                        "61308",
                        "61304",
                    ])
                    .to_string(),
            };
            t.external_data.retain(|e| e.key != key || r.one_in(4));
            t.external_data.push(StringStringEntryProto {
                key: key.to_string(),
                value,
            });
        }
    }
}
