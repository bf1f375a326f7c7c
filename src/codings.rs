//! Whether each field's two sides use the same codes.
//!
//! In: [`Records`] and the [`PatternCounts`] of the candidate pairs. Out: per field a
//! [`FieldAgreement`] (the share of candidate pairs whose values agree at the top level and
//! the shares of each side's values that the other side holds too) and a serious warning for
//! each field whose sides look coded differently (see [`warnings`]). A warning shows values
//! only for fields of few distinct values on each side (category codes such as 1/2 or M/F),
//! never for others, whose values may be personal.

use crate::compare::{PatternCounts, MISSING_LEVEL};
use crate::config::Method;
use crate::pipeline::SERIOUS_PREFIX;
use crate::records::{FieldValues, Records};

/// Fewest candidate pairs holding both values, and fewest non-missing values on each side,
/// before a field's codings are judged.
pub const MIN_VALUES: usize = 20;

/// Below this share of values held by the other side too (on both sides), the two sides
/// "share almost no values".
pub const SHARED_FLOOR: f64 = 0.02;

/// Most distinct values on each side for a field's codes to be shown in a warning.
pub const MAX_CODES: usize = 12;

/// How far a field's two sides speak the same codes.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct FieldAgreement {
    /// Candidate pairs in which both values are present.
    pub comparable_pairs: f64,
    /// Share of those pairs whose values agree at the top level (identical after cleaning);
    /// None without such pairs.
    pub top_agreement: Option<f64>,
    /// Share of the left records holding a value that some right record holds too (among
    /// the left records with a value); None without any.
    pub left_shared: Option<f64>,
    /// The same for the right records.
    pub right_shared: Option<f64>,
}

/// Every field's agreement on the candidate pairs and its shares of values in common.
pub fn agreement(records: &Records, counts: &PatternCounts) -> Vec<FieldAgreement> {
    records
        .fields
        .iter()
        .enumerate()
        .map(|(k, fv)| {
            let (mut comparable, mut agree) = (0.0, 0.0);
            for (pattern, &n) in counts.patterns.iter().zip(&counts.counts) {
                match pattern.get(k) {
                    Some(&MISSING_LEVEL) | None => {}
                    Some(&level) => {
                        comparable += n;
                        if level == 0 {
                            agree += n;
                        }
                    }
                }
            }
            FieldAgreement {
                comparable_pairs: comparable,
                top_agreement: (comparable > 0.0).then(|| agree / comparable),
                left_shared: shared(&fv.left_counts, &fv.right_counts),
                right_shared: shared(&fv.right_counts, &fv.left_counts),
            }
        })
        .collect()
}

/// The share of one side's records (with a value) whose value the other side holds too.
fn shared(own: &[u32], other: &[u32]) -> Option<f64> {
    let total: u64 = own.iter().map(|&c| c as u64).sum();
    let common: u64 = own
        .iter()
        .zip(other)
        .filter(|(_, &o)| o > 0)
        .map(|(&c, _)| c as u64)
        .sum();
    (total > 0).then(|| common as f64 / total as f64)
}

/// Serious warnings (starting with [`SERIOUS_PREFIX`]) for fields whose two sides look coded
/// differently: a field that agrees on none of at least [`MIN_VALUES`] candidate pairs
/// holding both its values, or whose sides share almost no values (under [`SHARED_FLOOR`] of
/// the records of each side hold a value that some record of the other side holds, with at
/// least [`MIN_VALUES`] non-missing values on each side). Number fields are not judged:
/// measured values need never be equal.
pub fn warnings(records: &Records, agreement: &[FieldAgreement]) -> Vec<String> {
    records
        .fields
        .iter()
        .zip(agreement)
        .filter(|(fv, _)| fv.spec.method != Method::Number)
        .filter_map(|(fv, a)| serious_warning(fv, a))
        .collect()
}

fn serious_warning(fv: &FieldValues, a: &FieldAgreement) -> Option<String> {
    let non_missing = |counts: &[u32]| counts.iter().map(|&c| c as usize).sum::<usize>();
    let never_agrees =
        a.comparable_pairs >= MIN_VALUES as f64 && a.top_agreement.is_some_and(|s| s == 0.0);
    let enough_values =
        non_missing(&fv.left_counts) >= MIN_VALUES && non_missing(&fv.right_counts) >= MIN_VALUES;
    let (ls, rs) = (a.left_shared.unwrap_or(0.0), a.right_shared.unwrap_or(0.0));
    let shares_little = enough_values && ls < SHARED_FLOOR && rs < SHARED_FLOOR;
    if !never_agrees && !shares_little {
        return None;
    }
    let sharing = if ls == 0.0 && rs == 0.0 {
        "its two sides share no values".to_string()
    } else {
        format!(
            "its two sides share almost no values ({:.1}% of the left records hold a value found on the right, {:.1}% of the right records one found on the left)",
            100.0 * ls,
            100.0 * rs
        )
    };
    let pairs = crate::pipeline::count_text(a.comparable_pairs);
    let advice = match (fv.spec.method, codes(fv, true), codes(fv, false)) {
        (Method::Date, _, _) => "check each side's date format (`left_date_order`, `right_date_order`) or map the values with `left_recode`/`right_recode`".to_string(),
        (_, Some(l), Some(r)) => format!(
            "check its codings (left: {}; right: {}) or map them with `left_recode`/`right_recode`",
            l.join(", "),
            r.join(", ")
        ),
        _ => "check its codings or map them with `left_recode`/`right_recode`".to_string(),
    };
    let name = &fv.spec.name;
    Some(match (never_agrees, shares_little) {
        (true, true) => format!(
            "{SERIOUS_PREFIX}field `{name}` agreed on none of the {pairs} candidate pairs and {sharing}: {advice}"
        ),
        (true, false) => format!(
            "{SERIOUS_PREFIX}field `{name}` agreed on none of the {pairs} candidate pairs that hold both its values: {advice}"
        ),
        _ => format!("{SERIOUS_PREFIX}field `{name}`: {sharing}; {advice}"),
    })
}

