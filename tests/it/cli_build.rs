//! `ingot build` end to end: failures leave the output folder untouched.

use ingot_testkit::ingot;
use std::collections::BTreeMap;
use std::path::Path;

fn snapshot(dir: &Path) -> BTreeMap<String, Vec<u8>> {
    std::fs::read_dir(dir)
        .unwrap()
        .map(|e| e.unwrap())
        .map(|e| {
            (
                e.file_name().to_string_lossy().into_owned(),
                std::fs::read(e.path()).unwrap(),
            )
        })
        .collect()
}

fn ingot(args: &[&std::ffi::OsStr]) -> std::process::Output {
    ingot!().args(args).output().unwrap()
}

#[test]
fn failing_build_leaves_existing_out_dir_byte_identical() {
    let t = tempfile::tempdir().unwrap();
    let out = t.path().join("out");
    let files = vec![
        ("model.rs".to_string(), b"// old module\n".to_vec()),
        ("model.weights.bin".to_string(), vec![9; 10]),
    ];
    ingot_compiler::codegen::output::write_all(&out, &files, false).unwrap();
    let before = snapshot(&out);
    let bad = t.path().join("bad.graph.json");
    std::fs::write(&bad, b"{ \"format\": \"not a graph\" }").unwrap();
    let ranges = t.path().join("r.json");
    std::fs::write(&ranges, b"{}").unwrap();
    let o = ingot(&[
        "build".as_ref(),
        bad.as_os_str(),
        "--ranges".as_ref(),
        ranges.as_os_str(),
        "--out".as_ref(),
        out.as_os_str(),
    ]);
    assert!(!o.status.success());
    let err = String::from_utf8_lossy(&o.stderr);
    assert!(err.contains("bad.graph.json"), "{err}");
    assert_eq!(snapshot(&out), before);
    let siblings = std::fs::read_dir(t.path()).unwrap().count();
    assert_eq!(siblings, 3, "temporary files left behind");
}

#[test]
fn build_needs_ranges_or_images() {
    let t = tempfile::tempdir().unwrap();
    let g = t.path().join("g.json");
    let o = ingot(&[
        "build".as_ref(),
        g.as_os_str(),
        "--out".as_ref(),
        t.path().join("o").as_os_str(),
    ]);
    assert!(!o.status.success());
    let err = String::from_utf8_lossy(&o.stderr);
    assert!(
        err.contains("--images") || err.contains("--ranges"),
        "{err}"
    );
    assert!(!t.path().join("o").exists());
}

/// A zoo network written to `dir` with min/max ranges of a few random
/// inputs saved next to it: `(graph path, ranges path)`.
fn zoo_model(dir: &Path) -> (std::path::PathBuf, std::path::PathBuf) {
    use ingot_compiler::calibrate::{MapRange, Ranges};
    let net = ingot_testkit::zoo::residual(
        &ingot_testkit::zoo::ResidualConfig {
            input: [3, 16, 16],
            ..Default::default()
        },
        5,
    );
    let graph = net.write(dir, "res").unwrap();
    let g = ingot_compiler::load(&graph).unwrap();
    let r = ingot_compiler::reference::Reference::new(&g);
    let mut maps = vec![
        MapRange {
            min: f32::INFINITY,
            max: f32::NEG_INFINITY
        };
        g.map_count()
    ];
    for s in 0..2 {
        r.run_with(&net.random_input(s), |m, v| {
            for &a in v {
                maps[m.index()].min = maps[m.index()].min.min(a);
                maps[m.index()].max = maps[m.index()].max.max(a);
            }
        })
        .unwrap();
    }
    let ranges = Ranges {
        graph: g.name().into(),
        graph_hash: ingot_compiler::calibrate::ranges::graph_hash(&g).unwrap(),
        method: "minmax".into(),
        images: 2,
        maps,
        bias_shifts: Default::default(),
        channels: Vec::new(),
    };
    let path = dir.join("res.ranges.json");
    ranges.save(&g, &path).unwrap();
    (graph, path)
}

