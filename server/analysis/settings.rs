//! The one set of analysis settings, read from a URL query string or from command-line
//! flags, so that a link or a script reproduces a view exactly.

use serde::{Deserialize, Serialize};

pub use crate::stats::binary::ModelKind;

/// How a participation model is named on every page, chart, report and export note (the
/// one place, so that pages never write the same model two ways).
pub fn model_label(kind: ModelKind) -> &'static str {
    match kind {
        ModelKind::Logit => "Logit",
        ModelKind::Firth => "Logit, Firth-penalised",
        ModelKind::Probit => "Probit",
    }
}

/// [`model_label`] for a model named as in settings and results (`logit`, `firth`,
/// `probit`); other names are returned as they are.
pub fn model_label_of(name: &str) -> &str {
    match ModelKind::parse(name) {
        Some(kind) => model_label(kind),
        None => name,
    }
}

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
            WeightingKind::CovariateBalancing => "Covariate-balancing propensity, just-identified",
            WeightingKind::CovariateBalancingGmm => {
                "Covariate-balancing propensity, over-identified (GMM)"
            }
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
    /// Fill each gap several times by chained equations (`imputations` completed frames),
    /// run the analysis on each and combine by Rubin's rules (analysis::imputed).
    Impute,
}

impl MissingRule {
    pub fn as_str(self) -> &'static str {
        match self {
            MissingRule::CompleteCases => "complete-cases",
            MissingRule::MedianFill => "median-fill",
            MissingRule::FillAndBalance => "fill-and-balance",
            MissingRule::Impute => "impute",
        }
    }

    pub fn parse(s: &str) -> Option<MissingRule> {
        match s {
            "complete-cases" => Some(MissingRule::CompleteCases),
            "median-fill" => Some(MissingRule::MedianFill),
            "fill-and-balance" => Some(MissingRule::FillAndBalance),
            "impute" => Some(MissingRule::Impute),
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
    /// Completed frames under `MissingRule::Impute` (M; its seed is `seed`).
    pub imputations: usize,
}

/// The default number of imputations M.
pub const DEFAULT_IMPUTATIONS: usize = 20;
/// The most imputations a request may ask for.
pub const MAX_IMPUTATIONS: usize = 200;

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
            imputations: DEFAULT_IMPUTATIONS,
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
                    s.missing = MissingRule::parse(value).ok_or_else(|| SettingsError(format!("missing must be complete-cases, median-fill, fill-and-balance or impute, not '{value}'")))?;
                }
                "variances" => s.match_variances = matches!(value, "1" | "true" | "yes" | "on"),
                "imputations" => {
                    let m: usize = value.parse().map_err(|_| SettingsError(format!("imputations must be a whole number such as 20, not '{value}'")))?;
                    if !(2..=MAX_IMPUTATIONS).contains(&m) {
                        return Err(SettingsError(format!("imputations must be between 2 and {MAX_IMPUTATIONS}, not {m}")));
                    }
                    s.imputations = m;
                }
                "seed" => s.seed = value.parse().map_err(|_| SettingsError(format!("seed must be a whole number, not '{value}'")))?,
                other => {
                    return Err(SettingsError(format!(
                        "unknown setting '{other}'; the settings are wave, model, weighting, covariates, factors, trim, missing, imputations, variances, seed"
                    )))
                }
            }
        }
        Ok(s)
    }

    /// The settings as `key=value` pairs, in a fixed order (the inverse of
    /// [`Settings::from_pairs`]); defaults that need not be said are left out.
    pub fn to_pairs(&self) -> Vec<(&'static str, String)> {
        let mut pairs = Vec::new();
        if let Some(w) = self.wave {
            pairs.push(("wave", w.to_string()));
        }
        pairs.push(("model", self.model.as_str().to_string()));
        pairs.push(("weighting", self.weighting.as_str().to_string()));
        if let Some(c) = &self.covariates {
            pairs.push(("covariates", c.join(",")));
        }
        if let Some(f) = &self.factors {
            pairs.push(("factors", f.join(",")));
        }
        if let Some(t) = self.trim {
            pairs.push(("trim", t.to_string()));
        }
        if self.missing != MissingRule::CompleteCases {
            pairs.push(("missing", self.missing.as_str().to_string()));
        }
        if self.missing == MissingRule::Impute && self.imputations != DEFAULT_IMPUTATIONS {
            pairs.push(("imputations", self.imputations.to_string()));
        }
        if self.match_variances {
            pairs.push(("variances", "1".to_string()));
        }
        pairs.push(("seed", self.seed.to_string()));
        pairs
    }

    /// The settings as a query string, percent-encoded by `form_urlencoded`.
    pub fn to_query(&self) -> String {
        form_urlencoded::Serializer::new(String::new())
            .extend_pairs(self.to_pairs())
            .finish()
    }
}

