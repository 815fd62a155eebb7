//! The words of a notice email: Subject, plain-text body, HTML body, and the
//! RFC 2369 / RFC 8058 unsubscribe headers.
//!
//! Role: pure templates for a landholder reading a phone at 2 a.m. Short
//! sentences; the species in plain words first, the scientific name after;
//! where it is (site label and camera id) and how far from their area; the
//! local time in their zone with its abbreviation; for a spike the numbers
//! in words (METHODS.md section 7); the photo link; earlier events folded in;
//! the safety caution; the status and unsubscribe links. No I/O.
//!
//! Both bodies are built from the same list of sentences, so they say the
//! same thing. Every piece of text that came from a message or the config
//! (names, species, site labels, URLs) passes [`header_safe`] (control
//! characters, CR and LF removed) before it is used anywhere, and the HTML
//! body escapes every sentence with [`html_escape`]. URLs are linked only
//! when they are plain `http`/`https` URLs ([`safe_url`]). Encoding the
//! Subject for the header (RFC 2047) is the mail library's job.

use chrono::{DateTime, Utc};
use chrono_tz::Tz;

use crate::notify::notice::{Notice, Trigger};

/// The caution every notice email carries (DESIGN.md "Cautions").
pub const CAUTION_TITLE: &str = "Stay safe";
pub const CAUTION: [&str; 5] = [
    "Follow local pest-control codes of practice, permits and product labels.",
    "Tell your neighbours before you lay baits.",
    "Never approach a feral pig or a wild dog.",
    "Camera detections can be wrong. Check the photo before you act.",
    "Local codes and licensed practice come first.",
];

/// What the renderer needs besides the notice.
#[derive(Debug, Clone, Copy)]
pub struct EmailContext<'a> {
    /// The subscriber's time zone.
    pub time_zone: Tz,
    /// For a spike: the chance already in words, e.g. "about once in 2,000
    /// nights" (`activity::words::chance_in_words(p, "nights")`).
    pub chance_in_words: Option<&'a str>,
    /// Link to the status page, if there is one.
    pub status_url: Option<&'a str>,
    /// The subscriber's one-click unsubscribe link (signed token inside).
    pub unsubscribe_url: &'a str,
}

/// A rendered notice email.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct RenderedEmail {
    /// One line, control characters removed; not yet RFC 2047 encoded.
    pub subject: String,
    pub text: String,
    pub html: String,
}

/// Text fit for a header or any single line: every control character
/// (C0 including CR, LF and TAB, DEL, C1), the Unicode line and paragraph
/// separators, zero-width characters and bidirectional overrides become a
/// space; runs of white space collapse to one space; the ends are trimmed.
/// Letters of every script are kept.
pub fn header_safe(s: &str) -> String {
    let mut out = String::with_capacity(s.len());
    let mut pending_space = false;
    for ch in s.chars() {
        let blank = ch.is_control()
            || ch.is_whitespace()
            || matches!(ch, '\u{200B}'..='\u{200F}' | '\u{202A}'..='\u{202E}' | '\u{2060}'..='\u{2069}' | '\u{FEFF}');
        if blank {
            pending_space = !out.is_empty();
        } else {
            if pending_space {
                out.push(' ');
                pending_space = false;
            }
            out.push(ch);
        }
    }
    out
}

/// Escape text for HTML element content and quoted attribute values:
/// `&`, `<`, `>`, `"` and `'`.
pub fn html_escape(s: &str) -> String {
    let mut out = String::with_capacity(s.len() + s.len() / 8);
    for ch in s.chars() {
        match ch {
            '&' => out.push_str("&amp;"),
            '<' => out.push_str("&lt;"),
            '>' => out.push_str("&gt;"),
            '"' => out.push_str("&quot;"),
            '\'' => out.push_str("&#39;"),
            c => out.push(c),
        }
    }
    out
}

/// `s` as a URL safe to link: `http://` or `https://` (any case), then only
/// printable ASCII with no space, quote, backslash, backtick or angle
/// bracket, at most 2,048 bytes. Anything else (a `javascript:` URL from a
/// message, an address with a line break) gives `None` and is not linked.
pub fn safe_url(s: &str) -> Option<&str> {
    let s = s.trim();
    let lower = s.get(..8).map(str::to_ascii_lowercase).unwrap_or_default();
    let scheme_ok = lower.starts_with("https://") || lower.starts_with("http://");
    let chars_ok = s.bytes().all(|b| {
        (0x21..=0x7e).contains(&b) && !matches!(b, b'<' | b'>' | b'"' | b'\'' | b'\\' | b'`')
    });
    let has_host = s
        .split_once("://")
        .is_some_and(|(_, rest)| !rest.is_empty());
    (scheme_ok && chars_ok && has_host && s.len() <= 2048).then_some(s)
}

