//! `ingot-rt`: the int8 kernels that ingot-generated firmware modules call.
#![no_std]
#![forbid(unsafe_code)]
#![deny(missing_docs)]
