//! From a wave view and the settings to the numbers the estimators take: the design
//! matrix (intercept, numeric indicators, dummies), the balance columns, the margins.

use ndarray::Array2;
use serde::Serialize;

use super::settings::{MissingRule, Settings};
use crate::project::manifest::PopulationScale;
use crate::project::WaveView;
use crate::stats::describe;

/// A column whose balance is checked: a numeric indicator or one level of a category.
#[derive(Debug, Clone, Serialize)]
pub struct BalanceColumn {
    /// Column name, or `factor=level`.
    pub name: String,
    pub label: String,
    pub values: Vec<f64>,
    /// A 0/1 level indicator (SMD uses sqrt(p(1-p)) of the universe).
    pub is_level: bool,
}

/// A categorical indicator as level codes (for raking and coverage).
#[derive(Debug, Clone, Serialize)]
pub struct Margin {
    pub name: String,
    pub levels: Vec<String>,
    pub codes: Vec<usize>,
}

/// Everything the estimators need for one wave's analysis universe.
#[derive(Debug, Clone)]
pub struct Design {
    /// Term names, intercept first.
    pub terms: Vec<String>,
    /// Readable labels of the terms, in the same order (the manifest's labels, or labels
    /// derived from the column names), for everything a person reads.
    pub term_labels: Vec<String>,
    /// Design matrix on the original scale, intercept column first.
    pub x: Array2<f64>,
    pub participated: Vec<bool>,
    pub ids: Vec<String>,
    pub names: Vec<String>,
    /// Index into the wave view of each analysed unit.
    pub units: Vec<usize>,
    /// Countries left out for a missing value: "CODE (indicator labels)".
    pub dropped: Vec<String>,
    /// Whether each country in `dropped` took part.
    pub dropped_took_part: Vec<bool>,
    /// Indicators filled with the median: (indicator's readable label, count, median).
    pub filled: Vec<(String, usize, f64)>,
    pub balance: Vec<BalanceColumn>,
    pub margins: Vec<Margin>,
    /// Column means and standard deviations used to standardise (intercept: 0 and 1).
    pub centre: Vec<f64>,
    pub scale: Vec<f64>,
}

#[derive(Debug, Clone, PartialEq, thiserror::Error)]
#[error("{0}")]
pub struct DesignError(pub String);

pub const INTERCEPT: &str = "intercept";

/// The positions in `view.numeric` of the settings' covariates (every numeric indicator
/// when none are named); the first name that is not a numeric indicator as the error.
pub fn covariate_positions<'a>(
    view: &WaveView,
    settings: &'a Settings,
) -> Result<Vec<usize>, &'a str> {
    match &settings.covariates {
        None => Ok((0..view.numeric.len()).collect()),
        Some(names) => names
            .iter()
            .map(|n| {
                view.numeric
                    .iter()
                    .position(|c| &c.column == n)
                    .ok_or(n.as_str())
            })
            .collect(),
    }
}

