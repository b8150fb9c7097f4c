//! Training helpers shared by the demo's training programs (candle on CPU).
//!
//! Feature maps are kept **channel-major**, `[C, N, H, W]`, so that a
//! convolution is one large matrix product `W[O, C*k*k] x cols[C*k*k, N*H*W]`
//! (im2col) whose result is again `[O, N, H, W]`, and batch normalisation
//! reduces over one contiguous row per channel. On candle's CPU backend this
//! is several times faster than its direct convolution for these small
//! channel counts.
//!
//! Batch normalisation (Ioffe & Szegedy 2015) is implemented here with candle
//! ops: batch statistics while training, running mean and (unbiased)
//! variance updated with momentum 0.1, running statistics at evaluation.
//! The optimiser is candle-nn's AdamW (Adam, Kingma & Ba 2015, with
//! decoupled weight decay).

#![allow(dead_code)]

use anyhow::Result;
use candle_core::{DType, Device, Tensor, Var};
use ingot_compiler::frontend::TensorStore;
use ingot_demo::rng::Rng;

/// Batch-norm epsilon (the graph format's default).
pub const BN_EPS: f64 = 1e-5;
/// Running-statistics momentum.
pub const BN_MOMENTUM: f64 = 0.1;

/// Seeded parameter initialisation.
pub struct Init(pub Rng);

impl Init {
    /// He-normal convolution weight `[o, c, k, k]` (He et al. 2015).
    pub fn conv(&mut self, o: usize, c: usize, k: usize) -> Result<Var> {
        let std = (2.0 / (c * k * k) as f64).sqrt();
        let v: Vec<f32> = (0..o * c * k * k)
            .map(|_| (self.0.gaussish() * std) as f32)
            .collect();
        Ok(Var::from_tensor(&Tensor::from_vec(
            v,
            (o, c, k, k),
            &Device::Cpu,
        )?)?)
    }
    /// Uniform(+-1/sqrt(i)) linear weight `[o, i]`.
    pub fn linear(&mut self, o: usize, i: usize) -> Result<Var> {
        let b = 1.0 / (i as f64).sqrt();
        let v: Vec<f32> = (0..o * i).map(|_| self.0.range(-b, b) as f32).collect();
        Ok(Var::from_tensor(&Tensor::from_vec(
            v,
            (o, i),
            &Device::Cpu,
        )?)?)
    }
    /// A constant vector.
    pub fn constant(&mut self, n: usize, value: f32) -> Result<Var> {
        Ok(Var::from_tensor(&Tensor::from_vec(
            vec![value; n],
            n,
            &Device::Cpu,
        )?)?)
    }
}

/// Stride-1 convolution with square zero padding, on channel-major maps.
pub struct Conv {
    /// `[O, C, k, k]`.
    pub w: Var,
    /// `[O]`.
    pub b: Option<Var>,
    /// Zero padding on every side.
    pub pad: usize,
    /// Stride (both axes).
    pub stride: usize,
}

impl Conv {
    /// A convolution `c -> o` with a `k x k` kernel.
    pub fn new(
        init: &mut Init,
        c: usize,
        o: usize,
        k: usize,
        pad: usize,
        bias: bool,
    ) -> Result<Self> {
        Ok(Conv {
            w: init.conv(o, c, k)?,
            b: if bias {
                Some(init.constant(o, 0.0)?)
            } else {
                None
            },
            pad,
            stride: 1,
        })
    }

    /// The same convolution with stride `s`.
    pub fn with_stride(mut self, s: usize) -> Self {
        self.stride = s;
        self
    }

