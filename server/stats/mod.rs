//! Pure numerical code over slices and ndarray: no polars, no files, no HTTP.
//! Each estimator's doc comment states its formula and its published source.

pub mod describe;
