//! Regression tests of issue 14 (hardening), defects 1 to 10, through the
//! command line: every test reproduces one defect found by feeding the
//! release binary hostile input, on real files in temporary folders.
//!
//! Commands that once hung run in a child process that is killed after a
//! generous limit ([`run_limited`]); the test fails on the kill. That is a
//! hang detector, not a speed assertion.

use ingot_compiler::frontend::TensorStore;
use ingot_testkit::cli::{repo, stderr};
use ingot_testkit::ingot;
use serde_json::{json, Value};
use std::path::{Path, PathBuf};
use std::process::{Command, Output, Stdio};
use std::time::{Duration, Instant};

fn digits_dir() -> PathBuf {
    repo().join("tests/data/optdigits")
}

/// Runs `cmd` and kills it after `limit`; a killed command fails the test
/// (it hung). The limit is far above the normal run time.
fn run_limited(mut cmd: Command, limit: Duration) -> Output {
    let mut child = cmd
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn()
        .unwrap();
    let t0 = Instant::now();
    loop {
        if child.try_wait().unwrap().is_some() {
            return child.wait_with_output().unwrap();
        }
        if t0.elapsed() > limit {
            let _ = child.kill();
            let out = child.wait_with_output().unwrap();
            panic!(
                "still running after {limit:?}, killed (a hang)\nstderr: {}",
                String::from_utf8_lossy(&out.stderr)
            );
        }
        std::thread::sleep(Duration::from_millis(50));
    }
}

fn fails_with(o: &Output, needles: &[&str]) -> String {
    let e = stderr(o);
    assert_eq!(o.status.code(), Some(1), "expected a clean failure: {e}");
    for n in needles {
        assert!(e.contains(n), "missing `{n}` in: {e}");
    }
    assert!(!e.contains("panicked"), "{e}");
    e
}

/// Copies the optdigits model (Alpaydin & Kaynak 1998, see
/// `tests/data/optdigits/README.md`) into `dir` with `edit` applied to
/// its graph JSON; returns the graph path.
fn digits_copy(dir: &Path, edit: impl FnOnce(&mut Value)) -> PathBuf {
    let src = digits_dir().join("model");
    let mut g: Value =
        serde_json::from_str(&std::fs::read_to_string(src.join("digits.graph.json")).unwrap())
            .unwrap();
    edit(&mut g);
    std::fs::copy(
        src.join("digits.safetensors"),
        dir.join("digits.safetensors"),
    )
    .unwrap();
    let p = dir.join("digits.graph.json");
    std::fs::write(&p, serde_json::to_string_pretty(&g).unwrap()).unwrap();
    p
}

/// A graph of one input and the given layers, with an empty weights file.
fn tiny_graph(dir: &Path, shape: [usize; 3], layers: Value) -> PathBuf {
    TensorStore::new(dir.join("w.safetensors"))
        .save(&dir.join("w.safetensors"))
        .unwrap();
    let last = layers
        .as_array()
        .and_then(|l| l.last())
        .map(|l| l["name"].clone())
        .unwrap_or(json!("image"));
    let g = json!({
        "format": "ingot.graph.v1",
        "name": "tiny",
        "weights": "w.safetensors",
        "input": { "name": "image", "shape": shape, "color": "gray" },
        "layers": layers,
        "output": last,
    });
    let p = dir.join("tiny.graph.json");
    std::fs::write(&p, serde_json::to_string_pretty(&g).unwrap()).unwrap();
    p
}

// ---- defect 1: `check --report DIR` deleted whatever DIR held ----------

