//! Comparison: each candidate pair's agreement level on each field, and the pattern counts.
//!
//! In: [`Records`] and [`Candidates`]. Out: a [`Comparison`], one pattern code per pair (the
//! field levels in mixed radix, "missing" as its own digit), and [`PatternCounts`]: the distinct
//! patterns with their counts, which is all that `model` needs. Pattern counts from separate
//! shards merge by adding counts.
//!
//! Levels are numbered from the strongest agreement (0) down; the last level is "disagree".

use crate::block::Candidates;
use crate::config::Method;
use crate::records::{FieldValues, Records, MISSING};
use crate::text::Date;
use rayon::prelude::*;
use std::collections::HashMap;

/// The level code stored for "either value missing".
pub const MISSING_LEVEL: u8 = u8::MAX;

/// How one field is turned into levels.
#[derive(Debug, Clone)]
pub struct Comparator {
    /// The method.
    pub method: Method,
    /// Cut points (similarities highest first, or differences smallest first).
    pub bands: Vec<f64>,
    /// Number differences are relative.
    pub relative: bool,
}

/// Names of a date field's levels.
pub const DATE_LEVELS: [&str; 5] = [
    "same",
    "day-month swapped",
    "one digit off",
    "same year",
    "different",
];

impl Comparator {
    /// The comparator for a field.
    pub fn for_field(fv: &FieldValues) -> Comparator {
        Comparator {
            method: fv.spec.method,
            bands: fv.spec.bands(),
            relative: fv.spec.relative,
        }
    }

    /// Number of observed levels (missing not counted).
    pub fn levels(&self) -> usize {
        match self.method {
            Method::Exact => 2,
            Method::JaroWinkler | Method::Levenshtein | Method::Number => self.bands.len() + 2,
            Method::Date => DATE_LEVELS.len(),
        }
    }

    /// A short name for each level, for outputs.
    pub fn level_names(&self) -> Vec<String> {
        match self.method {
            Method::Exact => vec!["agree".into(), "disagree".into()],
            Method::JaroWinkler | Method::Levenshtein => {
                let mut v = vec!["identical".to_string()];
                v.extend(self.bands.iter().map(|b| format!("similarity >= {b}")));
                v.push("other".into());
                v
            }
            Method::Number => {
                let mut v = vec!["equal".to_string()];
                let unit = if self.relative { " (relative)" } else { "" };
                v.extend(self.bands.iter().map(|b| format!("within {b}{unit}")));
                v.push("other".into());
                v
            }
            Method::Date => DATE_LEVELS.iter().map(|s| s.to_string()).collect(),
        }
    }

    /// The level of a pair of interned values of field `fv`.
    pub fn level(&self, fv: &FieldValues, a: u32, b: u32) -> u8 {
        if a == MISSING || b == MISSING {
            return MISSING_LEVEL;
        }
        if a == b {
            return 0;
        }
        match self.method {
            Method::Exact => 1,
            Method::JaroWinkler => {
                let s = strsim::jaro_winkler(&fv.dict[a as usize], &fv.dict[b as usize]);
                self.similarity_level(s)
            }
            Method::Levenshtein => {
                let s = strsim::normalized_levenshtein(&fv.dict[a as usize], &fv.dict[b as usize]);
                self.similarity_level(s)
            }
            Method::Date => date_level(fv.dates[a as usize], fv.dates[b as usize]),
            Method::Number => {
                let (x, y) = (fv.numbers[a as usize], fv.numbers[b as usize]);
                self.number_level(x, y)
            }
        }
    }

    fn similarity_level(&self, s: f64) -> u8 {
        if s >= 1.0 {
            return 0;
        }
        let i = self
            .bands
            .iter()
            .position(|&b| s >= b)
            .unwrap_or(self.bands.len());
        (i + 1) as u8
    }

    fn number_level(&self, x: f64, y: f64) -> u8 {
        let mut diff = (x - y).abs();
        if diff == 0.0 {
            return 0;
        }
        if self.relative {
            diff /= x.abs().max(y.abs());
        }
        let i = self
            .bands
            .iter()
            .position(|&b| diff <= b)
            .unwrap_or(self.bands.len());
        (i + 1) as u8
    }
}

