//! targets
pub struct Target;
pub struct Budget;
#[derive(Debug)]
pub struct TargetError;
