//! One module per subcommand.

pub mod build;
pub mod calibrate;
pub mod check;
pub mod inspect;
pub mod plan;
