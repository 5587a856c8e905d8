//! Choosing what a run covers: filters by scheme, operation, dtype and case id pattern,
//! and one part of N, so that N jobs together cover every selected case exactly once.
//!
//! The order is fixed: the filters first, then the part. Suite cases (and vector files,
//! in file-name order) that pass the filters are dealt out round-robin: the case at
//! position `p` of the filtered list belongs to part `p mod N + 1`, which keeps the parts
//! within one case of each other in size and spreads neighbouring (similar, equally
//! expensive) cases over different parts. Random cases are split by index instead: the
//! fuzzer draws the same sequence in every part from the same seed, and part `I` of `N`
//! runs the contiguous indices `⌊(I-1)·F/N⌋ .. ⌊I·F/N⌋` of the `F` random cases, so the
//! parts together run exactly the cases one unsplit run would.

use std::fmt;
use std::ops::Range;
use std::str::FromStr;

use crate::case::{Case, OperationKind};
use crate::error::{Error, Result};
use crate::math::precision::Dtype;
use crate::scheme::Scheme;

/// One part of a run split `count` ways (`index` from 1 to `count`), written `I/N`.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Part {
    index: usize,
    count: usize,
}

impl Part {
    /// Part `index` of `count` (1-based); an error unless `1 <= index <= count`.
    pub fn new(index: usize, count: usize) -> Result<Part> {
        if count == 0 || index == 0 || index > count {
            return Err(Error::param(
                "part",
                "I/N with 1 <= I <= N (for example 2/4)",
                format!("{index}/{count}"),
            ));
        }
        Ok(Part { index, count })
    }

    /// The whole run: part 1 of 1.
    pub const fn whole() -> Part {
        Part { index: 1, count: 1 }
    }

    /// Whether this is the whole run (1/1).
    pub fn is_whole(self) -> bool {
        self.count == 1
    }

    /// `I`, from 1 to `N`.
    pub fn index(self) -> usize {
        self.index
    }

    /// `N`, the number of parts.
    pub fn count(self) -> usize {
        self.count
    }

    /// Whether the case at `position` of a filtered list belongs to this part
    /// (round-robin).
    pub fn holds(self, position: usize) -> bool {
        position % self.count == self.index - 1
    }

    /// This part's contiguous share of the indices `0..total` (random cases).
    pub fn range(self, total: usize) -> Range<usize> {
        let at = |i: usize| (total as u128 * i as u128 / self.count as u128) as usize;
        at(self.index - 1)..at(self.index)
    }
}

impl Default for Part {
    fn default() -> Self {
        Part::whole()
    }
}

impl fmt::Display for Part {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "{}/{}", self.index, self.count)
    }
}

impl FromStr for Part {
    type Err = Error;

    /// `I/N`, two decimal integers with `1 <= I <= N`.
    fn from_str(text: &str) -> Result<Part> {
        let bad = || {
            Error::param(
                "part",
                "I/N with 1 <= I <= N (for example 2/4)",
                format!("{text:?}"),
            )
        };
        let (index, count) = text.split_once('/').ok_or_else(bad)?;
        let number = |s: &str| -> Result<usize> {
            if s.is_empty() || !s.bytes().all(|b| b.is_ascii_digit()) {
                return Err(bad());
            }
            s.parse().map_err(|_| bad())
        };
        Part::new(number(index.trim())?, number(count.trim())?).map_err(|_| bad())
    }
}

/// A case id pattern: `*` stands for any run of characters (also none), `?` for one
/// character; everything else stands for itself. It matches the whole id.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct IdPattern(String);

impl IdPattern {
    /// Whether `id` matches the whole pattern.
    pub fn matches(&self, id: &str) -> bool {
        glob_match(self.0.as_bytes(), id.as_bytes())
    }

    /// The pattern as written.
    pub fn as_str(&self) -> &str {
        &self.0
    }
}

impl FromStr for IdPattern {
    type Err = Error;

    fn from_str(text: &str) -> Result<IdPattern> {
        if text.is_empty() {
            return Err(Error::param(
                "id",
                "a non-empty pattern (* and ? are wildcards)",
                "\"\"",
            ));
        }
        Ok(IdPattern(text.to_string()))
    }
}

