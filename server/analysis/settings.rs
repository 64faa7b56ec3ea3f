//! The one set of analysis settings, read from a URL query string or from command-line
//! flags, so that a link or a script reproduces a view exactly.

use serde::{Deserialize, Serialize};

pub use crate::stats::binary::ModelKind;

/// How participants are weighted to stand for the eligible universe.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum WeightingKind {
    InverseProbability,
    CovariateBalancing,
    CovariateBalancingGmm,
    Entropy,
    Raking,
}

impl WeightingKind {
    pub const ALL: [WeightingKind; 5] = [
        WeightingKind::InverseProbability,
        WeightingKind::CovariateBalancing,
        WeightingKind::CovariateBalancingGmm,
        WeightingKind::Entropy,
        WeightingKind::Raking,
    ];

    pub fn as_str(self) -> &'static str {
        match self {
            WeightingKind::InverseProbability => "inverse-probability",
            WeightingKind::CovariateBalancing => "covariate-balancing",
            WeightingKind::CovariateBalancingGmm => "covariate-balancing-gmm",
            WeightingKind::Entropy => "entropy",
            WeightingKind::Raking => "raking",
        }
    }

    pub fn label(self) -> &'static str {
        match self {
            WeightingKind::InverseProbability => "Inverse probability",
            WeightingKind::CovariateBalancing => "Covariate-balancing propensity (exact)",
            WeightingKind::CovariateBalancingGmm => "Covariate-balancing propensity (GMM)",
            WeightingKind::Entropy => "Entropy balancing",
            WeightingKind::Raking => "Raking to category shares",
        }
    }

    pub fn parse(s: &str) -> Option<WeightingKind> {
        WeightingKind::ALL.into_iter().find(|k| k.as_str() == s)
    }
}

/// What to do with countries that miss an indicator value.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum MissingRule {
    /// Drop them, listing every dropped country.
    CompleteCases,
    /// Fill with the median and add a missingness indicator per affected indicator.
    MedianFill,
    /// As `MedianFill`, and the weights also balance the missingness indicators (the
    /// missing-indicator approach for balancing weights).
    FillAndBalance,
}

impl MissingRule {
    pub fn as_str(self) -> &'static str {
        match self {
            MissingRule::CompleteCases => "complete-cases",
            MissingRule::MedianFill => "median-fill",
            MissingRule::FillAndBalance => "fill-and-balance",
        }
    }

    pub fn parse(s: &str) -> Option<MissingRule> {
        match s {
            "complete-cases" => Some(MissingRule::CompleteCases),
            "median-fill" => Some(MissingRule::MedianFill),
            "fill-and-balance" => Some(MissingRule::FillAndBalance),
            _ => None,
        }
    }
}

/// Every choice an analysis depends on.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Settings {
    pub wave: Option<i64>,
    pub model: ModelKind,
    pub weighting: WeightingKind,
    /// Numeric indicators; `None` means every numeric indicator of the project.
    pub covariates: Option<Vec<String>>,
    /// Categorical indicators; `None` means every categorical indicator of the project.
    pub factors: Option<Vec<String>>,
    /// Cap weights at this quantile of participants' weights (e.g. 0.95).
    pub trim: Option<f64>,
    pub missing: MissingRule,
    /// Entropy balancing also matches the universe's variances.
    pub match_variances: bool,
    pub seed: u64,
}

impl Default for Settings {
    fn default() -> Self {
        Settings {
            wave: None,
            model: ModelKind::Logit,
            weighting: WeightingKind::Entropy,
            covariates: None,
            factors: None,
            trim: None,
            missing: MissingRule::CompleteCases,
            match_variances: false,
            seed: 20_261_201,
        }
    }
}

#[derive(Debug, Clone, PartialEq, thiserror::Error)]
#[error("{0}")]
pub struct SettingsError(pub String);

