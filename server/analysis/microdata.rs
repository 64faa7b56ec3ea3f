//! Respondent-level questions: pooled estimates and regressions, unweighted and under each
//! country weighting, with standard errors clustered by country.

use std::collections::HashMap;
use std::path::Path;

use ndarray::Array2;
use serde::Serialize;

use crate::project::table::clean_csv::{read_clean_csv, CleanRequest, Target};
use crate::project::table::{load_table, load_table_bytes, read_stable, ColumnKind, ColumnSpec};
use crate::project::Problem;
use crate::stats::regression::{self, Kind, TwoStepInput};

/// The result of `gapwise pooled`.
#[derive(Debug, Clone, Serialize)]
pub struct PooledReport {
    pub kind: Kind,
    /// Intercept first.
    pub terms: Vec<String>,
    pub coef: Vec<f64>,
    /// CR1 cluster-robust standard errors.
    pub se: Vec<f64>,
    /// Degrees of freedom of the t reference distribution: countries - 1 (Cameron & Miller
    /// 2015, section VI.C).
    pub df: usize,
    /// Two-sided p-values from t(G - 1); null where not estimable.
    pub p: Vec<Option<f64>>,
    pub ci95_low: Vec<Option<f64>>,
    pub ci95_high: Vec<Option<f64>>,
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
#[derive(Debug)]
pub struct RegressionData {
    pub x: Array2<f64>,
    pub y: Vec<f64>,
    pub weight: Option<Vec<f64>>,
    /// Cluster index of each row in `0..clusters.len()`.
    pub cluster: Vec<usize>,
    pub clusters: Vec<String>,
    pub dropped: usize,
}

/// Reads the needed columns of a CSV or Parquet file and keeps the complete rows. A clean
/// CSV (no missing values, nothing to report) is read in one quick pass straight into the
/// design matrix; any other file takes the careful read, which names each bad cell.
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
        ColumnSpec::new(cluster, ColumnKind::Text, "--country"),
    ];
    specs.extend(
        predictors
            .iter()
            .map(|p| ColumnSpec::new(p, ColumnKind::Number, "--predictors")),
    );
    if let Some(w) = weight {
        specs.push(ColumnSpec::new(w, ColumnKind::Number, "--design-weight"));
    }
    let bytes = read_stable(path, &label).map_err(|p| MicrodataError::Input(vec![p]))?;
    let is_parquet = path
        .extension()
        .is_some_and(|e| e.eq_ignore_ascii_case("parquet"));
    if !is_parquet {
        if let Some(data) = quick_regression_data(&bytes, outcome, predictors, cluster, weight) {
            return Ok(data);
        }
    }
    let table = load_table_bytes(path, bytes, &label, &specs).map_err(MicrodataError::Input)?;
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

/// A clean CSV's columns read straight into the design matrix (intercept first), the
/// outcome and the weights; `None` when the careful read is needed (a missing or bad
/// cell, a weight that is not positive: it names the row).
fn quick_regression_data(
    bytes: &[u8],
    outcome: &str,
    predictors: &[String],
    cluster: &str,
    weight: Option<&str>,
) -> Option<RegressionData> {
    let k = predictors.len() + 1;
    let mut numbers = vec![(
        outcome,
        Target {
            output: 1,
            column: 0,
        },
    )];
    numbers.extend(predictors.iter().enumerate().map(|(j, p)| {
        (
            p.as_str(),
            Target {
                output: 0,
                column: j + 1,
            },
        )
    }));
    if let Some(w) = weight {
        numbers.push((
            w,
            Target {
                output: 2,
                column: 0,
            },
        ));
    }
    let read = read_clean_csv(
        bytes,
        &CleanRequest {
            numbers,
            widths: vec![k, 1, usize::from(weight.is_some())],
            codes: Some(cluster),
        },
    )?;
    let mut outputs = read.outputs.into_iter();
    let x = Array2::from_shape_vec((read.rows, k), outputs.next()?).ok()?;
    let y = outputs.next()?;
    let weight = weight.and(outputs.next());
    if weight.as_ref().is_some_and(|w| w.iter().any(|v| *v <= 0.0)) {
        return None;
    }
    Some(RegressionData {
        x,
        y,
        weight,
        cluster: read.codes,
        clusters: read.levels,
        dropped: 0,
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
        format!("the outcome is {v}; a binomial outcome must be 0 or 1: recode it, or use --kind linear"),
    )]))
}

