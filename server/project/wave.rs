//! One wave's eligible universe as plain vectors: the seam between loading and analysis.

use serde::Serialize;

use super::Project;

/// A numeric indicator over the wave's eligible countries.
#[derive(Debug, Clone, Serialize)]
pub struct NumericIndicator {
    pub column: String,
    pub label: String,
    pub values: Vec<Option<f64>>,
}

/// A categorical indicator: levels (reference first) and each country's level index.
#[derive(Debug, Clone, Serialize)]
pub struct CategoricalIndicator {
    pub column: String,
    pub label: String,
    pub levels: Vec<String>,
    pub values: Vec<Option<usize>>,
}

/// The eligible countries of one wave, aligned by position in every vector.
#[derive(Debug, Clone, Serialize)]
pub struct WaveView {
    pub wave: i64,
    /// Frame row of each country.
    pub rows: Vec<usize>,
    pub codes: Vec<String>,
    pub names: Vec<String>,
    pub participated: Vec<bool>,
    pub numeric: Vec<NumericIndicator>,
    pub categorical: Vec<CategoricalIndicator>,
    /// Index into `categorical` of the grouping indicator (usually region).
    pub group: Option<usize>,
    /// Recruitment cost and feasibility, with the columns they came from.
    pub cost: Option<Vec<Option<f64>>>,
    pub cost_column: Option<String>,
    pub feasibility: Option<Vec<Option<f64>>>,
    pub feasibility_column: Option<String>,
    /// Support on offer: its cost and the chance of joining with it (both columns or none).
    pub support: Option<SupportColumns>,
}

/// What supporting a country costs and what it does to its chance of joining.
#[derive(Debug, Clone, Serialize)]
pub struct SupportColumns {
    pub cost_column: String,
    pub chance_column: String,
    pub cost: Vec<Option<f64>>,
    pub chance: Vec<Option<f64>>,
}

impl WaveView {
    /// `None` when the project has no such wave.
    pub fn new(project: &Project, wave: i64) -> Option<WaveView> {
        if !project.waves.contains(&wave) {
            return None;
        }
        let m = &project.manifest;
        let row_waves = project.row_waves();
        let rows: Vec<usize> = (0..row_waves.len())
            .filter(|&i| {
                row_waves[i] == wave
                    && project
                        .eligibility
                        .eligible
                        .get(i)
                        .copied()
                        .unwrap_or(false)
            })
            .collect();
        // `get`, not indexing: a column the load did not type comes back empty, and a wave
        // view must then show missing values rather than panic (the load refuses such
        // manifests; this keeps every page alive should one slip through).
        let pick = |all: Vec<Option<f64>>| {
            rows.iter()
                .map(|&i| all.get(i).copied().flatten())
                .collect::<Vec<_>>()
        };
        let codes = project.codes();
        let names = project.names();
        let participated = project.participated();
        let numeric = m
            .indicators
            .numeric
            .iter()
            .map(|c| NumericIndicator {
                column: c.clone(),
                label: m.label(c).to_string(),
                values: pick(project.frame.numbers(c)),
            })
            .collect();
        let categorical: Vec<CategoricalIndicator> = m
            .indicators
            .categorical
            .iter()
            .map(|c| {
                let all = project.frame.texts(c);
                let levels = levels(&all, m.indicators.reference.get(c).map(String::as_str));
                let values = rows
                    .iter()
                    .map(|&i| {
                        all.get(i)
                            .and_then(Option::as_ref)
                            .and_then(|v| levels.iter().position(|l| l == v))
                    })
                    .collect();
                CategoricalIndicator {
                    column: c.clone(),
                    label: m.label(c).to_string(),
                    levels,
                    values,
                }
            })
            .collect();
        let group = m
            .group_column()
            .and_then(|g| categorical.iter().position(|c| c.column == g));
        Some(WaveView {
            wave,
            codes: rows
                .iter()
                .map(|&i| codes.get(i).cloned().unwrap_or_default())
                .collect(),
            names: rows
                .iter()
                .map(|&i| names.get(i).cloned().unwrap_or_default())
                .collect(),
            participated: rows
                .iter()
                .map(|&i| participated.get(i).copied().unwrap_or(false))
                .collect(),
            numeric,
            categorical,
            group,
            cost: m
                .recruitment
                .cost
                .as_ref()
                .map(|c| pick(project.frame.numbers(c))),
            cost_column: m.recruitment.cost.clone(),
            feasibility_column: m.recruitment.feasibility.clone(),
            feasibility: m
                .recruitment
                .feasibility
                .as_ref()
                .map(|c| pick(project.frame.numbers(c))),
            support: match (&m.recruitment.support_cost, &m.recruitment.support_chance) {
                (Some(cost), Some(chance)) => Some(SupportColumns {
                    cost_column: cost.clone(),
                    chance_column: chance.clone(),
                    cost: pick(project.frame.numbers(cost)),
                    chance: pick(project.frame.numbers(chance)),
                }),
                _ => None,
            },
            rows,
        })
    }

