//! What `outrider replay` says on stderr: the per-subscriber summary of
//! notices (by trigger and disposition), what was read and refused from
//! each file, and a progress bar while it works when stderr is a terminal.
//!
//! Builds text; the caller writes it. Must not touch stdout (the notices
//! go there, one JSON object per line, and nothing else may).

use super::archive::FileStats;
use crate::config::Config;
use crate::notify::{Disposition, Notice, Trigger};
use std::collections::{BTreeMap, HashMap};
use std::fmt::Write as _;
use std::io::Write as _;
use std::time::{Duration, Instant};

/// Notices counted per subscriber, trigger and disposition.
#[derive(Debug, Clone)]
pub struct Summary {
    /// Subscriber ids in config order (every one is listed, with or
    /// without notices, so a setting that sends nothing shows as 0).
    subscribers: Vec<String>,
    index: HashMap<String, usize>,
    /// (subscriber index, trigger) -> [sent, folded, deferred].
    counts: BTreeMap<(usize, Trigger), [u64; 3]>,
}

fn slot(d: Disposition) -> usize {
    match d {
        Disposition::Sent => 0,
        Disposition::Folded => 1,
        Disposition::Deferred => 2,
    }
}

impl Summary {
    pub fn new(cfg: &Config) -> Self {
        let subscribers: Vec<String> = cfg.subscribers.iter().map(|s| s.id.clone()).collect();
        let index = subscribers
            .iter()
            .enumerate()
            .map(|(i, s)| (s.clone(), i))
            .collect();
        Summary {
            subscribers,
            index,
            counts: BTreeMap::new(),
        }
    }

    pub fn count(&mut self, n: &Notice) {
        let i = match self.index.get(&*n.subscriber_id) {
            Some(i) => *i,
            None => {
                // Not in the config (cannot happen: notices come from its
                // watches); listed anyway rather than dropped.
                self.subscribers.push(n.subscriber_id.to_string());
                self.index
                    .insert(n.subscriber_id.to_string(), self.subscribers.len() - 1);
                self.subscribers.len() - 1
            }
        };
        self.counts.entry((i, n.trigger)).or_default()[slot(n.disposition)] += 1;
    }

    /// [sent, folded, deferred] over everything.
    pub fn totals(&self) -> [u64; 3] {
        let mut t = [0; 3];
        for c in self.counts.values() {
            for k in 0..3 {
                t[k] += c[k];
            }
        }
        t
    }

    /// The table: one row per subscriber and trigger, a `-` row for a
    /// subscriber without notices, and a total row.
    pub fn render(&self) -> String {
        let mut rows: Vec<[String; 5]> = Vec::new();
        for (i, s) in self.subscribers.iter().enumerate() {
            let mine: Vec<_> = self
                .counts
                .range((i, Trigger::ALL[0])..)
                .take_while(|((j, _), _)| *j == i)
                .collect();
            if mine.is_empty() {
                rows.push([s.clone(), "-".into(), "0".into(), "0".into(), "0".into()]);
            }
            for ((_, trigger), c) in mine {
                rows.push([
                    s.clone(),
                    trigger.as_str().into(),
                    c[0].to_string(),
                    c[1].to_string(),
                    c[2].to_string(),
                ]);
            }
        }
        let t = self.totals();
        rows.push([
            "total".into(),
            "-".into(),
            t[0].to_string(),
            t[1].to_string(),
            t[2].to_string(),
        ]);
        let head = ["subscriber", "trigger", "sent", "folded", "deferred"];
        let mut width = head.map(str::len);
        for r in &rows {
            for (k, cell) in r.iter().enumerate() {
                width[k] = width[k].max(cell.len());
            }
        }
        let mut out = String::from("notices:\n");
        let mut line = |cells: [&str; 5]| {
            let _ = writeln!(
                out,
                "  {:<w0$}  {:<w1$}  {:>w2$}  {:>w3$}  {:>w4$}",
                cells[0],
                cells[1],
                cells[2],
                cells[3],
                cells[4],
                w0 = width[0],
                w1 = width[1],
                w2 = width[2],
                w3 = width[3],
                w4 = width[4],
            );
        };
        line(head);
        for r in &rows {
            line([&r[0], &r[1], &r[2], &r[3], &r[4]]);
        }
        out
    }
}

