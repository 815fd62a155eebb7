//! The words of the daily digest: Subject, plain text, HTML (with the
//! 14-night chart as an embedded image) and the chart's PNG bytes.
//!
//! The same rules as notice emails ([`crate::notify::render`]): every text
//! from a message or the config passes `header_safe`, the HTML escapes
//! every sentence, links only for plain http(s) URLs, the caution footer
//! always. A digest with nothing to report says so in one line. No I/O.

use super::{chart, Digest, FailedDelivery, NoticeLine};
use crate::notify::render::{
    header_safe, html_escape, html_footer, local_time, safe_url, text_footer,
};
use chrono_tz::Tz;

/// The Content-ID of the chart part; the HTML refers to `cid:` it.
pub const CHART_CID: &str = "nights-chart@outrider";

/// What the renderer needs besides the digest.
#[derive(Debug, Clone, Copy)]
pub struct DigestContext<'a> {
    pub subscriber_name: &'a str,
    pub time_zone: Tz,
    pub status_url: Option<&'a str>,
    pub unsubscribe_url: &'a str,
}

/// A rendered digest.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct RenderedDigest {
    pub subject: String,
    pub text: String,
    pub html: String,
    /// The chart (PNG), referred to from the HTML as `cid:CHART_CID`;
    /// `None` when there are no nights to draw.
    pub chart_png: Option<Vec<u8>>,
}

/// "wild dog" when the messages named it, else the scientific name.
fn species(name: &str, vernacular: Option<&str>) -> String {
    match vernacular.map(header_safe).filter(|v| !v.is_empty()) {
        Some(v) => v,
        None => header_safe(name),
    }
}

/// 0.43 -> "0.4", 12.0 -> "12", 2.25 -> "2.3" (one decimal below 10).
pub fn number(x: f64) -> String {
    if !x.is_finite() {
        return "-".into();
    }
    let s = if x.abs() < 10.0 {
        format!("{x:.1}")
    } else {
        format!("{x:.0}")
    };
    s.strip_suffix(".0").map(str::to_string).unwrap_or(s)
}

/// The usual count over a period: "under 0.1" rather than "0".
fn usual(x: f64) -> String {
    if x < 0.05 {
        "under 0.1".into()
    } else {
        number(x)
    }
}

/// "1 camera-night", "3.5 camera-nights".
fn camera_nights(x: f64) -> String {
    let n = number(x);
    if n == "1" {
        "1 camera-night".into()
    } else {
        format!("{n} camera-nights")
    }
}

fn plural(n: u64, one: &str, many: &str) -> String {
    format!("{n} {}", if n == 1 { one } else { many })
}

/// The sections of a digest as sentences (cleaned, not escaped).
struct Sections {
    subject: String,
    headline: String,
    activity: Vec<String>,
    others: Vec<String>,
    silent: Vec<String>,
    notices: Vec<String>,
    failures: Vec<String>,
    chart_alt: String,
}

fn notice_line(n: &NoticeLine, tz: Tz) -> String {
    let what = match n.disposition.as_str() {
        "sent" => "sent",
        "folded" => "folded into a later message",
        "deferred" => "held for this digest",
        other => other,
    };
    let sp = n
        .scientific_name
        .as_deref()
        .map(|s| format!(" {}", header_safe(s)))
        .unwrap_or_default();
    format!(
        "{}: {}{} at {} ({}), {what}.",
        local_time(n.at, tz),
        header_safe(&n.trigger),
        sp,
        header_safe(&n.deployment_id),
        header_safe(&n.watch),
    )
}

fn failure_line(f: &FailedDelivery, tz: Tz) -> String {
    format!(
        "{}: {} to {} failed for good: {}",
        local_time(f.at, tz),
        header_safe(&f.channel),
        header_safe(&f.subscriber_id),
        header_safe(&f.error),
    )
}