/// The `List-Unsubscribe` header (RFC 2369: URIs in angle brackets, comma
/// separated) and, when the link is HTTPS, `List-Unsubscribe-Post:
/// List-Unsubscribe=One-Click` (RFC 8058 requires an HTTPS URI for
/// one-click). `mailto` is added when it is a `mailto:` URI. Empty when the
/// link is not a safe URL.
pub fn list_unsubscribe_headers(url: &str, mailto: Option<&str>) -> Vec<(&'static str, String)> {
    let Some(url) = safe_url(url) else {
        return vec![];
    };
    let mut value = format!("<{url}>");
    if let Some(m) = mailto.map(str::trim).filter(|m| {
        m.len() > 7
            && m.get(..7)
                .is_some_and(|p| p.eq_ignore_ascii_case("mailto:"))
            && m.bytes()
                .all(|b| (0x21..=0x7e).contains(&b) && !matches!(b, b'<' | b'>' | b','))
    }) {
        value.push_str(&format!(", <{m}>"));
    }
    let mut headers = vec![("List-Unsubscribe", value)];
    if url[..8].eq_ignore_ascii_case("https://") {
        headers.push((
            "List-Unsubscribe-Post",
            "List-Unsubscribe=One-Click".to_owned(),
        ));
    }
    headers
}

/// Subject, text and HTML for `notice`.
pub fn render_email(notice: &Notice, ctx: &EmailContext<'_>) -> RenderedEmail {
    let m = Message::compose(notice, ctx);
    let image = notice.image_url.as_deref().and_then(safe_url);
    let status = ctx.status_url.and_then(safe_url);
    let unsubscribe = safe_url(ctx.unsubscribe_url);
    let watch_line = format!(
        "Sent to {} for your watch: {}.",
        or_dash(&header_safe(&notice.subscriber_name)),
        or_dash(&header_safe(&notice.watch))
    );

    // Plain text.
    let mut text = String::new();
    text.push_str(&m.headline);
    text.push_str("\n\n");
    for f in &m.facts {
        text.push_str(f);
        text.push('\n');
    }
    if let Some(u) = image {
        text.push_str(&format!("Photo: {u}\n"));
    }
    text.push('\n');
    text.push_str(&watch_line);
    text.push_str("\n\n");
    text_footer(&mut text, status, unsubscribe, "Stop these notices");

    // HTML: the same sentences, escaped; no colours, large type.
    let small = "font-size:15px;";
    let mut html = String::new();
    html.push_str("<!DOCTYPE html>\n<html lang=\"en\">\n<head>\n<meta charset=\"utf-8\">\n");
    html.push_str("<meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">\n");
    html.push_str(&format!(
        "<title>{}</title>\n</head>\n",
        html_escape(&m.subject)
    ));
    html.push_str(
        "<body style=\"margin:0;padding:16px;font-family:sans-serif;font-size:17px;line-height:1.5;\">\n",
    );
    html.push_str(&format!(
        "<h1 style=\"font-size:20px;margin:0 0 12px 0;\">{}</h1>\n",
        html_escape(&m.headline)
    ));
    for f in &m.facts {
        html.push_str(&format!("<p>{}</p>\n", html_escape(f)));
    }
    if let Some(u) = image {
        html.push_str(&format!(
            "<p><a href=\"{}\">See the photo</a></p>\n",
            html_escape(u)
        ));
    }
    html.push_str(&format!(
        "<p style=\"{small}\">{}</p>\n<hr>\n",
        html_escape(&watch_line)
    ));
    html_footer(&mut html, status, unsubscribe, "Stop these notices");

    RenderedEmail {
        subject: header_safe(&m.subject),
        text,
        html,
    }
}

/// The words of a notice without the email around them: the subject, the
/// headline and the facts, cleaned with [`header_safe`] and not escaped.
/// Other formats (CAP alerts) say the same thing as the email with these.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct NoticeWords {
    pub subject: String,
    pub headline: String,
    pub facts: Vec<String>,
}

/// [`NoticeWords`] of `notice` in `time_zone`; `chance_in_words` as in
/// [`EmailContext`].
pub fn notice_words(notice: &Notice, time_zone: Tz, chance_in_words: Option<&str>) -> NoticeWords {
    let ctx = EmailContext {
        time_zone,
        chance_in_words,
        status_url: None,
        unsubscribe_url: "",
    };
    let m = Message::compose(notice, &ctx);
    NoticeWords {
        subject: header_safe(&m.subject),
        headline: m.headline,
        facts: m.facts,
    }
}

/// The end of every plain-text message: the caution, then the status and
/// stop links (already checked with [`safe_url`]).
pub fn text_footer(text: &mut String, status: Option<&str>, stop: Option<&str>, stop_label: &str) {
    text.push_str(CAUTION_TITLE);
    text.push('\n');
    for c in CAUTION {
        text.push_str("- ");
        text.push_str(c);
        text.push('\n');
    }
    text.push('\n');
    if let Some(u) = status {
        text.push_str(&format!("Status page: {u}\n"));
    }
    if let Some(u) = stop {
        text.push_str(&format!("{stop_label}: {u}\n"));
    }
}

