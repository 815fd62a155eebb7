//! A walker over a spanned TOML tree that checks shape and types by hand, so
//! that *every* problem in a file is reported at once with its line and
//! column (serde stops at the first), and unknown keys get a "did you mean".
//!
//! Pure: it reads a string that the caller loaded.

use super::error::{nearest, Reporter};
use std::collections::BTreeSet;
use std::ops::Range;
use toml::de::{DeTable, DeValue};
use toml::Spanned;

/// A TOML value with its place.
pub type Node<'i> = Spanned<DeValue<'i>>;

/// One table being read: remembers which keys were asked for, so that
/// [`Walker::finish`] can report the rest as unknown.
pub struct Table<'t, 'i> {
    pub map: &'t DeTable<'i>,
    pub path: String,
    pub span: Range<usize>,
    seen: BTreeSet<String>,
}

impl<'t, 'i> Table<'t, 'i> {
    pub fn new(map: &'t DeTable<'i>, path: impl Into<String>, span: Range<usize>) -> Self {
        Self {
            map,
            path: path.into(),
            span,
            seen: BTreeSet::new(),
        }
    }

    pub fn key_path(&self, key: &str) -> String {
        if self.path.is_empty() {
            key.to_string()
        } else {
            format!("{}.{key}", self.path)
        }
    }

    /// The raw node for `key`, marking it as known.
    pub fn get(&mut self, key: &str) -> Option<&'t Node<'i>> {
        self.seen.insert(key.to_string());
        self.map.get(key)
    }

    pub fn has(&self, key: &str) -> bool {
        self.map.get(key).is_some()
    }
}

/// A value that was read, with its byte span for later range errors.
#[derive(Debug, Clone, PartialEq)]
pub struct At<T> {
    pub value: T,
    pub span: Range<usize>,
}

