//! `ingot-compiler`: turns a trained float CNN into a fixed-point `no_std`
//! Rust module for microcontrollers.
//!
//! The pipeline follows the folders: [`frontend`] loads and validates a graph
//! into a checked [`graph::Graph`]; [`reference`] runs it in f32.

pub mod calibrate;
pub mod camera;
pub mod check;
pub mod codegen;
pub mod frontend;
pub mod graph;
pub mod inspect;
pub mod lower;
pub mod plan;
pub mod reference;
pub mod util;
pub mod zoo;

pub use frontend::{load, LoadError};

/// The build-script API (see [`codegen::build_script`]).
pub mod build {
    pub use crate::codegen::build_script::{BuildError, Builder, Built};
}
pub use graph::{Graph, LayerId, MapId, Op, Shape};