#[test]
fn check_report_refuses_a_folder_ingot_did_not_write() {
    let tmp = tempfile::tempdir().unwrap();
    let work = tmp.path().join("work");
    std::fs::create_dir_all(work.join("src")).unwrap();
    std::fs::write(work.join("thesis.tex"), "\\documentclass{article}").unwrap();
    std::fs::write(work.join("src/main.rs"), "fn main() {}").unwrap();
    let d = digits_dir();
    let o = run_limited(
        {
            let mut c = ingot!();
            c.arg("check")
                .arg(d.join("model/digits.graph.json"))
                .arg("--images")
                .arg(d.join("heldout"))
                .arg("--report")
                .arg(&work);
            c
        },
        Duration::from_secs(120),
    );
    fails_with(
        &o,
        &[
            "work",
            "not a report folder written by ingot",
            ".ingot-report",
        ],
    );
    assert_eq!(
        std::fs::read_to_string(work.join("thesis.tex")).unwrap(),
        "\\documentclass{article}"
    );
    assert!(work.join("src/main.rs").is_file());
    // The model's own folder is refused the same way and keeps its files.
    let model = tmp.path().join("model");
    std::fs::create_dir(&model).unwrap();
    let g = digits_copy(&model, |_| {});
    let o = ingot!()
        .arg("check")
        .arg(&g)
        .arg("--images")
        .arg(d.join("heldout"))
        .arg("--report")
        .arg(&model)
        .output()
        .unwrap();
    fails_with(&o, &["not a report folder written by ingot"]);
    assert!(g.is_file() && model.join("digits.safetensors").is_file());
}

// ---- defect 2: `calibrate -o` and `plan --svg` overwrote their inputs --

#[test]
fn calibrate_output_never_replaces_an_input_or_a_foreign_file() {
    let tmp = tempfile::tempdir().unwrap();
    let g = digits_copy(tmp.path(), |_| {});
    let before = std::fs::read(&g).unwrap();
    let images = digits_dir().join("calibration");
    let calibrate = |out: &Path, force: bool| {
        let mut c = ingot!();
        c.arg("calibrate")
            .arg(&g)
            .arg("--images")
            .arg(&images)
            .arg("-o")
            .arg(out);
        if force {
            c.arg("--force");
        }
        c.output().unwrap()
    };
    // Its own graph, even with --force, and even under another name.
    for force in [false, true] {
        let o = calibrate(&g, force);
        fails_with(&o, &["graph file", "refusing to write over an input"]);
        assert_eq!(std::fs::read(&g).unwrap(), before);
    }
    let alias = tmp.path().join("sub/../digits.graph.json");
    std::fs::create_dir(tmp.path().join("sub")).unwrap();
    fails_with(
        &calibrate(&alias, true),
        &["refusing to write over an input"],
    );
    let w = tmp.path().join("digits.safetensors");
    fails_with(&calibrate(&w, true), &["weights file"]);
    // A file the user wrote: refused without --force, replaced with it.
    let notes = tmp.path().join("notes.json");
    std::fs::write(&notes, "my notes").unwrap();
    fails_with(
        &calibrate(&notes, false),
        &["was not written by ingot", "--force"],
    );
    assert_eq!(std::fs::read_to_string(&notes).unwrap(), "my notes");
    let o = calibrate(&notes, true);
    assert!(o.status.success(), "{}", stderr(&o));
    assert!(std::fs::read_to_string(&notes)
        .unwrap()
        .contains("ingot.ranges.v3"));
    // A file ingot wrote may be replaced without --force.
    let r = tmp.path().join("r.json");
    for _ in 0..2 {
        let o = calibrate(&r, false);
        assert!(o.status.success(), "{}", stderr(&o));
    }
}

#[test]
fn plan_svg_never_replaces_an_input_or_a_foreign_file() {
    let tmp = tempfile::tempdir().unwrap();
    let g = digits_copy(tmp.path(), |_| {});
    let before = std::fs::read(&g).unwrap();
    let plan = |svg: &Path, force: bool| {
        let mut c = ingot!();
        c.arg("plan").arg(&g).arg("--svg").arg(svg);
        if force {
            c.arg("--force");
        }
        c.output().unwrap()
    };
    fails_with(
        &plan(&g, true),
        &["graph file", "refusing to write over an input"],
    );
    assert_eq!(std::fs::read(&g).unwrap(), before);
    let pic = tmp.path().join("plan.svg");
    std::fs::write(&pic, "mine").unwrap();
    fails_with(&plan(&pic, false), &["was not written by ingot"]);
    assert_eq!(std::fs::read_to_string(&pic).unwrap(), "mine");
    let o = plan(&pic, true);
    assert!(o.status.success(), "{}", stderr(&o));
    let o = plan(&pic, false);
    assert!(
        o.status.success(),
        "ingot wrote it last time: {}",
        stderr(&o)
    );
    assert!(std::fs::read_to_string(&pic).unwrap().starts_with("<svg"));
}

