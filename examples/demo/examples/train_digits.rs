//! Trains the small digits CNN on the optdigits 8x8 images (UCI "Optical
//! Recognition of Handwritten Digits", Alpaydin & Kaynak 1998, CC BY 4.0)
//! and exports it, with the held-out and calibration images as PNG folders.
//!
//! ```text
//! cargo run -p ingot-demo --example train_digits --release
//! ```
//!
//! Split: CSV row `i` is held out when `i % 5 == 0` (360 rows), the rest
//! (1437 rows) train. Pixel convention (see `ingot_demo::digits`): image
//! byte `p = round(v * 255 / 16)`, graph `pixel_scale = 1/255`; the network
//! is trained on exactly those bytes.
//!
//! Network: conv3x3 1->16 - BN - ReLU, conv3x3 16->32 - BN - ReLU, max pool
//! 2x2, conv3x3 32->32 (bias) - ReLU, flatten (C, H, W order), linear
//! 512->10. Batch normalisation per Ioffe & Szegedy 2015; AdamW optimiser.
//!
//! Options: `--epochs N` (default 30), `--batch N` (default 32), `--lr X`
//! (default 0.002), `--seed N`, `--dir DIR` (default `tests/data/optdigits`).

mod common;

use anyhow::{bail, Context, Result};
use candle_core::{Device, Tensor, Var};
use candle_nn::{Optimizer, ParamsAdamW};
use common::*;
use ingot_compiler::frontend::{GraphFile, InputFile, LayerFile, TensorStore, FORMAT_V1};
use ingot_demo::digits::{is_heldout, parse_csv, value_to_byte, Row, SIDE};
use ingot_demo::encode_png_gray;
use ingot_demo::rng::Rng;
use std::io::Read;
use std::path::{Path, PathBuf};
use std::time::Instant;

/// Training rows written to the calibration folder.
const CALIBRATION_IMAGES: usize = 100;

struct Net {
    conv1: Conv,
    bn1: Bn,
    conv2: Conv,
    bn2: Bn,
    conv3: Conv,
    fc: Fc,
}

impl Net {
    fn new(seed: u64) -> Result<Self> {
        let mut init = Init(Rng::new(seed));
        let i = &mut init;
        Ok(Net {
            conv1: Conv::new(i, 1, 16, 3, 1, false)?,
            bn1: Bn::new(i, 16)?,
            conv2: Conv::new(i, 16, 32, 3, 1, false)?,
            bn2: Bn::new(i, 32)?,
            conv3: Conv::new(i, 32, 32, 3, 1, true)?,
            fc: Fc::new(i, 32 * 4 * 4, 10)?,
        })
    }

    fn params(&self) -> Vec<Var> {
        let mut v = self.conv1.params();
        v.extend(self.bn1.params());
        v.extend(self.conv2.params());
        v.extend(self.bn2.params());
        v.extend(self.conv3.params());
        v.extend(self.fc.params());
        v
    }

    /// Images `[N, 1, 8, 8]` to logits `[N, 10]`.
    fn forward(&self, x: &Tensor, train: bool) -> Result<Tensor> {
        let x = images_to_cnhw(x)?;
        let x = bn_relu(&self.bn1, &self.conv1.forward(&x)?, train)?;
        let x = bn_relu(&self.bn2, &self.conv2.forward(&x)?, train)?;
        let x = x.max_pool2d(2)?;
        let x = self.conv3.forward(&x)?.relu()?;
        self.fc.forward(&flatten_chw(&x)?)
    }

