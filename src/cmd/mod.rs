//! One module per subcommand.

pub mod calibrate;
pub mod build;
pub mod inspect;
pub mod plan;