/// `gapwise pooled`: one pooled regression with CR1 standard errors and t(G - 1) inference.
pub fn pooled_file(
    path: &Path,
    outcome: &str,
    predictors: &[String],
    cluster: &str,
    weight: Option<&str>,
    kind: Kind,
) -> Result<PooledReport, MicrodataError> {
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
        kind,
    )
    .map_err(|e| match e {
        regression::RegressionError::NotBinary(_) => not_binary(path, outcome).unwrap_or(e.into()),
        e => e.into(),
    })?;
    let inference = regression::t_inference(&fit.coef, &fit.se, fit.clusters);
    let mut terms = vec!["intercept".to_string()];
    terms.extend(predictors.iter().cloned());
    Ok(PooledReport {
        kind,
        terms,
        coef: fit.coef,
        se: fit.se,
        df: inference.df,
        p: inference.p,
        ci95_low: inference.ci95_low,
        ci95_high: inference.ci95_high,
        n: fit.n,
        clusters: fit.clusters,
        dropped: data.dropped,
        converged: fit.converged,
    })
}

/// One equation of `gapwise two-step`'s result.
#[derive(Debug, Clone, Serialize)]
pub struct Equation {
    pub terms: Vec<String>,
    pub coef: Vec<f64>,
    pub se: Vec<f64>,
    /// Outcome equation only: least-squares standard errors that take the inverse Mills
    /// ratio as known (clustered when --country is given).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub se_uncorrected: Option<Vec<f64>>,
}

/// The result of `gapwise two-step`.
#[derive(Debug, Clone, Serialize)]
pub struct TwoStepReport {
    pub selection: Equation,
    /// `lambda` (the inverse Mills ratio) is the last term.
    pub outcome: Equation,
    /// lambda's coefficient over sigma (not truncated to [-1, 1]).
    pub rho: f64,
    pub sigma: f64,
    /// Rows in the selection equation, and of them selected with a complete outcome.
    pub n: usize,
    pub n_selected: usize,
    /// Countries (clusters), when --country is given.
    pub clusters: Option<usize>,
    /// "heckman-1979" without clusters, "murphy-topel-cluster" with them.
    pub standard_errors: &'static str,
    /// Rows left out for a missing value in a used column.
    pub dropped: usize,
    pub notes: Vec<String>,
}

/// Column names of `gapwise two-step`.
pub struct TwoStepColumns<'a> {
    pub outcome: &'a str,
    pub predictors: &'a [String],
    pub selected: &'a str,
    pub selection_predictors: &'a [String],
    pub country: Option<&'a str>,
}