impl Sections {
    fn compose(d: &Digest, ctx: &DigestContext<'_>) -> Sections {
        let tz = ctx.time_zone;
        let day = d.to.with_timezone(&tz).format("%a %-d %b").to_string();
        let mut activity = Vec::new();
        let mut others = Vec::new();
        for r in &d.rows {
            let name = species(&r.scientific_name, r.vernacular_name.as_deref());
            let mut s = format!(
                "{} at {} ({}): {}",
                name,
                header_safe(&r.site_label),
                header_safe(&r.deployment_id),
                plural(r.events, "visit", "visits"),
            );
            match r.expected {
                Some(e) => s.push_str(&format!(" (usual {})", usual(e))),
                None => s.push_str(" (no usual level yet)"),
            }
            match r.rai {
                Some(rai) => s.push_str(&format!(
                    "; RAI {} per 100 camera-nights, {}",
                    number(rai),
                    camera_nights(r.camera_nights)
                )),
                None => s.push_str("; the camera was not operating"),
            }
            if r.above_usual {
                s.push_str(". Well above usual");
            }
            s.push('.');
            if r.watched {
                activity.push(s);
            } else {
                others.push(s);
            }
        }
        let silent = d
            .silent
            .iter()
            .map(|c| {
                format!(
                    "{} ({}) has sent nothing since {}. Check its battery, card and signal: a dead camera shows no pests.",
                    header_safe(&c.site_label),
                    header_safe(&c.deployment_id),
                    local_time(c.last_sign, tz)
                )
            })
            .collect();
        let notices = d.notices.iter().map(|n| notice_line(n, tz)).collect();
        let failures = d.failures.iter().map(|f| failure_line(f, tz)).collect();
        let above = d.rows.iter().filter(|r| r.above_usual).count();
        let visits: u64 = d.rows.iter().filter(|r| r.watched).map(|r| r.events).sum();
        let headline = if d.is_quiet() {
            format!(
                "Nothing to report for the 24 hours to {}: no visits, no silent cameras, no notices ({} cameras, {} camera-nights).",
                local_time(d.to, tz),
                d.cameras,
                number(d.camera_nights)
            )
        } else {
            let mut h = format!(
                "The 24 hours to {}: {} of watched species across {} cameras",
                local_time(d.to, tz),
                plural(visits, "visit", "visits"),
                d.cameras
            );
            if above > 0 {
                h.push_str(&format!(", {above} well above usual"));
            }
            if !d.silent.is_empty() {
                h.push_str(&format!(
                    ", {}",
                    plural(d.silent.len() as u64, "silent camera", "silent cameras")
                ));
            }
            h.push('.');
            h
        };
        let subject = if d.is_quiet() {
            format!("Daily digest {day}: all quiet")
        } else {
            let mut s = format!("Daily digest {day}: {}", plural(visits, "visit", "visits"));
            if above > 0 {
                s.push_str(&format!(", {above} above usual"));
            }
            if !d.silent.is_empty() {
                s.push_str(&format!(", {} silent", d.silent.len()));
            }
            s
        };
        let chart_alt = {
            let parts: Vec<String> = d
                .nights
                .iter()
                .map(|n| {
                    format!(
                        "{} {} (usual up to {})",
                        n.date.format("%-d %b"),
                        n.events,
                        n.usual_high
                    )
                })
                .collect();
            format!(
                "Visits of watched species per night, last {} nights: {}",
                d.nights.len(),
                parts.join(", ")
            )
        };
        Sections {
            subject: header_safe(&subject),
            headline,
            activity,
            others,
            silent,
            notices,
            failures,
            chart_alt,
        }
    }
}

