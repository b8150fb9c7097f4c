//! One small crafted file per way a graph can be refused. Each test writes
//! the files into a temporary folder, loads them through `frontend::load`
//! and checks that the message names the file and, where they apply, the
//! layer and the tensor, so a user can find the problem.

use ingot_compiler::frontend::{self, LayerFile, LoadError};
use ingot_testkit::zoo::{self, Net};
use safetensors::tensor::{Dtype, TensorView};
use serde_json::json;
use std::path::PathBuf;

/// plain_stack on 1x8x8: conv1 relu1 pool1 conv2 relu2 pool2 flatten fc.
fn base() -> Net {
    zoo::plain_stack(
        &zoo::PlainStackConfig {
            input: [1, 8, 8],
            channels: [2, 3],
            classes: 3,
        },
        1,
    )
}

/// Writes `net` as `case.graph.json` + `case.safetensors` and loads it.
fn load(
    net: &Net,
) -> (
    tempfile::TempDir,
    PathBuf,
    Result<ingot_compiler::Graph, LoadError>,
) {
    let dir = tempfile::tempdir().unwrap();
    let path = net.write(dir.path(), "case").unwrap();
    let r = frontend::load(&path);
    (dir, path, r)
}

/// The error message of loading `net`, which must fail.
fn err(net: &Net) -> String {
    let (_dir, _path, r) = load(net);
    match r {
        Ok(_) => panic!("loaded, but should have been refused"),
        Err(e) => e.to_string(),
    }
}

fn has(msg: &str, parts: &[&str]) {
    for p in parts {
        assert!(msg.contains(p), "message lacks `{p}`: {msg}");
    }
}

#[test]
fn the_base_case_loads() {
    let (_dir, _path, r) = load(&base());
    assert_eq!(r.unwrap().layers().len(), 8);
}

#[test]
fn unknown_op() {
    let mut n = base();
    n.file.layers[1].op = "gelu".into();
    has(
        &err(&n),
        &[
            "case.graph.json",
            "layer `relu1`",
            "unknown op `gelu`",
            "known: conv2d",
        ],
    );
}

#[test]
fn unknown_attribute() {
    let mut n = base();
    n.file.layers[0] = n.file.layers[0].clone().attr("strides", 2);
    has(
        &err(&n),
        &[
            "case.graph.json",
            "layer `conv1` (conv2d)",
            "unknown attribute `strides`",
            "allowed: weight, bias, stride",
        ],
    );
}

#[test]
fn missing_input() {
    let mut n = base();
    n.file.layers[1].input = None;
    has(
        &err(&n),
        &["case.graph.json", "layer `relu1` (relu)", "missing `input`"],
    );
    let mut n = base();
    n.file.layers.insert(
        3,
        LayerFile {
            input: None,
            inputs: None,
            ..LayerFile::multi("cat", "concat", &[])
        },
    );
    has(
        &err(&n),
        &[
            "case.graph.json",
            "layer `cat` (concat)",
            "missing `inputs`",
        ],
    );
}

#[test]
fn extra_input_both_keys() {
    let mut n = base();
    n.file.layers[1].inputs = Some(vec!["conv1".into()]);
    has(
        &err(&n),
        &[
            "case.graph.json",
            "layer `relu1` (relu)",
            "either `input` or `inputs`, not both",
        ],
    );
    // A one-input op given a list.
    let mut n = base();
    n.file.layers[1].input = None;
    n.file.layers[1].inputs = Some(vec!["conv1".into(), "input".into()]);
    has(
        &err(&n),
        &["layer `relu1` (relu)", "use `input`, not `inputs`"],
    );
    // `add` with three inputs.
    let mut n = base();
    n.file.layers.insert(
        2,
        LayerFile::multi("sum", "add", &["relu1", "relu1", "conv1"]),
    );
    has(&err(&n), &["layer `sum` (add)", "exactly 2 inputs, got 3"]);
}

#[test]
fn reference_to_a_later_layer_is_a_cycle() {
    let mut n = base();
    n.file.layers[3].input = Some("relu2".into());
    has(
        &err(&n),
        &[
            "case.graph.json",
            "layer `conv2` (conv2d)",
            "reads `relu2`, which comes later",
            "cycle",
        ],
    );
}

#[test]
fn self_reference() {
    let mut n = base();
    n.file.layers[1].input = Some("relu1".into());
    has(
        &err(&n),
        &[
            "case.graph.json",
            "layer `relu1` (relu)",
            "reads its own output `relu1`",
        ],
    );
}

#[test]
fn unknown_name_and_duplicate_name() {
    let mut n = base();
    n.file.layers[1].input = Some("conv9".into());
    has(
        &err(&n),
        &[
            "layer `relu1`",
            "reads `conv9`, which is neither the input nor a layer",
        ],
    );
    let mut n = base();
    n.file.layers[4].name = "relu1".into();
    n.file.layers[5].input = Some("relu1".into());
    has(
        &err(&n),
        &["case.graph.json", "layer `relu1`", "used twice"],
    );
}