impl Settings {
    /// Parses `key=value` pairs (from a query string or from flags). Unknown keys and bad
    /// values are errors that list what is allowed.
    pub fn from_pairs<'a>(
        pairs: impl IntoIterator<Item = (&'a str, &'a str)>,
    ) -> Result<Settings, SettingsError> {
        let mut s = Settings::default();
        for (key, value) in pairs {
            let value = value.trim();
            match key {
                "wave" => {
                    s.wave = Some(value.parse().map_err(|_| SettingsError(format!("wave must be a whole number, not '{value}'")))?);
                }
                "model" => {
                    s.model = ModelKind::parse(value).ok_or_else(|| SettingsError(format!("model must be logit, firth or probit, not '{value}'")))?;
                }
                "weighting" => {
                    s.weighting = WeightingKind::parse(value).ok_or_else(|| {
                        SettingsError(format!(
                            "weighting must be one of {}, not '{value}'",
                            WeightingKind::ALL.map(WeightingKind::as_str).join(", ")
                        ))
                    })?;
                }
                "covariates" => s.covariates = Some(split_list(value)),
                "factors" => s.factors = Some(split_list(value)),
                "trim" => {
                    if value.is_empty() || value == "none" {
                        s.trim = None;
                    } else {
                        let q: f64 = value.parse().map_err(|_| SettingsError(format!("trim must be a quantile such as 0.95, not '{value}'")))?;
                        if !(0.5..1.0).contains(&q) {
                            return Err(SettingsError(format!("trim must be a quantile between 0.5 and 1 (e.g. 0.95), not {q}")));
                        }
                        s.trim = Some(q);
                    }
                }
                "missing" => {
                    s.missing = MissingRule::parse(value).ok_or_else(|| SettingsError(format!("missing must be complete-cases, median-fill or fill-and-balance, not '{value}'")))?;
                }
                "variances" => s.match_variances = matches!(value, "1" | "true" | "yes" | "on"),
                "seed" => s.seed = value.parse().map_err(|_| SettingsError(format!("seed must be a whole number, not '{value}'")))?,
                other => {
                    return Err(SettingsError(format!(
                        "unknown setting '{other}'; the settings are wave, model, weighting, covariates, factors, trim, missing, variances, seed"
                    )))
                }
            }
        }
        Ok(s)
    }

    /// The settings as a query string (the inverse of [`Settings::from_pairs`]).
    pub fn to_query(&self) -> String {
        let mut parts = Vec::new();
        if let Some(w) = self.wave {
            parts.push(format!("wave={w}"));
        }
        parts.push(format!("model={}", self.model.as_str()));
        parts.push(format!("weighting={}", self.weighting.as_str()));
        if let Some(c) = &self.covariates {
            parts.push(format!("covariates={}", encode(&c.join(","))));
        }
        if let Some(f) = &self.factors {
            parts.push(format!("factors={}", encode(&f.join(","))));
        }
        if let Some(t) = self.trim {
            parts.push(format!("trim={t}"));
        }
        if self.missing != MissingRule::CompleteCases {
            parts.push(format!("missing={}", self.missing.as_str()));
        }
        if self.match_variances {
            parts.push("variances=1".to_string());
        }
        parts.push(format!("seed={}", self.seed));
        parts.join("&")
    }
}

fn split_list(value: &str) -> Vec<String> {
    value
        .split(',')
        .map(str::trim)
        .filter(|s| !s.is_empty())
        .map(str::to_string)
        .collect()
}

/// Percent-encodes the characters that matter in a query value.
fn encode(s: &str) -> String {
    s.bytes()
        .map(|b| match b {
            b'A'..=b'Z' | b'a'..=b'z' | b'0'..=b'9' | b'-' | b'_' | b'.' | b',' => {
                (b as char).to_string()
            }
            _ => format!("%{b:02X}"),
        })
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn round_trip_and_errors() {
        let s = Settings::from_pairs([
            ("wave", "2"),
            ("model", "probit"),
            ("weighting", "raking"),
            ("trim", "0.9"),
            ("covariates", "a, b"),
        ])
        .unwrap();
        assert_eq!(s.wave, Some(2));
        assert_eq!(s.covariates, Some(vec!["a".to_string(), "b".to_string()]));
        assert!(s.to_query().contains("weighting=raking"));
        assert!(Settings::from_pairs([("model", "tobit")])
            .unwrap_err()
            .0
            .contains("logit, firth or probit"));
        assert!(Settings::from_pairs([("colour", "red")]).is_err());
        assert!(Settings::from_pairs([("trim", "1.5")]).is_err());
    }
}
