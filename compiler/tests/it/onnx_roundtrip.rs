//! Round trip: the committed digits and demo models, exported to ONNX by
//! `tests/fixtures/onnx/make_fixtures.py` (onnx 1.23.2) and imported back,
//! must be the same network as the native graphs: same layers and tensors
//! bit for bit, the same float outputs (so the same float accuracy) on the
//! evaluation images, and the same int8 module, weights file and reports
//! byte for byte except the model hash (which covers the source files'
//! bytes, and the JSON text and tensor order of the files differ).

use ingot_compiler::calibrate::images::ImageSet;
use ingot_compiler::calibrate::Method;
use ingot_compiler::driver::{self as pipeline, BuildInputs, RangesSource};
use ingot_compiler::frontend::onnx::{self, ImportOptions};
use ingot_compiler::reference::Reference;
use std::path::{Path, PathBuf};

fn root() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("..")
}

fn argmax(v: &[f32]) -> usize {
    v.iter()
        .enumerate()
        .fold(
            (0, f32::NEG_INFINITY),
            |b, (i, &x)| if x > b.1 { (i, x) } else { b },
        )
        .0
}

/// Imports `onnx_name`, writes it as `{stem}` into a temporary folder, and
/// compares with the native graph `native`.
fn round_trip(onnx_name: &str, stem: &str, native: &str, calib: &str, eval: &str) {
    let dir = tempfile::tempdir().unwrap();
    let model = root()
        .join("compiler/tests/fixtures/onnx/roundtrip")
        .join(onnx_name);
    let opt = ImportOptions {
        name: Some(stem.into()),
        ..ImportOptions::default()
    };
    let imported = onnx::import(&model, &opt).unwrap();
    assert!(imported.notices.is_empty(), "{:?}", imported.notices);
    let graph_path = dir.path().join(format!("{stem}.graph.json"));
    imported.validate(&graph_path).unwrap();
    std::fs::write(&graph_path, imported.graph_json()).unwrap();
    imported
        .store
        .save(&dir.path().join(&imported.file.weights))
        .unwrap();

    let native_path = root().join(native);
    let a = ingot_compiler::load(&native_path).unwrap();
    let b = ingot_compiler::load(&graph_path).unwrap();
    assert_eq!(a.input(), b.input());
    assert_eq!(a.labels(), b.labels());
    assert_eq!(
        a.layers(),
        b.layers(),
        "layers (ops, attributes, tensors) differ"
    );
    assert_eq!(a.output(), b.output());

    // Float outputs on the evaluation images: bit for bit.
    let images = ImageSet::open(&root().join(eval), &a).unwrap();
    let (ra, rb) = (Reference::new(&a), Reference::new(&b));
    let (mut correct, mut n) = (0, 0);
    for s in images.iter() {
        let s = s.unwrap();
        let (ya, yb) = (ra.run(&s.input).unwrap(), rb.run(&s.input).unwrap());
        assert_eq!(ya, yb, "float outputs differ on image {}", s.index);
        if let Some(l) = s.label {
            n += 1;
            correct += (argmax(&yb) == l) as usize;
        }
    }
    assert!(n > 0);
    println!("{stem}: float accuracy {correct}/{n} on {eval}, native and imported alike");

    // The int8 module: calibrated the same way, the same bytes.
    let build = |graph: &Path| {
        let mut req = BuildInputs::new(
            graph,
            RangesSource::Images(root().join(calib), Method::MinMax),
        );
        req.module = stem.into();
        pipeline::compile(&req).unwrap().files(stem)
    };
    let (fa, fb) = (build(&native_path), build(&graph_path));
    // MODEL_HASH covers the source files' bytes (the JSON text and the
    // order of tensors in the safetensors file differ), so it legitimately
    // differs; everything else must be the same byte for byte.
    let (ha, hb) = (model_hash(&fa, stem), model_hash(&fb, stem));
    assert_ne!(ha, hb);
    assert_eq!(fa.len(), fb.len());
    for ((na, ba), (nb, bb)) in fa.iter().zip(&fb) {
        assert_eq!(na, nb);
        let (ba, bb) = (unhash(ba, &ha), unhash(bb, &hb));
        if ba != bb {
            let (ta, tb) = (String::from_utf8_lossy(&ba), String::from_utf8_lossy(&bb));
            let diff: Vec<(&str, &str)> =
                ta.lines().zip(tb.lines()).filter(|(x, y)| x != y).collect();
            panic!(
                "{na} differs beyond the model hash: {} lines, first {:?}",
                diff.len(),
                &diff[..diff.len().min(6)]
            );
        }
    }
}

/// The `MODEL_HASH` of a generated module.
fn model_hash(files: &[(String, Vec<u8>)], stem: &str) -> String {
    let module = &files
        .iter()
        .find(|(n, _)| *n == format!("{stem}.rs"))
        .unwrap()
        .1;
    let text = String::from_utf8_lossy(module);
    let line = text
        .lines()
        .find(|l| l.contains("pub const MODEL_HASH"))
        .unwrap();
    line.split('"').nth(1).unwrap().to_string()
}

/// `bytes` with every occurrence of `hash` replaced by a placeholder of the
/// same length.
fn unhash(bytes: &[u8], hash: &str) -> Vec<u8> {
    let h = hash.as_bytes();
    let mut out = bytes.to_vec();
    let mut i = 0;
    while i + h.len() <= out.len() {
        if &out[i..i + h.len()] == h {
            out[i..i + h.len()].fill(b'#');
            i += h.len();
        } else {
            i += 1;
        }
    }
    out
}

#[test]
fn digits_model_round_trips_through_onnx() {
    round_trip(
        "digits.onnx",
        "digits",
        "tests/data/optdigits/model/digits.graph.json",
        "tests/data/optdigits/calibration",
        "tests/data/optdigits/heldout",
    );
}

#[test]
fn demo_model_round_trips_through_onnx() {
    round_trip(
        "brackets.onnx",
        "brackets",
        "examples/demo/model/brackets.graph.json",
        "examples/demo/data/calibration",
        "examples/demo/data/eval",
    );
}
