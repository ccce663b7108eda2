//! Reading a TOML section key by key, so that every problem names its section, key, value, allowed range and
//! reason ("preamp stage 2: cathode_resistor = 0 ohm: must be at least 10 ohm"), instead of a parser's line and
//! column. Unknown keys are refused with the list of known ones (a typo must not silently fall back to a default).

use super::CircuitError;
use crate::units::{clip, si};
use std::cell::RefCell;

/// Longest user text echoed back in a message.
const ECHO_CHARS: usize = 40;

/// An allowed range with its unit and the reason for it.
#[derive(Clone, Copy, Debug)]
pub struct Range {
    pub low: f64,
    pub high: f64,
    pub unit: &'static str,
    pub why: &'static str,
}

impl Range {
    pub const fn new(low: f64, high: f64, unit: &'static str, why: &'static str) -> Range {
        Range {
            low,
            high,
            unit,
            why,
        }
    }

    /// "1 kohm .. 10 Mohm".
    pub fn describe(&self) -> String {
        format!(
            "{} .. {}",
            si(self.low, self.unit),
            si(self.high, self.unit)
        )
    }

    /// Check `value` of `key` in `section`, with a message naming all of it.
    pub fn check(&self, section: &str, key: &str, value: f64) -> Result<f64, CircuitError> {
        let shown = si(value, self.unit);
        let problem = if !value.is_finite() {
            Some("must be a finite number".to_string())
        } else if value < self.low {
            Some(format!("must be at least {}", si(self.low, self.unit)))
        } else if value > self.high {
            Some(format!("must be at most {}", si(self.high, self.unit)))
        } else {
            None
        };
        match problem {
            None => Ok(value),
            Some(p) => Err(CircuitError(format!(
                "{section}: {key} = {shown}: {p} ({}: {})",
                self.describe(),
                self.why
            ))),
        }
    }
}

/// A TOML table being read, with the keys taken so far.
pub struct Section<'a> {
    /// How messages name it: "gain_stage", "preamp stage 2", "clamp position 1 (\"off\")".
    pub name: String,
    table: &'a toml::Table,
    taken: RefCell<Vec<&'static str>>,
}

/// What a TOML value is, for messages.
fn kind(value: &toml::Value) -> &'static str {
    match value {
        toml::Value::String(_) => "text",
        toml::Value::Integer(_) | toml::Value::Float(_) => "a number",
        toml::Value::Boolean(_) => "true/false",
        toml::Value::Datetime(_) => "a date",
        toml::Value::Array(_) => "a list",
        toml::Value::Table(_) => "a table",
    }
}

/// The value as written, short.
fn shown(value: &toml::Value) -> String {
    clip(&value.to_string(), ECHO_CHARS)
}

impl<'a> Section<'a> {
    pub fn new(name: impl Into<String>, table: &'a toml::Table) -> Self {
        Section {
            name: name.into(),
            table,
            taken: RefCell::new(Vec::new()),
        }
    }