/// The end of every HTML message: the caution in small type, the status
/// and stop links, and the closing tags.
pub fn html_footer(html: &mut String, status: Option<&str>, stop: Option<&str>, stop_label: &str) {
    let small = "font-size:15px;";
    html.push_str(&format!(
        "<p style=\"{small}\"><strong>{CAUTION_TITLE}.</strong>"
    ));
    for c in CAUTION {
        html.push(' ');
        html.push_str(&html_escape(c));
    }
    html.push_str("</p>\n");
    let mut links = vec![];
    if let Some(u) = status {
        links.push(format!("<a href=\"{}\">Status page</a>", html_escape(u)));
    }
    if let Some(u) = stop {
        links.push(format!("<a href=\"{}\">{stop_label}</a>", html_escape(u)));
    }
    if !links.is_empty() {
        html.push_str(&format!("<p style=\"{small}\">{}</p>\n", links.join(" | ")));
    }
    html.push_str("</body>\n</html>\n");
}

/// The sentences of one notice, already cleaned, not yet escaped.
struct Message {
    subject: String,
    headline: String,
    facts: Vec<String>,
}

impl Message {
    fn compose(n: &Notice, ctx: &EmailContext<'_>) -> Message {
        let tz = ctx.time_zone;
        let dep = or_dash(&header_safe(&n.deployment_id));
        let site = header_safe(&n.site_label);
        let sci = header_safe(n.scientific_name.as_deref().unwrap_or(""));
        let vern = header_safe(n.vernacular_name.as_deref().unwrap_or(""));
        // "wild dog" for sentences; "wild dog (Canis familiaris)" where the
        // species is first named.
        let species = match (vern.is_empty(), sci.is_empty()) {
            (false, _) => vern.clone(),
            (true, false) => sci.clone(),
            (true, true) => "animal".to_owned(),
        };
        let species_full = if !vern.is_empty() && !sci.is_empty() && vern != sci {
            format!("{vern} ({sci})")
        } else {
            species.clone()
        };
        // "Swamp Corner (KB-07)" for animals, "KB-07 at Swamp Corner" for
        // cameras.
        let has_site = !site.is_empty() && site != dep;
        let place = if has_site {
            format!("{site} ({dep})")
        } else {
            dep.clone()
        };
        let camera = if has_site {
            format!("{dep} at {site}")
        } else {
            dep.clone()
        };
        let when = local_time(n.event_time, tz);
        let e = &n.evidence;

        let from_centre = e.distance_from == Some(crate::notify::notice::DistanceFrom::Centre);
        let distance = e.distance_km.filter(|d| d.is_finite()).map(|d| {
            if from_centre {
                format!("{} km from the centre of your area.", km(d))
            } else if d <= 0.0 {
                "Inside your area.".to_owned()
            } else {
                format!("{} km from your area.", km(d))
            }
        });
        let seen_at = format!("Seen at {when}.");

        let (subject, headline, mut facts) = match n.trigger {
            Trigger::Presence => {
                let mut facts = vec![seen_at];
                if let Some(c) = e.count.filter(|c| *c > 1) {
                    facts.push(format!("{c} animals in view."));
                }
                (
                    format!(
                        "{} at {place}, {}",
                        capitalise(&species),
                        hm_zone(n.event_time, tz)
                    ),
                    format!("{} seen at {place}.", capitalise(&species_full)),
                    facts,
                )
            }
            Trigger::Spike => {
                let mut facts = vec![];
                if let Some(s) = spike_sentence(&species, &dep, n, ctx.chance_in_words) {
                    facts.push(s);
                }
                facts.push(format!("Latest visit at {when}."));
                (
                    format!("More {species} visits than usual at {place}"),
                    format!(
                        "{}: more visits than usual at {place}.",
                        capitalise(&species_full)
                    ),
                    facts,
                )
            }
            Trigger::BuildUp => {
                let mut facts = vec![];
                if let (Some(c), Some(x)) = (e.count, e.expected.filter(|x| x.is_finite())) {
                    let window = e
                        .window_hours
                        .map(window_words)
                        .unwrap_or_else(|| "window".into());
                    facts.push(format!(
                        "{c} {} in the last {window}, where about {} would be usual.",
                        plural(c, "visit", "visits"),
                        rate(x)
                    ));
                }
                facts.push(format!("Latest visit at {when}."));
                (
                    format!("{} visits building up at {place}", capitalise(&species)),
                    format!(
                        "{}: visits building up at {place} over several days.",
                        capitalise(&species_full)
                    ),
                    facts,
                )
            }
            Trigger::FirstSeen => {
                let (subj, head) = match e.quiet_days {
                    Some(d) => (
                        format!(
                            "{} back at {place} after {d} quiet {}",
                            capitalise(&species),
                            plural(d, "day", "days")
                        ),
                        format!(
                            "{} seen at {place}, the first in {d} {}.",
                            capitalise(&species_full),
                            plural(d, "day", "days")
                        ),
                    ),
                    None => (
                        format!("{} back at {place}", capitalise(&species)),
                        format!(
                            "{} seen at {place}, the first in a while.",
                            capitalise(&species_full)
                        ),
                    ),
                };
                (subj, head, vec![seen_at])
            }
            Trigger::Silence => {
                let mut facts = vec![];
                match e.silent_hours.filter(|h| h.is_finite()) {
                    Some(h) => facts.push(format!(
                        "Nothing from it for {} hours. Last heard at {when}.",
                        whole(h)
                    )),
                    None => facts.push(format!("Last heard at {when}.")),
                }
                facts.push("A quiet camera cannot see pests. Please check it.".to_owned());
                (
                    format!("Camera {camera} has gone quiet"),
                    format!("Camera {camera} has gone quiet."),
                    facts,
                )
            }
            Trigger::SilenceEnded => {
                let back = local_time(n.at, tz);
                let fact = match e.silent_hours.filter(|h| h.is_finite()) {
                    Some(h) => format!("Back at {back} after {} hours quiet.", whole(h)),
                    None => format!("Back at {back}."),
                };
                (
                    format!("Camera {camera} is reporting again"),
                    format!("Camera {camera} is reporting again."),
                    vec![fact],
                )
            }
            Trigger::Retraction => (
                format!("Correction: {species} at {place} not confirmed"),
                format!("Correction: the {species_full} reported at {place} was not confirmed."),
                vec![
                    format!("A person checked the photo from {when} and changed the label."),
                    "Please disregard the earlier notice.".to_owned(),
                ],
            ),
        };

        if let Some(d) = distance {
            if !n.trigger.is_about_camera() {
                facts.push(d);
            }
        }
        if let Some(first) = n.folded.iter().map(|f| f.event_time).min() {
            let count = n.folded.len();
            let noun = if n.trigger.is_about_camera() {
                plural(count, "alert", "alerts")
            } else {
                plural(count, "visit", "visits")
            };
            let first_local = first.with_timezone(&tz);
            let since = if first_local.date_naive() == n.event_time.with_timezone(&tz).date_naive()
            {
                first_local.format("%H:%M").to_string()
            } else {
                first_local.format("%H:%M %a %-d %b").to_string()
            };
            let since = if count == 1 {
                format!("at {since}")
            } else {
                format!("since {since}")
            };
            facts.push(format!("Plus {count} earlier {noun} {since}."));
        }
        Message {
            subject,
            headline,
            facts,
        }
    }
}