/// Level of two dates: same; day and month swapped; one digit off (of the eight in
/// YYYYMMDD, the usual keying slip); same year (also when one date is known only to the year
/// or month and the known parts agree); different.
pub fn date_level(a: Date, b: Date) -> u8 {
    if a == b {
        return 0;
    }
    if let (Some(am), Some(ad), Some(bm), Some(bd)) = (a.month, a.day, b.month, b.day) {
        if a.year == b.year && am == bd && ad == bm {
            return 1;
        }
        let da = format!("{:04}{:02}{:02}", a.year, am, ad);
        let db = format!("{:04}{:02}{:02}", b.year, bm, bd);
        if da.bytes().zip(db.bytes()).filter(|(x, y)| x != y).count() == 1 {
            return 2;
        }
    }
    if a.year == b.year {
        return 3;
    }
    4
}

/// Every candidate pair's pattern code.
#[derive(Debug, Clone)]
pub struct Comparison {
    /// Per field comparators, in config order.
    pub comparators: Vec<Comparator>,
    /// Mixed-radix place value of each field in a pattern code.
    pub place: Vec<u64>,
    /// One pattern code per candidate pair, in candidate order.
    pub codes: Vec<u64>,
}

impl Comparison {
    /// The level of field `k` in a pattern code ([`MISSING_LEVEL`] for missing).
    pub fn level(&self, code: u64, k: usize) -> u8 {
        let radix = self.comparators[k].levels() as u64 + 1;
        let digit = (code / self.place[k]) % radix;
        if digit == radix - 1 {
            MISSING_LEVEL
        } else {
            digit as u8
        }
    }

    /// All levels of a pattern code.
    pub fn levels_of(&self, code: u64) -> Vec<u8> {
        (0..self.comparators.len())
            .map(|k| self.level(code, k))
            .collect()
    }

    /// The number of observed levels per field.
    pub fn level_counts(&self) -> Vec<usize> {
        self.comparators.iter().map(Comparator::levels).collect()
    }

    /// Encodes a levels vector as a pattern code.
    pub fn encode(&self, levels: &[u8]) -> u64 {
        levels
            .iter()
            .enumerate()
            .map(|(k, &l)| {
                let radix = self.comparators[k].levels() as u64 + 1;
                let digit = if l == MISSING_LEVEL {
                    radix - 1
                } else {
                    l as u64
                };
                digit * self.place[k]
            })
            .sum()
    }
}

/// Distinct agreement patterns with their counts: the sufficient statistic for EM.
#[derive(Debug, Clone, PartialEq)]
pub struct PatternCounts {
    /// Observed levels per field.
    pub levels: Vec<usize>,
    /// Distinct patterns: per pattern, one level per field ([`MISSING_LEVEL`] for missing).
    pub patterns: Vec<Vec<u8>>,
    /// How many pairs show each pattern.
    pub counts: Vec<f64>,
}

/// Compares every candidate pair on every field (pairs in parallel).
pub fn compare(records: &Records, cands: &Candidates) -> Comparison {
    let comparators: Vec<Comparator> = records.fields.iter().map(Comparator::for_field).collect();
    let mut place = Vec::with_capacity(comparators.len());
    let mut p = 1u64;
    for c in &comparators {
        place.push(p);
        p = p.saturating_mul(c.levels() as u64 + 1);
    }
    let codes = (0..cands.len())
        .into_par_iter()
        .map(|i| {
            let (a, b) = (cands.left[i] as usize, cands.right[i] as usize);
            comparators
                .iter()
                .zip(&records.fields)
                .zip(&place)
                .map(|((c, fv), &pl)| {
                    let l = c.level(fv, fv.left[a], fv.right[b]);
                    let digit = if l == MISSING_LEVEL {
                        c.levels() as u64
                    } else {
                        l as u64
                    };
                    digit * pl
                })
                .sum()
        })
        .collect();
    Comparison {
        comparators,
        place,
        codes,
    }
}

