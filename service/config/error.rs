//! Configuration errors: every one carries the file, line and column it
//! points at, the key, what is wrong and a hint saying what to do.

use std::fmt;
use std::path::{Path, PathBuf};

/// One problem found in a configuration or sites file.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct ConfigError {
    pub file: PathBuf,
    /// 1-based; 0 when the problem is not at a place in the file.
    pub line: usize,
    /// 1-based column (characters, not bytes).
    pub col: usize,
    /// Dotted key path, e.g. `subscriber[2].watch[1].channels`.
    pub key: String,
    pub message: String,
    pub hint: Option<String>,
}

impl fmt::Display for ConfigError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "{}", self.file.display())?;
        if self.line > 0 {
            write!(f, ":{}:{}", self.line, self.col)?;
        }
        if self.key.is_empty() {
            write!(f, ": {}", self.message)?;
        } else {
            write!(f, ": {}: {}", self.key, self.message)?;
        }
        if let Some(hint) = &self.hint {
            write!(f, " (hint: {hint})")?;
        }
        Ok(())
    }
}

/// Every problem found in one load, in file order.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct ConfigErrors(pub Vec<ConfigError>);

impl fmt::Display for ConfigErrors {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        let n = self.0.len();
        writeln!(
            f,
            "{n} problem{} in the configuration; outrider will not start until {} fixed:",
            if n == 1 { "" } else { "s" },
            if n == 1 { "it is" } else { "they are" }
        )?;
        for e in &self.0 {
            writeln!(f, "  {e}")?;
        }
        Ok(())
    }
}

impl std::error::Error for ConfigErrors {}

/// Maps byte offsets in a source text to 1-based line and column.
#[derive(Debug, Clone)]
pub struct LineIndex {
    starts: Vec<usize>,
}

impl LineIndex {
    pub fn new(src: &str) -> Self {
        let mut starts = vec![0];
        starts.extend(src.match_indices('\n').map(|(i, _)| i + 1));
        Self { starts }
    }

    /// Line and column (in characters) of byte `offset` in `src`.
    pub fn locate(&self, src: &str, offset: usize) -> (usize, usize) {
        let offset = offset.min(src.len());
        let line = match self.starts.binary_search(&offset) {
            Ok(i) => i,
            Err(i) => i - 1,
        };
        let start = self.starts[line];
        let col = src
            .get(start..offset)
            .map(|s| s.chars().count())
            .unwrap_or(offset - start);
        (line + 1, col + 1)
    }
}

/// Collects errors for one file.
#[derive(Debug)]
pub struct Reporter<'s> {
    pub file: PathBuf,
    pub src: &'s str,
    index: LineIndex,
    pub errors: Vec<ConfigError>,
}

impl<'s> Reporter<'s> {
    pub fn new(file: &Path, src: &'s str) -> Self {
        Self {
            file: file.to_path_buf(),
            src,
            index: LineIndex::new(src),
            errors: Vec::new(),
        }
    }

    /// Records an error at byte offset `at`.
    pub fn at(&mut self, at: usize, key: &str, message: impl Into<String>, hint: Option<String>) {
        let (line, col) = self.index.locate(self.src, at);
        self.errors.push(ConfigError {
            file: self.file.clone(),
            line,
            col,
            key: key.to_string(),
            message: message.into(),
            hint,
        });
    }

    /// Records an error at a line (1-based) and column.
    pub fn at_line(
        &mut self,
        line: usize,
        col: usize,
        key: &str,
        message: impl Into<String>,
        hint: Option<String>,
    ) {
        self.errors.push(ConfigError {
            file: self.file.clone(),
            line,
            col,
            key: key.to_string(),
            message: message.into(),
            hint,
        });
    }
}

/// The known key closest to `unknown` by edit distance, if it is close.
pub fn nearest<'a>(unknown: &str, known: &[&'a str]) -> Option<&'a str> {
    known
        .iter()
        .map(|k| (edit_distance(unknown, k), *k))
        .filter(|(d, k)| *d <= 2.max(k.len() / 3))
        .min()
        .map(|(_, k)| k)
}

fn edit_distance(a: &str, b: &str) -> usize {
    let a: Vec<char> = a.chars().collect();
    let b: Vec<char> = b.chars().collect();
    let mut prev: Vec<usize> = (0..=b.len()).collect();
    for (i, ca) in a.iter().enumerate() {
        let mut cur = vec![i + 1; b.len() + 1];
        for (j, cb) in b.iter().enumerate() {
            let sub = prev[j] + usize::from(ca != cb);
            cur[j + 1] = sub.min(prev[j + 1] + 1).min(cur[j] + 1);
        }
        prev = cur;
    }
    prev[b.len()]
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn locates_lines_and_columns() {
        let src = "a = 1\nbé = 2\n\nc";
        let idx = LineIndex::new(src);
        assert_eq!(idx.locate(src, 0), (1, 1));
        assert_eq!(idx.locate(src, 6), (2, 1));
        // 'é' is two bytes: the '=' after "bé " is column 4.
        assert_eq!(idx.locate(src, src.find('=').unwrap_or(0)), (1, 3));
        assert_eq!(idx.locate(src, 11), (2, 5));
        assert_eq!(idx.locate(src, src.len()), (4, 2));
    }

    #[test]
    fn suggests_near_keys_only() {
        assert_eq!(
            nearest("radius_kms", &["radius_km", "lat"]),
            Some("radius_km")
        );
        assert_eq!(nearest("zzzz", &["radius_km", "lat"]), None);
    }
}
