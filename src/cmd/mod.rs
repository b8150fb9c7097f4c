//! One module per subcommand.

pub mod build;
pub mod calibrate;
pub mod camera;
pub mod check;
pub mod inspect;
pub mod plan;

/// `--method` of `calibrate`, `build` and `check`: minmax, percentile:P,
/// mse, kl or auto.
pub(crate) fn parse_method(s: &str) -> Result<ingot_compiler::calibrate::Method, String> {
    s.parse()
}