#[test]
fn missing_tensor() {
    let mut n = base();
    n.store.tensors.remove("conv2.weight");
    has(
        &err(&n),
        &[
            "case.safetensors",
            "tensor `conv2.weight`",
            "layer `conv2` (conv2d)",
            "missing",
        ],
    );
    let mut n = base();
    n.store.tensors.remove("fc.bias");
    has(
        &err(&n),
        &[
            "case.safetensors",
            "tensor `fc.bias`",
            "layer `fc` (linear)",
        ],
    );
}

#[test]
fn tensor_shape_does_not_match_the_op() {
    let mut n = base();
    // conv2 reads 2 channels; give it weights for 4.
    n.store
        .insert("conv2.weight", vec![3, 4, 3, 3], vec![0.1; 108]);
    has(
        &err(&n),
        &[
            "case.safetensors",
            "tensor `conv2.weight`",
            "layer `conv2` (conv2d)",
            "[3, 4, 3, 3]",
            "expected [O, 2, kH, kW]",
        ],
    );
    let mut n = base();
    n.store.insert("fc.weight", vec![3, 47], vec![0.1; 141]);
    has(
        &err(&n),
        &[
            "tensor `fc.weight`",
            "layer `fc` (linear)",
            "[3, 47]",
            "expected [out, 12]",
        ],
    );
    let mut n = base();
    n.store.insert("conv1.bias", vec![3], vec![0.1; 3]);
    has(
        &err(&n),
        &[
            "tensor `conv1.bias`",
            "layer `conv1`",
            "[3]",
            "expected [2]",
        ],
    );
}

#[test]
fn concat_of_maps_with_different_sizes() {
    let mut n = base();
    n.file
        .layers
        .insert(3, LayerFile::multi("cat", "concat", &["relu1", "pool1"]));
    has(
        &err(&n),
        &[
            "case.graph.json",
            "layer `cat` (concat)",
            "input 1 has shape [2, 4, 4] but input 0 has [2, 8, 8]",
            "same height and width",
        ],
    );
}

#[test]
fn add_of_different_shapes() {
    let mut n = base();
    n.file
        .layers
        .insert(3, LayerFile::multi("sum", "add", &["relu1", "pool1"]));
    has(
        &err(&n),
        &[
            "case.graph.json",
            "layer `sum` (add)",
            "[2, 8, 8] and [2, 4, 4]",
            "equal shapes",
        ],
    );
}

