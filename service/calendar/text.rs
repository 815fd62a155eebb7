//! Instants written as text by hand, for the hot path: chrono's formatter
//! parses its pattern on every call. Callers' tests compare the output with
//! chrono's own formatting.

use chrono::{DateTime, Datelike, Timelike, Utc};

/// Writes `v` (below 100) as two digits.
pub fn push_two(s: &mut String, v: u32) {
    s.push(char::from(b'0' + (v / 10 % 10) as u8));
    s.push(char::from(b'0' + (v % 10) as u8));
}

/// Writes `YYYY-MM-DD<sep>HH:MM` (UTC) and returns true; for a year outside
/// 0-9999, which four digits cannot hold, writes nothing and returns false
/// (the caller falls back to chrono).
pub fn push_utc_minutes(s: &mut String, t: DateTime<Utc>, sep: char) -> bool {
    let y = t.year();
    if !(0..=9999).contains(&y) {
        return false;
    }
    let y = y as u32;
    push_two(s, y / 100);
    push_two(s, y % 100);
    s.push('-');
    push_two(s, t.month());
    s.push('-');
    push_two(s, t.day());
    s.push(sep);
    push_two(s, t.hour());
    s.push(':');
    push_two(s, t.minute());
    true
}
