//! Small lowered networks built directly as [`QGraph`]s, with deterministic
//! pseudo-random weights and valid quantization: they exercise every kernel
//! and schedule feature of the generator (plain stack, dense concatenation
//! with fused input transforms, residual adds, depthwise and grouped
//! convolutions, hostile layer names) without needing calibration or
//! lowering. Also a DenseNet-121-shaped graph for compile-time benchmarks.

//!
//! The builder is [`crate::qbuild::QBuilder`] in its random fill.

pub use crate::qbuild::{ConvSpec, QBuilder};
use ingot_compiler::lower::QGraph;

/// conv → max pool → strided conv → global average → linear.
pub fn plain() -> QGraph {
    let (mut b, x) = QBuilder::new("plain", 3, 12, 12, 1);
    let c1 = b.conv("conv1", x, ConvSpec::new(8, 3));
    let p1 = b.max_pool("pool1", c1, 2, 2, 0);
    let c2 = b.conv("conv2", p1, ConvSpec::new(16, 3).stride(2));
    let c3 = b.conv("conv3", c2, ConvSpec::new(12, 1).linear());
    let g = b.global_avg_pool("gap", c3);
    let y = b.linear("fc", g, 5);
    b.finish(y, &["zero", "one", "two", "three", "four"])
}

/// A densely connected block: concatenations, fused affine and table input
/// transforms, a transform step, average pooling, and a linear layer over a
/// spatial map.
pub fn dense() -> QGraph {
    let (mut b, x) = QBuilder::new("dense", 3, 10, 10, 2);
    let q = b.qp();
    let x0 = b.conv_q("stem", x, ConvSpec::new(16, 3), Some(q));
    let y1 = b.conv_q("block.1", x0, ConvSpec::new(8, 3).transform(1), Some(q));
    let c1 = b.concat("cat1", &[x0, y1]);
    let y2 = b.conv_q("block.2", c1, ConvSpec::new(8, 3).transform(2), Some(q));
    let c2 = b.concat("cat2", &[c1, y2]);
    let t = b.channel("bn_relu", c2, 1);
    let a = b.avg_pool("pool", t, 2, 2);
    let z = b.conv("transition", a, ConvSpec::new(6, 1).transform(1));
    let y = b.linear("classifier", z, 4);
    b.finish(y, &["a", "b", "c", "d"])
}

/// Residual connections with add, a dilated convolution and padded max pooling.
pub fn residual() -> QGraph {
    let (mut b, x) = QBuilder::new("residual", 2, 9, 9, 3);
    let s = b.conv("stem", x, ConvSpec::new(8, 3));
    let r1 = b.conv("res1.a", s, ConvSpec::new(8, 3));
    let r2 = b.conv("res1.b", r1, ConvSpec::new(8, 3).linear());
    let a1 = b.add("res1.add", s, r2, true);
    let p = b.max_pool("pool", a1, 3, 2, 1);
    let d = b.conv(
        "dilated",
        p,
        ConvSpec::new(8, 3).dilation(2).pad([2; 4]).linear(),
    );
    let a2 = b.add("res2.add", p, d, false);
    let t = b.channel("table", a2, 2);
    let g = b.global_avg_pool("gap", t);
    let y = b.linear("fc", g, 3);
    b.finish(y, &["x", "y", "z"])
}

/// Depthwise, pointwise, grouped and asymmetrically padded convolutions.
pub fn depthwise() -> QGraph {
    let (mut b, x) = QBuilder::new("depthwise", 3, 11, 11, 4);
    let s = b.conv("stem", x, ConvSpec::new(12, 3).stride(2));
    let d1 = b.conv("dw1", s, ConvSpec::new(12, 3).groups(12));
    let p1 = b.conv("pw1", d1, ConvSpec::new(16, 1));
    let d2 = b.conv(
        "dw2",
        p1,
        ConvSpec::new(16, 3).groups(16).stride(2).pad([0, 0, 1, 1]),
    );
    let g2 = b.conv("grouped", d2, ConvSpec::new(8, 3).groups(4).linear());
    let d3 = b.conv("dw3", g2, ConvSpec::new(8, 3).groups(8).transform(1));
    let gp = b.global_avg_pool("gap", d3);
    let y = b.linear("fc", gp, 6);
    b.finish(y, &["0", "1", "2", "3", "4", "5"])
}

