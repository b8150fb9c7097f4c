//! Malformed and unsupported ONNX models: each gives a clear error naming
//! what is wrong and where, never a panic or a partial result.

use ingot_compiler::frontend::onnx::proto::{
    AttributeProto, ModelProto, NodeProto, StringStringEntryProto, TensorProto,
};
use ingot_compiler::frontend::onnx::{self, ImportError, ImportOptions};
use prost::Message;
use std::path::{Path, PathBuf};

fn fixture_path(name: &str) -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join(format!("tests/fixtures/onnx/{name}.onnx"))
}

fn model(name: &str) -> ModelProto {
    ModelProto::decode(&std::fs::read(fixture_path(name)).unwrap()[..]).unwrap()
}

fn import_model(m: &ModelProto) -> Result<onnx::Imported, ImportError> {
    onnx::import_bytes(
        &m.encode_to_vec(),
        Path::new("/virtual/model.onnx"),
        &ImportOptions::default(),
    )
}

fn err(m: &ModelProto) -> String {
    match import_model(m) {
        Ok(_) => panic!("import accepted a bad model"),
        Err(e) => e.to_string(),
    }
}

#[test]
fn truncated_protobuf_is_a_decode_error() {
    let bytes = std::fs::read(fixture_path("net_resnet")).unwrap();
    for cut in [bytes.len() / 2, bytes.len() - 3, 7] {
        let e = onnx::import_bytes(
            &bytes[..cut],
            Path::new("cut.onnx"),
            &ImportOptions::default(),
        )
        .unwrap_err();
        assert!(matches!(e, ImportError::Decode { .. }), "{e}");
        assert!(
            e.to_string()
                .starts_with("cut.onnx: not a readable ONNX model"),
            "{e}"
        );
    }
}

#[test]
fn wrong_field_types_are_decode_errors() {
    // Field 7 (graph, a message) sent as a varint; field 1 (ir_version, a
    // varint) sent as a length-delimited field.
    for bytes in [&[0x38u8, 0x01][..], &[0x0a, 0x02, 0x01, 0x02][..]] {
        let e = onnx::import_bytes(bytes, Path::new("bad.onnx"), &ImportOptions::default())
            .unwrap_err();
        assert!(matches!(e, ImportError::Decode { .. }), "{e}");
    }
    // A text file is not a model either.
    let e = onnx::import_bytes(
        b"hello, not a model",
        Path::new("t.onnx"),
        &ImportOptions::default(),
    )
    .unwrap_err();
    assert!(
        matches!(e, ImportError::Decode { .. } | ImportError::Model { .. }),
        "{e}"
    );
}

#[test]
fn a_missing_initializer_names_the_node_and_value() {
    let mut m = model("net_resnet");
    let g = m.graph.as_mut().unwrap();
    g.initializer.retain(|t| t.name != "fc.weight");
    let e = err(&m);
    assert!(
        e.contains("node `/fc/Gemm`")
            && e.contains("`fc.weight`")
            && e.contains("missing initializer"),
        "{e}"
    );
}

#[test]
fn a_cycle_is_refused_with_its_nodes() {
    let mut m = model("concat_add");
    let g = m.graph.as_mut().unwrap();
    // /a/Conv now reads the output of /Add, which reads /a/Conv's output.
    g.node[0].input[0] = "output".into();
    let e = err(&m);
    assert!(e.contains("cycle") && e.contains("`/a/Conv` (Conv)"), "{e}");
}

#[test]
fn an_unknown_op_lists_the_supported_ops() {
    let mut m = model("batchnorm_relu");
    let g = m.graph.as_mut().unwrap();
    g.node[2].op_type = "LeakyRelu".into();
    let e = err(&m);
    assert!(
        e.contains("node `/relu/Relu`: op LeakyRelu (opset 15) is not supported"),
        "{e}"
    );
    assert!(e.contains("BatchNormalization, Cast, Clip"), "{e}");
    // Ops of other domains are named with their domain.
    g_domain(&mut m);
    let e = err(&m);
    assert!(e.contains("com.example::LeakyRelu"), "{e}");
}

fn g_domain(m: &mut ModelProto) {
    m.graph.as_mut().unwrap().node[2].domain = "com.example".into();
}

#[test]
fn huge_declared_dims_are_refused_without_allocating() {
    // An initializer declaring 2^40 elements with a few bytes of data.
    let mut m = model("conv_pads_stride");
    let t = &mut m.graph.as_mut().unwrap().initializer[0];
    t.dims = vec![1 << 20, 1 << 20, 1, 1];
    let e = err(&m);
    assert!(
        e.contains("tensor `onnx::Conv_1`") && e.contains("more than"),
        "{e}"
    );
    // Dimensions whose product overflows.
    let t = &mut m.graph.as_mut().unwrap().initializer[0];
    t.dims = vec![i64::MAX, i64::MAX];
    assert!(err(&m).contains("more than"));
    // An input image of 10^12 pixels.
    let mut m = model("conv_pads_stride");
    let dim = &mut m.graph.as_mut().unwrap().input[0]
        .r#type
        .as_mut()
        .unwrap()
        .tensor_type
        .as_mut()
        .unwrap()
        .shape
        .as_mut()
        .unwrap()
        .dim[2];
    dim.dim_value = Some(1_000_000_000_000);
    let e = err(&m);
    assert!(
        e.contains("input `input`") && e.contains("far larger"),
        "{e}"
    );
    // Data shorter than declared.
    let mut m = model("conv_pads_stride");
    m.graph.as_mut().unwrap().initializer[0].dims = vec![4, 1, 3, 4];
    let e = err(&m);
    assert!(
        e.contains("raw data holds 144 bytes") && e.contains("need 192"),
        "{e}"
    );
}

