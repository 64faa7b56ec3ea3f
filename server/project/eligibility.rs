//! Who belongs to a wave's eligible universe.
//!
//! A country is eligible in a wave when every rule that applies to the wave holds. A cut-off
//! is a number or is taken from the wave's participants (the lowest or highest value among
//! them), the usual data-driven choice when no official list of eligible countries exists.
//! Participants always stay in the universe: a participant that fails a rule is reported,
//! never dropped, because dropping it would hide data the programme holds.

use serde::Serialize;

use super::manifest::{EligibilityRule, ParticipantCut, Threshold};

/// One rule with the values of its indicator, aligned with the frame's rows.
pub struct RuleValues<'a> {
    pub rule: &'a EligibilityRule,
    pub values: &'a [Option<f64>],
}

/// Why a row is or is not in its wave's universe.
#[derive(Debug, Clone, PartialEq, Serialize)]
#[serde(tag = "status", rename_all = "kebab-case")]
pub enum RowStatus {
    Eligible,
    /// Failed a rule: the indicator, its value and the cut-off.
    Fails {
        indicator: String,
        value: f64,
        cut: String,
    },
    /// A rule's indicator is missing, so the rule cannot be judged.
    Unknown {
        indicator: String,
    },
}

/// A cut-off as applied in one wave.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct AppliedCut {
    pub wave: i64,
    pub indicator: String,
    /// "at least" or "at most".
    pub direction: &'static str,
    /// `None` when the cut-off comes from participants and the wave has none with a value.
    pub value: Option<f64>,
    pub from_participants: bool,
}

/// The outcome for every frame row.
#[derive(Debug, Clone, Serialize)]
pub struct Eligibility {
    /// In the universe: passes every rule, or took part.
    pub eligible: Vec<bool>,
    pub status: Vec<RowStatus>,
    pub cuts: Vec<AppliedCut>,
}

