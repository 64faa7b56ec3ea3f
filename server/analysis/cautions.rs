//! The cautions shown wherever a reader could be misled.

use serde::Serialize;

#[derive(Debug, Clone, Serialize)]
pub struct Caution {
    pub title: &'static str,
    pub text: &'static str,
}

/// The standing cautions of every page and report.
pub const STANDING: [Caution; 3] = [
    Caution {
        title: "Weights correct only for what the indicators measure",
        text: "Weighting makes participants resemble the eligible universe on the indicators in the model. If countries also stay away for reasons the indicators do not capture, and those reasons relate to the survey answers, the weighted results remain biased.",
    },
    Caution {
        title: "A few countries standing in for many",
        text: "When a handful of participants carry large weights, every estimate rests on them: the effective number of countries, not the count of participants, tells how much information there is. Treat results with a small effective number as fragile.",
    },
    Caution {
        title: "The universe is a choice",
        text: "Who counts as eligible follows the project's rules. A data-driven cut-off (the lowest participant's value) moves when participation changes, so compare waves with that in mind.",
    },
];
