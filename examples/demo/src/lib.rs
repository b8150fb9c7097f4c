//! Shared code of the ingot demo programs.
//!
//! The demo scenario is **invented**: a bench-top camera on a small
//! workshop's packing table photographs laser-cut aluminium brackets, and a
//! microcontroller sorts each 64x64 grayscale photo into `ok`, `scratch`,
//! `pit` or `stain`, lighting a reject lamp for anything not `ok`. No real
//! photographs exist; [`brackets`] draws them procedurally from a seed.
//!
//! [`digits`] holds the conventions of the optdigits test model (a real,
//! open data set; see `tests/data/optdigits/README.md`).

pub mod brackets;
pub mod digits;
pub mod rng;

use std::path::Path;

/// Encodes an 8-bit grayscale image as PNG bytes.
///
/// The encoder settings are fixed, so the same pixels always give the same
/// bytes (the regeneration test checks this against the committed files).
pub fn encode_png_gray(width: u32, height: u32, pixels: &[u8]) -> Vec<u8> {
    use image::codecs::png::{CompressionType, FilterType, PngEncoder};
    use image::{ExtendedColorType, ImageEncoder};
    assert_eq!(
        pixels.len(),
        (width * height) as usize,
        "pixel count does not match the size"
    );
    let mut out = Vec::new();
    PngEncoder::new_with_quality(&mut out, CompressionType::Default, FilterType::Adaptive)
        .write_image(pixels, width, height, ExtendedColorType::L8)
        .expect("encoding a grayscale PNG into memory cannot fail");
    out
}

/// Reads a PNG (or any format `image` knows) as 8-bit grayscale:
/// `(width, height, pixels)`.
pub fn read_gray(path: &Path) -> anyhow::Result<(u32, u32, Vec<u8>)> {
    let img = image::open(path)
        .map_err(|e| anyhow::anyhow!("{}: {e}", path.display()))?
        .to_luma8();
    Ok((img.width(), img.height(), img.into_raw()))
}

/// Sorted `.png` files of a folder.
pub fn png_files(dir: &Path) -> anyhow::Result<Vec<std::path::PathBuf>> {
    let mut v: Vec<_> = std::fs::read_dir(dir)
        .map_err(|e| anyhow::anyhow!("{}: {e}", dir.display()))?
        .filter_map(|e| e.ok().map(|e| e.path()))
        .filter(|p| p.extension().is_some_and(|x| x == "png"))
        .collect();
    v.sort();
    Ok(v)
}

/// The demo crate's folder (`examples/demo`).
pub fn crate_dir() -> &'static Path {
    Path::new(env!("CARGO_MANIFEST_DIR"))
}

/// The repository root.
pub fn repo_root() -> std::path::PathBuf {
    crate_dir()
        .join("../..")
        .canonicalize()
        .expect("the demo crate lives two levels below the repository root")
}

/// Float accuracy of an exported graph on a labelled folder tree
/// `dir/<label>/*.png`, computed by the compiler's f32 reference from the
/// PNG bytes through the graph's own preprocessing.
#[derive(Debug, Clone)]
pub struct FolderAccuracy {
    /// Labels, in the graph's output order.
    pub labels: Vec<String>,
    /// `(correct, total)` per label.
    pub per_class: Vec<(usize, usize)>,
    /// Output vectors, in folder order (labels in graph order, files sorted).
    pub outputs: Vec<Vec<f32>>,
}

impl FolderAccuracy {
    /// Fraction of all images classified correctly.
    pub fn overall(&self) -> f64 {
        let (c, t) = self
            .per_class
            .iter()
            .fold((0, 0), |a, b| (a.0 + b.0, a.1 + b.1));
        c as f64 / t.max(1) as f64
    }
}

/// Runs the graph at `graph_path` in f32 on every `dir/<label>/*.png`
/// (`limit` images per label at most).
pub fn reference_accuracy(
    graph_path: &Path,
    dir: &Path,
    limit: usize,
) -> anyhow::Result<FolderAccuracy> {
    let g = ingot_compiler::load(graph_path).map_err(|e| anyhow::anyhow!("{e}"))?;
    let spec = g.input().clone();
    let labels = g.labels().to_vec();
    let mut inputs = Vec::new();
    let mut truth = Vec::new();
    for (c, label) in labels.iter().enumerate() {
        for p in png_files(&dir.join(label))?.into_iter().take(limit) {
            let (w, h, px) = read_gray(&p)?;
            anyhow::ensure!(
                (1, h as usize, w as usize) == (spec.shape.c, spec.shape.h, spec.shape.w),
                "{}: {w}x{h} does not fit the graph input {}",
                p.display(),
                spec.shape
            );
            inputs.push(
                px.iter()
                    .map(|&b| spec.preprocess(0, b))
                    .collect::<Vec<f32>>(),
            );
            truth.push(c);
        }
    }
    let outputs = ingot_compiler::reference::Reference::new(&g)
        .run_batch(&inputs)
        .map_err(|e| anyhow::anyhow!("{e}"))?;
    let mut per_class = vec![(0usize, 0usize); labels.len()];
    for (o, &t) in outputs.iter().zip(&truth) {
        let p = o
            .iter()
            .enumerate()
            .fold(
                (0, f32::NEG_INFINITY),
                |b, (i, &x)| if x > b.1 { (i, x) } else { b },
            )
            .0;
        per_class[t].1 += 1;
        if p == t {
            per_class[t].0 += 1;
        }
    }
    Ok(FolderAccuracy {
        labels,
        per_class,
        outputs,
    })
}