/// One side's distinct values, sorted, when there are at most [`MAX_CODES`] of them.
fn codes(fv: &FieldValues, left: bool) -> Option<Vec<&str>> {
    let counts = if left {
        &fv.left_counts
    } else {
        &fv.right_counts
    };
    let mut values: Vec<&str> = fv
        .dict
        .iter()
        .zip(counts)
        .filter(|(_, &c)| c > 0)
        .map(|(v, _)| v.as_str())
        .collect();
    values.sort_unstable();
    (values.len() <= MAX_CODES).then_some(values)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::config::FieldSpec;
    use crate::records::Unparsed;

    fn field(dict: &[&str], left_counts: &[u32], right_counts: &[u32]) -> FieldValues {
        FieldValues {
            spec: FieldSpec::key_column("sex"),
            dict: dict.iter().map(|s| s.to_string()).collect(),
            dates: Vec::new(),
            numbers: Vec::new(),
            left: Vec::new(),
            right: Vec::new(),
            left_counts: left_counts.to_vec(),
            right_counts: right_counts.to_vec(),
            left_unparsed: Unparsed::default(),
            right_unparsed: Unparsed::default(),
        }
    }

    fn records(fv: FieldValues) -> Records {
        Records {
            left_ids: crate::texts::Texts::new(),
            right_ids: crate::texts::Texts::new(),
            fields: vec![fv],
            key_columns: Vec::new(),
        }
    }

    #[test]
    fn disjoint_codes_are_serious_and_listed() {
        let r = records(field(
            &["1", "2", "f", "m"],
            &[30, 25, 0, 0],
            &[0, 0, 28, 27],
        ));
        let counts = PatternCounts {
            levels: vec![2],
            patterns: vec![vec![1], vec![MISSING_LEVEL]],
            counts: vec![1234.0, 5.0],
        };
        let a = agreement(&r, &counts);
        assert_eq!(a[0].comparable_pairs, 1234.0);
        assert_eq!(a[0].top_agreement, Some(0.0));
        assert_eq!(
            (a[0].left_shared, a[0].right_shared),
            (Some(0.0), Some(0.0))
        );
        let w = warnings(&r, &a);
        assert_eq!(
            w,
            vec!["serious: field `sex` agreed on none of the 1,234 candidate pairs and its two sides share no values: check its codings (left: 1, 2; right: f, m) or map them with `left_recode`/`right_recode`"]
        );
    }

    #[test]
    fn shared_codes_are_not_serious() {
        let r = records(field(&["f", "m"], &[30, 25], &[28, 27]));
        let counts = PatternCounts {
            levels: vec![2],
            patterns: vec![vec![0], vec![1]],
            counts: vec![40.0, 60.0],
        };
        let a = agreement(&r, &counts);
        assert_eq!(a[0].top_agreement, Some(0.4));
        assert_eq!(a[0].left_shared, Some(1.0));
        assert!(warnings(&r, &a).is_empty());
        // Too few values to judge: 19 on the left (MIN_VALUES is 20).
        let r = records(field(&["1", "f"], &[19, 0], &[0, 40]));
        let none = PatternCounts {
            levels: vec![2],
            patterns: vec![vec![1]],
            counts: vec![19.0],
        };
        assert!(warnings(&r, &agreement(&r, &none)).is_empty());
    }

    #[test]
    fn many_values_are_not_shown() {
        let dict: Vec<String> = (0..40).map(|i| format!("v{i}")).collect();
        let dict: Vec<&str> = dict.iter().map(String::as_str).collect();
        let lc: Vec<u32> = (0..40).map(|i| u32::from(i < 20)).collect();
        let rc: Vec<u32> = (0..40).map(|i| u32::from(i >= 20)).collect();
        let r = records(field(&dict, &lc, &rc));
        let counts = PatternCounts {
            levels: vec![2],
            patterns: vec![vec![0]],
            counts: vec![3.0],
        };
        let w = warnings(&r, &agreement(&r, &counts));
        assert_eq!(w.len(), 1);
        assert!(
            w[0].contains("field `sex`: its two sides share no values; check its codings or map"),
            "{}",
            w[0]
        );
        assert!(!w[0].contains("v1"), "{}", w[0]);
    }
}