    fn export(&self, mean: f32, std: f32) -> Result<(GraphFile, TensorStore)> {
        let mut store = TensorStore::new("digits.safetensors");
        self.conv1.export(&mut store, "conv1")?;
        self.bn1.export(&mut store, "bn1")?;
        self.conv2.export(&mut store, "conv2")?;
        self.bn2.export(&mut store, "bn2")?;
        self.conv3.export(&mut store, "conv3")?;
        self.fc.export(&mut store, "fc")?;
        let layers = vec![
            LayerFile::conv2d("conv1", "image", false, 1, 1),
            LayerFile::batch_norm("bn1", "conv1"),
            LayerFile::new("relu1", "relu", "bn1"),
            LayerFile::conv2d("conv2", "relu1", false, 1, 1),
            LayerFile::batch_norm("bn2", "conv2"),
            LayerFile::new("relu2", "relu", "bn2"),
            LayerFile::pool("pool", "max_pool2d", "relu2", 2, 2),
            LayerFile::conv2d("conv3", "pool", true, 1, 1),
            LayerFile::new("relu3", "relu", "conv3"),
            LayerFile::new("flatten", "flatten", "relu3"),
            LayerFile::linear("fc", "flatten", true),
        ];
        let graph = GraphFile {
            format: FORMAT_V1.into(),
            name: "digits".into(),
            weights: "digits.safetensors".into(),
            input: InputFile {
                name: "image".into(),
                shape: vec![1, SIDE, SIDE],
                pixel_scale: Some(1.0 / 255.0),
                mean: Some(vec![mean]),
                std: Some(vec![std]),
                color: Some("gray".into()),
            },
            labels: Some((0..10).map(|d| d.to_string()).collect()),
            layers,
            output: "fc".into(),
        };
        Ok((graph, store))
    }
}

fn bytes_of(rows: &[&Row]) -> Vec<f32> {
    rows.iter()
        .flat_map(|r| r.values.iter().map(|&v| value_to_byte(v) as f32))
        .collect()
}

fn to_input(bytes: &[f32], mean: f32, std: f32) -> Result<Tensor> {
    let n = bytes.len() / (SIDE * SIDE);
    let v: Vec<f32> = bytes
        .iter()
        .map(|&b| (b * (1.0 / 255.0) - mean) / std)
        .collect();
    Ok(Tensor::from_vec(v, (n, 1, SIDE, SIDE), &Device::Cpu)?)
}

fn write_png(path: &Path, row: &Row) -> Result<()> {
    let px: Vec<u8> = row.values.iter().map(|&v| value_to_byte(v)).collect();
    std::fs::write(path, encode_png_gray(SIDE as u32, SIDE as u32, &px))
        .with_context(|| path.display().to_string())
}