/// METHODS 7: "5 wild dog visits in the last 24 h at KB-07 (usual 0.4 per
/// night over the past 4 weeks; a count this high happens by chance about
/// once in 2,000 nights)." Needs at least the count; each part of the
/// bracket is given only when its figures are.
fn spike_sentence(species: &str, dep: &str, n: &Notice, chance: Option<&str>) -> Option<String> {
    let e = &n.evidence;
    let c = e.count?;
    let mut s = format!("{c} {species} {}", plural(c, "visit", "visits"));
    if let Some(w) = e.window_hours.filter(|w| w.is_finite() && *w > 0.0) {
        s.push_str(&format!(" in the last {}", window_words(w)));
    }
    s.push_str(&format!(" at {dep}"));
    let mut bracket = vec![];
    if let (Some(a), Some(b)) = (e.gamma_shape, e.gamma_rate) {
        let r = a / b;
        if r.is_finite() && r >= 0.0 {
            let mut usual = format!("usual {} per night", rate(r));
            if let (Some(from), Some(to)) = (e.baseline_from, e.baseline_to) {
                if let Some(p) = period_words(to - from) {
                    usual.push_str(&format!(" over the past {p}"));
                }
            }
            bracket.push(usual);
        }
    }
    if let Some(ch) = chance.map(header_safe).filter(|c| !c.is_empty()) {
        bracket.push(format!("a count this high happens by chance {ch}"));
    }
    if !bracket.is_empty() {
        s.push_str(&format!(" ({})", bracket.join("; ")));
    }
    s.push('.');
    Some(s)
}

/// "02:14 AEST, Tue 15 Jul" in `tz`.
pub fn local_time(t: DateTime<Utc>, tz: Tz) -> String {
    t.with_timezone(&tz)
        .format("%H:%M %Z, %a %-d %b")
        .to_string()
}

