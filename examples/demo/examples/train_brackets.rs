//! Trains the demo network on freshly generated (invented) bracket images
//! and exports it as `ingot.graph.v1` + F32 safetensors.
//!
//! ```text
//! cargo run -p ingot-demo --example train_brackets --release
//! ```
//!
//! The network is a small densely connected CNN (Huang et al. 2017,
//! "Densely Connected Convolutional Networks"): a 3x3 stride-2 stem
//! convolution (1->16), two dense blocks of four BN-ReLU-conv3x3 layers with growth rate
//! 8 (16->48 and 24->56 channels), a BN-ReLU-conv1x1 transition with
//! compression 0.5 and 2x2 average pooling between them, then BN-ReLU,
//! global average pooling and a linear layer to the four classes.
//!
//! Options: `--train N` (training images, default 3200), `--epochs N`
//! (default 10), `--batch N` (default 16), `--lr X` (default 0.004),
//! `--seed N` (training-set seed), `--data DIR` (committed sets),
//! `--out DIR` (model folder), `--init FILE` (start from an exported
//! `brackets.safetensors` instead of the seeded initialisation, to continue
//! training), `--no-export`.

mod common;

use anyhow::{bail, Context, Result};
use candle_core::{Device, Tensor, Var};
use common::*;
use ingot_compiler::frontend::{GraphFile, LayerFile, TensorStore};
use ingot_demo::brackets::{CLASSES, TRAIN_SEED};
use ingot_demo::rng::Rng;
use std::path::PathBuf;
use std::time::Instant;

const GROWTH: usize = 8;
const LAYERS_PER_BLOCK: usize = 4;
const STEM: usize = 16;
/// The stem halves the resolution: block 1 runs at 32x32, a quarter of the
/// work and RAM of full resolution, and the smallest defects (pits of
/// radius 1.5 px) still span a stem output pixel.
const STEM_STRIDE: usize = 2;

struct DenseLayer {
    bn: Bn,
    conv: Conv,
}

struct Net {
    stem: Conv,
    blocks: [Vec<DenseLayer>; 2],
    trans_bn: Bn,
    trans_conv: Conv,
    final_bn: Bn,
    fc: Fc,
}

fn block(init: &mut Init, c0: usize) -> Result<Vec<DenseLayer>> {
    (0..LAYERS_PER_BLOCK)
        .map(|k| {
            let c = c0 + k * GROWTH;
            Ok(DenseLayer {
                bn: Bn::new(init, c)?,
                conv: Conv::new(init, c, GROWTH, 3, 1, false)?,
            })
        })
        .collect()
}

/// Channel counts: block 1 in/out, block 2 in/out.
const B1_OUT: usize = STEM + LAYERS_PER_BLOCK * GROWTH; // 48
const B2_IN: usize = B1_OUT / 2; // 24
const B2_OUT: usize = B2_IN + LAYERS_PER_BLOCK * GROWTH; // 56

impl Net {
    fn new(seed: u64) -> Result<Self> {
        let mut init = Init(Rng::new(seed));
        let init = &mut init;
        Ok(Net {
            stem: Conv::new(init, 1, STEM, 3, 1, true)?.with_stride(STEM_STRIDE),
            blocks: [block(init, STEM)?, block(init, B2_IN)?],
            trans_bn: Bn::new(init, B1_OUT)?,
            trans_conv: Conv::new(init, B1_OUT, B2_IN, 1, 0, false)?,
            final_bn: Bn::new(init, B2_OUT)?,
            fc: Fc::new(init, B2_OUT, CLASSES.len())?,
        })
    }

    fn params(&self) -> Vec<Var> {
        let mut v = self.stem.params();
        for l in self.blocks.iter().flatten() {
            v.extend(l.bn.params());
            v.extend(l.conv.params());
        }
        v.extend(self.trans_bn.params());
        v.extend(self.trans_conv.params());
        v.extend(self.final_bn.params());
        v.extend(self.fc.params());
        v
    }

