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
    if let Some(data) = dense_regression_data(&table, outcome, predictors, cluster, weight) {
        return data.map_err(|(row, message)| {
            MicrodataError::Input(vec![Problem::at(
                &label,
                Some(table.row_number(row)),
                weight,
                message,
            )])
        });
    }
    let y_all = table.numbers(outcome);
    let x_all: Vec<Vec<Option<f64>>> = predictors.iter().map(|p| table.numbers(p)).collect();
    let w_all = weight.map(|w| table.numbers(w));
    let (c_all, clusters_found) = table.factorise(cluster);
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
    // Renumber the clusters that remain after dropping incomplete rows.
    let mut renumber: HashMap<usize, usize> = HashMap::new();
    let mut clusters = Vec::new();
    let cluster_of: Vec<usize> = keep
        .iter()
        .map(|&i| {
            let c = c_all[i].unwrap_or(0);
            *renumber.entry(c).or_insert_with(|| {
                clusters.push(clusters_found[c].clone());
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

/// The common case of millions of complete rows: copy whole columns, no per-cell checks.
/// `None` when some used column has a missing value (the general path handles it).
fn dense_regression_data(
    table: &crate::project::Table,
    outcome: &str,
    predictors: &[String],
    cluster: &str,
    weight: Option<&str>,
) -> Option<Result<RegressionData, (usize, String)>> {
    let y = table.dense_numbers(outcome)?;
    let columns: Vec<Vec<f64>> = predictors
        .iter()
        .map(|p| table.dense_numbers(p))
        .collect::<Option<_>>()?;
    let weight = match weight {
        Some(w) => Some(table.dense_numbers(w)?),
        None => None,
    };
    let (codes, clusters) = table.factorise(cluster);
    let cluster: Vec<usize> = codes.into_iter().collect::<Option<_>>()?;
    if let Some(w) = &weight {
        if let Some(i) = w.iter().position(|v| *v <= 0.0) {
            return Some(Err((
                i,
                "the weight is zero or negative; weights must be positive".to_string(),
            )));
        }
    }
    let n = y.len();
    let k = predictors.len() + 1;
    let mut flat = vec![1.0; n * k];
    for (j, col) in columns.iter().enumerate() {
        for (i, v) in col.iter().enumerate() {
            flat[i * k + j + 1] = *v;
        }
    }
    let x = Array2::from_shape_vec((n, k), flat).ok()?;
    Some(Ok(RegressionData {
        x,
        y,
        weight,
        cluster,
        clusters,
        dropped: 0,
    }))
}

/// `gapwise regress`: one pooled regression with CR1 standard errors.
/// The first outcome that is neither 0 nor 1, with its file, row and column (read again:
/// this runs only when the model refused the outcome).
fn not_binary(path: &Path, outcome: &str) -> Option<MicrodataError> {
    let label = path.file_name()?.to_string_lossy().to_string();
    let spec = ColumnSpec::new(outcome, ColumnKind::Number, "--outcome");
    let table = load_table(path, &label, &[spec]).ok()?;
    let values = table.numbers(outcome);
    let (i, v) = values
        .iter()
        .enumerate()
        .find_map(|(i, v)| v.filter(|v| *v != 0.0 && *v != 1.0).map(|v| (i, v)))?;
    Some(MicrodataError::Input(vec![Problem::at(
        &label,
        Some(table.row_number(i)),
        Some(outcome),
        format!("the outcome is {v}; a binomial outcome must be 0 or 1: recode it, or use --family gaussian"),
    )]))
}

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
    )
    .map_err(|e| match e {
        regression::RegressionError::NotBinary(_) => not_binary(path, outcome).unwrap_or(e.into()),
        e => e.into(),
    })?;
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
