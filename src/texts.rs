//! A column of texts in one buffer: the cells of an input table and the record ids.
//!
//! One `String` per cell costs 24 bytes of header and an allocation of at least 32 bytes, four
//! to six times what a name or an id holds; at a million rows a side with nine columns that
//! was about 0.9 GB, held for the whole run. Here a column is its texts end to end and the end
//! offset of each (8 bytes a cell).

use std::ops::Index;

/// Texts in one buffer, indexed by row.
#[derive(Clone, Debug, Default, PartialEq, Eq)]
pub struct Texts {
    text: String,
    ends: Vec<u64>,
}

/// An empty column, for a name a table does not hold.
pub static EMPTY: Texts = Texts::new();

impl Texts {
    /// No texts.
    pub const fn new() -> Texts {
        Texts {
            text: String::new(),
            ends: Vec::new(),
        }
    }

    /// Room for `rows` texts of `bytes` bytes in all.
    pub fn with_capacity(rows: usize, bytes: usize) -> Texts {
        Texts {
            text: String::with_capacity(bytes),
            ends: Vec::with_capacity(rows),
        }
    }

    /// `rows` empty texts.
    pub fn blank(rows: usize) -> Texts {
        Texts {
            text: String::new(),
            ends: vec![0; rows],
        }
    }

    /// Appends one text.
    pub fn push(&mut self, s: &str) {
        self.text.push_str(s);
        self.ends.push(self.text.len() as u64);
    }

    /// Number of texts.
    pub fn len(&self) -> usize {
        self.ends.len()
    }

    /// True when there is no text.
    pub fn is_empty(&self) -> bool {
        self.ends.is_empty()
    }

    /// The text of row `i`, if there is one.
    pub fn get(&self, i: usize) -> Option<&str> {
        let end = *self.ends.get(i)? as usize;
        let start = if i == 0 { 0 } else { self.ends[i - 1] as usize };
        Some(&self.text[start..end])
    }

    /// The texts in row order.
    pub fn iter(&self) -> impl ExactSizeIterator<Item = &str> + '_ {
        (0..self.len()).map(|i| &self[i])
    }

    /// The texts as owned strings (for tests and small tables).
    pub fn to_strings(&self) -> Vec<String> {
        self.iter().map(str::to_string).collect()
    }
}

impl Index<usize> for Texts {
    type Output = str;

    /// The text of row `i`; panics past the end, as a slice does.
    fn index(&self, i: usize) -> &str {
        let end = self.ends[i] as usize;
        let start = if i == 0 { 0 } else { self.ends[i - 1] as usize };
        &self.text[start..end]
    }
}

impl<S: AsRef<str>> FromIterator<S> for Texts {
    fn from_iter<I: IntoIterator<Item = S>>(iter: I) -> Texts {
        let mut t = Texts::new();
        for s in iter {
            t.push(s.as_ref());
        }
        t
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn texts_keep_each_cell_apart() {
        let t: Texts = ["Ann", "", "Bo B", "é"].into_iter().collect();
        assert_eq!(t.len(), 4);
        assert_eq!(&t[0], "Ann");
        assert_eq!(&t[1], "");
        assert_eq!(&t[2], "Bo B");
        assert_eq!(t.get(3), Some("é"));
        assert_eq!(t.get(4), None);
        assert_eq!(t.iter().collect::<Vec<_>>(), ["Ann", "", "Bo B", "é"]);
        assert!(EMPTY.is_empty() && EMPTY.get(0).is_none());
    }
}
