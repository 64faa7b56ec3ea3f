//! Respondent-level questions: pooled estimates and regressions, unweighted and under each
//! country weighting, with standard errors clustered by country.

use std::collections::HashMap;
use std::path::Path;

use ndarray::Array2;
use serde::Serialize;

use crate::project::table::{load_table, ColumnKind, ColumnSpec};
use crate::project::Problem;
use crate::stats::regression::{self, Family};

/// The result of `gapwise regress`.
#[derive(Debug, Clone, Serialize)]
pub struct RegressReport {
    pub family: &'static str,
    /// Intercept first.
    pub terms: Vec<String>,
    pub coef: Vec<f64>,
    /// CR1 cluster-robust standard errors.
    pub se: Vec<f64>,
    pub n: usize,
    pub clusters: usize,
    /// Rows left out for a missing value in a used column.
    pub dropped: usize,
    pub converged: bool,
}

#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum MicrodataError {
    #[error("{}", .0.iter().map(Problem::to_string).collect::<Vec<_>>().join("\n"))]
    Input(Vec<Problem>),
    #[error("{0}")]
    Model(#[from] regression::RegressionError),
    #[error("{0}")]
    Request(String),
}

/// Columns of a respondent file ready for a regression: complete cases only.
pub struct RegressionData {
    pub x: Array2<f64>,
    pub y: Vec<f64>,
    pub weight: Option<Vec<f64>>,
    /// Cluster index of each row in `0..clusters.len()`.
    pub cluster: Vec<usize>,
    pub clusters: Vec<String>,
    pub dropped: usize,
}

/// Reads the needed columns of a CSV or Parquet file and keeps the complete rows.
pub fn read_regression_file(
    path: &Path,
    outcome: &str,
    predictors: &[String],
    cluster: &str,
    weight: Option<&str>,
) -> Result<RegressionData, MicrodataError> {
    let label = path.file_name().map_or_else(
        || path.display().to_string(),
        |n| n.to_string_lossy().to_string(),
    );
    let mut specs = vec![
        ColumnSpec::new(outcome, ColumnKind::Number, "--outcome"),
        ColumnSpec::new(cluster, ColumnKind::Text, "--cluster"),
    ];
    specs.extend(
        predictors
            .iter()
            .map(|p| ColumnSpec::new(p, ColumnKind::Number, "--predictors")),
    );
    if let Some(w) = weight {
        specs.push(ColumnSpec::new(w, ColumnKind::Number, "--weight"));
    }
    let table = load_table(path, &label, &specs).map_err(MicrodataError::Input)?;
    let y_all = table.numbers(outcome);
    let x_all: Vec<Vec<Option<f64>>> = predictors.iter().map(|p| table.numbers(p)).collect();
    let w_all = weight.map(|w| table.numbers(w));
    let c_all = table.texts(cluster);
    let n_all = y_all.len();
    let keep: Vec<usize> = (0..n_all)
        .filter(|&i| {
            y_all[i].is_some()
                && c_all[i].is_some()
                && x_all.iter().all(|c| c[i].is_some())
                && w_all.as_ref().is_none_or(|w| w[i].is_some())
        })
        .collect();
    if let Some(w) = &w_all {
        if let Some(&i) = keep.iter().find(|&&i| w[i].is_some_and(|v| v <= 0.0)) {
            return Err(MicrodataError::Input(vec![Problem::at(
                &label,
                Some(table.row_number(i)),
                weight,
                "the weight is zero or negative; weights must be positive",
            )]));
        }
    }
    let mut x = Array2::<f64>::ones((keep.len(), predictors.len() + 1));
    for (r, &i) in keep.iter().enumerate() {
        for (j, col) in x_all.iter().enumerate() {
            x[[r, j + 1]] = col[i].unwrap_or(0.0);
        }
    }
    let mut index: HashMap<&str, usize> = HashMap::new();
    let mut clusters = Vec::new();
    let cluster_of: Vec<usize> = keep
        .iter()
        .map(|&i| {
            let c = c_all[i].as_deref().unwrap_or("");
            *index.entry(c).or_insert_with(|| {
                clusters.push(c.to_string());
                clusters.len() - 1
            })
        })
        .collect();
    Ok(RegressionData {
        y: keep.iter().map(|&i| y_all[i].unwrap_or(0.0)).collect(),
        weight: w_all.map(|w| keep.iter().map(|&i| w[i].unwrap_or(1.0)).collect()),
        x,
        cluster: cluster_of,
        clusters,
        dropped: n_all - keep.len(),
    })
}

/// `gapwise regress`: one pooled regression with CR1 standard errors.
pub fn regress_file(
    path: &Path,
    outcome: &str,
    predictors: &[String],
    cluster: &str,
    weight: Option<&str>,
    family: Family,
) -> Result<RegressReport, MicrodataError> {
    if predictors.is_empty() {
        return Err(MicrodataError::Request(
            "name at least one predictor (--predictors a,b,c)".to_string(),
        ));
    }
    let data = read_regression_file(path, outcome, predictors, cluster, weight)?;
    let fit = regression::fit(
        data.x.view(),
        &data.y,
        data.weight.as_deref(),
        &data.cluster,
        family,
    )?;
    let mut terms = vec!["intercept".to_string()];
    terms.extend(predictors.iter().cloned());
    Ok(RegressReport {
        family: family.as_str(),
        terms,
        coef: fit.coef,
        se: fit.se,
        n: fit.n,
        clusters: fit.clusters,
        dropped: data.dropped,
        converged: fit.converged,
    })
}