#[test]
fn build_lowers_plans_and_checks_the_target() {
    let t = tempfile::tempdir().unwrap();
    let (graph, ranges) = zoo_model(t.path());
    let target = Path::new(env!("CARGO_MANIFEST_DIR")).join("targets/stm32f446re.toml");
    let out = t.path().join("out");
    let o = ingot(&[
        "build".as_ref(),
        graph.as_os_str(),
        "--ranges".as_ref(),
        ranges.as_os_str(),
        "--target".as_ref(),
        target.as_os_str(),
        "--out".as_ref(),
        out.as_os_str(),
    ]);
    let text = String::from_utf8_lossy(&o.stdout);
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    assert!(text.contains("lower bound"), "{text}");
    assert!(text.contains("fits: yes"), "{text}");
    let module = std::fs::read_to_string(out.join("model.rs")).unwrap();
    assert!(module.contains("pub fn run"));
    let weights = std::fs::metadata(out.join("model.weights.bin"))
        .unwrap()
        .len();
    assert!(weights > 0);

    // A part with 4 KiB of RAM is refused, naming the target and the RAM.
    let tiny = t.path().join("tiny.toml");
    std::fs::write(
        &tiny,
        "name = \"tiny\"\ncore = \"cortex-m0\"\ntriple = \"thumbv6m-none-eabi\"\nclock_hz = 1000000\n\
         note = \"test\"\n[ram]\nbytes = 4096\nreserve = 0\nnote = \"x\"\n[flash]\nbytes = 1048576\nreserve = 0\nnote = \"x\"\n\
         [datasheet]\ntitle = \"none\"\ndocument = \"none\"\nrevision = \"none\"\n",
    )
    .unwrap();
    let out2 = t.path().join("out2");
    let o = ingot(&[
        "build".as_ref(),
        graph.as_os_str(),
        "--ranges".as_ref(),
        ranges.as_os_str(),
        "--target".as_ref(),
        tiny.as_os_str(),
        "--out".as_ref(),
        out2.as_os_str(),
    ]);
    assert!(!o.status.success());
    let err = String::from_utf8_lossy(&o.stderr);
    assert!(
        err.contains("does not fit") && err.contains("tiny") && err.contains("RAM"),
        "{err}"
    );
    assert!(!out2.exists());
}

#[test]
fn weight_form_follows_the_target_core_and_the_flag() {
    let t = tempfile::tempdir().unwrap();
    let (graph, ranges) = zoo_model(t.path());
    let root = Path::new(env!("CARGO_MANIFEST_DIR"));
    let build = |name: &str, extra: &[&str]| {
        let out = t.path().join(name);
        let mut args: Vec<std::ffi::OsString> = vec![
            "build".into(),
            graph.clone().into(),
            "--ranges".into(),
            ranges.clone().into(),
            "--out".into(),
            out.clone().into(),
        ];
        args.extend(extra.iter().map(|a| a.into()));
        let refs: Vec<&std::ffi::OsStr> = args.iter().map(|a| a.as_os_str()).collect();
        let o = ingot(&refs);
        (o, out)
    };
    let m4 = root.join("targets/stm32f446re.toml");
    let m0 = root.join("targets/rp2040.toml");
    let m4 = m4.to_str().unwrap();
    let m0 = m0.to_str().unwrap();
    // A Cortex-M4F part: int8 words, widened in registers; the weights
    // file holds them as the module reads them, so flash is the file.
    let (o, out) = build("m4", &["--target", m4]);
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    let text = String::from_utf8_lossy(&o.stdout).to_string();
    assert!(text.contains("words form"), "{text}");
    let module = std::fs::read_to_string(out.join("model.rs")).unwrap();
    assert!(module.contains("ingot_rt::checked::Conv2dWords::new("));
    let json: serde_json::Value =
        serde_json::from_slice(&std::fs::read(out.join("model.report.json")).unwrap()).unwrap();
    assert_eq!(json["weight_form"], "words");
    assert_eq!(json["weights_flash_bytes"], json["weights_bytes"]);
    // Pairs by name: twice the flash for those weights.
    let (o, out) = build("m4-pairs", &["--target", m4, "--weight-form", "pairs"]);
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    let module = std::fs::read_to_string(out.join("model.rs")).unwrap();
    assert!(module.contains("ingot_rt::checked::Conv2dPaired::new("));
    let json: serde_json::Value =
        serde_json::from_slice(&std::fs::read(out.join("model.report.json")).unwrap()).unwrap();
    assert_eq!(json["weight_form"], "pairs");
    assert!(
        json["weights_flash_bytes"].as_u64().unwrap() > json["weights_bytes"].as_u64().unwrap()
    );
    // The flag overrides the core.
    let (o, out) = build("m4-int8", &["--target", m4, "--weight-form", "int8"]);
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    let module = std::fs::read_to_string(out.join("model.rs")).unwrap();
    assert!(!module.contains("Conv2dPaired"));
    // A Cortex-M0+ part (no DSP extension): int8.
    let (o, out) = build("m0", &["--target", m0]);
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    let module = std::fs::read_to_string(out.join("model.rs")).unwrap();
    assert!(!module.contains("Conv2dPaired") && !module.contains("Conv2dWords"));
    // An unknown form is refused, naming the choices.
    let (o, _) = build("bad", &["--weight-form", "int16"]);
    assert!(!o.status.success());
    let err = String::from_utf8_lossy(&o.stderr);
    assert!(err.contains("int8, pairs or words"), "{err}");
}
