//! Writes the invented bracket-inspection image sets.
//!
//! ```text
//! cargo run -p ingot-demo --example gen_brackets --release -- --seed 2026 --out examples/demo/data
//! ```
//!
//! Layout: `OUT/calibration/NNNN.png` (unlabelled, mixed classes) and
//! `OUT/eval/{ok,scratch,pit,stain}/NNNN.png`. Options: `--calibration N`
//! (default 200), `--per-class N` (default 100).

use anyhow::{bail, Context, Result};
use ingot_demo::brackets::{
    calibration_sample, eval_sample, file_name, render, CLASSES, COMMITTED_SEED, SIZE,
};
use ingot_demo::encode_png_gray;
use std::path::PathBuf;

fn main() -> Result<()> {
    let mut seed = COMMITTED_SEED;
    let mut out: Option<PathBuf> = None;
    let mut calibration = 200usize;
    let mut per_class = 100usize;
    let mut args = std::env::args().skip(1);
    while let Some(a) = args.next() {
        let mut value = || args.next().with_context(|| format!("{a} needs a value"));
        match a.as_str() {
            "--seed" => seed = value()?.parse().context("--seed")?,
            "--out" => out = Some(PathBuf::from(value()?)),
            "--calibration" => calibration = value()?.parse().context("--calibration")?,
            "--per-class" => per_class = value()?.parse().context("--per-class")?,
            "-h" | "--help" => {
                println!("gen_brackets --seed N --out DIR [--calibration N] [--per-class N]");
                return Ok(());
            }
            other => bail!("unknown argument `{other}` (try --help)"),
        }
    }
    let out = out.context("--out DIR is required")?;
    let mut bytes = 0usize;
    let cal_dir = out.join("calibration");
    std::fs::create_dir_all(&cal_dir)?;
    let mut cal_counts = [0usize; 4];
    for i in 0..calibration {
        let (s, class) = calibration_sample(seed, i);
        cal_counts[class] += 1;
        let png = encode_png_gray(SIZE as u32, SIZE as u32, &render(s, class));
        bytes += png.len();
        std::fs::write(cal_dir.join(file_name(i)), png)?;
    }
    for (c, name) in CLASSES.iter().enumerate() {
        let dir = out.join("eval").join(name);
        std::fs::create_dir_all(&dir)?;
        for i in 0..per_class {
            let png = encode_png_gray(
                SIZE as u32,
                SIZE as u32,
                &render(eval_sample(seed, c, i), c),
            );
            bytes += png.len();
            std::fs::write(dir.join(file_name(i)), png)?;
        }
    }
    println!(
        "seed {seed}: {calibration} calibration images (classes {:?} of {:?}), {per_class} eval images per class, {:.1} KiB of PNG in {}",
        cal_counts,
        CLASSES,
        bytes as f64 / 1024.0,
        out.display()
    );
    Ok(())
}
