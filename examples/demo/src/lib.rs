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