// ---- defect 3: reads without a size limit hung on /dev/zero ------------

#[cfg(unix)]
#[test]
fn devices_and_fifos_are_refused_without_hanging() {
    let tmp = tempfile::tempdir().unwrap();
    for dev in ["/dev/zero", "/dev/urandom"] {
        let g = digits_copy(tmp.path(), |g| g["weights"] = json!(dev));
        let mut c = ingot!();
        c.arg("inspect").arg(&g);
        let o = run_limited(c, Duration::from_secs(60));
        fails_with(&o, &[dev, "not a regular file"]);
    }
    let g = digits_copy(tmp.path(), |_| {});
    let mut c = ingot!();
    c.arg("plan").arg(&g).arg("--ranges").arg("/dev/zero");
    fails_with(
        &run_limited(c, Duration::from_secs(60)),
        &["/dev/zero", "character device"],
    );
    // A FIFO nobody writes to would block `open` for ever.
    let fifo = tmp.path().join("pipe.json");
    let made = Command::new("mkfifo").arg(&fifo).status().unwrap();
    assert!(made.success());
    let mut c = ingot!();
    c.arg("inspect").arg(&fifo);
    fails_with(
        &run_limited(c, Duration::from_secs(60)),
        &["pipe.json", "FIFO"],
    );
}

#[test]
fn oversized_and_lying_files_are_refused_before_reading() {
    let tmp = tempfile::tempdir().unwrap();
    // A graph file past the JSON limit (64 MiB): a sparse file, so the test
    // writes almost nothing.
    let big = tmp.path().join("big.graph.json");
    let f = std::fs::File::create(&big).unwrap();
    f.set_len(ingot_compiler::guard::MAX_JSON_BYTES + 1)
        .unwrap();
    let o = ingot!().arg("inspect").arg(&big).output().unwrap();
    fails_with(&o, &["big.graph.json", "larger than the limit"]);
    // A safetensors header that claims 10^15 bytes of tensor data.
    let g = digits_copy(tmp.path(), |_| {});
    let h = br#"{"fc.weight":{"dtype":"F32","shape":[250000000000000],"data_offsets":[0,1000000000000000]}}"#;
    let mut b = (h.len() as u64).to_le_bytes().to_vec();
    b.extend_from_slice(h);
    std::fs::write(tmp.path().join("digits.safetensors"), &b).unwrap();
    let o = ingot!().arg("inspect").arg(&g).output().unwrap();
    fails_with(
        &o,
        &["digits.safetensors", "declares 1000000000000000 bytes"],
    );
}

// ---- defect 4: average pools whose int32 sum wraps were accepted --------

#[test]
fn pools_whose_sum_could_overflow_are_refused_naming_the_layer() {
    let tmp = tempfile::tempdir().unwrap();
    // 5000×5000 taps: 255·25e6 > 2^31 (int32). `plan` lowers with
    // synthetic ranges, so no calibration is needed.
    let g = tiny_graph(
        tmp.path(),
        [1, 5000, 5000],
        json!([{ "name": "big_pool", "op": "avg_pool2d", "input": "image", "kernel": 5000 }]),
    );
    let mut c = ingot!();
    c.arg("plan").arg(&g);
    fails_with(
        &run_limited(c, Duration::from_secs(120)),
        &["big_pool", "avg_pool2d", "25000000 taps", "beyond int32"],
    );
    let g = tiny_graph(
        tmp.path(),
        [1, 5000, 5000],
        json!([{ "name": "gap", "op": "global_avg_pool", "input": "image" }]),
    );
    let mut c = ingot!();
    c.arg("plan").arg(&g);
    fails_with(
        &run_limited(c, Duration::from_secs(120)),
        &["`gap`", "global_avg_pool"],
    );
    // 2896² = 8,386,816 taps, just below 2^23: accepted.
    let g = tiny_graph(
        tmp.path(),
        [1, 2896, 2896],
        json!([{ "name": "gap", "op": "global_avg_pool", "input": "image" }]),
    );
    let o = ingot!().arg("plan").arg(&g).output().unwrap();
    assert!(o.status.success(), "{}", stderr(&o));
}

// ---- defect 5: the graph's name set default output paths ---------------