    /// `x` `[C, N, H, W]` to `[O, N, OH, OW]`.
    pub fn forward(&self, x: &Tensor) -> Result<Tensor> {
        let (c, n, h, wd) = x.dims4()?;
        let (o, ci, kh, kw) = self.w.dims4()?;
        anyhow::ensure!(ci == c, "conv: weight has {ci} input channels, map has {c}");
        let p = self.pad;
        let (oh, ow) = (h + 2 * p + 1 - kh, wd + 2 * p + 1 - kw);
        let cols = if kh == 1 && kw == 1 && p == 0 {
            x.reshape((c, n * h * wd))?
        } else {
            let xp = if p > 0 {
                x.pad_with_zeros(2, p, p)?.pad_with_zeros(3, p, p)?
            } else {
                x.clone()
            };
            let mut taps = Vec::with_capacity(kh * kw);
            for ky in 0..kh {
                for kx in 0..kw {
                    taps.push(xp.narrow(2, ky, oh)?.narrow(3, kx, ow)?);
                }
            }
            // [C, k*k, N, OH, OW]: rows ordered (c, ky, kx) like the weight.
            Tensor::stack(&taps, 1)?.reshape((c * kh * kw, n * oh * ow))?
        };
        let y = self
            .w
            .as_tensor()
            .reshape((o, c * kh * kw))?
            .matmul(&cols)?;
        let y = match &self.b {
            Some(b) => y.broadcast_add(&b.as_tensor().reshape((o, 1))?)?,
            None => y,
        };
        let y = y.reshape((o, n, oh, ow))?;
        if self.stride == 1 {
            return Ok(y);
        }
        // A stride-s output is the stride-1 output at every s-th position
        // (same padding); computing all of it costs little on the thin
        // layers this is used for and keeps one im2col path.
        let s = self.stride;
        let pick = |len: usize| -> Result<Tensor> {
            let idx: Vec<u32> = (0..len).step_by(s).map(|i| i as u32).collect();
            let n = idx.len();
            Ok(Tensor::from_vec(idx, n, &Device::Cpu)?)
        };
        Ok(y.index_select(&pick(oh)?, 2)?.index_select(&pick(ow)?, 3)?)
    }

    /// Trainable tensors.
    pub fn params(&self) -> Vec<Var> {
        let mut v = vec![self.w.clone()];
        v.extend(self.b.clone());
        v
    }

    /// Stores `{name}.weight` (and `{name}.bias`).
    pub fn export(&self, store: &mut TensorStore, name: &str) -> Result<()> {
        put(store, &format!("{name}.weight"), self.w.as_tensor())?;
        if let Some(b) = &self.b {
            put(store, &format!("{name}.bias"), b.as_tensor())?;
        }
        Ok(())
    }
}

/// Depthwise 3x3-style convolution (`groups == channels`: each channel is
/// filtered by its own `k x k` kernel) with square zero padding, on
/// channel-major maps; no bias (a batch norm follows).
pub struct DwConv {
    /// `[C, 1, k, k]`, the graph format's depthwise weight shape.
    pub w: Var,
    /// Zero padding on every side.
    pub pad: usize,
    /// Stride (both axes).
    pub stride: usize,
}

impl DwConv {
    /// A depthwise convolution over `c` channels, He-normal weights (fan-in `k * k`).
    pub fn new(init: &mut Init, c: usize, k: usize, pad: usize, stride: usize) -> Result<Self> {
        Ok(DwConv {
            w: init.conv(c, 1, k)?,
            pad,
            stride,
        })
    }

    /// `x` `[C, N, H, W]` to `[C, N, OH, OW]`: the `k * k` shifted (and, for
    /// stride `s`, subsampled) views of the padded map, weighted per channel
    /// and summed.
    pub fn forward(&self, x: &Tensor) -> Result<Tensor> {
        let (c, n, h, wd) = x.dims4()?;
        let (o, one, kh, kw) = self.w.dims4()?;
        anyhow::ensure!(
            o == c && one == 1,
            "depthwise conv: weight [{o}, {one}, ..], map has {c} channels"
        );
        let (p, s) = (self.pad, self.stride);
        let (oh, ow) = ((h + 2 * p - kh) / s + 1, (wd + 2 * p - kw) / s + 1);
        let xp = if p > 0 {
            x.pad_with_zeros(2, p, p)?.pad_with_zeros(3, p, p)?
        } else {
            x.clone()
        };
        let pick = |first: usize, len: usize| -> Result<Tensor> {
            let idx: Vec<u32> = (0..len).map(|i| (first + i * s) as u32).collect();
            Ok(Tensor::from_vec(idx, len, &Device::Cpu)?)
        };
        let mut taps = Vec::with_capacity(kh * kw);
        for ky in 0..kh {
            let rows = if s == 1 {
                xp.narrow(2, ky, oh)?
            } else {
                xp.index_select(&pick(ky, oh)?, 2)?
            };
            for kx in 0..kw {
                taps.push(if s == 1 {
                    rows.narrow(3, kx, ow)?
                } else {
                    rows.index_select(&pick(kx, ow)?, 3)?
                });
            }
        }
        // [C, k*k, N*OH*OW] weighted by [C, k*k, 1], summed over the taps.
        let cols = Tensor::stack(&taps, 1)?.reshape((c, kh * kw, n * oh * ow))?;
        let w = self.w.as_tensor().reshape((c, kh * kw, 1))?;
        Ok(cols.broadcast_mul(&w)?.sum(1)?.reshape((c, n, oh, ow))?)
    }