impl Settings {
    /// The same settings with the chosen indicators in the project's order (`numeric`,
    /// `categorical`: the manifest's lists) and each named once, so that two spellings of
    /// one choice (`a,b` and `b,a`) are one setting: the design's columns, and so every
    /// table of a result, follow the project's order. Names the project does not have
    /// stay, after the others in the order given, for the design to report.
    pub fn with_indicators_in_order(mut self, numeric: &[String], categorical: &[String]) -> Self {
        fn in_order(list: &mut Option<Vec<String>>, order: &[String]) {
            if let Some(names) = list.as_mut() {
                let mut ordered: Vec<String> = order
                    .iter()
                    .filter(|c| names.contains(c))
                    .cloned()
                    .collect();
                for n in names.iter() {
                    if !ordered.contains(n) {
                        ordered.push(n.clone());
                    }
                }
                *names = ordered;
            }
        }
        in_order(&mut self.covariates, numeric);
        in_order(&mut self.factors, categorical);
        self
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
        let s = Settings::from_pairs([("missing", "impute"), ("imputations", "7")]).unwrap();
        assert_eq!((s.missing, s.imputations), (MissingRule::Impute, 7));
        assert!(s.to_query().contains("imputations=7"));
        assert!(Settings::from_pairs([("imputations", "1")]).is_err());
    }

    /// Indicators in the project's order, each once; unknown names kept last (our own
    /// rule: one choice, one setting).
    #[test]
    fn indicators_follow_the_project_order() {
        let list = |v: &[&str]| v.iter().map(|s| s.to_string()).collect::<Vec<_>>();
        let s = Settings::from_pairs([("covariates", "c,a,zz,a"), ("factors", "g,f")])
            .unwrap()
            .with_indicators_in_order(&list(&["a", "b", "c"]), &list(&["f", "g"]));
        assert_eq!(s.covariates, Some(list(&["a", "c", "zz"])));
        assert_eq!(s.factors, Some(list(&["f", "g"])));
        let all = Settings::default().with_indicators_in_order(&list(&["a"]), &[]);
        assert_eq!(all.covariates, None, "None (every indicator) stays None");
    }

    /// settings -> query -> settings gives the same settings, also for names that need
    /// encoding (common practice for URL round trips).
    #[test]
    fn query_round_trip_with_awkward_names() {
        let s = Settings {
            wave: Some(3),
            model: ModelKind::Firth,
            weighting: WeightingKind::CovariateBalancingGmm,
            covariates: Some(vec!["gdp & co".into(), "x=1".into(), "naïve%".into()]),
            factors: Some(vec![]),
            trim: Some(0.95),
            missing: MissingRule::MedianFill,
            match_variances: true,
            seed: 42,
            imputations: DEFAULT_IMPUTATIONS,
        };
        let query = s.to_query();
        assert!(!query.contains(' ') && !query.contains("& "), "{query}");
        let pairs: Vec<(String, String)> = form_urlencoded::parse(query.as_bytes())
            .into_owned()
            .collect();
        let back =
            Settings::from_pairs(pairs.iter().map(|(k, v)| (k.as_str(), v.as_str()))).unwrap();
        assert_eq!(back, s);
    }
}
