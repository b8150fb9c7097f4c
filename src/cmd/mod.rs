//! One module per subcommand.

pub mod inspect;
pub mod plan;