    /// Trainable tensors.
    pub fn params(&self) -> Vec<Var> {
        vec![self.w.clone()]
    }

    /// Stores `{name}.weight`.
    pub fn export(&self, store: &mut TensorStore, name: &str) -> Result<()> {
        put(store, &format!("{name}.weight"), self.w.as_tensor())
    }
}

/// Batch normalisation over the channels of channel-major maps.
pub struct Bn {
    /// Scale.
    pub gamma: Var,
    /// Shift.
    pub beta: Var,
    /// Running mean (not trained; updated in training passes).
    pub running_mean: Var,
    /// Running variance.
    pub running_var: Var,
}

impl Bn {
    /// A batch norm over `c` channels: scale 1, shift 0, running stats 0 / 1.
    pub fn new(init: &mut Init, c: usize) -> Result<Self> {
        Ok(Bn {
            gamma: init.constant(c, 1.0)?,
            beta: init.constant(c, 0.0)?,
            running_mean: init.constant(c, 0.0)?,
            running_var: init.constant(c, 1.0)?,
        })
    }

    /// `x` `[C, N, H, W]` (or `[C, N]`), normalised per channel.
    pub fn forward(&self, x: &Tensor, train: bool) -> Result<Tensor> {
        let dims = x.dims().to_vec();
        let c = dims[0];
        let xf = x.reshape((c, ()))?;
        let (xc, inv) = if train {
            let m = xf.dim(1)? as f64;
            let mean = xf.mean_keepdim(1)?;
            let xc = xf.broadcast_sub(&mean)?;
            let var = xc.sqr()?.mean_keepdim(1)?;
            let rm = ((self.running_mean.as_tensor().detach() * (1.0 - BN_MOMENTUM))?
                + (mean.detach().flatten_all()? * BN_MOMENTUM)?)?;
            let unbiased = (var.detach().flatten_all()? * (m / (m - 1.0).max(1.0)))?;
            let rv = ((self.running_var.as_tensor().detach() * (1.0 - BN_MOMENTUM))?
                + (unbiased * BN_MOMENTUM)?)?;
            self.running_mean.set(&rm)?;
            self.running_var.set(&rv)?;
            (xc, (var + BN_EPS)?.sqrt()?.recip()?)
        } else {
            let rm = self.running_mean.as_tensor().detach().reshape((c, 1))?;
            let rv = self.running_var.as_tensor().detach().reshape((c, 1))?;
            (xf.broadcast_sub(&rm)?, (rv + BN_EPS)?.sqrt()?.recip()?)
        };
        let scale = inv.broadcast_mul(&self.gamma.as_tensor().reshape((c, 1))?)?;
        let y = xc
            .broadcast_mul(&scale)?
            .broadcast_add(&self.beta.as_tensor().reshape((c, 1))?)?;
        Ok(y.reshape(dims)?)
    }

    /// Trainable tensors (not the running statistics).
    pub fn params(&self) -> Vec<Var> {
        vec![self.gamma.clone(), self.beta.clone()]
    }

    /// Stores `{name}.weight/.bias/.running_mean/.running_var`.
    pub fn export(&self, store: &mut TensorStore, name: &str) -> Result<()> {
        put(store, &format!("{name}.weight"), self.gamma.as_tensor())?;
        put(store, &format!("{name}.bias"), self.beta.as_tensor())?;
        put(
            store,
            &format!("{name}.running_mean"),
            self.running_mean.as_tensor(),
        )?;
        put(
            store,
            &format!("{name}.running_var"),
            self.running_var.as_tensor(),
        )?;
        Ok(())
    }
}

/// `relu(bn(x))`.
pub fn bn_relu(bn: &Bn, x: &Tensor, train: bool) -> Result<Tensor> {
    Ok(bn.forward(x, train)?.relu()?)
}

/// `min(max(x, 0), 6)` as `relu(x) - relu(x - 6)` (cheap to differentiate).
pub fn relu6(x: &Tensor) -> Result<Tensor> {
    Ok((x.relu()? - (x - 6.0)?.relu()?)?)
}