    /// Every tensor (trainable or not) under its exported name.
    fn named_vars(&self) -> Vec<(String, Var)> {
        let mut v = Vec::new();
        let conv = |v: &mut Vec<(String, Var)>, n: &str, c: &Conv| {
            v.push((format!("{n}.weight"), c.w.clone()));
            if let Some(b) = &c.b {
                v.push((format!("{n}.bias"), b.clone()));
            }
        };
        let bn = |v: &mut Vec<(String, Var)>, n: &str, b: &Bn| {
            v.push((format!("{n}.weight"), b.gamma.clone()));
            v.push((format!("{n}.bias"), b.beta.clone()));
            v.push((format!("{n}.running_mean"), b.running_mean.clone()));
            v.push((format!("{n}.running_var"), b.running_var.clone()));
        };
        conv(&mut v, "stem", &self.stem);
        for (bi, blk) in self.blocks.iter().enumerate() {
            for (k, l) in blk.iter().enumerate() {
                bn(&mut v, &format!("b{}.l{k}.bn", bi + 1), &l.bn);
                conv(&mut v, &format!("b{}.l{k}.conv", bi + 1), &l.conv);
            }
        }
        bn(&mut v, "t1.bn", &self.trans_bn);
        conv(&mut v, "t1.conv", &self.trans_conv);
        bn(&mut v, "final.bn", &self.final_bn);
        v.push(("fc.weight".into(), self.fc.w.clone()));
        v.push(("fc.bias".into(), self.fc.b.clone()));
        v
    }

    /// Starts from an exported weights file instead of the seeded init.
    fn load(&self, path: &std::path::Path) -> Result<()> {
        let store = TensorStore::load(path).map_err(|e| anyhow::anyhow!("{e}"))?;
        for (name, var) in self.named_vars() {
            let t = store
                .tensors
                .get(&name)
                .with_context(|| format!("{}: no tensor `{name}`", path.display()))?;
            var.set(&Tensor::from_vec(
                t.data.clone(),
                t.shape.as_slice(),
                &Device::Cpu,
            )?)?;
        }
        Ok(())
    }

    fn dense_block(layers: &[DenseLayer], x0: Tensor, train: bool) -> Result<Tensor> {
        let mut feats = vec![x0];
        for l in layers {
            let inp = if feats.len() == 1 {
                feats[0].clone()
            } else {
                Tensor::cat(&feats, 0)?
            };
            let h = l.conv.forward(&bn_relu(&l.bn, &inp, train)?)?;
            feats.push(h);
        }
        Ok(Tensor::cat(&feats, 0)?)
    }

    /// Images `[N, 1, 64, 64]` to logits `[N, 4]`.
    fn forward(&self, x: &Tensor, train: bool) -> Result<Tensor> {
        let x = images_to_cnhw(x)?;
        let x0 = self.stem.forward(&x)?;
        let b1 = Self::dense_block(&self.blocks[0], x0, train)?;
        let t = self
            .trans_conv
            .forward(&bn_relu(&self.trans_bn, &b1, train)?)?
            .avg_pool2d(2)?;
        let b2 = Self::dense_block(&self.blocks[1], t, train)?;
        let f = global_avg_pool(&bn_relu(&self.final_bn, &b2, train)?)?;
        self.fc.forward(&f)
    }