/// Builds the design for the settings' covariates and factors.
pub fn build(view: &WaveView, settings: &Settings) -> Result<Design, DesignError> {
    let covariates = covariate_positions(view, settings).map_err(|n| {
        DesignError(format!(
            "'{n}' is not a numeric indicator; the numeric indicators are: {}",
            view.numeric
                .iter()
                .map(|c| c.column.as_str())
                .collect::<Vec<_>>()
                .join(", ")
        ))
    })?;
    let factors: Vec<usize> = match &settings.factors {
        None => (0..view.categorical.len()).collect(),
        Some(names) => names
            .iter()
            .map(|n| {
                view.categorical.iter().position(|c| &c.column == n).ok_or_else(|| {
                    DesignError(format!(
                        "'{n}' is not a categorical indicator; the categorical indicators are: {}",
                        view.categorical.iter().map(|c| c.column.as_str()).collect::<Vec<_>>().join(", ")
                    ))
                })
            })
            .collect::<Result<_, _>>()?,
    };
    if covariates.is_empty() && factors.is_empty() {
        return Err(DesignError(
            "choose at least one indicator for the participation model".to_string(),
        ));
    }

    // Which units stay, and how missing values are handled.
    let mut units: Vec<usize> = Vec::new();
    let mut dropped = Vec::new();
    let mut dropped_took_part = Vec::new();
    let keep_incomplete = matches!(
        settings.missing,
        MissingRule::MedianFill | MissingRule::FillAndBalance
    );
    for i in 0..view.len() {
        let missing: Vec<&str> = covariates
            .iter()
            .filter(|&&c| view.numeric[c].values[i].is_none())
            .map(|&c| view.numeric[c].label.as_str())
            .chain(
                factors
                    .iter()
                    .filter(|&&f| view.categorical[f].values[i].is_none())
                    .map(|&f| view.categorical[f].label.as_str()),
            )
            .collect();
        if missing.is_empty() || keep_incomplete {
            units.push(i);
        } else {
            dropped.push(format!("{} ({})", view.codes[i], missing.join(", ")));
            dropped_took_part.push(view.participated[i]);
        }
    }
    let n = units.len();

    let mut terms = vec![INTERCEPT.to_string()];
    let mut term_labels = vec!["Intercept".to_string()];
    let mut columns: Vec<Vec<f64>> = vec![vec![1.0; n]];
    let mut balance = Vec::new();
    let mut filled = Vec::new();
    let mut missing_dummies = Vec::new();
    for &c in &covariates {
        let ind = &view.numeric[c];
        let raw: Vec<Option<f64>> = units.iter().map(|&i| ind.values[i]).collect();
        let present: Vec<f64> = raw.iter().flatten().copied().collect();
        let n_missing = n - present.len();
        let values: Vec<f64> = if n_missing > 0 {
            let median = describe::median(&present).ok_or_else(|| {
                DesignError(format!("'{}' has no values in this wave", ind.column))
            })?;
            filled.push((ind.label.clone(), n_missing, median));
            missing_dummies.push((
                format!("{} missing", ind.column),
                format!("{} missing (share of countries)", ind.label),
                raw.iter()
                    .map(|v| f64::from(u8::from(v.is_none())))
                    .collect::<Vec<_>>(),
            ));
            raw.iter().map(|v| v.unwrap_or(median)).collect()
        } else {
            present
        };
        terms.push(ind.column.clone());
        term_labels.push(ind.label.clone());
        columns.push(values.clone());
        balance.push(BalanceColumn {
            name: ind.column.clone(),
            label: ind.label.clone(),
            values,
            is_level: false,
        });
    }
    let mut margins = Vec::new();
    for &f in &factors {
        let cat = &view.categorical[f];
        let mut levels = cat.levels.clone();
        let missing_level = units.iter().any(|&i| cat.values[i].is_none());
        if missing_level {
            levels.push("(missing)".to_string());
        }
        let codes: Vec<usize> = units
            .iter()
            .map(|&i| cat.values[i].unwrap_or(levels.len() - 1))
            .collect();
        // Keep only the levels present among the analysed units; the first present is the reference.
        let present: Vec<usize> = (0..levels.len()).filter(|l| codes.contains(l)).collect();
        for (k, &l) in present.iter().enumerate() {
            let indicator: Vec<f64> = codes.iter().map(|&c| f64::from(u8::from(c == l))).collect();
            let name = format!("{}={}", cat.column, levels[l]);
            let label = format!("{}: {}", cat.label, levels[l]);
            if k > 0 {
                terms.push(name.clone());
                term_labels.push(label.clone());
                columns.push(indicator.clone());
            }
            balance.push(BalanceColumn {
                name,
                label,
                values: indicator,
                is_level: true,
            });
        }
        let remap: Vec<usize> = codes
            .iter()
            .map(|c| present.iter().position(|p| p == c).unwrap_or(0))
            .collect();
        margins.push(Margin {
            name: cat.column.clone(),
            levels: present.iter().map(|&l| levels[l].clone()).collect(),
            codes: remap,
        });
    }
    for (name, label, values) in missing_dummies {
        if settings.missing == MissingRule::FillAndBalance {
            balance.push(BalanceColumn {
                name: name.clone(),
                label: label.clone(),
                values: values.clone(),
                is_level: true,
            });
        }
        terms.push(name);
        term_labels.push(label);
        columns.push(values);
    }

    let k = columns.len();
    let mut x = Array2::<f64>::zeros((n, k));
    let mut centre = vec![0.0; k];
    let mut scale = vec![1.0; k];
    for (j, col) in columns.iter().enumerate() {
        for (i, &v) in col.iter().enumerate() {
            x[[i, j]] = v;
        }
        if j > 0 {
            let mean = col.iter().sum::<f64>() / n.max(1) as f64;
            let sd = (col.iter().map(|v| (v - mean).powi(2)).sum::<f64>() / (n.max(2) - 1) as f64)
                .sqrt();
            if sd == 0.0 || !sd.is_finite() {
                return Err(DesignError(format!(
                    "'{}' takes a single value among the {n} countr{} analysed in this wave, so it cannot explain participation; leave it out",
                    term_labels[j],
                    if n == 1 { "y" } else { "ies" }
                )));
            }
            centre[j] = mean;
            scale[j] = sd;
        }
    }
    Ok(Design {
        terms,
        term_labels,
        x,
        participated: units.iter().map(|&i| view.participated[i]).collect(),
        ids: units.iter().map(|&i| view.codes[i].clone()).collect(),
        names: units.iter().map(|&i| view.names[i].clone()).collect(),
        units,
        dropped,
        dropped_took_part,
        filled,
        balance,
        margins,
        centre,
        scale,
    })
}

