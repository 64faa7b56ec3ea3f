//! One function per question: project + settings -> one serialisable result, rendered
//! alike by pages, JSON twins, the command line and the report.

pub mod balance;
pub mod cache;
pub mod cautions;
pub mod coverage;
pub mod design;
pub mod exports;
pub mod impact;
pub mod impact_bootstrap;
pub mod imputed;
pub mod limits;
pub mod microdata;
pub mod multilevel;
pub mod overview;
pub mod participation;
pub mod planner;
pub mod projection;
pub mod report;
pub mod selection_bounds;
pub mod sensitivity;
pub mod settings;

pub use settings::Settings;