/// `1234567` -> `1,234,567`.
pub fn thousands(n: u64) -> String {
    let s = n.to_string();
    let mut out = String::with_capacity(s.len() + s.len() / 3);
    for (i, c) in s.chars().enumerate() {
        if i > 0 && (s.len() - i) % 3 == 0 {
            out.push(',');
        }
        out.push(c);
    }
    out
}

/// What was read from each file and what was refused, by reason with the
/// first line numbers and what the first was told.
pub fn render_files(files: &[FileStats]) -> String {
    let read: u64 = files.iter().map(|f| f.records).sum();
    let kept: u64 = files.iter().map(|f| f.kept).sum();
    let rejected: u64 = files.iter().map(FileStats::rejected_total).sum();
    let outside: u64 = files.iter().map(|f| f.outside_window).sum();
    let mut out = format!(
        "records: {} read, {} replayed, {} rejected, {} outside --from/--to\n",
        thousands(read),
        thousands(kept),
        thousands(rejected),
        thousands(outside)
    );
    for f in files {
        let _ = write!(
            out,
            "  {} ({}): {} read, {} replayed, {} rejected",
            f.path.display(),
            f.format.describe(),
            thousands(f.records),
            thousands(f.kept),
            thousands(f.rejected_total())
        );
        if f.outside_window > 0 {
            let _ = write!(out, ", {} outside --from/--to", thousands(f.outside_window));
        }
        if f.media_level_skipped > 0 {
            let _ = write!(
                out,
                ", {} media-level rows left out (the file has event-level rows for the same detections)",
                thousands(f.media_level_skipped)
            );
        }
        out.push('\n');
        for (reason, t) in &f.rejected {
            let lines: Vec<String> = t.lines.iter().map(u64::to_string).collect();
            let more = if t.count > t.lines.len() as u64 {
                ", ..."
            } else {
                ""
            };
            let _ = writeln!(
                out,
                "    rejected {}: {} (line{} {}{}): {}",
                reason.as_str(),
                thousands(t.count),
                if lines.len() == 1 { "" } else { "s" },
                lines.join(", "),
                more,
                t.example
            );
        }
    }
    out
}

/// A one-line progress bar on stderr, drawn only when stderr is a
/// terminal, at most ten times a second.
pub struct Progress {
    enabled: bool,
    last: Option<Instant>,
    drawn: bool,
}

const BAR: usize = 30;

impl Progress {
    pub fn new(enabled: bool) -> Self {
        Progress {
            enabled,
            last: None,
            drawn: false,
        }
    }

    /// `done` of `total` units of the phase `label`.
    pub fn show(&mut self, label: &str, done: u64, total: u64) {
        if !self.enabled {
            return;
        }
        if self
            .last
            .is_some_and(|t| t.elapsed() < Duration::from_millis(100))
        {
            return;
        }
        self.last = Some(Instant::now());
        let frac = if total == 0 {
            1.0
        } else {
            (done as f64 / total as f64).clamp(0.0, 1.0)
        };
        let full = (frac * BAR as f64).round() as usize;
        let bar: String = "#".repeat(full) + &"-".repeat(BAR - full);
        let mut err = std::io::stderr().lock();
        let _ = write!(err, "\r\x1b[2K{label} [{bar}] {:>3.0}%", frac * 100.0);
        let _ = err.flush();
        self.drawn = true;
    }

    /// Clears the bar so the summary starts on a clean line.
    pub fn clear(&mut self) {
        if self.enabled && self.drawn {
            let mut err = std::io::stderr().lock();
            let _ = write!(err, "\r\x1b[2K");
            let _ = err.flush();
            self.drawn = false;
            self.last = None;
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn thousands_groups_digits() {
        assert_eq!(thousands(0), "0");
        assert_eq!(thousands(999), "999");
        assert_eq!(thousands(1000), "1,000");
        assert_eq!(thousands(1_234_567), "1,234,567");
    }
}
