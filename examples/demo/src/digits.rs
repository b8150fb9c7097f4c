//! Conventions of the optdigits test model (UCI "Optical Recognition of
//! Handwritten Digits", Alpaydin & Kaynak 1998, CC BY 4.0; the copy lives in
//! `tests/data/optdigits/`).
//!
//! A CSV row is 64 pixel values `v` in `0..=16` (8x8, row-major) and a label.
//! The one mapping used everywhere (held-out PNGs, calibration PNGs, the
//! graph's preprocessing and training) is:
//!
//! - image byte `p = round(v * 255 / 16)` (this is what the PNGs hold; it is
//!   invertible: `v = round(p * 16 / 255)`),
//! - the graph's `pixel_scale` is `1/255`, so the network sees
//!   `(p / 255 - mean) / std`, i.e. about `v / 16` before normalisation.
//!
//! Training feeds the network exactly those bytes, so the float model, the
//! PNG folders and the CSV agree bit for bit.

/// Side of a digit image.
pub const SIDE: usize = 8;

/// Held-out rule: row `i` is a test row when `i % 5 == 0`.
pub fn is_heldout(row: usize) -> bool {
    row % 5 == 0
}

/// Image byte of an optdigits pixel value `0..=16`.
pub fn value_to_byte(v: u8) -> u8 {
    assert!(v <= 16, "optdigits pixel values are 0..=16, got {v}");
    // round(v * 255 / 16) in integers: (v * 255 * 2 + 16) / 32.
    ((v as u32 * 510 + 16) / 32) as u8
}

/// Inverse of [`value_to_byte`].
pub fn byte_to_value(p: u8) -> u8 {
    ((p as u32 * 32 + 255) / 510) as u8
}

/// One row: 64 pixel values and the label.
#[derive(Debug, Clone)]
pub struct Row {
    /// Row index in the CSV (0-based).
    pub index: usize,
    /// Pixel values `0..=16`, row-major.
    pub values: [u8; 64],
    /// Digit `0..=9`.
    pub label: u8,
}

/// Parses the decompressed CSV text.
pub fn parse_csv(text: &str) -> anyhow::Result<Vec<Row>> {
    let mut rows = Vec::new();
    for (index, line) in text.lines().filter(|l| !l.trim().is_empty()).enumerate() {
        let nums: Vec<u8> = line
            .split(',')
            .map(|s| s.trim().parse::<u8>())
            .collect::<Result<_, _>>()
            .map_err(|e| anyhow::anyhow!("row {index}: {e}"))?;
        anyhow::ensure!(
            nums.len() == 65,
            "row {index}: {} values, expected 65",
            nums.len()
        );
        let mut values = [0u8; 64];
        values.copy_from_slice(&nums[..64]);
        anyhow::ensure!(
            values.iter().all(|&v| v <= 16) && nums[64] <= 9,
            "row {index}: value out of range"
        );
        rows.push(Row {
            index,
            values,
            label: nums[64],
        });
    }
    Ok(rows)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn byte_mapping_rounds_and_inverts() {
        for v in 0..=16u8 {
            let p = value_to_byte(v);
            assert_eq!(p as f64, (v as f64 * 255.0 / 16.0).round());
            assert_eq!(byte_to_value(p), v);
        }
    }
}