#[test]
fn graph_names_cannot_steer_default_output_paths() {
    let tmp = tempfile::tempdir().unwrap();
    let model = tmp.path().join("a/b/model");
    std::fs::create_dir_all(&model).unwrap();
    let abs = tmp.path().join("abs");
    for name in ["../../esc", abs.to_str().unwrap(), ".."] {
        let g = digits_copy(&model, |g| g["name"] = json!(name));
        let o = ingot!()
            .arg("calibrate")
            .arg(&g)
            .arg("--images")
            .arg(digits_dir().join("calibration"))
            .output()
            .unwrap();
        assert!(o.status.success(), "{name}: {}", stderr(&o));
        let written: Vec<String> = std::fs::read_dir(&model)
            .unwrap()
            .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
            .filter(|n| n.ends_with(".ranges.json"))
            .collect();
        assert_eq!(written.len(), 1, "{name}: {written:?}");
        assert!(!written[0].starts_with('.'), "{written:?}");
        std::fs::remove_file(model.join(&written[0])).unwrap();
    }
    // Nothing outside the model folder.
    assert!(!tmp.path().join("a/esc.ranges.json").exists());
    assert!(!tmp.path().join("esc.ranges.json").exists());
    assert!(!tmp.path().join("abs.ranges.json").exists());
}

// ---- defect 7: NaN thresholds switched the gates off --------------------

#[test]
fn non_finite_thresholds_are_rejected() {
    for (flag, v) in [
        ("--max-drop", "NaN"),
        ("--min-agreement", "nan"),
        ("--max-drop", "inf"),
        ("--min-agreement", "-inf"),
    ] {
        let o = ingot!()
            .args(["check", "g.json", "--images", "x", &format!("{flag}={v}")])
            .output()
            .unwrap();
        let e = stderr(&o);
        assert_eq!(o.status.code(), Some(2), "{e}");
        assert!(e.contains(flag) && e.contains("not a finite number"), "{e}");
    }
}

/// Without thresholds, `check` used to print `result: pass` at an 86.67
/// pp accuracy drop. Ranges 100 times too narrow make the int8 model
/// useless; the default gates must fail it.
#[test]
fn collapsed_accuracy_fails_the_default_gates() {
    let tmp = tempfile::tempdir().unwrap();
    let g = digits_copy(tmp.path(), |_| {});
    let graph = ingot_compiler::load(&g).unwrap();
    let mut r = ingot_compiler::calibrate::Ranges {
        graph: graph.name().into(),
        graph_hash: ingot_compiler::calibrate::ranges::graph_hash(&graph).unwrap(),
        method: "minmax".into(),
        images: 1,
        maps: vec![
            ingot_compiler::calibrate::MapRange {
                min: -0.01,
                max: 0.01
            };
            graph.map_count()
        ],
        bias_shifts: Default::default(),
        channels: Vec::new(),
    };
    r.maps[0] = ingot_compiler::calibrate::MapRange {
        min: -1.0,
        max: 2.0,
    };
    let rp = tmp.path().join("narrow.ranges.json");
    r.save(&graph, &rp).unwrap();
    let o = ingot!()
        .arg("check")
        .arg(&g)
        .arg("--ranges")
        .arg(&rp)
        .arg("--images")
        .arg(digits_dir().join("heldout"))
        .output()
        .unwrap();
    let out = String::from_utf8_lossy(&o.stdout);
    let e = fails_with(&o, &["check failed"]);
    assert!(!out.contains("result:         pass"), "{out}");
    assert!(
        e.contains("accuracy drop") || e.contains("top-1 agreement"),
        "{e}"
    );
}

// ---- defect 8: degenerate inputs were accepted without a word -----------

