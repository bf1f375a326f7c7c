//! Value cleaning, phonetic codes and date parsing (numeric forms and English month names):
//! pure functions on one value at a time.
//!
//! Used by `io` (cleaning once per record) and by `block` (key transforms). Nothing here sees a
//! pair of records or a file.

use crate::config::Normalize;
use unicode_normalization::char::is_combining_mark;
use unicode_normalization::UnicodeNormalization;

/// Cleans one value: the chosen normalisation, then whole words in `drop_tokens` removed
/// (tokens compared after the same cleaning). Returns an empty string for "missing".
pub fn clean(value: &str, how: Normalize, drop_tokens: &[String]) -> String {
    let cleaned = match how {
        Normalize::None => value.trim().to_string(),
        Normalize::Digits => value.chars().filter(char::is_ascii_digit).collect(),
        Normalize::Code => fold(value)
            .chars()
            .filter(|c| c.is_alphanumeric())
            .flat_map(char::to_uppercase)
            .collect(),
        Normalize::Text => collapse_spaces(&fold(value).to_lowercase()),
        Normalize::Name => {
            let lowered = fold(value).to_lowercase();
            // Hyphens and apostrophes join name parts: "O'Neil" -> "oneil", "Smith-Jones" ->
            // "smith jones"; other punctuation is dropped.
            let spaced: String = lowered
                .chars()
                .filter_map(|c| {
                    if c.is_alphanumeric() {
                        Some(c)
                    } else if c == '\'' || c == '\u{2019}' || c == '.' {
                        None
                    } else {
                        Some(' ')
                    }
                })
                .collect();
            collapse_spaces(&spaced)
        }
    };
    if drop_tokens.is_empty() {
        return cleaned;
    }
    let drop: Vec<String> = drop_tokens
        .iter()
        .map(|t| clean(t, how, &[]))
        .filter(|t| !t.is_empty())
        .collect();
    let kept: Vec<&str> = cleaned
        .split(' ')
        .filter(|w| !w.is_empty() && !drop.iter().any(|d| d == w))
        .collect();
    kept.join(" ")
}

/// Unicode compatibility decomposition (NFKD) with combining marks (accents) removed.
pub fn fold(value: &str) -> String {
    // ASCII is its own compatibility decomposition: skip the Unicode tables (most values).
    if value.is_ascii() {
        return value.to_string();
    }
    value.nfkd().filter(|c| !is_combining_mark(*c)).collect()
}

fn collapse_spaces(s: &str) -> String {
    s.split_whitespace().collect::<Vec<_>>().join(" ")
}

/// American Soundex by the rules of the US National Archives ("The Soundex Indexing System"):
/// first letter kept; b f p v = 1, c g j k q s x z = 2, d t = 3, l = 4, m n = 5, r = 6;
/// vowels (a e i o u y) separate equal codes, h and w do not; padded with zeros to four
/// characters. Non-letters are ignored; returns an empty string when there is no letter.
pub fn soundex(s: &str) -> String {
    let letters: Vec<char> = fold(s)
        .chars()
        .filter(|c| c.is_ascii_alphabetic())
        .map(|c| c.to_ascii_uppercase())
        .collect();
    let Some(&first) = letters.first() else {
        return String::new();
    };
    let code = |c: char| -> Option<char> {
        match c {
            'B' | 'F' | 'P' | 'V' => Some('1'),
            'C' | 'G' | 'J' | 'K' | 'Q' | 'S' | 'X' | 'Z' => Some('2'),
            'D' | 'T' => Some('3'),
            'L' => Some('4'),
            'M' | 'N' => Some('5'),
            'R' => Some('6'),
            _ => None,
        }
    };
    let mut out = String::with_capacity(4);
    out.push(first);
    let mut last = code(first);
    for &c in &letters[1..] {
        if out.len() == 4 {
            break;
        }
        match c {
            'H' | 'W' => {}
            'A' | 'E' | 'I' | 'O' | 'U' | 'Y' => last = None,
            _ => {
                let d = code(c);
                if d != last {
                    if let Some(d) = d {
                        out.push(d);
                    }
                }
                last = d;
            }
        }
    }
    while out.len() < 4 {
        out.push('0');
    }
    out
}