impl Comparison {
    /// Collapses the pairs to distinct patterns with counts, ordered by pattern code, so the
    /// result does not depend on the thread count.
    pub fn pattern_counts(&self) -> PatternCounts {
        let counts: HashMap<u64, u64> = self
            .codes
            .par_chunks(1 << 16)
            .map(|chunk| {
                let mut m: HashMap<u64, u64> = HashMap::new();
                for &c in chunk {
                    *m.entry(c).or_default() += 1;
                }
                m
            })
            .reduce(HashMap::new, |mut a, b| {
                for (k, v) in b {
                    *a.entry(k).or_default() += v;
                }
                a
            });
        let mut sorted: Vec<(u64, u64)> = counts.into_iter().collect();
        sorted.sort_unstable();
        PatternCounts {
            levels: self.level_counts(),
            patterns: sorted.iter().map(|&(c, _)| self.levels_of(c)).collect(),
            counts: sorted.iter().map(|&(_, n)| n as f64).collect(),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn jaro_winkler_worked_examples() {
        // Winkler's worked examples (Winkler 1990 and later papers): MARTHA/MARHTA 0.961,
        // DWAYNE/DUANE 0.840, DIXON/DICKSONX 0.813. Values recalled from memory of the commonly
        // reproduced table, so from memory.
        let check = |a: &str, b: &str, want: f64| {
            let got = strsim::jaro_winkler(a, b);
            assert!((got - want).abs() < 5e-4, "{a}/{b}: {got}");
        };
        check("MARTHA", "MARHTA", 0.961);
        check("DWAYNE", "DUANE", 0.840);
        check("DIXON", "DICKSONX", 0.813);
    }

    #[test]
    fn levenshtein_textbook() {
        // kitten -> sitting needs 3 edits (Levenshtein 1966; the standard textbook example).
        assert_eq!(strsim::levenshtein("kitten", "sitting"), 3);
    }

    #[test]
    fn similarity_and_number_levels() {
        let c = Comparator {
            method: Method::JaroWinkler,
            bands: vec![0.94, 0.85],
            relative: false,
        };
        assert_eq!(c.similarity_level(1.0), 0);
        assert_eq!(c.similarity_level(0.95), 1);
        assert_eq!(c.similarity_level(0.94), 1);
        assert_eq!(c.similarity_level(0.9), 2);
        assert_eq!(c.similarity_level(0.2), 3);
        let n = Comparator {
            method: Method::Number,
            bands: vec![1.0, 5.0],
            relative: false,
        };
        assert_eq!(n.number_level(10.0, 10.0), 0);
        assert_eq!(n.number_level(10.0, 11.0), 1);
        assert_eq!(n.number_level(10.0, 14.0), 2);
        assert_eq!(n.number_level(10.0, 16.0), 3);
        let r = Comparator {
            method: Method::Number,
            bands: vec![0.1],
            relative: true,
        };
        assert_eq!(r.number_level(100.0, 95.0), 1);
        assert_eq!(r.number_level(100.0, 85.0), 2);
    }

    #[test]
    fn date_levels() {
        let d = |y, m, dd| Date {
            year: y,
            month: Some(m),
            day: Some(dd),
        };
        let y = |y| Date {
            year: y,
            month: None,
            day: None,
        };
        assert_eq!(date_level(d(1980, 3, 7), d(1980, 3, 7)), 0);
        assert_eq!(date_level(d(1980, 3, 7), d(1980, 7, 3)), 1);
        assert_eq!(date_level(d(1980, 3, 7), d(1980, 3, 8)), 2);
        assert_eq!(date_level(d(1980, 3, 7), d(1981, 3, 7)), 2);
        assert_eq!(date_level(d(1980, 3, 7), d(1980, 11, 21)), 3);
        assert_eq!(date_level(d(1980, 3, 7), y(1980)), 3);
        assert_eq!(date_level(d(1980, 3, 7), d(1975, 1, 1)), 4);
    }
}