impl fmt::Display for IdPattern {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(&self.0)
    }
}

/// `*` and `?` wildcard matching of the whole `text`, iterative with one backtrack point
/// (linear in practice, never exponential). Bytes, so `?` is one byte of UTF-8: ids are
/// ASCII (`[A-Za-z0-9._-]`).
fn glob_match(pattern: &[u8], text: &[u8]) -> bool {
    let (mut p, mut t) = (0, 0);
    let mut star: Option<(usize, usize)> = None;
    while t < text.len() {
        match pattern.get(p) {
            Some(b'*') => {
                star = Some((p, t));
                p += 1;
            }
            Some(&c) if c == b'?' || c == text[t] => {
                p += 1;
                t += 1;
            }
            _ => match star {
                Some((sp, st)) => {
                    p = sp + 1;
                    t = st + 1;
                    star = Some((sp, st + 1));
                }
                None => return false,
            },
        }
    }
    pattern[p..].iter().all(|&c| c == b'*')
}

/// Which cases a run keeps: each list, when not empty, must contain the case's value
/// (an empty list keeps every value); `ids` keep a case whose id matches any pattern.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct Filter {
    /// Schemes to keep.
    pub schemes: Vec<Scheme>,
    /// Operations to keep.
    pub operations: Vec<OperationKind>,
    /// Case dtypes to keep (the dtype the case is written for).
    pub dtypes: Vec<Dtype>,
    /// Case id patterns.
    pub ids: Vec<IdPattern>,
}

impl Filter {
    /// Whether the filter keeps everything.
    pub fn is_empty(&self) -> bool {
        self.schemes.is_empty()
            && self.operations.is_empty()
            && self.dtypes.is_empty()
            && self.ids.is_empty()
    }

    /// Whether the scheme, operation and dtype criteria keep these values.
    pub fn keeps_kind(&self, scheme: Scheme, operation: OperationKind, dtype: Dtype) -> bool {
        (self.schemes.is_empty() || self.schemes.contains(&scheme))
            && (self.operations.is_empty() || self.operations.contains(&operation))
            && (self.dtypes.is_empty() || self.dtypes.contains(&dtype))
    }

    /// Whether the id patterns keep `id`.
    pub fn keeps_id(&self, id: &str) -> bool {
        self.ids.is_empty() || self.ids.iter().any(|p| p.matches(id))
    }

    /// Whether the filter keeps `case`.
    pub fn keeps(&self, case: &Case) -> bool {
        self.keeps_kind(case.scheme.scheme(), case.operation.kind(), case.dtype)
            && self.keeps_id(&case.id)
    }

    /// Whether only ids are filtered (a case that could not be read can still be judged).
    pub fn ids_only(&self) -> bool {
        self.schemes.is_empty() && self.operations.is_empty() && self.dtypes.is_empty()
    }

    /// The filter as the options that make it, e.g. `--scheme alibi,rotary --id 'x.*'`.
    pub fn describe(&self) -> String {
        self.describe_with("--id")
    }

    /// [`describe`](Self::describe) with the id patterns under another option name.
    pub fn describe_with(&self, id_option: &str) -> String {
        let mut parts = Vec::new();
        let join = |names: Vec<&str>| names.join(",");
        if !self.schemes.is_empty() {
            parts.push(format!(
                "--scheme {}",
                join(self.schemes.iter().map(|s| s.name()).collect())
            ));
        }
        if !self.operations.is_empty() {
            parts.push(format!(
                "--operation {}",
                join(self.operations.iter().map(|o| o.name()).collect())
            ));
        }
        if !self.dtypes.is_empty() {
            parts.push(format!(
                "--dtype {}",
                join(self.dtypes.iter().map(|d| d.name()).collect())
            ));
        }
        for id in &self.ids {
            parts.push(format!("{id_option} '{id}'"));
        }
        parts.join(" ")
    }
}

/// Filters and a part: what one run covers.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct Selection {
    /// Which cases to keep.
    pub filter: Filter,
    /// Which part of the kept cases to run.
    pub part: Part,
}