/// NYSIIS, the New York State Identification and Intelligence System name code (Taft 1970),
/// without truncation: prefix rules (MAC, KN, K, PH, PF, SCH), suffix rules (EE, IE; DT, RT,
/// RD, NT, ND), then each remaining letter transcoded (EV -> AF, vowels -> A, Q -> G, Z -> S,
/// M -> N, KN -> N, K -> C, SCH -> SSS, PH -> FF, H and W after or before vowels), repeats
/// collapsed, and a final S, A or AY trimmed. Non-letters are ignored; empty when no letter.
pub fn nysiis(s: &str) -> String {
    let mut c: Vec<char> = fold(s)
        .chars()
        .filter(|c| c.is_ascii_alphabetic())
        .map(|c| c.to_ascii_uppercase())
        .collect();
    if c.is_empty() {
        return String::new();
    }
    let starts =
        |c: &[char], p: &str| c.len() >= p.len() && c.iter().zip(p.chars()).all(|(a, b)| *a == b);
    for (from, to) in [
        ("MAC", "MCC"),
        ("KN", "NN"),
        ("K", "C"),
        ("PH", "FF"),
        ("PF", "FF"),
        ("SCH", "SSS"),
    ] {
        if starts(&c, from) {
            c.splice(0..from.len(), to.chars());
            break;
        }
    }
    let ends = |c: &[char], p: &str| {
        c.len() >= p.len() && c[c.len() - p.len()..].iter().copied().eq(p.chars())
    };
    for (from, to) in [
        ("EE", "Y"),
        ("IE", "Y"),
        ("DT", "D"),
        ("RT", "D"),
        ("RD", "D"),
        ("NT", "D"),
        ("ND", "D"),
    ] {
        if ends(&c, from) {
            let n = c.len();
            c.splice(n - from.len().., to.chars());
            break;
        }
    }
    let vowel = |x: char| matches!(x, 'A' | 'E' | 'I' | 'O' | 'U');
    let mut key = vec![c[0]];
    let mut i = 1;
    while i < c.len() {
        let (prev, cur) = (c[i - 1], c[i]);
        let next = c.get(i + 1).copied().unwrap_or(' ');
        let after = c.get(i + 2).copied().unwrap_or(' ');
        let sub: Vec<char> = if cur == 'E' && next == 'V' {
            vec!['A', 'F']
        } else if vowel(cur) {
            vec!['A']
        } else {
            match cur {
                'Q' => vec!['G'],
                'Z' => vec!['S'],
                'M' => vec!['N'],
                'K' if next == 'N' => vec!['N'],
                'K' => vec!['C'],
                'S' if next == 'C' && after == 'H' => vec!['S', 'S', 'S'],
                'P' if next == 'H' => vec!['F', 'F'],
                'H' if !vowel(prev) || !vowel(next) => vec![prev],
                'W' if vowel(prev) => vec![prev],
                _ => vec![cur],
            }
        };
        for (k, &x) in sub.iter().enumerate() {
            if i + k < c.len() {
                c[i + k] = x;
            }
        }
        if c[i] != c[i - 1] {
            key.push(c[i]);
        }
        i += 1;
    }
    if key.len() > 1 && key.last() == Some(&'S') {
        key.pop();
    }
    if key.len() > 2 && key[key.len() - 2..] == ['A', 'Y'] {
        let n = key.len();
        key.remove(n - 2);
    }
    if key.len() > 1 && key.last() == Some(&'A') {
        key.pop();
    }
    key.into_iter().collect()
}

/// A calendar date, possibly known only to the year or the month.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord)]
pub struct Date {
    /// Year.
    pub year: i32,
    /// Month 1..=12 when known.
    pub month: Option<u8>,
    /// Day 1..=31 when known.
    pub day: Option<u8>,
}