    pub fn len(&self) -> usize {
        self.rows.len()
    }

    pub fn is_empty(&self) -> bool {
        self.rows.is_empty()
    }

    pub fn n_participants(&self) -> usize {
        self.participated.iter().filter(|&&p| p).count()
    }
}

/// Distinct levels in sorted order, the reference level (when given and present) first.
pub fn levels(values: &[Option<String>], reference: Option<&str>) -> Vec<String> {
    let mut levels: Vec<String> = values.iter().flatten().cloned().collect();
    levels.sort();
    levels.dedup();
    if let Some(r) = reference {
        if let Some(pos) = levels.iter().position(|l| l == r) {
            let level = levels.remove(pos);
            levels.insert(0, level);
        }
    }
    levels
}

impl WaveView {
    /// A universe read from a bare CSV or Parquet file in which every row is an eligible
    /// unit: `id` names the units, `flag` says who took part (1/0).
    pub fn from_file(
        path: &std::path::Path,
        id: &str,
        flag: &str,
        covariates: &[String],
        factors: &[String],
        extra: &ExtraColumns,
    ) -> Result<WaveView, Vec<super::Problem>> {
        use super::table::{load_table, ColumnKind, ColumnSpec};
        let label = path.file_name().map_or_else(
            || path.display().to_string(),
            |n| n.to_string_lossy().to_string(),
        );
        let mut specs = vec![
            ColumnSpec::new(id, ColumnKind::RequiredText, "--id"),
            ColumnSpec::new(flag, ColumnKind::Flag, "--flag"),
        ];
        specs.extend(
            covariates
                .iter()
                .map(|c| ColumnSpec::new(c, ColumnKind::Number, "--covariates")),
        );
        specs.extend(
            factors
                .iter()
                .map(|f| ColumnSpec::new(f, ColumnKind::Text, "--categorical")),
        );
        if let Some(c) = &extra.cost {
            specs.push(ColumnSpec::new(c, ColumnKind::Number, "--cost-column"));
        }
        if let Some(c) = &extra.feasibility {
            specs.push(ColumnSpec::new(c, ColumnKind::Number, "--feasibility"));
        }
        if let Some((cost, chance)) = &extra.support {
            specs.push(ColumnSpec::new(cost, ColumnKind::Number, "--support-cost"));
            specs.push(ColumnSpec::new(
                chance,
                ColumnKind::Number,
                "--support-chance",
            ));
        }
        let table = load_table(path, &label, &specs)?;
        let codes: Vec<String> = table
            .texts(id)
            .into_iter()
            .map(Option::unwrap_or_default)
            .collect();
        let mut seen = std::collections::HashMap::new();
        let mut problems = Vec::new();
        for (i, c) in codes.iter().enumerate() {
            if let Some(first) = seen.insert(c.clone(), i) {
                problems.push(super::Problem::at(
                    &label,
                    Some(table.row_number(i)),
                    Some(id),
                    format!(
                        "{c} appears twice (also on row {}); give every unit one row",
                        table.row_number(first)
                    ),
                ));
            }
        }
        if !problems.is_empty() {
            return Err(problems);
        }
        let n = codes.len();
        Ok(WaveView {
            wave: 0,
            rows: (0..n).collect(),
            names: codes.clone(),
            codes,
            participated: table
                .integers(flag)
                .into_iter()
                .map(|f| f == Some(1))
                .collect(),
            numeric: covariates
                .iter()
                .map(|c| NumericIndicator {
                    column: c.clone(),
                    label: c.clone(),
                    values: table.numbers(c),
                })
                .collect(),
            categorical: factors
                .iter()
                .map(|f| {
                    let all = table.texts(f);
                    let levels = levels(&all, None);
                    let values = all
                        .iter()
                        .map(|v| v.as_ref().and_then(|v| levels.iter().position(|l| l == v)))
                        .collect();
                    CategoricalIndicator {
                        column: f.clone(),
                        label: f.clone(),
                        levels,
                        values,
                    }
                })
                .collect(),
            group: None,
            cost: extra.cost.as_ref().map(|c| table.numbers(c)),
            cost_column: extra.cost.clone(),
            feasibility: extra.feasibility.as_ref().map(|c| table.numbers(c)),
            feasibility_column: extra.feasibility.clone(),
            support: extra.support.as_ref().map(|(cost, chance)| SupportColumns {
                cost_column: cost.clone(),
                chance_column: chance.clone(),
                cost: table.numbers(cost),
                chance: table.numbers(chance),
            }),
        })
    }
}

/// Optional recruitment columns of a bare frame file.
#[derive(Debug, Clone, Default)]
pub struct ExtraColumns {
    pub cost: Option<String>,
    pub feasibility: Option<String>,
    /// Support's cost column and chance-of-joining-with-support column.
    pub support: Option<(String, String)>,
}
