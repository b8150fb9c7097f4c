//! One module per subcommand.

pub mod build;
pub mod inspect;
pub mod plan;