/// "02:14 AEST" in `tz`.
fn hm_zone(t: DateTime<Utc>, tz: Tz) -> String {
    t.with_timezone(&tz).format("%H:%M %Z").to_string()
}

/// 2.34 -> "2.3", 12.6 -> "13".
fn km(d: f64) -> String {
    if d < 10.0 {
        trim_zeros(format!("{d:.1}"))
    } else {
        format!("{d:.0}")
    }
}

/// A rate or expected count: one decimal from 1 up (whole from 10 up), one
/// significant figure below 1: 0.4, 0.04, 2.5, 12.
pub fn rate(r: f64) -> String {
    if r >= 10.0 {
        format!("{r:.0}")
    } else if r >= 1.0 {
        trim_zeros(format!("{r:.1}"))
    } else if r > 0.0 {
        let decimals = (-r.log10().floor()).clamp(1.0, 12.0) as usize;
        trim_zeros(format!("{r:.decimals$}"))
    } else {
        "0".to_owned()
    }
}

/// 24 -> "24 h", 72 -> "3 days", 36.5 -> "36.5 h".
fn window_words(hours: f64) -> String {
    let whole_days = hours >= 48.0 && (hours / 24.0).fract() == 0.0;
    if whole_days {
        format!("{} days", hours / 24.0)
    } else {
        format!("{} h", trim_zeros(format!("{hours:.1}")))
    }
}

/// 28 days -> "4 weeks", 7 -> "week", 10 -> "10 days".
fn period_words(d: chrono::Duration) -> Option<String> {
    let days = (d.num_hours() as f64 / 24.0).round() as i64;
    match days {
        i64::MIN..=0 => None,
        7 => Some("week".to_owned()),
        1 => Some("day".to_owned()),
        d if d % 7 == 0 => Some(format!("{} weeks", d / 7)),
        d => Some(format!("{d} days")),
    }
}

fn whole(h: f64) -> String {
    format!("{:.0}", h.max(0.0))
}

fn trim_zeros(s: String) -> String {
    if s.contains('.') {
        s.trim_end_matches('0').trim_end_matches('.').to_owned()
    } else {
        s
    }
}

fn plural<N: PartialEq + From<u8>>(n: N, one: &'static str, many: &'static str) -> &'static str {
    if n == N::from(1) {
        one
    } else {
        many
    }
}

fn capitalise(s: &str) -> String {
    let mut c = s.chars();
    match c.next() {
        Some(f) => f.to_uppercase().chain(c).collect(),
        None => String::new(),
    }
}

