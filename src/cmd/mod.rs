//! One module per subcommand.

pub mod calibrate;
pub mod inspect;
