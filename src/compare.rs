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
            // ASCII texts as bytes through this module's allocation-free versions (bit for bit
            // strsim's on characters, see the tests); others through strsim.
            Method::JaroWinkler => {
                let (x, y) = (&fv.dict[a as usize], &fv.dict[b as usize]);
                let s = if x.is_ascii() && y.is_ascii() {
                    jaro_winkler(x.as_bytes(), y.as_bytes())
                } else {
                    strsim::jaro_winkler(x, y)
                };
                self.similarity_level(s)
            }
            Method::Levenshtein => {
                let (x, y) = (&fv.dict[a as usize], &fv.dict[b as usize]);
                let s = if x.is_ascii() && y.is_ascii() {
                    normalized_levenshtein(x.as_bytes(), y.as_bytes())
                } else {
                    strsim::normalized_levenshtein(x, y)
                };
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
        if one_digit_off((a.year, am, ad), (b.year, bm, bd)) {
            return 2;
        }
    }
    if a.year == b.year {
        return 3;
    }
    4
}

/// True when two dates written as YYYYMMDD differ in exactly one of the digits (compared
/// place by place as far as the shorter one goes). Four-digit years and two-digit months and
/// days (every parsed date) are compared digit by digit without building the text.
fn one_digit_off(a: (i32, u8, u8), b: (i32, u8, u8)) -> bool {
    let plain = |(y, m, d): (i32, u8, u8)| (0..=9999).contains(&y) && m < 100 && d < 100;
    if !plain(a) || !plain(b) {
        let da = format!("{:04}{:02}{:02}", a.0, a.1, a.2);
        let db = format!("{:04}{:02}{:02}", b.0, b.1, b.2);
        return da.bytes().zip(db.bytes()).filter(|(x, y)| x != y).count() == 1;
    }
    let digits = |(y, m, d): (i32, u8, u8)| {
        let (y, m, d) = (y as u32, m as u32, d as u32);
        [
            y / 1000,
            y / 100 % 10,
            y / 10 % 10,
            y % 10,
            m / 10,
            m % 10,
            d / 10,
            d % 10,
        ]
    };
    let (x, z) = (digits(a), digits(b));
    x.iter().zip(&z).filter(|(p, q)| p != q).count() == 1
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
///
/// Each field's values are prepared once (the characters of every distinct text, so a pair
/// costs no decoding or allocation), and the right records' value ids are laid out row by row
/// so one pair reads one short run of memory on the right side. The levels are those of
/// [`Comparator::level`].
pub fn compare(records: &Records, cands: &Candidates) -> Comparison {
    let comparators: Vec<Comparator> = records.fields.iter().map(Comparator::for_field).collect();
    let mut place = Vec::with_capacity(comparators.len());
    let mut p = 1u64;
    for c in &comparators {
        place.push(p);
        p = p.saturating_mul(c.levels() as u64 + 1);
    }
    let fields: Vec<FieldCompare> = comparators
        .iter()
        .zip(&records.fields)
        .zip(&place)
        .map(|((c, fv), &pl)| FieldCompare::new(c, fv, pl))
        .collect();
    let nf = fields.len();
    let mut right_rows = vec![MISSING; records.n_right() * nf];
    for (k, fv) in records.fields.iter().enumerate() {
        for (j, &v) in fv.right.iter().enumerate() {
            right_rows[j * nf + k] = v;
        }
    }
    let codes = cands
        .left
        .par_iter()
        .zip(cands.right.par_iter())
        .with_min_len(1024)
        .map(|(&a, &b)| {
            let row = &right_rows[b as usize * nf..(b as usize + 1) * nf];
            fields
                .iter()
                .zip(row)
                .map(|(f, &y)| f.digit(f.left[a as usize], y))
                .sum()
        })
        .collect();
    Comparison {
        comparators,
        place,
        codes,
    }
}

/// One field made ready for comparing many pairs: the left value ids, the place value and
/// missing digit of the field in a pattern code, and the distinct values in the form its method
/// compares.
struct FieldCompare<'a> {
    comparator: &'a Comparator,
    left: &'a [u32],
    place: u64,
    missing_digit: u64,
    values: Prepared<'a>,
}

