//! Non-fatal findings collected while reading and analysing a log. Each kind is counted and
//! shown once, with its first occurrence, in every report format.

use serde::Serialize;
use std::collections::BTreeMap;

/// One kind of finding with how often it occurred.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Warning {
    /// Stable machine-readable code, e.g. `truncated_without_bootstrap`.
    pub code: &'static str,
    /// Human sentence describing the finding and its consequence.
    pub message: String,
    pub count: u64,
    /// Where it was first seen (episode id and line), when that helps.
    pub first: Option<String>,
}

#[derive(Debug, Clone, Default, PartialEq, Serialize)]
#[serde(transparent)]
pub struct Warnings {
    items: BTreeMap<&'static str, Warning>,
}

impl Warnings {
    /// Counts one occurrence; the message and location of the first occurrence are kept.
    pub fn add(&mut self, code: &'static str, message: impl Into<String>, first: Option<String>) {
        self.items
            .entry(code)
            .and_modify(|w| w.count += 1)
            .or_insert_with(|| Warning {
                code,
                message: message.into(),
                count: 1,
                first,
            });
    }

    /// Counts `n` occurrences at once (for findings decided after the whole log is read).
    pub fn add_many(
        &mut self,
        code: &'static str,
        message: impl Into<String>,
        first: Option<String>,
        n: u64,
    ) {
        if n > 0 {
            self.add(code, message, first);
            self.items.get_mut(code).expect("just added").count += n - 1;
        }
    }

    /// Appends `more` to the message of the finding `code`, when it was counted: for advice
    /// that depends on the command reporting it (the reader that counts it cannot know).
    pub fn amend(&mut self, code: &str, more: &str) {
        if let Some(w) = self.items.get_mut(code) {
            w.message.push_str(more);
        }
    }

    /// Replaces `from` by `to` in the message of the finding `code`, when it was counted: for
    /// a command that reuses another's pass but gives other advice (shard files).
    pub fn reword(&mut self, code: &str, from: &str, to: &str) {
        if let Some(w) = self.items.get_mut(code) {
            w.message = w.message.replace(from, to);
        }
    }

    /// Drops a finding that a later stage made moot.
    pub fn remove(&mut self, code: &str) {
        self.items.remove(code);
    }

    pub fn iter(&self) -> impl Iterator<Item = &Warning> {
        self.items.values()
    }

    pub fn count(&self, code: &str) -> u64 {
        self.items.get(code).map_or(0, |w| w.count)
    }

    pub fn is_empty(&self) -> bool {
        self.items.is_empty()
    }

    pub fn extend(&mut self, other: &Warnings) {
        for w in other.iter() {
            self.items
                .entry(w.code)
                .and_modify(|mine| mine.count += w.count)
                .or_insert_with(|| w.clone());
        }
    }

    /// One line per warning, for text reports.
    pub fn lines(&self) -> Vec<String> {
        self.iter()
            .map(|w| {
                let times = if w.count == 1 {
                    "1 time".to_string()
                } else {
                    format!("{} times", w.count)
                };
                match &w.first {
                    Some(first) => format!("{} ({times}; first: {first})", w.message),
                    None => format!("{} ({times})", w.message),
                }
            })
            .collect()
    }
}