/// `gapwise two-step`: the Heckman (1979) two-step estimator on a file with one row per
/// unit. Rows need the selection columns; selected rows also the outcome columns (a
/// selected row without them is left out and counted).
pub fn two_step_file(path: &Path, cols: &TwoStepColumns) -> Result<TwoStepReport, MicrodataError> {
    if cols.predictors.is_empty() || cols.selection_predictors.is_empty() {
        return Err(MicrodataError::Request(
            "name the outcome's predictors (--predictors a,b) and the selection's (--selection-predictors c,d)".to_string(),
        ));
    }
    let label = path.file_name().map_or_else(
        || path.display().to_string(),
        |n| n.to_string_lossy().to_string(),
    );
    let mut specs = vec![
        ColumnSpec::new(cols.outcome, ColumnKind::Number, "--outcome"),
        ColumnSpec::new(cols.selected, ColumnKind::Number, "--selected"),
    ];
    let mut seen: Vec<&str> = vec![cols.outcome, cols.selected];
    for (p, role) in cols.predictors.iter().map(|p| (p, "--predictors")).chain(
        cols.selection_predictors
            .iter()
            .map(|p| (p, "--selection-predictors")),
    ) {
        if !seen.contains(&p.as_str()) {
            seen.push(p);
            specs.push(ColumnSpec::new(p, ColumnKind::Number, role));
        }
    }
    if let Some(c) = cols.country {
        if seen.contains(&c) {
            return Err(MicrodataError::Request(format!(
                "'{c}' is the country column (--country) and also an outcome, flag or predictor; name a column that identifies countries"
            )));
        }
        specs.push(ColumnSpec::new(c, ColumnKind::Text, "--country"));
    }
    let table = load_table(path, &label, &specs).map_err(MicrodataError::Input)?;
    let y_all = table.numbers(cols.outcome);
    let s_all = table.numbers(cols.selected);
    let x_all: Vec<Vec<Option<f64>>> = cols.predictors.iter().map(|p| table.numbers(p)).collect();
    let z_all: Vec<Vec<Option<f64>>> = cols
        .selection_predictors
        .iter()
        .map(|p| table.numbers(p))
        .collect();
    let country = cols.country.map(|c| table.factorise(c));
    let n_all = y_all.len();
    let mut units = Vec::new();
    let mut selected = Vec::new();
    let mut outcome_rows = Vec::new();
    for i in 0..n_all {
        let Some(s) = s_all[i] else { continue };
        if s != 0.0 && s != 1.0 {
            return Err(MicrodataError::Input(vec![Problem::at(
                &label,
                Some(table.row_number(i)),
                Some(cols.selected),
                format!("the selection flag must be 0 or 1; found {s}"),
            )]));
        }
        if z_all.iter().any(|c| c[i].is_none())
            || country
                .as_ref()
                .is_some_and(|(codes, _)| codes[i].is_none())
        {
            continue;
        }
        let chosen = s == 1.0;
        if chosen && (y_all[i].is_none() || x_all.iter().any(|c| c[i].is_none())) {
            continue;
        }
        if chosen {
            outcome_rows.push((i, units.len()));
        }
        units.push(i);
        selected.push(chosen);
    }
    let n = units.len();
    let mut z = Array2::<f64>::ones((n, cols.selection_predictors.len() + 1));
    for (r, &i) in units.iter().enumerate() {
        for (j, c) in z_all.iter().enumerate() {
            z[[r, j + 1]] = c[i].unwrap_or(0.0);
        }
    }
    let mut x = Array2::<f64>::ones((outcome_rows.len(), cols.predictors.len() + 1));
    for (r, &(i, _)) in outcome_rows.iter().enumerate() {
        for (j, c) in x_all.iter().enumerate() {
            x[[r, j + 1]] = c[i].unwrap_or(0.0);
        }
    }
    let y: Vec<f64> = outcome_rows
        .iter()
        .map(|&(i, _)| y_all[i].unwrap_or(0.0))
        .collect();
    let unit: Vec<usize> = outcome_rows.iter().map(|&(_, u)| u).collect();
    let cluster: Option<Vec<usize>> = country.as_ref().map(|(codes, _)| {
        let mut renumber: HashMap<usize, usize> = HashMap::new();
        units
            .iter()
            .map(|&i| {
                let next = renumber.len();
                *renumber.entry(codes[i].unwrap_or(0)).or_insert(next)
            })
            .collect()
    });
    let fit = regression::heckman_two_step(&TwoStepInput {
        z: z.view(),
        selected: &selected,
        x: x.view(),
        y: &y,
        w: None,
        unit: &unit,
        cluster: cluster.as_deref(),
        probit: None,
    })?;
    let mut selection_terms = vec!["intercept".to_string()];
    selection_terms.extend(cols.selection_predictors.iter().cloned());
    let mut outcome_terms = vec!["intercept".to_string()];
    outcome_terms.extend(cols.predictors.iter().cloned());
    outcome_terms.push("lambda".to_string());
    let mut notes = Vec::new();
    if cols
        .selection_predictors
        .iter()
        .all(|c| cols.predictors.contains(c))
    {
        notes.push("Every selection predictor is also in the outcome equation: the correction is identified only by the probit's functional form, and its estimates can be fragile.".to_string());
    }
    Ok(TwoStepReport {
        selection: Equation {
            terms: selection_terms,
            coef: fit.selection_coef,
            se: fit.selection_se,
            se_uncorrected: None,
        },
        outcome: Equation {
            terms: outcome_terms,
            coef: fit.coef,
            se: fit.se,
            se_uncorrected: Some(fit.se_uncorrected),
        },
        rho: fit.rho,
        sigma: fit.sigma,
        n: fit.n,
        n_selected: fit.n_selected,
        clusters: fit.clusters,
        standard_errors: if fit.clusters.is_some() {
            "murphy-topel-cluster"
        } else {
            "heckman-1979"
        },
        dropped: n_all - n,
        notes,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    fn write(name: &str, text: &str) -> std::path::PathBuf {
        let dir = std::env::temp_dir().join(format!("gapwise-micro-{}", std::process::id()));
        std::fs::create_dir_all(&dir).unwrap();
        let path = dir.join(name);
        std::fs::write(&path, text).unwrap();
        path
    }

    fn read(path: &Path) -> Result<RegressionData, MicrodataError> {
        let predictors = vec!["a".to_string(), "b".to_string()];
        read_regression_file(path, "y", &predictors, "c", Some("w"))
    }

    #[test]
    fn quick_and_careful_reads_agree() {
        // Common practice: the same cells read by the quick pass and (forced by quoting a
        // header name) by the careful read give the same matrix, weights and clusters.
        let rows = "XB,1.5,-2,1,0.75,t\nXA,0.25,3,0,1.25,u\nXB,7,0.1,1,2,v\nXC,123456789.0123456789,-0,0,0.5,w\n";
        let clean = read(&write("clean.csv", &format!("c,a,b,y,w,note\n{rows}"))).unwrap();
        let quoted = read(&write("quoted.csv", &format!("c,a,b,y,w,\"note\"\n{rows}"))).unwrap();
        let predictors = vec!["a".to_string(), "b".to_string()];
        let quick = |text: String| {
            quick_regression_data(text.as_bytes(), "y", &predictors, "c", Some("w")).is_some()
        };
        assert!(
            quick(format!("c,a,b,y,w,note\n{rows}")),
            "the clean file takes the quick pass"
        );
        assert!(!quick(format!("c,a,b,y,w,\"note\"\n{rows}")));
        assert_eq!(clean.x.dim(), (4, 3));
        assert_eq!(clean.x, quoted.x);
        assert_eq!(clean.x.row(0).to_vec(), vec![1.0, 1.5, -2.0]);
        assert_eq!(clean.y, quoted.y);
        assert_eq!(clean.weight, quoted.weight);
        assert_eq!(clean.cluster, vec![0, 1, 0, 2]);
        assert_eq!(clean.cluster, quoted.cluster);
        assert_eq!(clean.clusters, quoted.clusters);
        assert_eq!((clean.dropped, quoted.dropped), (0, 0));
    }

    #[test]
    fn problems_found_after_the_quick_pass_keep_their_row_and_column() {
        let zero = read(&write("zero.csv", "c,a,b,y,w\nXA,1,2,1,1\nXB,1,2,0,0\n")).unwrap_err();
        assert!(zero.to_string().starts_with("zero.csv:3:w:"), "{zero}");
        let text = read(&write("text.csv", "c,a,b,y,w\nXA,1,2,1,1\nXB,1,many,0,1\n")).unwrap_err();
        assert!(text.to_string().starts_with("text.csv:3:b:"), "{text}");
        let missing = read(&write(
            "missing.csv",
            "c,a,b,y,w\nXA,1,2,1,1\nXB,NA,2,0,1\nXA,3,1,0,1\n",
        ))
        .unwrap();
        assert_eq!((missing.x.nrows(), missing.dropped), (2, 1));
    }
}