/// [`plain`] with hostile layer and label names: quotes, comment ends,
/// newlines, keywords, raw identifiers, non-ASCII, duplicates.
pub fn hostile_names() -> QGraph {
    let mut g = plain();
    let names = [
        "\"; panic!(\"boom\"); \"",
        "*/ fn main() {} /*",
        "r#fn",
        "line\nbreak\r\n// x",
        "größe_ß→λ",
        // Bidi overrides and isolates (issue 14, defect 6): rustc refuses
        // them unescaped in comments and docs.
        "fc\u{202e}txt.exe\u{2066}",
    ];
    for (s, n) in g.steps.iter_mut().zip(names) {
        s.name = n.to_string();
    }
    let maps = [
        "input",
        "\"; panic!()",
        "*/",
        "fn",
        "self",
        "\u{0}nul",
        "a\"b",
    ];
    for (m, n) in g.maps.iter_mut().zip(maps) {
        m.name = n.to_string();
    }
    g.name = "evil */ \"name\"\nnext\u{202e}\u{2069}\u{200b}".into();
    g.labels = vec![
        "\"quoted\"".into(),
        "*/".into(),
        "new\nline".into(),
        "ünï\u{2067}".into(),
        "\\".into(),
    ];
    g
}

/// A DenseNet-121-shaped graph (224×224×3, growth 32, blocks 6-12-24-16,
/// pre-activation batch norm + ReLU fused as affine input transforms,
/// about 8 M parameters) with random weights: for compile-time benchmarks.
pub fn densenet121(input: usize) -> QGraph {
    let (mut b, x) = QBuilder::new("densenet121", 3, input, input, 121);
    let c0 = b.conv(
        "features.conv0",
        x,
        ConvSpec::new(64, 7).stride(2).pad([3; 4]),
    );
    let mut h = b.max_pool("features.pool0", c0, 3, 2, 1);
    for (bi, &n) in [6usize, 12, 24, 16].iter().enumerate() {
        let q = b.qp_of(h);
        let mut cat = h;
        for l in 0..n {
            let name = format!("features.denseblock{}.denselayer{}", bi + 1, l + 1);
            let b1 = b.conv(
                &format!("{name}.conv1"),
                cat,
                ConvSpec::new(128, 1).transform(1),
            );
            let g = b.conv_q(
                &format!("{name}.conv2"),
                b1,
                ConvSpec::new(32, 3).transform(1).linear(),
                Some(q),
            );
            cat = b.concat(&format!("{name}.cat"), &[cat, g]);
        }
        if bi < 3 {
            let c = b.g.map(cat).shape.c;
            let t = b.conv(
                &format!("features.transition{}.conv", bi + 1),
                cat,
                ConvSpec::new(c / 2, 1).transform(1).linear(),
            );
            h = b.avg_pool(&format!("features.transition{}.pool", bi + 1), t, 2, 2);
        } else {
            h = b.channel("features.norm5", cat, 1);
        }
    }
    let g = b.global_avg_pool("gap", h);
    let y = b.linear("classifier", g, 1000);
    let labels: Vec<String> = (0..1000).map(|i| format!("class{i}")).collect();
    let labels: Vec<&str> = labels.iter().map(String::as_str).collect();
    b.finish(y, &labels)
}

/// A network shaped like the demo (the zoo's `dense_small`: 1×64×64 input,
/// 3×3 stem to 16 channels, two dense blocks of four BN-ReLU-conv3×3 layers
/// with growth 8, a halving transition, 4 classes), with random weights.
pub fn demo_sized() -> QGraph {
    let (mut b, x) = QBuilder::new("demo_sized", 1, 64, 64, 5);
    let mut h = b.conv("features.conv0", x, ConvSpec::new(16, 3).linear());
    for block in 1..=2 {
        let q = b.qp_of(h);
        let mut cat = h;
        for l in 1..=4 {
            let name = format!("features.denseblock{block}.denselayer{l}");
            let y = b.conv_q(
                &format!("{name}.conv"),
                cat,
                ConvSpec::new(8, 3).transform(1).linear(),
                Some(q),
            );
            cat = b.concat(&format!("{name}.cat"), &[cat, y]);
        }
        if block == 1 {
            let c = b.g.map(cat).shape.c;
            let t = b.conv(
                "features.transition1.conv",
                cat,
                ConvSpec::new(c / 2, 1).transform(1).linear(),
            );
            h = b.avg_pool("features.transition1.pool", t, 2, 2);
        } else {
            h = b.channel("features.norm5", cat, 1);
        }
    }
    let g = b.global_avg_pool("gap", h);
    let y = b.linear("classifier", g, 4);
    b.finish(y, &["round", "square", "curly", "angle"])
}

/// The test networks by name.
pub fn all() -> Vec<QGraph> {
    vec![plain(), dense(), residual(), depthwise()]
}