/// The distinct values of a field as its method compares them.
enum Prepared<'a> {
    /// Only the ids are compared.
    Ids,
    /// Texts that are all ASCII, as bytes: entry `v` is `data[start[v]..start[v + 1]]`.
    Bytes { data: Vec<u8>, start: Vec<usize> },
    /// Other texts, as characters, laid out as `Bytes`.
    Chars { data: Vec<char>, start: Vec<usize> },
    /// Parsed dates.
    Dates(&'a [Date]),
    /// Parsed numbers.
    Numbers(&'a [f64]),
}

impl<'a> FieldCompare<'a> {
    fn new(comparator: &'a Comparator, fv: &'a FieldValues, place: u64) -> FieldCompare<'a> {
        let values = match comparator.method {
            Method::Exact => Prepared::Ids,
            Method::Date => Prepared::Dates(&fv.dates),
            Method::Number => Prepared::Numbers(&fv.numbers),
            Method::JaroWinkler | Method::Levenshtein => {
                let mut start = Vec::with_capacity(fv.dict.len() + 1);
                start.push(0);
                if fv.dict.iter().all(|v| v.is_ascii()) {
                    let mut data = Vec::new();
                    for v in &fv.dict {
                        data.extend_from_slice(v.as_bytes());
                        start.push(data.len());
                    }
                    Prepared::Bytes { data, start }
                } else {
                    let mut data = Vec::new();
                    for v in &fv.dict {
                        data.extend(v.chars());
                        start.push(data.len());
                    }
                    Prepared::Chars { data, start }
                }
            }
        };
        FieldCompare {
            comparator,
            left: &fv.left,
            place,
            missing_digit: comparator.levels() as u64,
            values,
        }
    }

    /// The field's contribution to a pattern code for values `a` (left) and `b` (right).
    #[inline]
    fn digit(&self, a: u32, b: u32) -> u64 {
        let level = self.level(a, b);
        let digit = if level == MISSING_LEVEL {
            self.missing_digit
        } else {
            level as u64
        };
        digit * self.place
    }

    /// As [`Comparator::level`].
    #[inline]
    fn level(&self, a: u32, b: u32) -> u8 {
        if a == MISSING || b == MISSING {
            return MISSING_LEVEL;
        }
        if a == b {
            return 0;
        }
        let c = self.comparator;
        let (a, b) = (a as usize, b as usize);
        match &self.values {
            Prepared::Ids => 1,
            Prepared::Bytes { data, start } => {
                let (x, y) = (&data[start[a]..start[a + 1]], &data[start[b]..start[b + 1]]);
                c.similarity_level(self.similarity(x, y))
            }
            Prepared::Chars { data, start } => {
                let (x, y) = (&data[start[a]..start[a + 1]], &data[start[b]..start[b + 1]]);
                c.similarity_level(self.similarity(x, y))
            }
            Prepared::Dates(d) => date_level(d[a], d[b]),
            Prepared::Numbers(n) => c.number_level(n[a], n[b]),
        }
    }

    fn similarity<T: Copy + PartialEq>(&self, x: &[T], y: &[T]) -> f64 {
        if self.comparator.method == Method::Levenshtein {
            normalized_levenshtein(x, y)
        } else {
            jaro_winkler(x, y)
        }
    }
}

/// Jaro–Winkler similarity of two sequences, step for step (and so bit for bit) the
/// computation of `strsim::jaro_winkler` on their characters, without its allocation: the
/// matched flags are bit sets when both sequences are at most 64 long.
pub fn jaro_winkler<T: Copy + PartialEq>(a: &[T], b: &[T]) -> f64 {
    let sim = jaro(a, b);
    if sim > 0.7 {
        let prefix = a.iter().take(4).zip(b).take_while(|(x, y)| x == y).count();
        sim + 0.1 * prefix as f64 * (1.0 - sim)
    } else {
        sim
    }
}