/// Order of the parts in a date written with separators.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum DateOrder {
    /// Year, month, day (ISO 8601).
    Ymd,
    /// Day, month, year.
    Dmy,
    /// Month, day, year.
    Mdy,
}

impl DateOrder {
    /// From the config spelling (ymd, dmy, mdy); ymd when absent.
    pub fn from_config(s: Option<&str>) -> DateOrder {
        match s {
            Some("dmy") => DateOrder::Dmy,
            Some("mdy") => DateOrder::Mdy,
            _ => DateOrder::Ymd,
        }
    }

    /// Examples of the forms read under this order, for messages.
    pub fn examples(self) -> &'static str {
        match self {
            DateOrder::Ymd => "1984-07-21, 19840721, 1984-07, 21 July 1984 or 1984",
            DateOrder::Dmy => "21/07/1984, 1984-07-21, 21 July 1984 or 1984",
            DateOrder::Mdy => "07/21/1984, 1984-07-21, July 21, 1984 or 1984",
        }
    }
}

/// Parses `YYYY-MM-DD`, `YYYYMMDD`, `YYYY-MM`, `YYYY` (separators `-`, `/` or `.`), the
/// configured day/month order, or a date with its month written in English (see
/// [`parse_written_date`]). Returns `None` for text that is not a date.
pub fn parse_date(s: &str, order: DateOrder) -> Option<Date> {
    let s = s.trim();
    if s.bytes().any(|b| b.is_ascii_alphabetic()) {
        return parse_written_date(s);
    }
    let parts: Vec<&str> = s.split(['-', '/', '.', ' ']).collect();
    let num = |p: &str| -> Option<u32> {
        if p.is_empty() || p.len() > 4 || !p.bytes().all(|b| b.is_ascii_digit()) {
            None
        } else {
            p.parse().ok()
        }
    };
    let (y, m, d) = match parts.len() {
        1 if s.len() == 8 && s.bytes().all(|b| b.is_ascii_digit()) => {
            (num(&s[0..4])?, Some(num(&s[4..6])?), Some(num(&s[6..8])?))
        }
        1 if s.len() == 4 => (num(s)?, None, None),
        2 if parts[0].len() == 4 => (num(parts[0])?, Some(num(parts[1])?), None),
        3 => {
            let (a, b, c) = (num(parts[0])?, num(parts[1])?, num(parts[2])?);
            if parts[0].len() == 4 {
                (a, Some(b), Some(c))
            } else {
                match order {
                    DateOrder::Dmy => (c, Some(b), Some(a)),
                    DateOrder::Mdy => (c, Some(a), Some(b)),
                    DateOrder::Ymd => return None,
                }
            }
        }
        _ => return None,
    };
    calendar_date(y, m, d)
}

/// A date whose month is written in English, in any case and any order of its parts:
/// "12 March 1946", "March 12, 1946", "12-Mar-1946", "12th March 1946", "March 1946". The
/// month is its name or the name's first three letters or more ("Sept"); the year has four
/// digits; the day, when given, one or two (an English ordinal ending is allowed).
pub fn parse_written_date(s: &str) -> Option<Date> {
    let (mut year, mut month, mut day) = (None, None, None);
    for t in s.split(['-', '/', '.', ' ', ',']).filter(|t| !t.is_empty()) {
        let t = t.to_ascii_lowercase();
        let digits = t.trim_end_matches(|c: char| c.is_ascii_alphabetic());
        let ordinal = ["st", "nd", "rd", "th"].contains(&&t[digits.len()..]);
        let slot = if t.bytes().all(|b| b.is_ascii_alphabetic()) {
            month.replace(month_number(&t)?)
        } else if !digits.bytes().all(|b| b.is_ascii_digit()) || digits.is_empty() {
            return None;
        } else if digits.len() == 4 && digits.len() == t.len() {
            year.replace(digits.parse::<u32>().ok()?)
        } else if digits.len() <= 2 && (ordinal || digits.len() == t.len()) {
            day.replace(digits.parse::<u32>().ok()?)
        } else {
            return None;
        };
        if slot.is_some() {
            return None;
        }
    }
    calendar_date(year?, Some(month?), day)
}

