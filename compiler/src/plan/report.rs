//! Report.
pub struct PlanReport;
pub fn report() {}