fn or_dash(s: &str) -> String {
    if s.is_empty() {
        "-".to_owned()
    } else {
        s.to_owned()
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::notify::notice::tests::{sample, utc};
    use crate::notify::notice::{Evidence, FoldedEvent};
    use proptest::prelude::*;

    const SYDNEY: Tz = chrono_tz::Australia::Sydney;

    fn ctx<'a>() -> EmailContext<'a> {
        EmailContext {
            time_zone: SYDNEY,
            chance_in_words: None,
            status_url: Some("https://outrider.kellerby.example/status"),
            unsubscribe_url: "https://outrider.kellerby.example/u/TOKEN",
        }
    }

    #[test]
    fn notice_words_are_the_emails_own_sentences() {
        let n = sample();
        let w = notice_words(&n, SYDNEY, None);
        let e = render_email(&n, &ctx());
        assert_eq!(w.subject, e.subject);
        assert!(e.text.starts_with(&format!("{}\n\n", w.headline)));
        for f in &w.facts {
            assert!(e.text.contains(f.as_str()), "{f}");
        }
    }

    #[test]
    fn header_safe_removes_line_breaks_and_controls() {
        // Header injection (RFC 5322 §2.2: a header ends at CRLF).
        assert_eq!(
            header_safe("Stonecroft\r\nBcc: someone@evil.example"),
            "Stonecroft Bcc: someone@evil.example"
        );
        assert_eq!(
            header_safe("a\rb\nc\td\u{0}e\u{7f}f\u{85}g"),
            "a b c d e f g"
        );
        assert_eq!(
            header_safe("  Swamp\u{2028}Corner \u{202E}gnp.exe  "),
            "Swamp Corner gnp.exe"
        );
        assert_eq!(header_safe("zero\u{200B}width"), "zero width");
        // Letters of other scripts and punctuation stay.
        assert_eq!(header_safe("Wattle Downs — Nörth"), "Wattle Downs — Nörth");
        assert_eq!(header_safe("<script>\"&"), "<script>\"&");
        assert_eq!(header_safe("\r\n\r\n"), "");
    }

    #[test]
    fn html_escape_escapes_the_five() {
        // The five characters the HTML spec's serialisation escapes in text
        // and attribute values (&, <, >, ", ' — common practice).
        assert_eq!(
            html_escape(r#"<script>alert("x")</script> & 'y'"#),
            "&lt;script&gt;alert(&quot;x&quot;)&lt;/script&gt; &amp; &#39;y&#39;"
        );
        assert_eq!(html_escape("Wattle Downs — Nörth"), "Wattle Downs — Nörth");
        assert_eq!(
            html_escape("&amp;"),
            "&amp;amp;",
            "escapes once more, never decodes"
        );
    }

    #[test]
    fn safe_url_links_only_plain_web_urls() {
        assert_eq!(
            safe_url(" https://media.kellerby.example/a.jpg "),
            Some("https://media.kellerby.example/a.jpg")
        );
        assert_eq!(
            safe_url("HTTP://127.0.0.1:8080/status"),
            Some("HTTP://127.0.0.1:8080/status")
        );
        for bad in [
            "javascript:alert(1)",
            "data:text/html,<b>x</b>",
            "https://a.example/\r\nBcc: x",
            "https://a.example/\"onmouseover=\"x",
            "https://a.example/<x>",
            "https://a.example/ä",
            "https://",
            "ftp://a.example/x",
            "",
        ] {
            assert_eq!(safe_url(bad), None, "{bad:?}");
        }
    }

    #[test]
    fn unsubscribe_headers_follow_rfc_2369_and_8058() {
        // RFC 2369 §3.2 (angle brackets, comma list) and RFC 8058 §3.1 (the
        // exact Post value, HTTPS only), as summarised in
        // shared/standards/README.md.
        let h = list_unsubscribe_headers(
            "https://outrider.kellerby.example/u/abc.def",
            Some("mailto:unsubscribe@kellerby.example?subject=stop"),
        );
        assert_eq!(
            h,
            vec![
                (
                    "List-Unsubscribe",
                    "<https://outrider.kellerby.example/u/abc.def>, <mailto:unsubscribe@kellerby.example?subject=stop>"
                        .to_owned()
                ),
                ("List-Unsubscribe-Post", "List-Unsubscribe=One-Click".to_owned()),
            ]
        );
        // Loopback demo over http: the link, but no one-click claim.
        let h = list_unsubscribe_headers("http://127.0.0.1:8080/u/abc", Some("not-a-mailto"));
        assert_eq!(
            h,
            vec![(
                "List-Unsubscribe",
                "<http://127.0.0.1:8080/u/abc>".to_owned()
            )]
        );
        assert!(list_unsubscribe_headers("https://x.example/u\r\nBcc: y", None).is_empty());
    }

    #[test]
    fn presence_email_reads_plainly() {
        let r = render_email(&sample(), &ctx());
        // 2025-07-14T16:14Z is 02:14 AEST on Tue 15 Jul in Sydney (UTC+10);
        // checked with Python zoneinfo.
        assert_eq!(r.subject, "Wild dog at Swamp Corner (KB-07), 02:14 AEST");
        assert!(
            r.text
                .starts_with("Wild dog (Canis familiaris) seen at Swamp Corner (KB-07).\n"),
            "{}",
            r.text
        );
        assert!(r.text.contains("Seen at 02:14 AEST, Tue 15 Jul.\n"));
        assert!(r.text.contains("2.3 km from your area.\n"));
        assert!(r
            .text
            .contains("Photo: https://media.kellerby.example/kb07/0001.jpg\n"));
        assert!(r
            .text
            .contains("Sent to Stonecroft for your watch: dogs and foxes at night."));
        assert!(r
            .text
            .contains("Status page: https://outrider.kellerby.example/status\n"));
        assert!(r
            .text
            .contains("Stop these notices: https://outrider.kellerby.example/u/TOKEN\n"));
        assert!(r.html.contains(
            "<a href=\"https://media.kellerby.example/kb07/0001.jpg\">See the photo</a>"
        ));
        assert!(r.html.contains(
            "<a href=\"https://outrider.kellerby.example/u/TOKEN\">Stop these notices</a>"
        ));
        assert!(
            !r.text.contains("animals in view"),
            "one animal: no count line"
        );
    }

    #[test]
    fn daylight_saving_zone_abbreviation() {
        // 2025-12-01T15:30Z is 02:30 AEDT (UTC+11) on Tue 2 Dec in Sydney;
        // checked with Python zoneinfo.
        let mut n = sample();
        n.event_time = utc(2025, 12, 1, 15, 30);
        let r = render_email(&n, &ctx());
        assert_eq!(r.subject, "Wild dog at Swamp Corner (KB-07), 02:30 AEDT");
        assert!(r.text.contains("Seen at 02:30 AEDT, Tue 2 Dec."));
    }

    #[test]
    fn every_email_carries_the_caution() {
        // The caution of DESIGN.md "Cautions" and the brief's rules.
        for t in Trigger::ALL {
            let mut n = sample();
            n.trigger = t;
            let r = render_email(&n, &ctx());
            for needle in [
                "codes of practice, permits and product labels",
                "neighbours before you lay baits",
                "Never approach a feral pig or a wild dog",
                "Camera detections can be wrong",
                "licensed practice",
            ] {
                assert!(r.text.contains(needle), "{t}: text lacks {needle}");
                assert!(r.html.contains(needle), "{t}: html lacks {needle}");
            }
        }
    }

    #[test]
    fn spike_numbers_in_words_as_methods_7() {
        // METHODS.md section 7's own sentence. 0.4 per night = shape 11.6 /
        // rate 29 (posterior mean a/b); 4 weeks = 28 days of baseline.
        let mut n = sample();
        n.trigger = Trigger::Spike;
        n.evidence = Evidence {
            count: Some(5),
            window_hours: Some(24.0),
            gamma_shape: Some(11.6),
            gamma_rate: Some(29.0),
            p_value: Some(0.0005),
            baseline_from: Some(utc(2025, 6, 15, 14, 0)),
            baseline_to: Some(utc(2025, 7, 13, 14, 0)),
            distance_km: Some(0.0),
            ..Evidence::default()
        };
        let c = EmailContext {
            chance_in_words: Some("about once in 2,000 nights"),
            ..ctx()
        };
        let r = render_email(&n, &c);
        assert!(
            r.text.contains(
                "5 wild dog visits in the last 24 h at KB-07 (usual 0.4 per night over the past 4 weeks; \
                 a count this high happens by chance about once in 2,000 nights)."
            ),
            "{}",
            r.text
        );
        assert!(r.text.contains("Inside your area."));
        assert_eq!(
            r.subject,
            "More wild dog visits than usual at Swamp Corner (KB-07)"
        );
        assert!(r.text.starts_with(
            "Wild dog (Canis familiaris): more visits than usual at Swamp Corner (KB-07).\n"
        ));
    }

    #[test]
    fn spike_without_figures_still_says_what_it_can() {
        let mut n = sample();
        n.trigger = Trigger::Spike;
        n.evidence = Evidence {
            count: Some(1),
            window_hours: Some(72.0),
            ..Evidence::default()
        };
        let r = render_email(&n, &ctx());
        assert!(
            r.text
                .contains("1 wild dog visit in the last 3 days at KB-07.\n"),
            "{}",
            r.text
        );
    }

    #[test]
    fn folded_events_are_mentioned() {
        // Folded earlier events at 21:40, 22:30 and 23:50 AEST on Mon 14 Jul
        // (11:40Z, 12:30Z, 13:50Z), then this notice at 02:14 on Tue 15 Jul:
        // another local date, so the day is given.
        let mut n = sample();
        n.folded = [(11, 40), (12, 30), (13, 50)]
            .iter()
            .enumerate()
            .map(|(i, &(h, m))| FoldedEvent {
                event_id: format!("e{i}").into(),
                event_time: utc(2025, 7, 14, h, m),
                count: 1,
            })
            .collect();
        let r = render_email(&n, &ctx());
        assert!(
            r.text
                .contains("Plus 3 earlier visits since 21:40 Mon 14 Jul.\n"),
            "{}",
            r.text
        );
        // Same local date: the time alone.
        n.event_time = utc(2025, 7, 14, 13, 55);
        n.folded.truncate(1);
        let r = render_email(&n, &ctx());
        assert!(
            r.text.contains("Plus 1 earlier visit at 21:40.\n"),
            "{}",
            r.text
        );
    }

    #[test]
    fn distance_wording() {
        let mut n = sample();
        for (d, want) in [
            (2.34, "2.3 km from your area."),
            (12.6, "13 km from your area."),
            (0.0, "Inside your area."),
            (3.0, "3 km from your area."),
        ] {
            n.evidence.distance_km = Some(d);
            assert!(render_email(&n, &ctx()).text.contains(want), "{d}");
        }
        n.evidence.distance_km = None;
        assert!(!render_email(&n, &ctx()).text.contains("your area"));
    }

    #[test]
    fn other_triggers() {
        let mut n = sample();
        n.trigger = Trigger::FirstSeen;
        n.evidence = Evidence {
            quiet_days: Some(41),
            ..Evidence::default()
        };
        let r = render_email(&n, &ctx());
        assert_eq!(
            r.subject,
            "Wild dog back at Swamp Corner (KB-07) after 41 quiet days"
        );
        assert!(r.text.starts_with(
            "Wild dog (Canis familiaris) seen at Swamp Corner (KB-07), the first in 41 days."
        ));

        n.trigger = Trigger::Silence;
        n.scientific_name = None;
        n.vernacular_name = None;
        n.image_url = None;
        n.evidence = Evidence {
            silent_hours: Some(38.4),
            distance_km: Some(1.0),
            ..Evidence::default()
        };
        let r = render_email(&n, &ctx());
        assert_eq!(r.subject, "Camera KB-07 at Swamp Corner has gone quiet");
        assert!(r
            .text
            .contains("Nothing from it for 38 hours. Last heard at 02:14 AEST, Tue 15 Jul."));
        assert!(
            !r.text.contains("km from your area"),
            "no distance line for a camera"
        );
        assert!(!r.text.contains("Photo:"));

        n.trigger = Trigger::SilenceEnded;
        let r = render_email(&n, &ctx());
        assert_eq!(r.subject, "Camera KB-07 at Swamp Corner is reporting again");
        assert!(
            r.text
                .contains("Back at 02:15 AEST, Tue 15 Jul after 38 hours quiet."),
            "{}",
            r.text
        );

        let mut n = sample();
        n.trigger = Trigger::Retraction;
        let r = render_email(&n, &ctx());
        assert_eq!(
            r.subject,
            "Correction: wild dog at Swamp Corner (KB-07) not confirmed"
        );
        assert!(r.text.contains("Please disregard the earlier notice."));

        n.trigger = Trigger::BuildUp;
        n.evidence = Evidence {
            count: Some(9),
            expected: Some(2.54),
            window_hours: Some(168.0),
            ..Evidence::default()
        };
        let r = render_email(&n, &ctx());
        assert!(
            r.text
                .contains("9 visits in the last 7 days, where about 2.5 would be usual."),
            "{}",
            r.text
        );
    }

    #[test]
    fn hostile_text_is_escaped_and_kept_off_headers() {
        let mut n = sample();
        n.site_label = r#"<script>alert("x")</script>"#.into();
        n.subscriber_name = "Wattle Downs — Nörth\r\nBcc: someone@evil.example".into();
        n.vernacular_name = Some("dog & \"fox\"\r\nX-Injected: 1".into());
        n.watch = "<img src=x onerror=alert(1)>".into();
        n.image_url = Some("javascript:alert(document.cookie)".into());
        let r = render_email(&n, &ctx());
        assert!(
            !r.subject.contains('\r') && !r.subject.contains('\n'),
            "{:?}",
            r.subject
        );
        assert!(
            r.subject
                .starts_with("Dog & \"fox\" X-Injected: 1 at <script>"),
            "{:?}",
            r.subject
        );
        assert!(!r.html.contains("<script"), "{}", r.html);
        assert!(!r.html.contains("<img"), "{}", r.html);
        assert!(r
            .html
            .contains("&lt;script&gt;alert(&quot;x&quot;)&lt;/script&gt;"));
        assert!(r.html.contains("<h1 style=\"font-size:20px;margin:0 0 12px 0;\">Dog &amp; &quot;fox&quot; X-Injected: 1"), "{}", r.html);
        assert!(r
            .html
            .contains("Wattle Downs — Nörth Bcc: someone@evil.example"));
        assert!(!r.html.contains("javascript:") && !r.text.contains("javascript:"));
        // No line of the text body is an injected header-like line start.
        assert!(!r
            .text
            .lines()
            .any(|l| l.starts_with("Bcc:") || l.starts_with("X-Injected")));
    }

    proptest! {
        #[test]
        fn header_safe_output_is_one_clean_line(s in "\\PC*|[\\x00-\\x1f\\x7f\\u{85}\\u{2028}a ]*") {
            let h = header_safe(&s);
            prop_assert!(!h.chars().any(|c| c.is_control()));
            prop_assert!(!h.contains("  "));
            prop_assert_eq!(h.trim(), h.as_str());
            prop_assert_eq!(header_safe(&h), h.clone(), "idempotent");
        }

        #[test]
        fn html_escape_leaves_no_markup(s in any::<String>()) {
            let e = html_escape(&s);
            prop_assert!(!e.contains(['<', '>', '"', '\'']));
            // Decoding the five entities gives the input back.
            let back = e.replace("&lt;", "<").replace("&gt;", ">").replace("&quot;", "\"")
                .replace("&#39;", "'").replace("&amp;", "&");
            prop_assert_eq!(back, s);
        }

        #[test]
        fn text_fields_never_add_markup(s in any::<String>()) {
            // Whatever the names say, the HTML has the same tags as with a
            // harmless name, and the subject stays one line.
            prop_assume!(!header_safe(&s).is_empty());
            let with = |text: &str| {
                let mut n = sample();
                n.site_label = text.into();
                n.deployment_id = text.into();
                n.subscriber_name = text.into();
                n.watch = text.into();
                n.scientific_name = Some(text.into());
                n.vernacular_name = Some(text.into());
                n.image_url = None;
                render_email(&n, &ctx())
            };
            let hostile = with(&s);
            let plain = with("x");
            prop_assert_eq!(hostile.html.matches('<').count(), plain.html.matches('<').count());
            prop_assert!(!hostile.subject.chars().any(|c| c.is_control()));
        }
    }
}