/// The month of an English month name or its first three letters or more, lower case.
fn month_number(t: &str) -> Option<u32> {
    const MONTHS: [&str; 12] = [
        "january",
        "february",
        "march",
        "april",
        "may",
        "june",
        "july",
        "august",
        "september",
        "october",
        "november",
        "december",
    ];
    if t.len() < 3 {
        return None;
    }
    MONTHS
        .iter()
        .position(|m| m.starts_with(t))
        .map(|i| i as u32 + 1)
}

/// The date of a year, month and day when they make one in the Gregorian calendar (years
/// 1000 to 9999).
fn calendar_date(y: u32, m: Option<u32>, d: Option<u32>) -> Option<Date> {
    if !(1000..=9999).contains(&y) {
        return None;
    }
    if let Some(m) = m {
        if !(1..=12).contains(&m) {
            return None;
        }
    }
    if let Some(d) = d {
        if !(1..=31).contains(&d) || d > days_in_month(y as i32, m.unwrap_or(1) as u8) as u32 {
            return None;
        }
    }
    Some(Date {
        year: y as i32,
        month: m.map(|v| v as u8),
        day: d.map(|v| v as u8),
    })
}

/// Days in a month of the Gregorian calendar.
pub fn days_in_month(year: i32, month: u8) -> u8 {
    match month {
        4 | 6 | 9 | 11 => 30,
        2 if (year % 4 == 0 && year % 100 != 0) || year % 400 == 0 => 29,
        2 => 28,
        _ => 31,
    }
}