/// Renders `d` for email.
pub fn render_digest(d: &Digest, ctx: &DigestContext<'_>) -> RenderedDigest {
    let s = Sections::compose(d, ctx);
    let status = ctx.status_url.and_then(safe_url);
    let unsubscribe = safe_url(ctx.unsubscribe_url);
    let greeting = format!("Good morning {}.", header_safe(ctx.subscriber_name));
    let mut titled: Vec<(&str, &Vec<String>)> = Vec::new();
    if !d.is_quiet() {
        titled.push(("Watched species in the last 24 hours", &s.activity));
        titled.push(("Other animals", &s.others));
        titled.push(("Silent cameras", &s.silent));
        titled.push(("Notices", &s.notices));
        if d.coordinator {
            titled.push(("Deliveries that failed", &s.failures));
        }
    }

    let mut text = format!("{greeting}\n\n{}\n", s.headline);
    for (title, lines) in &titled {
        if lines.is_empty() {
            continue;
        }
        text.push_str(&format!("\n{title}\n"));
        for l in lines.iter() {
            text.push_str(&format!("- {l}\n"));
        }
    }
    if !d.nights.is_empty() {
        text.push_str(&format!("\n{}.\n", s.chart_alt));
    }
    text.push('\n');
    text_footer(&mut text, status, unsubscribe, "Stop these messages");

    let small = "font-size:15px;";
    let mut html = String::new();
    html.push_str("<!DOCTYPE html>\n<html lang=\"en\">\n<head>\n<meta charset=\"utf-8\">\n");
    html.push_str("<meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">\n");
    html.push_str(&format!(
        "<title>{}</title>\n</head>\n",
        html_escape(&s.subject)
    ));
    html.push_str(
        "<body style=\"margin:0;padding:16px;font-family:sans-serif;font-size:17px;line-height:1.5;\">\n",
    );
    html.push_str(&format!("<p>{}</p>\n", html_escape(&greeting)));
    html.push_str(&format!(
        "<h1 style=\"font-size:20px;margin:0 0 12px 0;\">{}</h1>\n",
        html_escape(&s.headline)
    ));
    for (title, lines) in &titled {
        if lines.is_empty() {
            continue;
        }
        html.push_str(&format!(
            "<h2 style=\"font-size:18px;margin:16px 0 4px 0;\">{}</h2>\n<ul>\n",
            html_escape(title)
        ));
        for l in lines.iter() {
            html.push_str(&format!("<li>{}</li>\n", html_escape(l)));
        }
        html.push_str("</ul>\n");
    }
    let chart_png = (!d.nights.is_empty()).then(|| chart::png(&d.nights));
    if chart_png.is_some() {
        html.push_str(&format!(
            "<p><img src=\"cid:{CHART_CID}\" width=\"{}\" height=\"{}\" style=\"max-width:100%;height:auto;\" alt=\"{}\"></p>\n",
            chart::WIDTH,
            chart::HEIGHT,
            html_escape(&s.chart_alt)
        ));
        html.push_str(&format!(
            "<p style=\"{small}\">Bars: visits per night (red above the usual range). Pale band: the usual range. Grey line: the usual level.</p>\n"
        ));
    }
    html.push_str("<hr>\n");
    html_footer(&mut html, status, unsubscribe, "Stop these messages");
    RenderedDigest {
        subject: s.subject,
        text,
        html,
        chart_png,
    }
}

#[cfg(test)]
#[allow(clippy::unwrap_used)]
mod tests {
    use super::*;
    use crate::digest::{ActivityRow, NightTotal, SilentCamera};
    use chrono::{NaiveDate, TimeZone, Utc};
    use chrono_tz::Australia::Sydney;

    fn ctx() -> DigestContext<'static> {
        DigestContext {
            subscriber_name: "Wattle <Downs>",
            time_zone: Sydney,
            status_url: Some("http://127.0.0.1:8080"),
            unsubscribe_url: "http://127.0.0.1:8080/unsubscribe/abc",
        }
    }

    fn empty() -> Digest {
        let due = Utc.with_ymd_and_hms(2026, 7, 14, 20, 30, 0).unwrap();
        Digest {
            subscriber_id: "wattle-downs".into(),
            due_at: due,
            from: due - chrono::Duration::hours(24),
            to: due,
            rows: vec![],
            nights: vec![],
            silent: vec![],
            cameras: 4,
            camera_nights: 4.0,
            notices: vec![],
            coordinator: false,
            failures: vec![],
        }
    }

    #[test]
    fn a_quiet_digest_says_so_in_one_line() {
        let r = render_digest(&empty(), &ctx());
        assert_eq!(r.subject, "Daily digest Wed 15 Jul: all quiet");
        let lines: Vec<&str> = r
            .text
            .lines()
            .filter(|l| l.starts_with("Nothing"))
            .collect();
        assert_eq!(lines.len(), 1);
        assert!(!r.text.contains("Watched species in the last"));
        assert!(r.chart_png.is_none());
        assert!(r.text.contains(crate::notify::render::CAUTION[0]));
    }

    #[test]
    fn numbers_are_in_words_and_text_from_messages_is_escaped() {
        let mut d = empty();
        d.rows.push(ActivityRow {
            deployment_id: "KB-07".into(),
            site_label: "Dam <script>alert(1)</script>\r\nBcc: x".into(),
            scientific_name: "Canis familiaris".into(),
            vernacular_name: Some("wild dog".into()),
            watched: true,
            events: 5,
            camera_nights: 1.0,
            expected: Some(0.43),
            p_value: Some(1e-4),
            above_usual: true,
            rai: Some(500.0),
        });
        d.silent.push(SilentCamera {
            deployment_id: "KB-11".into(),
            site_label: "North gate".into(),
            last_sign: Utc.with_ymd_and_hms(2026, 7, 12, 3, 0, 0).unwrap(),
        });
        d.nights = (1..=14)
            .map(|i| NightTotal {
                date: NaiveDate::from_ymd_opt(2026, 7, i).unwrap(),
                events: u64::from(i % 3),
                expected: 0.5,
                usual_high: 2,
            })
            .collect();
        let r = render_digest(&d, &ctx());
        assert_eq!(
            r.subject,
            "Daily digest Wed 15 Jul: 5 visits, 1 above usual, 1 silent"
        );
        assert!(r.text.contains("wild dog at Dam <script>alert(1)</script> Bcc: x (KB-07): 5 visits (usual 0.4); RAI 500 per 100 camera-nights, 1 camera-night. Well above usual."), "{}", r.text);
        assert!(!r.html.contains("<script>"));
        assert!(r.html.contains("&lt;script&gt;"));
        assert!(r.html.contains("Wattle &lt;Downs&gt;"));
        assert!(r.html.contains(&format!("cid:{CHART_CID}")));
        assert!(r.text.contains("North gate (KB-11) has sent nothing since"));
        assert!(r.chart_png.is_some());
    }

    #[test]
    fn numbers() {
        assert_eq!(number(0.43), "0.4");
        assert_eq!(number(12.0), "12");
        assert_eq!(number(2.0), "2");
        assert_eq!(number(f64::NAN), "-");
    }
}