fn jaro<T: Copy + PartialEq>(a: &[T], b: &[T]) -> f64 {
    let (a_len, b_len) = (a.len(), b.len());
    if a_len == 0 && b_len == 0 {
        return 1.0;
    } else if a_len == 0 || b_len == 0 {
        return 0.0;
    }
    let range = (a_len.max(b_len) / 2).saturating_sub(1);
    let mut matches = 0usize;
    let mut transpositions = 0usize;
    if a_len <= 64 && b_len <= 64 {
        let (mut a_flags, mut b_flags) = (0u64, 0u64);
        for (i, x) in a.iter().enumerate() {
            let (lo, hi) = (i.saturating_sub(range), b_len.min(i + range + 1));
            for (y, j) in b[lo.min(hi)..hi].iter().zip(lo..) {
                if b_flags & (1 << j) == 0 && x == y {
                    a_flags |= 1 << i;
                    b_flags |= 1 << j;
                    matches += 1;
                    break;
                }
            }
        }
        while a_flags != 0 {
            let (i, j) = (a_flags.trailing_zeros(), b_flags.trailing_zeros());
            if a[i as usize] != b[j as usize] {
                transpositions += 1;
            }
            a_flags &= a_flags - 1;
            b_flags &= b_flags - 1;
        }
    } else {
        let mut a_flags = vec![false; a_len];
        let mut b_flags = vec![false; b_len];
        for (i, x) in a.iter().enumerate() {
            let (lo, hi) = (i.saturating_sub(range), b_len.min(i + range + 1));
            for (y, j) in b[lo.min(hi)..hi].iter().zip(lo..) {
                if !b_flags[j] && x == y {
                    a_flags[i] = true;
                    b_flags[j] = true;
                    matches += 1;
                    break;
                }
            }
        }
        let mut bs = b.iter().zip(&b_flags).filter(|(_, &f)| f).map(|(y, _)| y);
        for (x, _) in a.iter().zip(&a_flags).filter(|(_, &f)| f) {
            if bs.next().is_some_and(|y| x != y) {
                transpositions += 1;
            }
        }
    }
    transpositions /= 2;
    if matches == 0 {
        0.0
    } else {
        ((matches as f64 / a_len as f64)
            + (matches as f64 / b_len as f64)
            + ((matches - transpositions) as f64 / matches as f64))
            / 3.0
    }
}

/// Levenshtein similarity of two sequences: 1 − distance / longer length, as
/// `strsim::normalized_levenshtein` computes it on their characters.
pub fn normalized_levenshtein<T: Copy + PartialEq>(a: &[T], b: &[T]) -> f64 {
    if a.is_empty() && b.is_empty() {
        return 1.0;
    }
    1.0 - (levenshtein(a, b) as f64) / (a.len().max(b.len()) as f64)
}

fn levenshtein<T: Copy + PartialEq>(a: &[T], b: &[T]) -> usize {
    let mut cache: Vec<usize> = (1..b.len() + 1).collect();
    let mut result = b.len();
    for (i, x) in a.iter().enumerate() {
        result = i + 1;
        let mut distance_b = i;
        for (j, y) in b.iter().enumerate() {
            let distance_a = distance_b + usize::from(x != y);
            distance_b = cache[j];
            result = (result + 1).min(distance_a.min(distance_b + 1));
            cache[j] = result;
        }
    }
    result
}

/// Pattern codes below this many are counted in a dense table rather than a hash map.
const DENSE_CODES: u64 = 1 << 16;

impl Comparison {
    /// The number of possible pattern codes (the product of the fields' radices), when it fits
    /// a dense table of [`DENSE_CODES`] entries.
    fn dense_codes(&self) -> Option<usize> {
        let mut n = 1u64;
        for c in &self.comparators {
            n = n.checked_mul(c.levels() as u64 + 1)?;
        }
        (n <= DENSE_CODES).then_some(n as usize)
    }

    /// The distinct pattern codes in increasing order, with how many pairs show each.
    fn code_counts(&self) -> Vec<(u64, u64)> {
        if let Some(n) = self.dense_codes() {
            let counts = self
                .codes
                .par_chunks(1 << 16)
                .fold(
                    || vec![0u64; n],
                    |mut acc, chunk| {
                        for &c in chunk {
                            acc[c as usize] += 1;
                        }
                        acc
                    },
                )
                .reduce(
                    || vec![0u64; n],
                    |mut a, b| {
                        for (x, y) in a.iter_mut().zip(b) {
                            *x += y;
                        }
                        a
                    },
                );
            return (0..n as u64).zip(counts).filter(|&(_, k)| k > 0).collect();
        }
        type Counts = HashMap<u64, u64, foldhash::fast::FixedState>;
        let counts: Counts = self
            .codes
            .par_chunks(1 << 16)
            .map(|chunk| {
                let mut m = Counts::default();
                for &c in chunk {
                    *m.entry(c).or_default() += 1;
                }
                m
            })
            .reduce(Counts::default, |mut a, b| {
                for (k, v) in b {
                    *a.entry(k).or_default() += v;
                }
                a
            });
        let mut sorted: Vec<(u64, u64)> = counts.into_iter().collect();
        sorted.sort_unstable();
        sorted
    }

