//! Pure numerical code over slices and ndarray: no polars, no files, no HTTP.
//! Each estimator's doc comment states its formula and its published source.

pub mod balance;
pub mod binary;
pub mod bootstrap;
pub mod combine;
pub mod describe;
pub mod imputation;
pub mod linalg;
pub mod multilevel;
pub mod newton;
pub mod normal;
pub mod pca;
pub mod random;
pub mod regression;
pub mod selection_bounds;
pub mod weights;