#[test]
fn unsupported_forms_say_what_was_found() {
    // Opset out of range.
    let mut m = model("conv_pads_stride");
    m.opset_import[0].version = 9;
    assert!(err(&m).contains("opset 9; ingot imports opsets 11 to 21"));
    // A dynamic height.
    let mut m = model("conv_pads_stride");
    let d = &mut m.graph.as_mut().unwrap().input[0]
        .r#type
        .as_mut()
        .unwrap()
        .tensor_type
        .as_mut()
        .unwrap()
        .shape
        .as_mut()
        .unwrap()
        .dim[2];
    d.dim_value = None;
    d.dim_param = Some("height".into());
    let e = err(&m);
    assert!(
        e.contains("[`batch_size`, 1, `height`, 8]")
            && e.contains("only the batch dimension may be dynamic"),
        "{e}"
    );
    // Channels-last input: [N, H, W, C] followed by a Transpose.
    let mut m = model("conv_pads_stride");
    let g = m.graph.as_mut().unwrap();
    let dims = &mut g.input[0]
        .r#type
        .as_mut()
        .unwrap()
        .tensor_type
        .as_mut()
        .unwrap()
        .shape
        .as_mut()
        .unwrap()
        .dim;
    dims[1].dim_value = Some(9);
    dims[2].dim_value = Some(8);
    dims[3].dim_value = Some(1);
    let e = err(&m);
    assert!(e.contains("channels-last"), "{e}");
    // A Transpose right after an NCHW-declared input.
    let mut m = model("conv_pads_stride");
    let g = m.graph.as_mut().unwrap();
    g.node.insert(
        0,
        NodeProto {
            input: vec!["input".into()],
            output: vec!["t".into()],
            name: "/Transpose".into(),
            op_type: "Transpose".into(),
            attribute: vec![AttributeProto {
                name: "perm".into(),
                r#type: 7,
                ints: vec![0, 3, 1, 2],
                ..Default::default()
            }],
            ..Default::default()
        },
    );
    g.node[1].input[0] = "t".into();
    let e = err(&m);
    assert!(
        e.contains("followed by Transpose") && e.contains("NHWC"),
        "{e}"
    );
    // Clip with other bounds.
    let mut m = model("clip_forms");
    let g = m.graph.as_mut().unwrap();
    for t in &mut g.initializer {
        if t.name == "six" {
            t.raw_data = 4.0f32.to_le_bytes().to_vec();
        }
    }
    let e = err(&m);
    assert!(
        e.contains("node `/a/Clip` (Clip, opset 12): bounds [0, 4]"),
        "{e}"
    );
    // Average pooling that excludes padding.
    let mut m = model("avgpool_forms");
    for a in &mut m.graph.as_mut().unwrap().node[0].attribute {
        if a.name == "count_include_pad" {
            a.i = 0;
        }
    }
    let e = err(&m);
    assert!(e.contains("`count_include_pad` is 0"), "{e}");
}

#[test]
fn external_data_must_stay_in_the_models_folder() {
    let dir = tempfile::tempdir().unwrap();
    let mut m = model("conv_pads_stride");
    let t: &mut TensorProto = &mut m.graph.as_mut().unwrap().initializer[0];
    let data = std::mem::take(&mut t.raw_data);
    t.data_location = 1;
    let ext = |loc: &str| {
        vec![
            StringStringEntryProto {
                key: "location".into(),
                value: loc.into(),
            },
            StringStringEntryProto {
                key: "length".into(),
                value: data.len().to_string(),
            },
        ]
    };
    let run = |m: &ModelProto| {
        onnx::import_bytes(
            &m.encode_to_vec(),
            &dir.path().join("m.onnx"),
            &ImportOptions::default(),
        )
    };
    // Next to the model: read.
    std::fs::write(dir.path().join("w.bin"), &data).unwrap();
    m.graph.as_mut().unwrap().initializer[0].external_data = ext("w.bin");
    run(&m).unwrap();
    // Outside the folder: refused, whether it exists or not.
    for loc in ["../w.bin", "/etc/passwd", "sub/../../w.bin"] {
        m.graph.as_mut().unwrap().initializer[0].external_data = ext(loc);
        let e = run(&m).unwrap_err().to_string();
        assert!(e.contains("inside the model's folder"), "{loc}: {e}");
    }
    // Missing file.
    m.graph.as_mut().unwrap().initializer[0].external_data = ext("absent.bin");
    let e = run(&m).unwrap_err().to_string();
    assert!(
        e.contains("absent.bin") && e.contains("next to the model"),
        "{e}"
    );
}