    /// Collapses the pairs to distinct patterns with counts, ordered by pattern code, so the
    /// result does not depend on the thread count.
    pub fn pattern_counts(&self) -> PatternCounts {
        let sorted = self.code_counts();
        PatternCounts {
            levels: self.level_counts(),
            patterns: sorted.iter().map(|&(c, _)| self.levels_of(c)).collect(),
            counts: sorted.iter().map(|&(_, n)| n as f64).collect(),
        }
    }

    /// Per candidate pair, the index of its pattern in `counts.patterns` (which must come from
    /// [`Comparison::pattern_counts`] of this comparison, or hold every pattern seen): a dense
    /// `u32` that later stages can use in place of the 64-bit code. A pair whose pattern is
    /// not in `counts` gets `u32::MAX`.
    pub fn pattern_index(&self, counts: &PatternCounts) -> Vec<u32> {
        let codes: Vec<u64> = counts.patterns.iter().map(|p| self.encode(p)).collect();
        if let Some(n) = self.dense_codes() {
            let mut table = vec![u32::MAX; n];
            for (i, &c) in codes.iter().enumerate() {
                if let Some(slot) = table.get_mut(c as usize) {
                    *slot = i as u32;
                }
            }
            return self
                .codes
                .par_iter()
                .with_min_len(4096)
                .map(|&c| table.get(c as usize).copied().unwrap_or(u32::MAX))
                .collect();
        }
        let index: HashMap<u64, u32, foldhash::fast::FixedState> = codes
            .iter()
            .enumerate()
            .map(|(i, &c)| (c, i as u32))
            .collect();
        self.codes
            .par_iter()
            .with_min_len(4096)
            .map(|c| index.get(c).copied().unwrap_or(u32::MAX))
            .collect()
    }

    /// [`Comparison::pattern_counts`] and [`Comparison::pattern_index`] together.
    pub fn pattern_counts_and_index(&self) -> (PatternCounts, Vec<u32>) {
        let counts = self.pattern_counts();
        let index = self.pattern_index(&counts);
        (counts, index)
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use proptest::prelude::*;

    proptest! {
        // Oracle: strsim, whose computation ours repeats step for step; the results must be
        // equal to the bit, also for texts longer than 64 characters and non-ASCII ones.
        #[test]
        fn similarities_equal_strsim(
            a in "[abcé ]{0,70}",
            b in "[abcé ]{0,70}",
        ) {
            let (x, y): (Vec<char>, Vec<char>) = (a.chars().collect(), b.chars().collect());
            prop_assert_eq!(jaro_winkler(&x, &y).to_bits(), strsim::jaro_winkler(&a, &b).to_bits());
            prop_assert_eq!(
                normalized_levenshtein(&x, &y).to_bits(),
                strsim::normalized_levenshtein(&a, &b).to_bits()
            );
            if a.is_ascii() && b.is_ascii() {
                prop_assert_eq!(
                    jaro_winkler(a.as_bytes(), b.as_bytes()).to_bits(),
                    strsim::jaro_winkler(&a, &b).to_bits()
                );
            }
        }

        // Oracle: the definition, the two dates written out as YYYYMMDD and compared digit by
        // digit.
        #[test]
        fn one_digit_off_equals_text(
            y1 in 0i32..12000, m1 in 0u8..120, d1 in 0u8..40,
            y2 in 0i32..12000, m2 in 0u8..120, d2 in 0u8..40,
        ) {
            let da = format!("{y1:04}{m1:02}{d1:02}");
            let db = format!("{y2:04}{m2:02}{d2:02}");
            let want = da.bytes().zip(db.bytes()).filter(|(x, y)| x != y).count() == 1;
            prop_assert_eq!(one_digit_off((y1, m1, d1), (y2, m2, d2)), want);
        }
    }

    #[test]
    fn pattern_index_points_at_each_pairs_pattern() {
        let comparison = Comparison {
            comparators: vec![
                Comparator {
                    method: Method::Exact,
                    bands: vec![],
                    relative: false,
                };
                2
            ],
            place: vec![1, 3],
            codes: vec![4, 0, 4, 8, 2, 0],
        };
        let (counts, index) = comparison.pattern_counts_and_index();
        assert_eq!(counts.counts, vec![2.0, 1.0, 2.0, 1.0]);
        assert_eq!(index, vec![2, 0, 2, 3, 1, 0]);
        for (i, &k) in index.iter().enumerate() {
            assert_eq!(
                comparison.encode(&counts.patterns[k as usize]),
                comparison.codes[i]
            );
        }
    }

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
