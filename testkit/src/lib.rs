//! Test scaffolding of ingot, kept out of the published `ingot-compiler`:
//! the networks the tests, examples, benchmarks and the example firmware
//! build in code, and the helpers the CLI tests share.
//!
//! - [`zoo`]: float networks (graph file + tensors) with deterministic
//!   random weights, for the loader, reference, calibration and lowering.
//! - [`qbuild`]: the one builder of lowered graphs ([`qbuild::QBuilder`]).
//! - [`testnets`]: lowered networks ([`ingot_compiler::lower::QGraph`]) with
//!   random weights and valid quantization, for code generation.
//! - [`synth`]: lowered networks with dummy quantization, for the planner.
//! - [`kinds`]: instructions per MAC by layer kind from an `ingot check`
//!   run, the rows of the `bench_kinds` example's table.
//! - [`cli`]: running the `ingot` binary from the root crate's tests.
//!
//! Not published (`publish = false`): nothing here is API of ingot.

pub mod cli;
pub mod kinds;
pub mod qbuild;
pub mod synth;
pub mod testnets;
pub mod zoo;
