//! `ingot-compiler`: turns a trained float CNN into a fixed-point `no_std`
//! Rust module for microcontrollers.
//!
//! The pipeline follows the folders: [`frontend`] loads and validates a graph
//! into a checked [`graph::Graph`]; [`reference`] runs it in f32.

pub mod calibrate;
pub mod check;
pub mod frontend;
pub mod graph;
pub mod inspect;
pub mod lower;
pub mod reference;
pub mod util;
pub mod zoo;

pub use frontend::{load, LoadError};
pub use graph::{Graph, LayerId, MapId, Op, Shape};