/// Writes a safetensors file holding the base tensors plus `extra` with the
/// given dtype (data of the right byte length, all zero).
fn with_extra_tensor(dtype: Dtype, bytes_per: usize) -> String {
    let n = base();
    let dir = tempfile::tempdir().unwrap();
    let path = n.write(dir.path(), "case").unwrap();
    let weights = dir.path().join("case.safetensors");
    let store = frontend::TensorStore::load(&weights).unwrap();
    let raw: Vec<(String, Vec<u8>, Vec<usize>)> = store
        .tensors
        .iter()
        .map(|(k, t)| {
            (
                k.clone(),
                t.data.iter().flat_map(|v| v.to_le_bytes()).collect(),
                t.shape.clone(),
            )
        })
        .collect();
    let extra = vec![0u8; 4 * bytes_per];
    let mut views: Vec<(String, TensorView<'_>)> = raw
        .iter()
        .map(|(k, b, s)| {
            (
                k.clone(),
                TensorView::new(Dtype::F32, s.clone(), b).unwrap(),
            )
        })
        .collect();
    views.push((
        "step_count".into(),
        TensorView::new(dtype, vec![4], &extra).unwrap(),
    ));
    std::fs::write(&weights, safetensors::serialize(views, None).unwrap()).unwrap();
    frontend::load(&path).unwrap_err().to_string()
}

#[test]
fn dtype_we_do_not_read() {
    has(
        &with_extra_tensor(Dtype::I64, 8),
        &[
            "case.safetensors",
            "tensor `step_count`",
            "dtype I64",
            "reads F32, F16 and BF16",
        ],
    );
    has(
        &with_extra_tensor(Dtype::F64, 8),
        &["case.safetensors", "tensor `step_count`", "dtype F64"],
    );
}

#[test]
fn half_precision_tensors_are_read() {
    // The counterpart of the refusals above: F16 converts exactly for these
    // values (1.5 and -2.0 are representable in binary16).
    let dir = tempfile::tempdir().unwrap();
    let p = dir.path().join("h.safetensors");
    let bytes: Vec<u8> = [half::f16::from_f32(1.5), half::f16::from_f32(-2.0)]
        .iter()
        .flat_map(|h| h.to_le_bytes())
        .collect();
    let v = TensorView::new(Dtype::F16, vec![2], &bytes).unwrap();
    std::fs::write(&p, safetensors::serialize(vec![("t", v)], None).unwrap()).unwrap();
    let s = frontend::TensorStore::load(&p).unwrap();
    assert_eq!(s.tensors["t"].data, vec![1.5, -2.0]);
}

/// Loads `base` after `f` has changed the bytes of the weights file.
fn with_weight_bytes(f: impl FnOnce(&mut Vec<u8>)) -> String {
    let n = base();
    let dir = tempfile::tempdir().unwrap();
    let path = n.write(dir.path(), "case").unwrap();
    let weights = dir.path().join("case.safetensors");
    let mut bytes = std::fs::read(&weights).unwrap();
    f(&mut bytes);
    std::fs::write(&weights, bytes).unwrap();
    frontend::load(&path).unwrap_err().to_string()
}

#[test]
fn truncated_safetensors() {
    let msg = with_weight_bytes(|b| b.truncate(b.len() - 10));
    has(
        &msg,
        &["case.safetensors", "not a readable safetensors file"],
    );
    let msg = with_weight_bytes(|b| b.truncate(5));
    has(
        &msg,
        &["case.safetensors", "not a readable safetensors file"],
    );
}

#[test]
fn corrupt_header() {
    // The header is JSON after an 8-byte length; break its first brace.
    let msg = with_weight_bytes(|b| b[8] = b'#');
    has(
        &msg,
        &["case.safetensors", "not a readable safetensors file"],
    );
    // A header length larger than the file.
    let msg = with_weight_bytes(|b| b[..8].copy_from_slice(&u64::MAX.to_le_bytes()));
    has(
        &msg,
        &["case.safetensors", "not a readable safetensors file"],
    );
}

#[test]
fn nan_and_infinite_weights() {
    let mut n = base();
    n.store.tensors.get_mut("conv2.weight").unwrap().data[7] = f32::NAN;
    has(
        &err(&n),
        &[
            "case.safetensors",
            "tensor `conv2.weight`",
            "layer `conv2` (conv2d)",
            "non-finite value (NaN) at flat index 7",
        ],
    );
    let mut n = base();
    n.store.tensors.get_mut("fc.bias").unwrap().data[2] = f32::NEG_INFINITY;
    has(
        &err(&n),
        &[
            "tensor `fc.bias`",
            "layer `fc` (linear)",
            "(-inf) at flat index 2",
        ],
    );
}

#[test]
fn sizes_whose_products_overflow() {
    let mut n = base();
    n.file.input.shape = vec![1, 1 << 40, 1 << 40];
    has(&err(&n), &["case.graph.json", "input `input`", "overflows"]);
    // Each output side fits in usize, their product does not.
    let mut n = base();
    n.file.layers[0] = n.file.layers[0].clone().attr("padding", 1u64 << 61);
    has(
        &err(&n),
        &["case.graph.json", "layer `conv1` (conv2d)", "overflows"],
    );
    // A side that itself overflows.
    let mut n = base();
    n.file.layers[0] = n.file.layers[0]
        .clone()
        .attr("padding", json!([u64::MAX / 2 + 1, 0, u64::MAX / 2 + 1, 0]));
    has(
        &err(&n),
        &["case.graph.json", "layer `conv1` (conv2d)", "overflow"],
    );
}

#[test]
fn softmax_not_last() {
    let mut n = base();
    n.file
        .layers
        .insert(2, LayerFile::new("sm", "softmax", "relu1"));
    n.file.layers[3].input = Some("sm".into());
    has(
        &err(&n),
        &[
            "case.graph.json",
            "layer `sm`",
            "softmax is only supported as the output layer",
        ],
    );
}

#[test]
fn wrong_format_string() {
    let mut n = base();
    n.file.format = "ingot.graph.v2".into();
    has(
        &err(&n),
        &[
            "case.graph.json",
            "\"ingot.graph.v2\"",
            "reads \"ingot.graph.v1\"",
        ],
    );
}

#[test]
fn json_syntax_error_names_line_and_column() {
    let n = base();
    let dir = tempfile::tempdir().unwrap();
    let path = n.write(dir.path(), "case").unwrap();
    let text = std::fs::read_to_string(&path).unwrap();
    // Drop the comma after `"name": "plain_stack"` on line 3.
    let line3 = text.lines().nth(2).unwrap();
    assert_eq!(line3, "  \"name\": \"plain_stack\",");
    let broken = text.replacen("\"plain_stack\",", "\"plain_stack\"", 1);
    std::fs::write(&path, broken).unwrap();
    let e = frontend::load(&path).unwrap_err();
    assert!(matches!(e, LoadError::Json { line: 4, .. }), "{e:?}");
    has(&e.to_string(), &["case.graph.json:4:3:", "expected `,`"]);
}

#[test]
fn unknown_top_level_key_and_missing_weights_file() {
    let n = base();
    let dir = tempfile::tempdir().unwrap();
    let path = n.write(dir.path(), "case").unwrap();
    let mut v: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(&path).unwrap()).unwrap();
    v["outputs"] = json!("fc");
    std::fs::write(&path, v.to_string()).unwrap();
    has(
        &frontend::load(&path).unwrap_err().to_string(),
        &["case.graph.json:1:", "unknown field `outputs`"],
    );
    let path = n.write(dir.path(), "case2").unwrap();
    std::fs::remove_file(dir.path().join("case2.safetensors")).unwrap();
    has(
        &frontend::load(&path).unwrap_err().to_string(),
        &["case2.safetensors", "cannot read"],
    );
}