impl Design {
    pub fn n(&self) -> usize {
        self.ids.len()
    }

    pub fn n_participants(&self) -> usize {
        self.participated.iter().filter(|&&p| p).count()
    }

    /// The design with every non-intercept column standardised (mean 0, sd 1).
    pub fn standardised(&self) -> Array2<f64> {
        let mut z = self.x.clone();
        for j in 1..z.ncols() {
            let (m, s) = (self.centre[j], self.scale[j]);
            z.column_mut(j).mapv_inplace(|v| (v - m) / s);
        }
        z
    }

    /// Each unit's number of people from the numeric country indicator `column`, read on
    /// `scale` (NaN where the unit has no value): the base weights of countries that count
    /// by population. Whether a missing or non-positive value matters is the caller's to
    /// say (the impact page leaves out what needs it, the bounds refuse).
    pub fn people(
        &self,
        view: &WaveView,
        column: &str,
        scale: PopulationScale,
    ) -> Result<Vec<f64>, DesignError> {
        let indicator = view
            .numeric
            .iter()
            .find(|n| n.column == column)
            .ok_or_else(|| DesignError(format!("'{column}' is not a numeric country indicator")))?;
        Ok(self
            .units
            .iter()
            .map(|&u| indicator.values[u].map_or(f64::NAN, |v| scale.people(v)))
            .collect())
    }
}

impl Design {
    /// The design restricted to (or resampled as) the given units, in that order; the
    /// standardisation constants stay those of the full design.
    pub fn subset(&self, rows: &[usize]) -> Design {
        let pick_f = |v: &Vec<f64>| rows.iter().map(|&i| v[i]).collect::<Vec<_>>();
        Design {
            terms: self.terms.clone(),
            term_labels: self.term_labels.clone(),
            x: self.x.select(ndarray::Axis(0), rows),
            participated: rows.iter().map(|&i| self.participated[i]).collect(),
            ids: rows.iter().map(|&i| self.ids[i].clone()).collect(),
            names: rows.iter().map(|&i| self.names[i].clone()).collect(),
            units: rows.iter().map(|&i| self.units[i]).collect(),
            dropped: self.dropped.clone(),
            dropped_took_part: self.dropped_took_part.clone(),
            filled: self.filled.clone(),
            balance: self
                .balance
                .iter()
                .map(|b| BalanceColumn {
                    name: b.name.clone(),
                    label: b.label.clone(),
                    values: pick_f(&b.values),
                    is_level: b.is_level,
                })
                .collect(),
            margins: self
                .margins
                .iter()
                .map(|m| Margin {
                    name: m.name.clone(),
                    levels: m.levels.clone(),
                    codes: rows.iter().map(|&i| m.codes[i]).collect(),
                })
                .collect(),
            centre: self.centre.clone(),
            scale: self.scale.clone(),
        }
    }
}
