//! The complete example of `docs/graph-format.md` loads: the test takes the
//! JSON block under "## Complete example" and the tensor table after it
//! verbatim from the document, writes a safetensors file with tensors of
//! those shapes, and loads both through `frontend::load`.

use ingot_compiler::frontend::{self, TensorStore};
use ingot_compiler::graph::{Op, Padding, Shape};
use ingot_compiler::reference::Reference;
use ingot_testkit::zoo::Rng;

const DOC: &str = include_str!("../../../docs/graph-format.md");

/// The text of the section that starts with `heading`.
fn section(heading: &str) -> &'static str {
    let start = DOC
        .find(heading)
        .unwrap_or_else(|| panic!("no `{heading}` in the document"));
    &DOC[start..]
}

fn example_json() -> &'static str {
    let s = section("## Complete example");
    let start = s.find("```json\n").expect("a json block") + "```json\n".len();
    let len = s[start..].find("```").expect("end of the json block");
    &s[start..start + len]
}

/// `(name, shape)` rows of the tensor table of the example.
fn example_tensors() -> Vec<(String, Vec<usize>)> {
    let s = section("Tensors of the example");
    s.lines()
        .filter(|l| l.starts_with("| `"))
        .map(|l| {
            let cells: Vec<&str> = l.split('|').map(|c| c.trim().trim_matches('`')).collect();
            let shape = cells[2]
                .trim_matches(|c| c == '[' || c == ']')
                .split(',')
                .map(|d| d.trim().parse().unwrap())
                .collect();
            (cells[1].to_string(), shape)
        })
        .collect()
}

#[test]
fn the_documented_example_loads() {
    let tensors = example_tensors();
    assert_eq!(tensors.len(), 12);
    let dir = tempfile::tempdir().unwrap();
    let mut store = TensorStore::new(dir.path().join("tiny.safetensors"));
    let mut rng = Rng::new(42);
    for (name, shape) in &tensors {
        let n = shape.iter().product();
        // Positive values keep every running variance valid.
        store.insert(name.clone(), shape.clone(), rng.uniform_vec(n, 0.5, 1.5));
    }
    store.save(&store.path).unwrap();
    let path = dir.path().join("tiny.graph.json");
    std::fs::write(&path, example_json()).unwrap();
    let g = frontend::load(&path).unwrap();

    // The map shapes the document states.
    let shape = |n: &str| g.shape(g.find_layer(n).unwrap().output());
    assert_eq!(shape("stem"), Shape::new(8, 16, 16));
    assert_eq!(shape("b1_relu"), Shape::new(8, 16, 16));
    assert_eq!(shape("pool"), Shape::new(8, 8, 8));
    assert_eq!(shape("pw"), Shape::new(4, 8, 8));
    assert_eq!(shape("cat"), Shape::new(12, 8, 8));
    assert_eq!(shape("down"), Shape::new(12, 4, 4));
    assert_eq!(shape("gap"), Shape::new(12, 1, 1));
    assert_eq!(g.shape(g.output()), Shape::flat(3));
    assert_eq!(g.labels(), ["cat", "dog", "bird"]);
    // "same" resolved to explicit padding; preprocessing as documented.
    match &g.layer(g.find_layer("stem").unwrap()).op {
        Op::Conv2d(c) => assert_eq!(c.padding, Padding::uniform(1)),
        other => panic!("stem is {}", other.kind()),
    }
    assert!((g.input().preprocess(0, 255) - 2.0).abs() < 1e-5);
    assert!((g.input().preprocess(0, 0) + 2.0).abs() < 1e-6);
    // Every tensor in the table is used: dropping any one is refused.
    for (name, _) in &tensors {
        let mut s =
            TensorStore::from_bytes(&std::fs::read(&store.path).unwrap(), &store.path).unwrap();
        s.tensors.remove(name);
        let file = frontend::parse(example_json(), &path).unwrap();
        let e = frontend::validate(&file, &s, &path)
            .unwrap_err()
            .to_string();
        assert!(e.contains(name.as_str()), "{e}");
    }
    // And it runs: the softmax output is a distribution.
    let out = Reference::new(&g).run(&vec![0.25; 256]).unwrap();
    assert!((out.iter().sum::<f32>() - 1.0).abs() < 1e-5);
}