/// What [`Selection::apply`] kept, with the counts a report states.
#[derive(Debug, Clone, PartialEq)]
pub struct Selected<T> {
    /// The items of this part, in their original order.
    pub items: Vec<T>,
    /// Items before selection.
    pub total: usize,
    /// Items the filters kept (in every part together).
    pub kept: usize,
}

impl<T> Selected<T> {
    /// One line for a report: how many of how many cases were selected, by what.
    pub fn note(&self, what: &str, selection: &Selection) -> String {
        let mut text = format!("selection: {} of {} {what}", self.items.len(), self.total);
        if !selection.filter.is_empty() {
            text.push_str(&format!(
                "; the filters ({}) keep {}, leave out {}",
                selection.filter.describe(),
                self.kept,
                self.total - self.kept
            ));
        }
        if !selection.part.is_whole() {
            text.push_str(&format!(
                "; part {} holds {} of the {} kept, the other parts {}",
                selection.part,
                self.items.len(),
                self.kept,
                self.kept - self.items.len()
            ));
        }
        text
    }
}

impl Selection {
    /// Everything: no filter, the whole run.
    pub fn everything() -> Self {
        Selection::default()
    }

    /// Whether the selection keeps every case.
    pub fn is_everything(&self) -> bool {
        self.filter.is_empty() && self.part.is_whole()
    }

    /// Keeps the items whose case the filter keeps (`keep` decides for each), then this
    /// part's share of them, round-robin.
    pub fn apply<T>(&self, items: Vec<T>, keep: impl Fn(&Filter, &T) -> bool) -> Selected<T> {
        let total = items.len();
        let kept: Vec<T> = items
            .into_iter()
            .filter(|item| keep(&self.filter, item))
            .collect();
        let count = kept.len();
        let items = kept
            .into_iter()
            .enumerate()
            .filter(|(position, _)| self.part.holds(*position))
            .map(|(_, item)| item)
            .collect();
        Selected {
            items,
            total,
            kept: count,
        }
    }

    /// [`apply`](Self::apply) to suite cases; an error naming the filters when they keep
    /// none of a non-empty list.
    pub fn cases(&self, cases: Vec<Case>, what: &str) -> Result<Selected<Case>> {
        let selected = self.apply(cases, |filter, case| filter.keeps(case));
        if selected.kept == 0 && selected.total > 0 {
            return Err(Error::format(
                self.filter.describe(),
                format!(
                    "these filters select none of the {} {what}; nothing to run",
                    selected.total
                ),
            ));
        }
        Ok(selected)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn part_parses_and_refuses_what_is_not_i_of_n() {
        let p: Part = "2/4".parse().unwrap();
        assert_eq!((p.index(), p.count()), (2, 4));
        assert_eq!(" 1 / 1 ".trim().parse::<Part>().unwrap(), Part::whole());
        for bad in [
            "0/0", "3/2", "0/3", "1/0", "1", "/2", "1/", "a/b", "-1/2", "1/2/3", "",
        ] {
            let e = bad.parse::<Part>().unwrap_err().to_string();
            assert!(
                e.contains("part") && e.contains("1 <= I <= N"),
                "{bad}: {e}"
            );
        }
    }

    #[test]
    fn glob_matches_whole_ids() {
        let m = |p: &str, t: &str| p.parse::<IdPattern>().unwrap().matches(t);
        assert!(m("rotary.*", "rotary.encode.adjacent"));
        assert!(!m("rotary.*", "xl_rotary.encode"));
        assert!(m("*.f32", "alibi.scores.f32"));
        assert!(!m("*.f32", "alibi.scores.f32x"));
        assert!(m("a?c", "abc"));
        assert!(!m("a?c", "ac"));
        assert!(m("*", ""));
        assert!(m("a*b*c", "a__b__b__c"));
        assert!(!m("a*b*c", "a__b__b__"));
        assert!(m("exact", "exact"));
        assert!(!m("exact", "exactly"));
        assert!("".parse::<IdPattern>().is_err());
    }
}
