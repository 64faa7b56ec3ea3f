//! Upper limits of every work setting, the same on pages and on the command line, so that
//! no request (a link on a foreign page, a typo) can occupy the machine for minutes.
//! Each limit is far above what the analysis needs for stable figures.

/// Bootstrap replicates of the planner's pick stability (200 by default).
pub const MAX_PLAN_REPLICATES: usize = 1000;

/// Wild cluster bootstrap replicates of the impact view (399 on pages by default).
pub const MAX_BOOTSTRAP_REPLICATES: usize = 1999;

/// Country bootstrap replicates of the impact view's whole pipeline (199 by default).
pub const MAX_PIPELINE_REPLICATES: usize = 1999;

/// Countries in one recruitment plan.
pub const MAX_PLAN_BUDGET: usize = 50;

/// The message for a work setting above its limit.
pub fn too_large(setting: &str, value: usize, limit: usize) -> String {
    format!("{setting} {value} is above the limit of {limit}; ask for at most {limit}")
}

/// Checks a work setting against its limit.
pub fn check(setting: &str, value: usize, limit: usize) -> Result<usize, String> {
    if value > limit {
        Err(too_large(setting, value, limit))
    } else {
        Ok(value)
    }
}