/// Applies the rules to every row. `waves` and `participated` are aligned with the rows.
pub fn evaluate(waves: &[i64], participated: &[bool], rules: &[RuleValues<'_>]) -> Eligibility {
    let n = waves.len();
    let mut status = vec![RowStatus::Eligible; n];
    let mut cuts = Vec::new();
    let mut distinct: Vec<i64> = waves.to_vec();
    distinct.sort_unstable();
    distinct.dedup();
    for &wave in &distinct {
        let rows: Vec<usize> = (0..n).filter(|&i| waves[i] == wave).collect();
        for rv in rules.iter().filter(|rv| rv.rule.applies_to(wave)) {
            let bounds = [
                ("at least", &rv.rule.at_least),
                ("at most", &rv.rule.at_most),
            ];
            for (direction, threshold) in bounds {
                let Some(threshold) = threshold else { continue };
                let (value, from_participants) = resolve(threshold, &rows, participated, rv.values);
                cuts.push(AppliedCut {
                    wave,
                    indicator: rv.rule.indicator.clone(),
                    direction,
                    value,
                    from_participants,
                });
                for &i in &rows {
                    if status[i] != RowStatus::Eligible {
                        continue;
                    }
                    match (rv.values.get(i).copied().flatten(), value) {
                        (None, _) => {
                            status[i] = RowStatus::Unknown {
                                indicator: rv.rule.indicator.clone(),
                            }
                        }
                        (Some(x), Some(cut)) => {
                            let passes = if direction == "at least" {
                                x >= cut
                            } else {
                                x <= cut
                            };
                            if !passes {
                                status[i] = RowStatus::Fails {
                                    indicator: rv.rule.indicator.clone(),
                                    value: x,
                                    cut: format!("{direction} {}", format_cut(cut)),
                                };
                            }
                        }
                        // No participant has a value, so the cut-off is undefined: nobody fails it.
                        (Some(_), None) => {}
                    }
                }
            }
        }
    }
    let eligible = status
        .iter()
        .zip(participated)
        .map(|(s, &p)| p || *s == RowStatus::Eligible)
        .collect();
    Eligibility {
        eligible,
        status,
        cuts,
    }
}

fn resolve(
    threshold: &Threshold,
    rows: &[usize],
    participated: &[bool],
    values: &[Option<f64>],
) -> (Option<f64>, bool) {
    match threshold {
        Threshold::Value(v) => (Some(*v), false),
        Threshold::FromParticipants(cut) => {
            let participant_values = rows
                .iter()
                .filter(|&&i| participated[i])
                .filter_map(|&i| values.get(i).copied().flatten());
            let value = match cut {
                ParticipantCut::LowestParticipant => participant_values.reduce(f64::min),
                ParticipantCut::HighestParticipant => participant_values.reduce(f64::max),
            };
            (value, true)
        }
    }
}

fn format_cut(x: f64) -> String {
    let s = format!("{x:.4}");
    s.trim_end_matches('0').trim_end_matches('.').to_string()
}

#[cfg(test)]
mod tests {
    use super::*;

    fn rule(at_least: Threshold) -> EligibilityRule {
        EligibilityRule {
            indicator: "democracy".into(),
            at_least: Some(at_least),
            at_most: None,
            waves: None,
        }
    }

    #[test]
    fn fixed_cut_and_participant_cut() {
        // Common practice: the lowest participant's value as the data-driven cut-off.
        let waves = [1, 1, 1, 1, 2, 2];
        let took_part = [true, false, false, true, true, false];
        let values = [Some(6.0), Some(5.0), Some(4.0), Some(4.5), Some(3.0), None];
        let by_participant = rule(Threshold::FromParticipants(
            ParticipantCut::LowestParticipant,
        ));
        let e = evaluate(
            &waves,
            &took_part,
            &[RuleValues {
                rule: &by_participant,
                values: &values,
            }],
        );
        assert_eq!(e.eligible, vec![true, true, false, true, true, false]);
        assert_eq!(
            e.status[5],
            RowStatus::Unknown {
                indicator: "democracy".into()
            }
        );
        assert_eq!(e.cuts[0].value, Some(4.5));

        let fixed = rule(Threshold::Value(5.0));
        let e = evaluate(
            &waves,
            &took_part,
            &[RuleValues {
                rule: &fixed,
                values: &values,
            }],
        );
        // Row 3 took part but fails: it stays in the universe and its status says why.
        assert_eq!(e.eligible, vec![true, true, false, true, true, false]);
        assert!(matches!(e.status[3], RowStatus::Fails { value, .. } if value == 4.5));
    }

    #[test]
    fn rule_limited_to_some_waves() {
        let mut r = rule(Threshold::Value(5.0));
        r.waves = Some(vec![2]);
        let e = evaluate(
            &[1, 2],
            &[false, false],
            &[RuleValues {
                rule: &r,
                values: &[Some(1.0), Some(1.0)],
            }],
        );
        assert_eq!(e.eligible, vec![true, false]);
    }

    #[test]
    fn at_most_and_highest_participant_cuts_and_rules_per_wave() {
        // Common practice: a ceiling rule (e.g. a population cap) and the highest
        // participant's value as the data-driven ceiling; a rule limited to some waves.
        let waves = [1, 1, 1, 1, 2, 2, 2];
        let took_part = [true, false, true, false, true, false, false];
        let values = [
            Some(3.0),
            Some(2.0),
            Some(5.0),
            Some(5.5),
            Some(9.0),
            Some(9.5),
            Some(1.0),
        ];
        let ceiling = EligibilityRule {
            indicator: "size".into(),
            at_least: None,
            at_most: Some(Threshold::FromParticipants(
                ParticipantCut::HighestParticipant,
            )),
            waves: Some(vec![1]),
        };
        let e = evaluate(
            &waves,
            &took_part,
            &[RuleValues {
                rule: &ceiling,
                values: &values,
            }],
        );
        // Wave 1's highest participant has 5.0: row 3 (5.5) fails; wave 2 has no rule.
        assert_eq!(e.eligible, vec![true, true, true, false, true, true, true]);
        assert_eq!(
            e.status[3],
            RowStatus::Fails {
                indicator: "size".into(),
                value: 5.5,
                cut: "at most 5".into()
            }
        );
        assert_eq!(e.cuts.len(), 1);
        assert_eq!(e.cuts[0].direction, "at most");
        assert_eq!(e.cuts[0].value, Some(5.0));
        assert!(e.cuts[0].from_participants);

        // A band: at least 2.5 and at most 9.2, in every wave.
        let band = EligibilityRule {
            indicator: "size".into(),
            at_least: Some(Threshold::Value(2.5)),
            at_most: Some(Threshold::Value(9.2)),
            waves: None,
        };
        let e = evaluate(
            &waves,
            &took_part,
            &[RuleValues {
                rule: &band,
                values: &values,
            }],
        );
        assert_eq!(
            e.eligible,
            vec![true, false, true, true, true, false, false]
        );
        assert_eq!(e.cuts.len(), 4, "two bounds in each of two waves");
        assert_eq!(
            e.status[5],
            RowStatus::Fails {
                indicator: "size".into(),
                value: 9.5,
                cut: "at most 9.2".into()
            }
        );
    }
}
