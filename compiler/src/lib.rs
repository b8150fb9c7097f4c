//! `ingot-compiler`: turns a trained float CNN into a fixed-point `no_std`
//! Rust module for microcontrollers.
//!
//! The pipeline follows the folders: [`frontend`] loads and validates a graph
//! into a checked [`graph::Graph`]; [`reference`] runs it in f32;
//! [`calibrate`] observes it on sample images and chooses [`ranges`];
//! [`lower`] turns graph and ranges into an int8 [`lower::QGraph`] (and
//! simulates it); [`agree`] measures int8 against float and picks among
//! candidate ranges; [`plan`] places every map in one arena (a
//! [`plan::Schedule`]); [`codegen`] writes the `no_std` module; [`driver`]
//! assembles these stages (the CLI and build scripts call it, see
//! [`build`]); [`check`] runs the module on host and emulated cores against
//! the float network. A stage uses only the stages before it
//! (`tests/it/layering.rs`).

pub mod agree;
pub mod calibrate;
pub mod camera;
pub mod check;
pub mod codegen;
pub mod driver;
pub mod frontend;
pub mod graph;
pub mod guard;
pub mod inspect;
pub mod lower;
pub mod measure;
pub mod plan;
pub mod ranges;
pub mod reference;
pub mod stats;
pub(crate) mod util;

pub use frontend::{load, LoadError};

/// The build-script API (see [`driver::build_script`]).
pub mod build {
    pub use crate::driver::build_script::{BuildError, Builder, Built};
}
pub use graph::{Graph, LayerId, MapId, Op, Shape};
