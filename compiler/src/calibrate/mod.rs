//! Calibration: observe every float map on sample images and choose int8
//! ranges.

pub mod ranges;

pub use ranges::{MapRange, Ranges, RangesError};