fn main() -> Result<()> {
    default_single_thread();
    let t_start = Instant::now();
    let (mut epochs, mut batch, mut lr, mut seed) = (30usize, 32usize, 2e-3f64, 1998u64);
    let mut dir: PathBuf = ingot_demo::repo_root().join("tests/data/optdigits");
    let mut it = std::env::args().skip(1);
    while let Some(k) = it.next() {
        let mut v = || it.next().with_context(|| format!("{k} needs a value"));
        match k.as_str() {
            "--epochs" => epochs = v()?.parse()?,
            "--batch" => batch = v()?.parse()?,
            "--lr" => lr = v()?.parse()?,
            "--seed" => seed = v()?.parse()?,
            "--dir" => dir = v()?.into(),
            other => bail!("unknown argument `{other}`"),
        }
    }
    let mut text = String::new();
    flate2::read::GzDecoder::new(
        std::fs::File::open(dir.join("digits.csv.gz")).context("digits.csv.gz")?,
    )
    .read_to_string(&mut text)?;
    let rows = parse_csv(&text)?;
    let train: Vec<&Row> = rows.iter().filter(|r| !is_heldout(r.index)).collect();
    // Held-out rows in the order of the PNG folder tree (label, then row).
    let mut test: Vec<&Row> = rows.iter().filter(|r| is_heldout(r.index)).collect();
    test.sort_by_key(|r| (r.label, r.index));
    println!(
        "{} rows: {} train, {} held out",
        rows.len(),
        train.len(),
        test.len()
    );

    // PNG folders.
    let _ = std::fs::remove_dir_all(dir.join("heldout"));
    let _ = std::fs::remove_dir_all(dir.join("calibration"));
    for r in &test {
        let d = dir.join("heldout").join(r.label.to_string());
        std::fs::create_dir_all(&d)?;
        write_png(&d.join(format!("{:04}.png", r.index)), r)?;
    }
    std::fs::create_dir_all(dir.join("calibration"))?;
    for r in train.iter().take(CALIBRATION_IMAGES) {
        write_png(
            &dir.join("calibration").join(format!("{:04}.png", r.index)),
            r,
        )?;
    }

    let train_px = bytes_of(&train);
    let scaled: Vec<f32> = train_px.iter().map(|&b| b / 255.0).collect();
    let (mean, std) = mean_std(&scaled);
    let (mean, std) = ((mean * 1e4).round() / 1e4, (std * 1e4).round() / 1e4);
    println!("input mean {mean}, std {std} (of byte/255 over the training rows)");
    let test_x = to_input(&bytes_of(&test), mean, std)?;
    let test_y: Vec<usize> = test.iter().map(|r| r.label as usize).collect();

    let net = Net::new(seed)?;
    let params = net.params();
    println!(
        "{} trainable values",
        params.iter().map(|v| v.elem_count()).sum::<usize>()
    );
    let mut opt = candle_nn::AdamW::new(
        params,
        ParamsAdamW {
            lr,
            weight_decay: 1e-4,
            ..Default::default()
        },
    )?;
    let img = SIDE * SIDE;
    let steps = train.len() / batch;
    let total = steps * epochs;
    let mut rng = Rng::new(seed ^ 0xD161);
    let mut order: Vec<usize> = (0..train.len()).collect();
    let mut step = 0;
    let t_train = Instant::now();
    for epoch in 0..epochs {
        rng.shuffle(&mut order);
        let mut loss_sum = 0.0;
        for b in 0..steps {
            let idx = &order[b * batch..(b + 1) * batch];
            let mut px = Vec::with_capacity(batch * img);
            for &i in idx {
                px.extend_from_slice(&train_px[i * img..(i + 1) * img]);
            }
            let y = Tensor::from_vec(
                idx.iter()
                    .map(|&i| train[i].label as u32)
                    .collect::<Vec<_>>(),
                batch,
                &Device::Cpu,
            )?;
            let loss = candle_nn::loss::cross_entropy(
                &net.forward(&to_input(&px, mean, std)?, true)?,
                &y,
            )?;
            opt.set_learning_rate(cosine_lr(lr, step, total, steps));
            opt.backward_step(&loss)?;
            loss_sum += loss.to_scalar::<f32>()? as f64;
            step += 1;
        }
        if (epoch + 1) % 5 == 0 || epoch + 1 == epochs {
            let pred = argmax_rows(&net.forward(&test_x, false)?)?;
            let acc = pred.iter().zip(&test_y).filter(|(p, t)| p == t).count() as f64
                / test_y.len() as f64;
            println!(
                "epoch {}: loss {:.4}, held-out acc {:.2}%",
                epoch + 1,
                loss_sum / steps as f64,
                100.0 * acc
            );
        }
    }
    let train_secs = t_train.elapsed().as_secs_f64();
    println!(
        "training took {train_secs:.0}s ({epochs} epochs of {} images)",
        steps * batch
    );
    let labels: Vec<String> = (0..10).map(|d| d.to_string()).collect();
    println!("float (eval mode) on the {} held-out rows:", test_y.len());
    report(
        &labels,
        &test_y,
        &argmax_rows(&net.forward(&test_x, false)?)?,
    );

    let (graph, store) = net.export(mean, std)?;
    let out = dir.join("model");
    std::fs::create_dir_all(&out)?;
    let gpath = out.join("digits.graph.json");
    store.save(&out.join("digits.safetensors"))?;
    std::fs::write(&gpath, serde_json::to_string_pretty(&graph)? + "\n")?;
    let g = ingot_compiler::frontend::load(&gpath)
        .map_err(|e| anyhow::anyhow!("exported graph does not load: {e}"))?;
    println!(
        "exported {} ({} layers); it loads and validates",
        gpath.display(),
        g.layers().len()
    );
    let diff = compare_with_reference(&gpath, &dir.join("heldout"), &net.forward(&test_x, false)?)?;
    anyhow::ensure!(
        diff < 1e-3,
        "the exported graph does not reproduce candle's outputs"
    );
    println!("total time {:.0}s", t_start.elapsed().as_secs_f64());
    Ok(())
}