/// Fully connected layer on `[N, I]` rows.
pub struct Fc {
    /// `[O, I]`.
    pub w: Var,
    /// `[O]`.
    pub b: Var,
}

impl Fc {
    /// A linear layer `i -> o` with bias.
    pub fn new(init: &mut Init, i: usize, o: usize) -> Result<Self> {
        Ok(Fc {
            w: init.linear(o, i)?,
            b: init.constant(o, 0.0)?,
        })
    }
    /// `[N, I]` to `[N, O]`.
    pub fn forward(&self, x: &Tensor) -> Result<Tensor> {
        Ok(x.matmul(&self.w.as_tensor().t()?)?
            .broadcast_add(self.b.as_tensor())?)
    }
    /// Trainable tensors.
    pub fn params(&self) -> Vec<Var> {
        vec![self.w.clone(), self.b.clone()]
    }
    /// Stores `{name}.weight` and `{name}.bias`.
    pub fn export(&self, store: &mut TensorStore, name: &str) -> Result<()> {
        put(store, &format!("{name}.weight"), self.w.as_tensor())?;
        put(store, &format!("{name}.bias"), self.b.as_tensor())?;
        Ok(())
    }
}

/// `[C, N, H, W]` to per-image `[N, C*H*W]` in C, H, W order (the graph
/// format's `flatten`).
pub fn flatten_chw(x: &Tensor) -> Result<Tensor> {
    let (c, n, h, w) = x.dims4()?;
    Ok(x.transpose(0, 1)?.contiguous()?.reshape((n, c * h * w))?)
}

/// `[C, N, H, W]` to `[N, C]` channel means (the graph format's `global_avg_pool`).
pub fn global_avg_pool(x: &Tensor) -> Result<Tensor> {
    let (c, n, h, w) = x.dims4()?;
    Ok(x.reshape((c, n, h * w))?.mean(2)?.t()?)
}

/// Images `[N, 1, H, W]` as a channel-major batch `[1, N, H, W]`.
pub fn images_to_cnhw(x: &Tensor) -> Result<Tensor> {
    let (n, c, h, w) = x.dims4()?;
    Ok(x.transpose(0, 1)?.contiguous()?.reshape((c, n, h, w))?)
}

fn put(store: &mut TensorStore, name: &str, t: &Tensor) -> Result<()> {
    let t = t.to_dtype(DType::F32)?;
    store.insert(name, t.dims().to_vec(), t.flatten_all()?.to_vec1::<f32>()?);
    Ok(())
}

/// Index of the largest value of each row of a `[N, K]` tensor.
pub fn argmax_rows(logits: &Tensor) -> Result<Vec<usize>> {
    let v = logits.to_vec2::<f32>()?;
    Ok(v.iter()
        .map(|r| {
            r.iter()
                .enumerate()
                .fold(
                    (0, f32::NEG_INFINITY),
                    |b, (i, &x)| if x > b.1 { (i, x) } else { b },
                )
                .0
        })
        .collect())
}

/// Learning rate of a cosine schedule with a short linear warm-up.
pub fn cosine_lr(base: f64, step: usize, total: usize, warmup: usize) -> f64 {
    if step < warmup {
        return base * (step + 1) as f64 / warmup as f64;
    }
    let t = (step - warmup) as f64 / (total - warmup).max(1) as f64;
    base * 0.5 * (1.0 + (std::f64::consts::PI * t).cos())
}

/// Mean and standard deviation of a list of values.
pub fn mean_std(values: &[f32]) -> (f32, f32) {
    let n = values.len() as f64;
    let mean = values.iter().map(|&v| v as f64).sum::<f64>() / n;
    let var = values
        .iter()
        .map(|&v| (v as f64 - mean).powi(2))
        .sum::<f64>()
        / n;
    (mean as f32, var.sqrt() as f32)
}

/// Per-class and overall accuracy lines.
pub fn report(labels: &[String], truth: &[usize], pred: &[usize]) -> (f64, Vec<f64>) {
    let k = labels.len();
    let mut hit = vec![0usize; k];
    let mut tot = vec![0usize; k];
    let mut confusion = vec![vec![0usize; k]; k];
    for (&t, &p) in truth.iter().zip(pred) {
        tot[t] += 1;
        confusion[t][p] += 1;
        if t == p {
            hit[t] += 1;
        }
    }
    let overall = hit.iter().sum::<usize>() as f64 / truth.len().max(1) as f64;
    let per: Vec<f64> = (0..k)
        .map(|c| hit[c] as f64 / tot[c].max(1) as f64)
        .collect();
    println!(
        "accuracy {:.2}% ({} / {})",
        100.0 * overall,
        hit.iter().sum::<usize>(),
        truth.len()
    );
    for c in 0..k {
        println!(
            "  {:>8}: {:6.2}% ({:3} / {:3})   predicted as {:?}",
            labels[c],
            100.0 * per[c],
            hit[c],
            tot[c],
            confusion[c]
        );
    }
    (overall, per)
}