    fn raw(&self, key: &'static str) -> Option<&'a toml::Value> {
        self.taken.borrow_mut().push(key);
        self.table.get(key)
    }

    pub fn has(&self, key: &str) -> bool {
        self.table.contains_key(key)
    }

    fn error(&self, text: String) -> CircuitError {
        CircuitError(format!("{}: {text}", self.name))
    }

    /// A number within `range`, or None when absent.
    pub fn optional_number(
        &self,
        key: &'static str,
        range: Range,
    ) -> Result<Option<f64>, CircuitError> {
        match self.raw(key) {
            None => Ok(None),
            Some(toml::Value::Float(v)) => range.check(&self.name, key, *v).map(Some),
            Some(toml::Value::Integer(v)) => range.check(&self.name, key, *v as f64).map(Some),
            Some(other) => Err(self.error(format!(
                "{key} = {}: expected a number in {} ({}), found {}",
                shown(other),
                range.unit,
                range.describe(),
                kind(other)
            ))),
        }
    }

    /// A number within `range` that must be there.
    pub fn number(&self, key: &'static str, range: Range) -> Result<f64, CircuitError> {
        self.optional_number(key, range)?.ok_or_else(|| {
            self.error(format!(
                "{key} is missing{}: give it in {} ({}; {})",
                self.misspelt(key),
                range.unit,
                range.describe(),
                range.why
            ))
        })
    }

    /// " (is 'plate_resistr' a misspelling of it?)" when the table has a key close to `key`.
    fn misspelt(&self, key: &str) -> String {
        self.table
            .keys()
            .find(|k| k.as_str() != key && edit_distance(k, key) <= 2)
            .map(|k| format!(" (is '{}' a misspelling of it?)", clip(k, ECHO_CHARS)))
            .unwrap_or_default()
    }

    /// A number that is 0 (meaning "none") or within `range` (whose reason should say so).
    pub fn number_or_zero(&self, key: &'static str, range: Range) -> Result<f64, CircuitError> {
        let zero = match self.table.get(key) {
            Some(toml::Value::Float(v)) => *v == 0.0,
            Some(toml::Value::Integer(v)) => *v == 0,
            _ => false,
        };
        if zero {
            self.taken.borrow_mut().push(key);
            return Ok(0.0);
        }
        self.number(key, range)
    }

    /// Text, or None when absent.
    pub fn optional_text(&self, key: &'static str) -> Result<Option<&'a str>, CircuitError> {
        match self.raw(key) {
            None => Ok(None),
            Some(toml::Value::String(s)) => Ok(Some(s.as_str())),
            Some(other) => Err(self.error(format!(
                "{key} = {}: expected text in quotes, found {}",
                shown(other),
                kind(other)
            ))),
        }
    }

    /// One of `choices` (text), or None when absent.
    pub fn optional_choice<T: Copy>(
        &self,
        key: &'static str,
        choices: &[(&str, T)],
    ) -> Result<Option<T>, CircuitError> {
        let Some(text) = self.optional_text(key)? else {
            return Ok(None);
        };
        choices
            .iter()
            .find(|(name, _)| *name == text)
            .map(|(_, v)| Some(*v))
            .ok_or_else(|| {
                let names: Vec<String> = choices.iter().map(|(n, _)| format!("\"{n}\"")).collect();
                self.error(format!(
                    "{key} = \"{}\": expected one of {}",
                    clip(text, ECHO_CHARS),
                    names.join(", ")
                ))
            })
    }

    /// One of `choices` that must be there.
    pub fn choice<T: Copy>(
        &self,
        key: &'static str,
        choices: &[(&str, T)],
    ) -> Result<T, CircuitError> {
        self.optional_choice(key, choices)?.ok_or_else(|| {
            let names: Vec<String> = choices.iter().map(|(n, _)| format!("\"{n}\"")).collect();
            self.error(format!(
                "{key} is missing: give one of {}",
                names.join(", ")
            ))
        })
    }

    /// A sub-table (a `[section]` or an inline `{ ... }`), or None when absent.
    pub fn optional_table(
        &self,
        key: &'static str,
        name: impl Into<String>,
    ) -> Result<Option<Section<'a>>, CircuitError> {
        match self.raw(key) {
            None => Ok(None),
            Some(toml::Value::Table(t)) => Ok(Some(Section::new(name, t))),
            Some(other) => Err(self.error(format!(
                "{key} = {}: expected a table ({key} = {{ ... }} or a [{key}] section), found {}",
                shown(other),
                kind(other)
            ))),
        }
    }

    /// A sub-table that must be there.
    pub fn table(&self, key: &'static str, what: &str) -> Result<Section<'a>, CircuitError> {
        self.optional_table(key, key)?
            .ok_or_else(|| CircuitError(format!("the [{key}] section is missing: it holds {what}")))
    }

    /// An array of tables (`[[key]]`), empty when absent; at most `limit` entries.
    pub fn tables(
        &self,
        key: &'static str,
        limit: usize,
        why: &str,
    ) -> Result<Vec<&'a toml::Table>, CircuitError> {
        match self.raw(key) {
            None => Ok(Vec::new()),
            Some(toml::Value::Array(items)) => {
                if items.len() > limit {
                    return Err(self.error(format!(
                        "{} [[{key}]] entries: at most {limit} ({why})",
                        items.len()
                    )));
                }
                items
                    .iter()
                    .enumerate()
                    .map(|(i, item)| match item {
                        toml::Value::Table(t) => Ok(t),
                        other => Err(self.error(format!(
                            "{key} entry {}: expected a table, found {}",
                            i + 1,
                            kind(other)
                        ))),
                    })
                    .collect()
            }
            Some(other) => Err(self.error(format!(
                "{key}: expected [[{key}]] tables, found {}",
                kind(other)
            ))),
        }
    }

    /// Refuse keys nobody took (typos, keys of another section).
    pub fn finish(&self) -> Result<(), CircuitError> {
        let taken = self.taken.borrow();
        for key in self.table.keys() {
            if !taken.iter().any(|t| t == key) {
                let mut known: Vec<&str> = taken.clone();
                known.sort_unstable();
                known.dedup();
                return Err(self.error(format!(
                    "unknown key '{}' (known here: {})",
                    clip(key, ECHO_CHARS),
                    known.join(", ")
                )));
            }
        }
        Ok(())
    }
}

/// Levenshtein distance (insertions, deletions, substitutions), for spotting typos in key names.
fn edit_distance(a: &str, b: &str) -> usize {
    let b: Vec<char> = b.chars().collect();
    let mut row: Vec<usize> = (0..=b.len()).collect();
    for (i, ca) in a.chars().enumerate() {
        let mut previous = row[0];
        row[0] = i + 1;
        for (j, cb) in b.iter().enumerate() {
            let current = row[j + 1];
            row[j + 1] = if ca == *cb {
                previous
            } else {
                1 + previous.min(row[j]).min(current)
            };
            previous = current;
        }
    }
    row[b.len()]
}
