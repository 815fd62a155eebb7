//! Small text helpers shared by the formats: local date-times with an
//! offset, and XML escaping. Pure.

use chrono::{DateTime, Utc};
use chrono_tz::Tz;

/// `2026-07-14T02:10:00+10:00`: whole seconds, the local offset of `tz`.
/// The form Camtrap DP's `%Y-%m-%dT%H:%M:%S%z` reads (Python's `%z` takes
/// `+10:00`) and the report's columns use.
pub fn local_datetime(t: DateTime<Utc>, tz: Tz) -> String {
    t.with_timezone(&tz)
        .format("%Y-%m-%dT%H:%M:%S%:z")
        .to_string()
}

/// CAP 1.2 date-time (CAP 1.2 §3.3.2 and the XSD pattern
/// `\d\d\d\d-\d\d-\d\dT\d\d:\d\d:\d\d[-,+]\d\d:\d\d`): whole seconds, a
/// numeric offset, never `Z`; UTC is written `-00:00`.
pub fn cap_datetime(t: DateTime<Utc>, tz: Tz) -> String {
    let s = local_datetime(t, tz);
    match s.strip_suffix("+00:00") {
        Some(head) => format!("{head}-00:00"),
        None => s,
    }
}

/// Text fit for XML 1.0 element content or a quoted attribute: the five
/// markup characters escaped, and characters XML 1.0 does not allow
/// (C0 controls other than TAB, LF and CR; U+FFFE, U+FFFF) dropped.
/// `multiline` keeps TAB, LF and CR; otherwise they become spaces.
pub fn xml_escape(s: &str, multiline: bool) -> String {
    let mut out = String::with_capacity(s.len() + s.len() / 8);
    for ch in s.chars() {
        match ch {
            '&' => out.push_str("&amp;"),
            '<' => out.push_str("&lt;"),
            '>' => out.push_str("&gt;"),
            '"' => out.push_str("&quot;"),
            '\'' => out.push_str("&apos;"),
            '\t' | '\n' | '\r' if multiline => out.push(ch),
            '\t' | '\n' | '\r' => out.push(' '),
            c if (c as u32) < 0x20 || c == '\u{FFFE}' || c == '\u{FFFF}' => {}
            c => out.push(c),
        }
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;
    use chrono::TimeZone;

    #[test]
    fn cap_datetimes_follow_the_standard() {
        // CAP 1.2 §3.3.2 (the XSD's pattern is in
        // tests/reference/cap-1.2/CAP-v1.2.xsd): numeric offset, "-00:00"
        // for UTC, no fractions. Expected strings written by hand.
        let t = Utc.with_ymd_and_hms(2026, 7, 13, 16, 10, 0).unwrap()
            + chrono::Duration::milliseconds(250);
        assert_eq!(
            cap_datetime(t, chrono_tz::Australia::Sydney),
            "2026-07-14T02:10:00+10:00"
        );
        assert_eq!(cap_datetime(t, chrono_tz::UTC), "2026-07-13T16:10:00-00:00");
        // January in Sydney is daylight time, UTC+11.
        let s = Utc.with_ymd_and_hms(2026, 1, 10, 0, 0, 0).unwrap();
        assert_eq!(
            cap_datetime(s, chrono_tz::Australia::Sydney),
            "2026-01-10T11:00:00+11:00"
        );
    }

    #[test]
    fn xml_escape_leaves_no_markup_or_illegal_characters() {
        // XML 1.0 §2.2 (Char) and §2.4 (markup characters), from memory.
        let hostile = "a<b>&\"c'\u{0}\u{1b}\u{FFFF}\nd";
        assert_eq!(xml_escape(hostile, false), "a&lt;b&gt;&amp;&quot;c&apos; d");
        assert_eq!(xml_escape(hostile, true), "a&lt;b&gt;&amp;&quot;c&apos;\nd");
    }
}