/// Makes candle run on one thread unless `CANDLE_NUM_THREADS` or
/// `RAYON_NUM_THREADS` says otherwise. On a shared two-core machine its
/// spinning thread pool is slower than one thread; call this first in `main`.
pub fn default_single_thread() {
    if std::env::var_os("CANDLE_NUM_THREADS").is_none()
        && std::env::var_os("RAYON_NUM_THREADS").is_none()
    {
        std::env::set_var("CANDLE_NUM_THREADS", "1");
        std::env::set_var("RAYON_NUM_THREADS", "1");
    }
}

/// Compares candle's eval-mode logits (`[N, K]`, images in folder order)
/// with the compiler's f32 reference run on the exported graph over the
/// same folder tree; prints and returns the largest absolute difference.
pub fn compare_with_reference(
    graph: &std::path::Path,
    dir: &std::path::Path,
    candle_logits: &Tensor,
) -> Result<f32> {
    let acc = ingot_demo::reference_accuracy(graph, dir, usize::MAX)?;
    let ours = candle_logits.to_vec2::<f32>()?;
    anyhow::ensure!(
        ours.len() == acc.outputs.len(),
        "{} candle rows, {} reference outputs",
        ours.len(),
        acc.outputs.len()
    );
    let diff = ours
        .iter()
        .zip(&acc.outputs)
        .flat_map(|(a, b)| a.iter().zip(b).map(|(x, y)| (x - y).abs()))
        .fold(0.0f32, f32::max);
    println!(
        "f32 reference on the exported graph: accuracy {:.2}%; largest |candle - reference| logit difference over {} images: {diff:.2e}",
        100.0 * acc.overall(),
        ours.len()
    );
    Ok(diff)
}

/// The committed bracket evaluation set (`DIR/eval/CLASS/*.png`, classes
/// in `CLASSES` order): pixels (0..=255 as f32) and labels.
pub fn load_bracket_eval(dir: &std::path::Path) -> Result<(Vec<f32>, Vec<usize>)> {
    use ingot_demo::brackets::{CLASSES, SIZE};
    let (mut px, mut labels) = (Vec::new(), Vec::new());
    for (c, name) in CLASSES.iter().enumerate() {
        for p in ingot_demo::png_files(&dir.join("eval").join(name))? {
            let (w, h, bytes) = ingot_demo::read_gray(&p)?;
            anyhow::ensure!(
                (w as usize, h as usize) == (SIZE, SIZE),
                "{}: {w}x{h}",
                p.display()
            );
            px.extend(bytes.iter().map(|&b| b as f32));
            labels.push(c);
        }
    }
    Ok((px, labels))
}

/// Normalised `[n, 1, 64, 64]` bracket images from raw byte values.
pub fn bracket_input(bytes: &[f32], mean: f32, std: f32) -> Result<Tensor> {
    use ingot_demo::brackets::SIZE;
    let n = bytes.len() / (SIZE * SIZE);
    let v: Vec<f32> = bytes
        .iter()
        .map(|&b| (b * (1.0 / 255.0) - mean) / std)
        .collect();
    Ok(Tensor::from_vec(v, (n, 1, SIZE, SIZE), &Device::Cpu)?)
}

/// Eval-mode predictions and logits of `forward` over `x` `[N, ..]`, 50
/// images at a time.
pub fn predict(
    forward: impl Fn(&Tensor) -> Result<Tensor>,
    x: &Tensor,
) -> Result<(Vec<usize>, Tensor)> {
    let n = x.dim(0)?;
    let mut outs = Vec::new();
    for s in (0..n).step_by(50) {
        // Detached: a result keeps its whole autograd graph (every
        // activation of the pass) alive otherwise.
        outs.push(forward(&x.narrow(0, s, 50.min(n - s))?)?.detach());
    }
    let logits = Tensor::cat(&outs, 0)?;
    Ok((argmax_rows(&logits)?, logits))
}