#[test]
fn degenerate_preprocessing_and_ranges_are_refused() {
    let tmp = tempfile::tempdir().unwrap();
    for (key, v) in [("pixel_scale", json!(1e-45)), ("std", json!([1e38]))] {
        let g = digits_copy(tmp.path(), |g| g["input"][key] = v.clone());
        let o = ingot!().arg("inspect").arg(&g).output().unwrap();
        fails_with(&o, &["digits.graph.json", "input `image`", "constant"]);
    }
    let g = digits_copy(tmp.path(), |_| {});
    let graph = ingot_compiler::load(&g).unwrap();
    let hash = ingot_compiler::calibrate::ranges::graph_hash(&graph).unwrap();
    for (min, max, needle) in [
        (0.0, 0.0, "every calibrated range is a single value"),
        (-1e38, 1e38, "is not usable"),
    ] {
        let r = ingot_compiler::calibrate::Ranges {
            graph: graph.name().into(),
            graph_hash: hash.clone(),
            method: "minmax".into(),
            images: 1,
            maps: vec![ingot_compiler::calibrate::MapRange { min, max }; graph.map_count()],
            bias_shifts: Default::default(),
            channels: Vec::new(),
        };
        let rp = tmp.path().join("r.json");
        r.save(&graph, &rp).unwrap();
        let o = ingot!()
            .arg("plan")
            .arg(&g)
            .arg("--ranges")
            .arg(&rp)
            .output()
            .unwrap();
        fails_with(&o, &[needle]);
    }
}

#[test]
fn all_zero_weights_are_reported_as_a_warning() {
    let tmp = tempfile::tempdir().unwrap();
    let g = digits_copy(tmp.path(), |_| {});
    let w = tmp.path().join("digits.safetensors");
    let mut store = TensorStore::load(&w).unwrap();
    // The weight of the second convolution (layer `conv2` of the graph).
    let name = "conv2.weight".to_string();
    for v in &mut store.tensors.get_mut(&name).unwrap().data {
        *v = 0.0;
    }
    store.save(&w).unwrap();
    let o = ingot!().arg("inspect").arg(&g).output().unwrap();
    let e = stderr(&o);
    assert!(o.status.success(), "{e}");
    assert!(
        e.contains("warning") && e.contains(&name) && e.contains("all") && e.contains("zero"),
        "{e}"
    );
}

// ---- defect 9: huge graphs allocated before checking --------------------

#[test]
fn huge_graphs_are_refused_before_allocating() {
    let tmp = tempfile::tempdir().unwrap();
    let g = tiny_graph(
        tmp.path(),
        [1, 100_000, 100_000],
        json!([{ "name": "r", "op": "relu", "input": "image" }]),
    );
    let mut c = ingot!();
    c.arg("plan").arg(&g).env_remove("INGOT_MEMORY_LIMIT");
    let e = fails_with(
        &run_limited(c, Duration::from_secs(60)),
        &[
            "tiny.graph.json",
            "more than the limit",
            "INGOT_MEMORY_LIMIT",
        ],
    );
    assert!(!e.contains("memory allocation"), "{e}");
    // The limit is the documented variable's: a small graph passes by
    // default and is refused under a 1 KiB limit.
    let g = tiny_graph(
        tmp.path(),
        [1, 64, 64],
        json!([{ "name": "r", "op": "relu", "input": "image" }]),
    );
    let o = ingot!().arg("inspect").arg(&g).output().unwrap();
    assert!(o.status.success(), "{}", stderr(&o));
    let o = ingot!()
        .arg("inspect")
        .arg(&g)
        .env("INGOT_MEMORY_LIMIT", "1K")
        .output()
        .unwrap();
    fails_with(&o, &["more than the limit of 1024 bytes"]);
}

// ---- defect 10: messages ------------------------------------------------

#[test]
fn os_errors_are_printed_once() {
    let tmp = tempfile::tempdir().unwrap();
    let o = ingot!()
        .arg("inspect")
        .arg(tmp.path().join("missing.json"))
        .output()
        .unwrap();
    let e = fails_with(&o, &["missing.json"]);
    assert_eq!(e.matches("No such file or directory").count(), 1, "{e}");
    // A lowering error through `build` (a pipeline error wrapping it).
    let g = tiny_graph(
        tmp.path(),
        [1, 5000, 5000],
        json!([{ "name": "big_pool", "op": "avg_pool2d", "input": "image", "kernel": 5000 }]),
    );
    let graph = ingot_compiler::load(&g).unwrap();
    let r = ingot_compiler::calibrate::Ranges {
        graph: graph.name().into(),
        graph_hash: ingot_compiler::calibrate::ranges::graph_hash(&graph).unwrap(),
        method: "minmax".into(),
        images: 1,
        maps: vec![
            ingot_compiler::calibrate::MapRange {
                min: -1.0,
                max: 1.0
            };
            graph.map_count()
        ],
        bias_shifts: Default::default(),
        channels: Vec::new(),
    };
    let rp = tmp.path().join("r.json");
    r.save(&graph, &rp).unwrap();
    let o = ingot!()
        .arg("build")
        .arg(&g)
        .arg("--ranges")
        .arg(&rp)
        .arg("--out")
        .arg(tmp.path().join("out"))
        .output()
        .unwrap();
    let e = fails_with(&o, &["big_pool"]);
    assert_eq!(e.matches("beyond int32").count(), 1, "{e}");
}