    /// Graph layers and tensors, mirroring `forward` op for op.
    fn export(&self, mean: f32, std: f32) -> Result<(GraphFile, TensorStore)> {
        let mut store = TensorStore::new("brackets.safetensors");
        let mut layers = Vec::new();
        self.stem.export(&mut store, "stem")?;
        layers.push(LayerFile::conv2d("stem", "image", true, STEM_STRIDE, 1));
        let mut x0 = "stem".to_string();
        for (bi, blk) in self.blocks.iter().enumerate() {
            let b = format!("b{}", bi + 1);
            let mut feats = vec![x0.clone()];
            for (k, l) in blk.iter().enumerate() {
                let inp = if feats.len() == 1 {
                    feats[0].clone()
                } else {
                    let name = format!("{b}.cat{k}");
                    let refs: Vec<&str> = feats.iter().map(String::as_str).collect();
                    layers.push(LayerFile::multi(&name, "concat", &refs));
                    name
                };
                let (bn_name, relu_name, conv_name) = (
                    format!("{b}.l{k}.bn"),
                    format!("{b}.l{k}.relu"),
                    format!("{b}.l{k}.conv"),
                );
                l.bn.export(&mut store, &bn_name)?;
                l.conv.export(&mut store, &conv_name)?;
                layers.push(LayerFile::batch_norm(&bn_name, &inp));
                layers.push(LayerFile::new(&relu_name, "relu", &bn_name));
                layers.push(LayerFile::conv2d(&conv_name, &relu_name, false, 1, 1));
                feats.push(conv_name);
            }
            let out = format!("{b}.cat{LAYERS_PER_BLOCK}");
            let refs: Vec<&str> = feats.iter().map(String::as_str).collect();
            layers.push(LayerFile::multi(&out, "concat", &refs));
            if bi == 0 {
                self.trans_bn.export(&mut store, "t1.bn")?;
                self.trans_conv.export(&mut store, "t1.conv")?;
                layers.push(LayerFile::batch_norm("t1.bn", &out));
                layers.push(LayerFile::new("t1.relu", "relu", "t1.bn"));
                layers.push(LayerFile::conv2d("t1.conv", "t1.relu", false, 1, 0));
                layers.push(LayerFile::pool("t1.pool", "avg_pool2d", "t1.conv", 2, 2));
                x0 = "t1.pool".into();
            } else {
                x0 = out;
            }
        }
        self.final_bn.export(&mut store, "final.bn")?;
        self.fc.export(&mut store, "fc")?;
        layers.push(LayerFile::batch_norm("final.bn", &x0));
        layers.push(LayerFile::new("final.relu", "relu", "final.bn"));
        layers.push(LayerFile::new("gap", "global_avg_pool", "final.relu"));
        layers.push(LayerFile::linear("fc", "gap", true));
        let graph = bracket_graph("brackets", "brackets.safetensors".into(), layers, mean, std);
        Ok((graph, store))
    }
}

struct Args {
    train: usize,
    epochs: usize,
    batch: usize,
    lr: f64,
    seed: u64,
    data: PathBuf,
    out: PathBuf,
    init: Option<PathBuf>,
    export: bool,
}

fn args() -> Result<Args> {
    let dir = ingot_demo::crate_dir();
    let mut a = Args {
        train: 3200,
        epochs: 10,
        batch: 16,
        lr: 4e-3,
        seed: TRAIN_SEED,
        data: dir.join("data"),
        out: dir.join("model"),
        init: None,
        export: true,
    };
    let mut it = std::env::args().skip(1);
    while let Some(k) = it.next() {
        let mut v = || it.next().with_context(|| format!("{k} needs a value"));
        match k.as_str() {
            "--train" => a.train = v()?.parse()?,
            "--epochs" => a.epochs = v()?.parse()?,
            "--batch" => a.batch = v()?.parse()?,
            "--lr" => a.lr = v()?.parse()?,
            "--seed" => a.seed = v()?.parse()?,
            "--data" => a.data = v()?.into(),
            "--out" => a.out = v()?.into(),
            "--init" => a.init = Some(v()?.into()),
            "--no-export" => a.export = false,
            other => bail!("unknown argument `{other}`"),
        }
    }
    Ok(a)
}

fn main() -> Result<()> {
    default_single_thread();
    let a = args()?;
    let t_start = Instant::now();
    let sets = bracket_sets(a.train, a.seed, &a.data)?;
    let net = Net::new(a.seed ^ 0x5EED)?;
    if let Some(p) = &a.init {
        net.load(p)?;
        println!("starting from {}", p.display());
    }
    fit_brackets(
        |x, train| net.forward(x, train),
        net.params(),
        &sets,
        &Fit {
            epochs: a.epochs,
            batch: a.batch,
            lr: a.lr,
            shuffle_seed: a.seed ^ 0xBA7C4,
        },
    )?;
    let export = match a.export {
        true => {
            let (graph, store) = net.export(sets.mean, sets.std)?;
            Some((graph, store, a.out.as_path(), "brackets"))
        }
        false => None,
    };
    report_and_export(|x| net.forward(x, false), &sets, &a.data, export)?;
    println!("total time {:.0}s", t_start.elapsed().as_secs_f64());
    Ok(())
}