pub fn type_name(v: &DeValue<'_>) -> &'static str {
    match v {
        DeValue::String(_) => "a string",
        DeValue::Integer(_) => "an integer",
        DeValue::Float(_) => "a number",
        DeValue::Boolean(_) => "a boolean",
        DeValue::Datetime(_) => "a date-time",
        DeValue::Array(_) => "an array",
        DeValue::Table(_) => "a table",
    }
}

/// Typed reads that record an error and return `None` on the wrong type.
pub struct Walker<'r, 's> {
    pub rep: &'r mut Reporter<'s>,
    /// Secrets read from `*_file` keys: (key path, file), so that `load`
    /// can warn about a secret file every user may read.
    pub secret_files: Vec<(String, std::path::PathBuf)>,
}

impl<'r, 's> Walker<'r, 's> {
    pub fn new(rep: &'r mut Reporter<'s>) -> Self {
        Self {
            rep,
            secret_files: Vec::new(),
        }
    }

    pub fn error(
        &mut self,
        span: &Range<usize>,
        key: &str,
        msg: impl Into<String>,
        hint: Option<String>,
    ) {
        self.rep.at(span.start, key, msg, hint);
    }

    fn wrong_type(&mut self, node: &Node<'_>, key: &str, expected: &str) {
        let found = type_name(node.get_ref());
        self.rep.at(
            node.span().start,
            key,
            format!("expected {expected}, found {found}"),
            None,
        );
    }

    /// Reports a key that is required but absent, at the table's header.
    pub fn missing(&mut self, t: &Table<'_, '_>, key: &str, hint: &str) {
        self.rep.at(
            t.span.start,
            &t.key_path(key),
            "is required but missing",
            Some(hint.to_string()),
        );
    }

    pub fn str(&mut self, t: &mut Table<'_, '_>, key: &str) -> Option<At<String>> {
        let node = t.get(key)?;
        self.node_str(node, &t.key_path(key))
    }

    pub fn node_str(&mut self, node: &Node<'_>, key: &str) -> Option<At<String>> {
        match node.get_ref() {
            DeValue::String(s) => Some(At {
                value: s.to_string(),
                span: node.span(),
            }),
            _ => {
                self.wrong_type(node, key, "a string");
                None
            }
        }
    }

    pub fn req_str(&mut self, t: &mut Table<'_, '_>, key: &str, hint: &str) -> Option<At<String>> {
        if !t.has(key) {
            t.get(key);
            self.missing(t, key, hint);
            return None;
        }
        self.str(t, key)
    }

    pub fn bool(&mut self, t: &mut Table<'_, '_>, key: &str) -> Option<At<bool>> {
        let node = t.get(key)?;
        match node.get_ref() {
            DeValue::Boolean(b) => Some(At {
                value: *b,
                span: node.span(),
            }),
            _ => {
                self.wrong_type(node, &t.key_path(key), "true or false");
                None
            }
        }
    }

    /// A number: integers are accepted where a number is wanted.
    pub fn f64(&mut self, t: &mut Table<'_, '_>, key: &str) -> Option<At<f64>> {
        let node = t.get(key)?;
        self.node_f64(node, &t.key_path(key))
    }

    pub fn node_f64(&mut self, node: &Node<'_>, key: &str) -> Option<At<f64>> {
        let value = match node.get_ref() {
            DeValue::Float(f) => f.as_str().replace('_', "").parse::<f64>().ok(),
            DeValue::Integer(i) => i64::from_str_radix(&i.as_str().replace('_', ""), i.radix())
                .ok()
                .map(|v| v as f64),
            _ => {
                self.wrong_type(node, key, "a number");
                return None;
            }
        };
        match value {
            Some(v) if v.is_finite() => Some(At {
                value: v,
                span: node.span(),
            }),
            _ => {
                self.rep
                    .at(node.span().start, key, "is not a finite number", None);
                None
            }
        }
    }

    /// A whole number in `[min, max]`.
    pub fn int(&mut self, t: &mut Table<'_, '_>, key: &str, min: i64, max: i64) -> Option<At<i64>> {
        let node = t.get(key)?;
        let path = t.key_path(key);
        let DeValue::Integer(i) = node.get_ref() else {
            self.wrong_type(node, &path, "a whole number");
            return None;
        };
        match i64::from_str_radix(&i.as_str().replace('_', ""), i.radix()) {
            Ok(v) if (min..=max).contains(&v) => Some(At {
                value: v,
                span: node.span(),
            }),
            _ => {
                self.rep.at(
                    node.span().start,
                    &path,
                    format!("must be a whole number from {min} to {max}"),
                    None,
                );
                None
            }
        }
    }

    /// A number in `[min, max]` (closed), with a hint on failure.
    pub fn f64_in(
        &mut self,
        t: &mut Table<'_, '_>,
        key: &str,
        min: f64,
        max: f64,
        hint: &str,
    ) -> Option<f64> {
        let at = self.f64(t, key)?;
        if at.value < min || at.value > max {
            self.error(
                &at.span,
                &t.key_path(key),
                format!("{} is out of range: must be from {min} to {max}", at.value),
                Some(hint.to_string()),
            );
            return None;
        }
        Some(at.value)
    }

    /// A number greater than zero (and at most `max`).
    pub fn positive(
        &mut self,
        t: &mut Table<'_, '_>,
        key: &str,
        max: f64,
        hint: &str,
    ) -> Option<f64> {
        let at = self.f64(t, key)?;
        if at.value <= 0.0 || at.value > max {
            self.error(
                &at.span,
                &t.key_path(key),
                format!(
                    "{} is out of range: must be greater than 0 and at most {max}",
                    at.value
                ),
                Some(hint.to_string()),
            );
            return None;
        }
        Some(at.value)
    }

    pub fn str_list(&mut self, t: &mut Table<'_, '_>, key: &str) -> Option<Vec<At<String>>> {
        let node = t.get(key)?;
        let path = t.key_path(key);
        let DeValue::Array(items) = node.get_ref() else {
            self.wrong_type(node, &path, "an array of strings");
            return None;
        };
        let mut out = Vec::new();
        for (i, item) in items.iter().enumerate() {
            if let Some(s) = self.node_str(item, &format!("{path}[{}]", i + 1)) {
                out.push(s);
            }
        }
        Some(out)
    }

    /// A sub-table (a `[section]` or an inline table).
    pub fn table<'t, 'i>(&mut self, t: &mut Table<'t, 'i>, key: &str) -> Option<Table<'t, 'i>> {
        let node = t.get(key)?;
        let path = t.key_path(key);
        self.node_table(node, path)
    }

    pub fn node_table<'t, 'i>(
        &mut self,
        node: &'t Node<'i>,
        path: String,
    ) -> Option<Table<'t, 'i>> {
        match node.get_ref() {
            DeValue::Table(map) => Some(Table::new(map, path, node.span())),
            _ => {
                self.wrong_type(node, &path, "a table");
                None
            }
        }
    }

    /// An array of tables (`[[name]]`).
    pub fn tables<'t, 'i>(&mut self, t: &mut Table<'t, 'i>, key: &str) -> Vec<Table<'t, 'i>> {
        let Some(node) = t.get(key) else {
            return Vec::new();
        };
        let path = t.key_path(key);
        let DeValue::Array(items) = node.get_ref() else {
            self.wrong_type(node, &path, "an array of tables (write [[{key}]])");
            return Vec::new();
        };
        items
            .iter()
            .enumerate()
            .filter_map(|(i, item)| self.node_table(item, format!("{path}[{}]", i + 1)))
            .collect()
    }

    /// Reports every key of `t` that was never asked for.
    pub fn finish(&mut self, t: Table<'_, '_>, known: &[&str]) {
        for (key, _) in t.map.iter() {
            let name: &str = key.get_ref();
            if !t.seen.contains(name) {
                let hint = nearest(name, known)
                    .map(|k| format!("did you mean `{k}`?"))
                    .or_else(|| Some(format!("known keys here: {}", known.join(", "))));
                self.rep
                    .at(key.span().start, &t.key_path(name), "unknown key", hint);
            }
        }
    }
}