#[test]
fn output_errors_name_the_out_folder() {
    let tmp = tempfile::tempdir().unwrap();
    let g = digits_copy(tmp.path(), |_| {});
    // --out under a plain file: the folder cannot be created.
    let blocker = tmp.path().join("blocker");
    std::fs::write(&blocker, "x").unwrap();
    let out = blocker.join("out");
    let o = ingot!()
        .arg("build")
        .arg(&g)
        .arg("--images")
        .arg(digits_dir().join("calibration"))
        .arg("--out")
        .arg(&out)
        .output()
        .unwrap();
    let e = fails_with(&o, &[out.to_str().unwrap()]);
    assert!(!e.contains(".ingot-tmp"), "{e}");
}

#[test]
fn a_top_level_array_gets_a_human_message() {
    let tmp = tempfile::tempdir().unwrap();
    let g = tmp.path().join("g.json");
    std::fs::write(&g, "[]").unwrap();
    let o = ingot!().arg("inspect").arg(&g).output().unwrap();
    let e = fails_with(&o, &["g.json", "holds an array", "one JSON object"]);
    assert!(!e.contains("GraphFile"), "{e}");
}

#[test]
fn a_corrupt_image_is_one_line_naming_the_file() {
    let tmp = tempfile::tempdir().unwrap();
    let g = digits_copy(tmp.path(), |_| {});
    let images = tmp.path().join("images");
    std::fs::create_dir(&images).unwrap();
    let mut first = None;
    for f in std::fs::read_dir(digits_dir().join("calibration"))
        .unwrap()
        .take(5)
    {
        let f = f.unwrap().path();
        std::fs::copy(&f, images.join(f.file_name().unwrap())).unwrap();
        first.get_or_insert(f);
    }
    let mut png = std::fs::read(first.unwrap()).unwrap();
    png.truncate(png.len() / 2);
    png[20] ^= 0xff;
    std::fs::write(images.join("broken.png"), &png).unwrap();
    let o = ingot!()
        .arg("calibrate")
        .arg(&g)
        .arg("--images")
        .arg(&images)
        .arg("-o")
        .arg(tmp.path().join("r.json"))
        .output()
        .unwrap();
    let e = fails_with(&o, &["broken.png"]);
    assert_eq!(e.trim_end().lines().count(), 1, "{e}");
    assert!(
        !e.contains("{ ") && !e.contains("Some("),
        "a debug dump: {e}"
    );
}

/// `check` without `--report` kept its module in `TMP/ingot-check-PID-*`
/// for ever, also when it failed.
#[test]
fn check_without_report_leaves_no_temporary_folder() {
    let tmp = tempfile::tempdir().unwrap();
    let d = digits_dir();
    // The runner build folder stays where the other tests keep it, so
    // this test does not rebuild the runner from scratch.
    let build_dir = ingot_compiler::check::runner::default_build_dir();
    for extra in [&[][..], &["--min-agreement", "1.01"][..]] {
        let o = ingot!()
            .arg("check")
            .arg(d.join("model/digits.graph.json"))
            .arg("--calib-images")
            .arg(d.join("calibration"))
            .arg("--images")
            .arg(d.join("heldout"))
            .args(extra)
            .env("TMPDIR", tmp.path())
            .env("INGOT_CHECK_DIR", &build_dir)
            .output()
            .unwrap();
        assert_eq!(o.status.success(), extra.is_empty(), "{}", stderr(&o));
        let left: Vec<_> = std::fs::read_dir(tmp.path())
            .unwrap()
            .map(|e| e.unwrap().file_name())
            .collect();
        assert!(left.is_empty(), "left behind: {left:?}");
    }
}