impl Date {
    /// The date as `YYYY-MM-DD` (or shorter when parts are unknown), for keys and outputs.
    pub fn iso(&self) -> String {
        match (self.month, self.day) {
            (Some(m), Some(d)) => format!("{:04}-{:02}-{:02}", self.year, m, d),
            (Some(m), None) => format!("{:04}-{:02}", self.year, m),
            _ => format!("{:04}", self.year),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn check_soundex(name: &str, expected: &str) {
        assert_eq!(soundex(name), expected, "{name}");
    }

    #[test]
    fn soundex_nara_examples() {
        // Examples from the US National Archives' Soundex page ("The Soundex Indexing
        // System"); recalled from memory of that page.
        check_soundex("Robert", "R163");
        check_soundex("Rupert", "R163");
        check_soundex("Rubin", "R150");
        check_soundex("Ashcraft", "A261");
        check_soundex("Ashcroft", "A261");
        check_soundex("Tymczak", "T522");
        check_soundex("Pfister", "P236");
        check_soundex("Gutierrez", "G362");
        check_soundex("Jackson", "J250");
        check_soundex("Lee", "L000");
        check_soundex("Washington", "W252");
        check_soundex("", "");
    }

    #[test]
    fn nysiis_published_examples() {
        // Examples of Taft's 1970 report as commonly reproduced with NYSIIS implementations
        // (recalled from memory, so from memory).
        for (name, code) in [
            ("Macintosh", "MCANT"),
            ("Knuth", "NAT"),
            ("Koehn", "CAN"),
            ("Phillipson", "FALAPSAN"),
            ("Pfeister", "FASTAR"),
            ("McKee", "MCY"),
            ("Mackie", "MCY"),
            ("Heitschmidt", "HATSNAD"),
            ("Bart", "BAD"),
            ("Hurd", "HAD"),
            ("Hunt", "HAD"),
            ("Westerlund", "WASTARLAD"),
            ("Casstevens", "CASTAFAN"),
            ("Vasquez", "VASG"),
            ("Frazier", "FRASAR"),
            ("Bowman", "BANAN"),
            ("McKnight", "MCNAGT"),
            ("Rickert", "RACAD"),
            ("Deutsch", "DAT"),
            ("Westphal", "WASTFAL"),
            ("Shriver", "SRAVAR"),
            ("Kuhl", "CAL"),
            ("Rawson", "RASAN"),
            ("Jiles", "JAL"),
            ("Carraway", "CARY"),
            ("Yamada", "YANAD"),
        ] {
            assert_eq!(nysiis(name), code, "{name}");
        }
        assert_eq!(nysiis(""), "");
    }

    #[test]
    fn name_cleaning() {
        // Compatibility fold + accent stripping: common practice for name comparison.
        assert_eq!(clean("  José  María ", Normalize::Name, &[]), "jose maria");
        assert_eq!(clean("O'Neil-Smith", Normalize::Name, &[]), "oneil smith");
        assert_eq!(clean("Ｍüller", Normalize::Name, &[]), "muller");
        assert_eq!(
            clean("Dr. Ann Lee", Normalize::Name, &["Dr".into()]),
            "ann lee"
        );
        assert_eq!(clean("+99 (0) 41-22", Normalize::Digits, &[]), "9904122");
        assert_eq!(clean("kv3 7q-d", Normalize::Code, &[]), "KV37QD");
    }

    #[test]
    fn dates() {
        let d = |y, m, dd| Date {
            year: y,
            month: Some(m),
            day: Some(dd),
        };
        assert_eq!(
            parse_date("1980-02-29", DateOrder::Ymd),
            Some(d(1980, 2, 29))
        );
        assert_eq!(parse_date("1981-02-29", DateOrder::Ymd), None);
        assert_eq!(parse_date("19800131", DateOrder::Ymd), Some(d(1980, 1, 31)));
        assert_eq!(
            parse_date("31/01/1980", DateOrder::Dmy),
            Some(d(1980, 1, 31))
        );
        assert_eq!(
            parse_date("01/31/1980", DateOrder::Mdy),
            Some(d(1980, 1, 31))
        );
        assert_eq!(parse_date("31/01/1980", DateOrder::Ymd), None);
        assert_eq!(
            parse_date("1980", DateOrder::Ymd),
            Some(Date {
                year: 1980,
                month: None,
                day: None
            })
        );
        assert_eq!(parse_date("soon", DateOrder::Ymd), None);
        assert_eq!(
            parse_date("1980-01-31", DateOrder::Mdy),
            Some(d(1980, 1, 31))
        );
        assert_eq!(
            DateOrder::Dmy.examples().split(',').next(),
            Some("21/07/1984")
        );
        assert_eq!(
            DateOrder::Mdy.examples().split(',').next(),
            Some("07/21/1984")
        );
        // Gregorian leap rule: 1900 is not a leap year, 2000 is (common practice).
        assert_eq!(days_in_month(1900, 2), 28);
        assert_eq!(days_in_month(2000, 2), 29);
    }

    #[test]
    fn written_months() {
        // English month names and their three-letter abbreviations as written in dates
        // (common practice); the order of the parts does not matter.
        let d = |y, m, dd| {
            Some(Date {
                year: y,
                month: Some(m),
                day: Some(dd),
            })
        };
        for s in [
            "12 March 1946",
            "March 12, 1946",
            "12 Mar 1946",
            "12-MAR-1946",
            "12th march 1946",
            "mar. 12, 1946",
            "1946 March 12",
        ] {
            assert_eq!(parse_date(s, DateOrder::Ymd), d(1946, 3, 12), "{s}");
            assert_eq!(parse_date(s, DateOrder::Mdy), d(1946, 3, 12), "{s}");
        }
        assert_eq!(parse_date("Sept 2, 1950", DateOrder::Dmy), d(1950, 9, 2));
        assert_eq!(
            parse_date("July 1984", DateOrder::Dmy),
            Some(Date {
                year: 1984,
                month: Some(7),
                day: None
            })
        );
        // No such day, no year, two months, a three-digit day or an unknown word.
        for s in [
            "30 February 1946",
            "12 March",
            "March April 1946",
            "123 March 1946",
            "12 Ma 1946",
            "12 Marchx 1946",
            "12 March 1946 soon",
            "12x March 1946",
        ] {
            assert_eq!(parse_date(s, DateOrder::Ymd), None, "{s}");
        }
    }
}
