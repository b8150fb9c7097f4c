//! One module per subcommand.

pub mod calibrate;
