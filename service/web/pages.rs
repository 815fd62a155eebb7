//! The HTML pages. Pure: a view (`web::view`) in, a complete HTML document
//! out. Every piece of text that came from a message, the store or the
//! config passes [`esc`] (the crate's `html_escape`); attribute values are
//! always double-quoted; URLs are only linked when they are plain http(s)
//! (`safe_url`) or our own paths built from escaped parts.
//!
//! The look is our own: a warm paper ground, dark eucalyptus bars, ochre
//! and rust for "more than usual"; system fonts; one column on a phone.
//! Each page carries its styles inline and loads nothing else.

use crate::notify::render::{CAUTION, CAUTION_TITLE};
use crate::web::assess::Level;
use crate::web::chart::nights_svg;
use crate::web::map::{legend_svg, map_svg, MapArea, MapSite};
use crate::web::view::*;
use chrono::{DateTime, Utc};
use chrono_tz::Tz;
use std::fmt::Write;

/// Escapes text for HTML content and quoted attributes.
pub fn esc(s: &str) -> String {
    crate::notify::html_escape(s)
}

/// Percent-encodes a path segment or query value (RFC 3986 unreserved
/// characters stay as they are).
pub fn url_part(s: &str) -> String {
    let mut o = String::with_capacity(s.len());
    for b in s.bytes() {
        if b.is_ascii_alphanumeric() || matches!(b, b'-' | b'.' | b'_' | b'~') {
            o.push(char::from(b));
        } else {
            let _ = write!(o, "%{b:02X}");
        }
    }
    o
}

const STYLE: &str = r#"
:root{--ink:#23262b;--muted:#5b6068;--ground:#f6f4ee;--card:#fff;--line:#d4d6d9;--accent:#2f5d50;--warn:#a2461b;--link:#1d4e89}
*{box-sizing:border-box}
body{margin:0;background:var(--ground);color:var(--ink);font:16px/1.5 system-ui,-apple-system,"Segoe UI",Roboto,"Noto Sans",sans-serif}
a{color:var(--link)}
a:focus-visible,button:focus-visible,select:focus-visible,input:focus-visible{outline:3px solid #c98a1b;outline-offset:2px}
.skip{position:absolute;left:-999px}.skip:focus{left:1rem;top:.5rem;background:#fff;color:var(--ink);padding:.4rem .8rem;z-index:2}
header{background:var(--accent);color:#fff;padding:.6rem 1rem}
header .in{max-width:64rem;margin:0 auto;display:flex;flex-wrap:wrap;align-items:baseline;gap:.3rem 1.2rem}
header a{color:#fff}
.brand{font-weight:700;letter-spacing:.06em;text-transform:lowercase;font-size:1.15rem}
nav ul{list-style:none;margin:0;padding:0;display:flex;flex-wrap:wrap;gap:.2rem 1rem}
nav a[aria-current=page]{text-decoration:none;border-bottom:3px solid #efe3b8}
main{max-width:64rem;margin:0 auto;padding:1rem}
h1{font-size:1.5rem;margin:.2rem 0 .6rem}h2{font-size:1.2rem;margin:1.4rem 0 .5rem}
.meta{color:var(--muted);font-size:.92rem}
.cards{display:grid;grid-template-columns:repeat(auto-fit,minmax(9.5rem,1fr));gap:.6rem;margin:0;padding:0;list-style:none}
.cards li{background:var(--card);border:1px solid var(--line);border-radius:6px;padding:.5rem .8rem}
.cards b{display:block;font-size:1.55rem;line-height:1.2}
.cards li.alert{border-color:var(--warn);border-width:2px}
.panel{background:var(--card);border:1px solid var(--line);border-radius:6px;padding:.8rem 1rem;margin:1rem 0}
.notices{list-style:none;padding:0;margin:0}
.notice{border-left:6px solid var(--accent);background:var(--card);padding:.5rem .9rem;margin:.6rem 0;border-radius:0 6px 6px 0}
.notice.spike,.notice.build-up{border-left-color:var(--warn)}
.notice.silence,.notice.silence-ended{border-left-color:var(--ink)}
.notice.retraction{border-left-color:var(--muted);border-left-style:dashed}
.notice h3{font-size:1.02rem;margin:0 0 .2rem}
.notice p{margin:.15rem 0}
.scroll{overflow-x:auto}
table{border-collapse:collapse;width:100%;background:var(--card)}
caption{text-align:left;font-weight:600;padding:.3rem 0}
th,td{text-align:left;padding:.35rem .5rem;border-bottom:1px solid var(--line);vertical-align:top}
td.n,th.n{text-align:right;font-variant-numeric:tabular-nums}
pre{white-space:pre-wrap;word-break:break-all;margin:0;font-size:.85rem;max-width:36rem}
.caution{border:2px solid var(--warn);background:#fff8f0;padding:.6rem 1rem;border-radius:6px;margin:1.5rem 0}
.caution ul{margin:.3rem 0;padding-left:1.2rem}
.legend{display:flex;flex-wrap:wrap;gap:.3rem 1.1rem;list-style:none;padding:0;margin:.5rem 0 0}
.legend li{display:flex;align-items:center;gap:.35rem}
.badge{display:inline-block;padding:0 .45rem;border-radius:4px;border:1px solid var(--line);background:var(--card);font-size:.85rem}
.badge.bad{border-color:var(--warn);color:var(--warn);font-weight:600}
button{font:inherit;padding:.6rem 1.3rem;background:var(--warn);color:#fff;border:0;border-radius:6px;cursor:pointer}
form.filters{display:flex;flex-wrap:wrap;gap:.5rem 1rem;align-items:flex-end}
form.filters button{background:var(--accent);padding:.35rem 1rem}
label{display:flex;flex-direction:column;font-size:.9rem}
select{font:inherit;padding:.25rem;min-width:9rem}
footer{max-width:64rem;margin:0 auto;padding:0 1rem 2rem;color:var(--muted);font-size:.9rem}
@media (max-width:32rem){body{font-size:15px}.cards b{font-size:1.3rem}main{padding:.7rem}}
"#;

/// The page icon, inline (a browser would otherwise fetch /favicon.ico):
/// a pale ring on the eucalyptus green, our own mark.
const ICON: &str = "data:image/svg+xml,%3Csvg xmlns='http://www.w3.org/2000/svg' viewBox='0 0 16 16'%3E%3Ccircle cx='8' cy='8' r='8' fill='%232f5d50'/%3E%3Ccircle cx='8' cy='8' r='4' fill='none' stroke='%23efe3b8' stroke-width='2'/%3E%3C/svg%3E";

/// Which page of the coordinator's menu is open; `None` for the public pages
/// (no menu: a subscriber or a mail program sees only their own page).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Nav {
    Overview,
    Notices,
    Rejected,
    Subscribers,
    Site,
}

fn layout(title: &str, nav: Option<Nav>, body: &str) -> String {
    let mut o = String::with_capacity(body.len() + 6000);
    let _ = write!(
        o,
        "<!DOCTYPE html>\n<html lang=\"en\">\n<head>\n<meta charset=\"utf-8\">\n<meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">\n<meta name=\"referrer\" content=\"no-referrer\">\n<link rel=\"icon\" href=\"{ICON}\">\n<title>{} · outrider</title>\n<style>{STYLE}</style>\n</head>\n<body>\n<a class=\"skip\" href=\"#main\">Skip to the content</a>\n<header><div class=\"in\"><span class=\"brand\">outrider</span>",
        esc(title)
    );
    if let Some(active) = nav {
        o.push_str("<nav aria-label=\"Pages\"><ul>");
        for (n, href, label) in [
            (Nav::Overview, "/", "Overview"),
            (Nav::Notices, "/notices", "Notices"),
            (Nav::Rejected, "/rejected", "Rejected messages"),
            (Nav::Subscribers, "/subscribers", "Subscribers"),
        ] {
            let current = if n == active {
                " aria-current=\"page\""
            } else {
                ""
            };
            let _ = write!(o, "<li><a href=\"{href}\"{current}>{label}</a></li>");
        }
        o.push_str("</ul></nav>");
    }
    o.push_str("</div></header>\n<main id=\"main\">\n");
    o.push_str(body);
    o.push_str("\n</main>\n<footer>outrider reports what cameras and a classifier detected; that can be wrong.</footer>\n</body>\n</html>\n");
    o
}

fn caution() -> String {
    let mut o = format!(
        "<aside class=\"caution\" aria-label=\"{CAUTION_TITLE}\"><strong>{CAUTION_TITLE}.</strong><ul>"
    );
    for c in CAUTION {
        let _ = write!(o, "<li>{}</li>", esc(c));
    }
    o.push_str("</ul></aside>");
    o
}

fn local(t: DateTime<Utc>, tz: Tz) -> String {
    crate::notify::render::local_time(t, tz)
}

fn parse_tz(name: &str) -> Tz {
    name.parse().unwrap_or(Tz::UTC)
}

fn plural(n: u64, one: &str, many: &str) -> String {
    format!("{n} {}", if n == 1 { one } else { many })
}

/// One notice as a list item: headline, facts, photo link, decision and
/// deliveries.
fn notice_item(n: &NoticeView, coordinator: bool) -> String {
    let mut o = format!(
        "<li class=\"notice {}\" data-notice=\"{}\"><h3>{}</h3>",
        esc(&n.trigger),
        esc(&n.id),
        esc(&n.headline)
    );
    for f in &n.facts {
        let _ = write!(o, "<p>{}</p>", esc(f));
    }
    if let Some(u) = &n.image_url {
        let _ = write!(
            o,
            "<p><a href=\"{}\" rel=\"noopener noreferrer\">See the photo</a></p>",
            esc(u)
        );
    }
    let mut meta = vec![format!("Decided {}", esc(&n.at_local))];
    if coordinator {
        meta.push(format!(
            "for <a href=\"/subscribers/{}\">{}</a>",
            url_part(&n.subscriber),
            esc(if n.subscriber_name.is_empty() {
                &n.subscriber
            } else {
                &n.subscriber_name
            })
        ));
    }
    meta.push(format!("watch “{}”", esc(&n.watch)));
    meta.push(format!("{}: {}", esc(&n.disposition), esc(&n.reason)));
    let _ = write!(o, "<p class=\"meta\">{}</p>", meta.join(" · "));
    if !n.deliveries.is_empty() {
        let d: Vec<String> = n
            .deliveries
            .iter()
            .map(|d| {
                let mut s = format!(
                    "<span class=\"badge{}\">{} {}</span>",
                    if d.state == "failed" { " bad" } else { "" },
                    esc(&d.channel),
                    esc(&d.state)
                );
                if coordinator {
                    if let Some(e) = &d.last_error {
                        let _ = write!(s, " {}", esc(e));
                    }
                }
                s
            })
            .collect();
        let _ = write!(o, "<p class=\"meta\">Delivery: {}</p>", d.join(" "));
    }
    o.push_str("</li>");
    o
}

fn notice_list(ns: &[NoticeView], coordinator: bool, empty: &str) -> String {
    if ns.is_empty() {
        return format!(
            "<p class=\"meta\" data-empty=\"notices\">{}</p>",
            esc(empty)
        );
    }
    let mut o = String::from("<ol class=\"notices\" data-list=\"notices\">");
    for n in ns {
        o.push_str(&notice_item(n, coordinator));
    }
    o.push_str("</ol>");
    o
}

fn legend() -> String {
    let mut o = String::from("<ul class=\"legend\" aria-label=\"Map key\">");
    for l in [
        Level::Quiet,
        Level::Usual,
        Level::Raised,
        Level::High,
        Level::Silent,
        Level::NoEffort,
    ] {
        let _ = write!(
            o,
            "<li>{}<span>{}</span></li>",
            legend_svg(l),
            esc(l.words())
        );
    }
    o.push_str("</ul>");
    o
}

fn map_sites(sites: &[SiteSummary]) -> Vec<MapSite> {
    sites
        .iter()
        .map(|s| MapSite {
            deployment_id: s.deployment_id.clone(),
            label: s.label.clone(),
            lat: s.latitude,
            lon: s.longitude,
            level: Some(s.level),
            href: Some(format!("/sites/{}", url_part(&s.deployment_id))),
            covered: None,
        })
        .collect()
}

fn card(o: &mut String, value: u64, label: &str, alert: bool) {
    let _ = write!(
        o,
        "<li{}><b>{value}</b>{}</li>",
        if alert { " class=\"alert\"" } else { "" },
        esc(label)
    );
}

/// `/`.
pub fn overview(v: &Overview) -> String {
    let tz = parse_tz(&v.time_zone);
    let c = &v.counts;
    let mut b = String::new();
    let _ = write!(
        b,
        "<h1>Camera sites and notices</h1><p class=\"meta\">As of {} ({}). Broker <span class=\"badge{}\">{}</span> Store <span class=\"badge{}\">{}</span></p>",
        esc(&local(v.now, tz)),
        esc(&v.time_zone),
        if v.broker_connected { "" } else { " bad" },
        if v.broker_connected { "connected" } else { "not connected" },
        if v.store_writable { "" } else { " bad" },
        if v.store_writable { "writable" } else { "not writable" },
    );
    b.push_str("<h2 id=\"counts\">Counts</h2><ul class=\"cards\" aria-labelledby=\"counts\" data-list=\"counts\">");
    card(&mut b, c.observations_stored, "observations stored", false);
    card(&mut b, c.heartbeats_stored, "heartbeats stored", false);
    card(
        &mut b,
        c.rejected_total,
        "messages rejected",
        c.rejected_total > 0,
    );
    card(&mut b, c.duplicates_ignored, "duplicates ignored", false);
    card(&mut b, c.events, "independent events", false);
    card(&mut b, c.notices.values().sum(), "notices decided", false);
    card(&mut b, c.outbox_pending, "deliveries pending", false);
    card(
        &mut b,
        c.deliveries_failed,
        "deliveries failed",
        c.deliveries_failed > 0,
    );
    card(
        &mut b,
        c.deployments_silent,
        "cameras silent",
        c.deployments_silent > 0,
    );
    card(
        &mut b,
        c.people_and_vehicles_24h,
        "people or vehicles in 24 h (counted only)",
        false,
    );
    b.push_str("</ul>");

    b.push_str("<h2 id=\"map\">Last 24 hours at each site</h2><div class=\"panel\">");
    b.push_str(&map_svg(
        &map_sites(&v.sites),
        &MapArea::None,
        "Map of the camera sites, each marked by its last 24 hours against its usual level",
        "overview",
    ));
    b.push_str(&legend());
    b.push_str("<p class=\"meta\">Compared with each site's own usual level for the species that subscribers watch (the same baseline the notices use; docs/web.md says how).</p></div>");

    b.push_str("<div class=\"scroll\"><table data-table=\"sites\"><caption>Sites</caption><thead><tr><th scope=\"col\">Site</th><th scope=\"col\">Last 24 hours</th><th scope=\"col\">Seen</th><th scope=\"col\">Last sign of life</th></tr></thead><tbody>");
    for s in &v.sites {
        let seen: Vec<String> = s
            .species
            .iter()
            .map(|sp| format!("{} {} (usual {:.1})", sp.count, esc(&sp.name), sp.expected))
            .collect();
        let _ = write!(
            b,
            "<tr><th scope=\"row\"><a href=\"/sites/{}\">{}</a> {}</th><td>{}</td><td>{}</td><td>{}</td></tr>",
            url_part(&s.deployment_id),
            esc(&s.deployment_id),
            if s.label != s.deployment_id { esc(&s.label) } else { String::new() },
            esc(&s.level_words),
            if seen.is_empty() { "none".into() } else { seen.join(", ") },
            s.last_seen
                .map(|t| esc(&local(t, tz)))
                .unwrap_or_else(|| "never".into()),
        );
    }
    b.push_str("</tbody></table></div>");

    b.push_str("<h2>Latest notices</h2>");
    b.push_str(&notice_list(&v.notices, true, "No notices yet."));
    let _ = write!(b, "<p><a href=\"/notices\">All notices</a></p>");
    b.push_str(&caution());
    layout("Overview", Some(Nav::Overview), &b)
}

/// `/sites/<id>`.
pub fn site(v: &SitePage) -> String {
    let tz = parse_tz(&v.time_zone);
    let s = &v.site;
    let mut b = String::new();
    let _ = write!(
        b,
        "<h1>{} {}</h1><p class=\"meta\">{:.5}, {:.5} · camera {} · deployed {}{}</p>",
        esc(&s.deployment_id),
        if s.label != s.deployment_id {
            esc(&s.label)
        } else {
            String::new()
        },
        s.latitude,
        s.longitude,
        esc(v.camera_id.as_deref().unwrap_or("not named")),
        esc(&local(v.deployment_start, tz)),
        v.deployment_end
            .map(|e| format!(", collected {}", esc(&local(e, tz))))
            .unwrap_or_default()
    );
    b.push_str("<ul class=\"cards\" data-list=\"camera\">");
    let _ = write!(
        b,
        "<li{}><b>{}</b>last 24 hours</li>",
        if matches!(s.level, Level::High | Level::Silent) {
            " class=\"alert\""
        } else {
            ""
        },
        esc(&s.level_words)
    );
    let _ = write!(
        b,
        "<li><b>{}</b>last sign of life</li>",
        s.last_seen
            .map(|t| esc(&local(t, tz)))
            .unwrap_or_else(|| "never".into())
    );
    match &v.heartbeat {
        Some(h) => {
            let _ = write!(
                b,
                "<li><b>{}</b>battery at the last heartbeat</li><li><b>{}</b>signal at the last heartbeat ({})</li>",
                h.battery_percent
                    .map(|p| format!("{p:.0} %"))
                    .unwrap_or_else(|| "not sent".into()),
                h.signal_dbm
                    .map(|d| format!("{d:.0} dBm"))
                    .unwrap_or_else(|| "not sent".into()),
                esc(&local(h.timestamp, tz))
            );
        }
        None => b.push_str("<li><b>none</b>heartbeats received</li>"),
    }
    b.push_str("</ul>");

    b.push_str("<h2>Last 14 nights</h2><div class=\"panel\">");
    b.push_str(&nights_svg(&v.nights, &format!("n{}", s.deployment_id)));
    b.push_str("<p class=\"meta\">A night runs from noon to noon, labelled by its evening. The usual band is the middle 80 % of the counts the site's baseline expects for that night's camera effort.</p></div>");

    b.push_str("<div class=\"scroll\"><table data-table=\"rai\"><caption>Relative abundance over these nights (events per 100 camera-nights)</caption><thead><tr><th scope=\"col\">Species</th><th scope=\"col\" class=\"n\">Events</th><th scope=\"col\" class=\"n\">Camera-nights</th><th scope=\"col\" class=\"n\">RAI</th></tr></thead><tbody>");
    if v.rai.is_empty() {
        b.push_str("<tr><td colspan=\"4\">No animal events.</td></tr>");
    }
    for r in &v.rai {
        let _ = write!(
            b,
            "<tr><th scope=\"row\">{} <i>{}</i></th><td class=\"n\">{}</td><td class=\"n\">{:.1}</td><td class=\"n\">{}</td></tr>",
            esc(&r.name),
            if r.name != r.scientific_name { esc(&r.scientific_name) } else { String::new() },
            r.events,
            r.camera_nights,
            r.rai
                .map(|x| format!("{x:.1}"))
                .unwrap_or_else(|| "undefined (no effort)".into())
        );
    }
    b.push_str("</tbody></table></div>");
    b.push_str("<h2>Notices from this camera</h2>");
    b.push_str(&notice_list(
        &v.notices,
        true,
        "No notices from this camera.",
    ));
    b.push_str(&caution());
    layout(&s.deployment_id, Some(Nav::Site), &b)
}

fn select(
    o: &mut String,
    name: &str,
    label: &str,
    current: Option<&str>,
    options: &[(String, String)],
) {
    let _ = write!(
        o,
        "<label>{}<select name=\"{name}\"><option value=\"\">any</option>",
        esc(label)
    );
    for (value, text) in options {
        let sel = if current == Some(value.as_str()) {
            " selected"
        } else {
            ""
        };
        let _ = write!(
            o,
            "<option value=\"{}\"{sel}>{}</option>",
            esc(value),
            esc(text)
        );
    }
    o.push_str("</select></label>");
}

/// `/notices`.
pub fn notices(v: &NoticesPage) -> String {
    let f = &v.filter;
    let mut b = String::from("<h1>Notices</h1><form class=\"filters\" method=\"get\" action=\"/notices\" aria-label=\"Filter the notices\">");
    select(
        &mut b,
        "subscriber",
        "Subscriber",
        f.subscriber.as_deref(),
        &v.subscribers,
    );
    select(
        &mut b,
        "species",
        "Species",
        f.species.as_deref(),
        &v.species,
    );
    let t: Vec<(String, String)> = v.triggers.iter().map(|t| (t.clone(), t.clone())).collect();
    select(&mut b, "trigger", "Trigger", f.trigger.as_deref(), &t);
    let d: Vec<(String, String)> = v
        .dispositions
        .iter()
        .map(|t| (t.clone(), t.clone()))
        .collect();
    select(
        &mut b,
        "disposition",
        "Disposition",
        f.disposition.as_deref(),
        &d,
    );
    b.push_str("<button type=\"submit\">Show</button></form>");
    let _ = write!(
        b,
        "<p class=\"meta\">{} shown, newest first (at most {}).</p>",
        plural(v.notices.len() as u64, "notice", "notices"),
        f.row_limit()
    );
    b.push_str(&notice_list(&v.notices, true, "No notice matches."));
    b.push_str(&caution());
    layout("Notices", Some(Nav::Notices), &b)
}

/// `/rejected`.
pub fn rejected(v: &RejectedPage) -> String {
    let mut b = String::from("<h1>Rejected messages</h1><p>Messages refused at the door, each with its reason. They are kept as received (cut to the payload limit); a message that said it showed a person or a vehicle keeps only its identifying keys.</p>");
    b.push_str("<ul class=\"cards\" data-list=\"reasons\">");
    for (reason, n) in &v.counts {
        let _ = write!(
            b,
            "<li><b>{n}</b><a href=\"/rejected?reason={}\">{}</a></li>",
            url_part(reason),
            esc(reason)
        );
    }
    if v.counts.is_empty() {
        b.push_str("<li><b>0</b>rejected</li>");
    }
    b.push_str("</ul>");
    if let Some(r) = &v.reason {
        let _ = write!(
            b,
            "<p class=\"meta\">Showing reason {} only. <a href=\"/rejected\">Show all</a></p>",
            esc(r)
        );
    }
    b.push_str("<div class=\"scroll\"><table data-table=\"rejected\"><caption>Latest first</caption><thead><tr><th scope=\"col\">Received</th><th scope=\"col\">Topic</th><th scope=\"col\">Reason</th><th scope=\"col\">Payload</th></tr></thead><tbody>");
    for r in &v.rows {
        let _ = write!(
            b,
            "<tr data-row=\"rejected\"><td>{}</td><td><code>{}</code></td><td><strong>{}</strong><br>{}</td><td><pre>{}</pre><span class=\"meta\">{} bytes{}{}</span></td></tr>",
            esc(&r.received_at.to_rfc3339_opts(chrono::SecondsFormat::Secs, true)),
            esc(&r.topic),
            esc(&r.reason),
            esc(&r.detail),
            esc(&r.payload),
            r.payload_bytes,
            if r.payload_encoding == "hex" { ", shown as hex" } else { "" },
            if r.shown_cut { ", cut for display" } else { "" },
        );
    }
    if v.rows.is_empty() {
        b.push_str("<tr><td colspan=\"4\">None.</td></tr>");
    }
    b.push_str("</tbody></table></div>");
    layout("Rejected messages", Some(Nav::Rejected), &b)
}

/// `/subscribers`.
pub fn subscribers(rows: &[SubscriberRow]) -> String {
    let mut b = String::from("<h1>Subscribers</h1><div class=\"scroll\"><table data-table=\"subscribers\"><caption>From the configuration</caption><thead><tr><th scope=\"col\">Subscriber</th><th scope=\"col\">Area</th><th scope=\"col\" class=\"n\">Watches</th><th scope=\"col\" class=\"n\">Sites</th><th scope=\"col\">Email</th></tr></thead><tbody>");
    for r in rows {
        let _ = write!(
            b,
            "<tr><th scope=\"row\"><a href=\"/subscribers/{}\">{}</a><br><span class=\"meta\">{}</span></th><td>{}</td><td class=\"n\">{}</td><td class=\"n\">{}</td><td>{}</td></tr>",
            url_part(&r.id),
            esc(&r.name),
            esc(&r.id),
            esc(&r.area),
            r.watches,
            r.sites_covered,
            r.unsubscribed_at
                .map(|t| format!("unsubscribed {}", esc(&t.to_rfc3339_opts(chrono::SecondsFormat::Secs, true))))
                .unwrap_or_else(|| "receiving".into())
        );
    }
    b.push_str("</tbody></table></div>");
    layout("Subscribers", Some(Nav::Subscribers), &b)
}

/// Who is looking at a subscriber's page.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum Viewer {
    Coordinator,
    /// The subscriber, through their signed link; `unsubscribe` is the
    /// action of the stop-email button (a fresh unsubscribe link).
    Subscriber {
        unsubscribe: String,
    },
}

/// `/subscribers/<id>` and `/my/<token>`.
pub fn subscriber(v: &SubscriberPage, viewer: &Viewer) -> String {
    let coordinator = *viewer == Viewer::Coordinator;
    let mut b = String::new();
    let _ = write!(
        b,
        "<h1>{}</h1><p class=\"meta\">{} · digest at {} ({}){}</p>",
        esc(&v.name),
        if coordinator {
            esc(&v.id)
        } else {
            "Your notices".into()
        },
        esc(&v.digest_at),
        esc(&v.time_zone),
        v.quiet_hours
            .as_ref()
            .map(|q| format!(" · quiet hours {}", esc(q)))
            .unwrap_or_default()
    );
    if let Some(t) = v.unsubscribed_at {
        let _ = write!(
            b,
            "<p class=\"panel\" data-state=\"unsubscribed\"><strong>Email is stopped</strong> since {}: no further notice is emailed.</p>",
            esc(&local(t, parse_tz(&v.time_zone)))
        );
    }
    let _ = write!(
        b,
        "<h2>Area</h2><p>{}.</p><div class=\"panel\">",
        esc(&capitalise(&v.area))
    );
    b.push_str(&map_svg(
        &v.map_sites,
        &v.map_area,
        &format!("Map of the area of {} and the camera sites in it", v.name),
        "area",
    ));
    b.push_str("</div>");
    if v.covered.is_empty() {
        b.push_str("<p>No camera site is in this area yet.</p>");
    } else {
        let distances = v.covered.iter().any(|c| c.distance_km.is_some());
        let _ = write!(
            b,
            "<div class=\"scroll\"><table data-table=\"covered\"><caption>Camera sites in the area</caption><thead><tr><th scope=\"col\">Site</th>{}</tr></thead><tbody>",
            if distances {
                "<th scope=\"col\" class=\"n\">Distance (km)</th>"
            } else {
                ""
            }
        );
        for c in &v.covered {
            let site = if coordinator {
                format!(
                    "<a href=\"/sites/{}\">{}</a>",
                    url_part(&c.deployment_id),
                    esc(&c.deployment_id)
                )
            } else {
                esc(&c.deployment_id)
            };
            let _ = write!(
                b,
                "<tr><th scope=\"row\">{site} {}</th>{}</tr>",
                if c.label != c.deployment_id {
                    esc(&c.label)
                } else {
                    String::new()
                },
                c.distance_km
                    .map(|d| format!("<td class=\"n\">{d:.1}</td>"))
                    .unwrap_or_default()
            );
        }
        b.push_str("</tbody></table></div>");
    }
    b.push_str("<h2>Watches</h2><ul>");
    for w in &v.watches {
        let _ = write!(b, "<li>{}</li>", esc(w));
    }
    b.push_str("</ul><h2>Recent notices</h2>");
    b.push_str(&notice_list(&v.notices, false, "No notices yet."));
    if let Viewer::Subscriber { unsubscribe } = viewer {
        if v.unsubscribed_at.is_none() {
            let _ = write!(
                b,
                "<h2>Stop email</h2><form method=\"post\" action=\"{}\"><input type=\"hidden\" name=\"List-Unsubscribe\" value=\"One-Click\"><input type=\"hidden\" name=\"source\" value=\"page\"><button type=\"submit\">Stop email notices</button></form>",
                esc(unsubscribe)
            );
        }
    }
    b.push_str(&caution());
    layout(
        &v.name,
        if coordinator {
            Some(Nav::Subscribers)
        } else {
            None
        },
        &b,
    )
}

/// The page a GET of an unsubscribe link shows: a question and a button;
/// nothing changes until the button is pressed (RFC 8058 §3.2: a GET must
/// not unsubscribe).
pub fn unsubscribe_confirm(name: &str, action: &str, since: Option<DateTime<Utc>>) -> String {
    let mut b = String::new();
    match since {
        Some(t) => {
            let _ = write!(
                b,
                "<h1>Email already stopped</h1><p data-state=\"unsubscribed\">{} gets no email notices since {}.</p>",
                esc(name),
                esc(&t.to_rfc3339_opts(chrono::SecondsFormat::Secs, true))
            );
        }
        None => {
            let _ = write!(
                b,
                "<h1>Stop email notices?</h1><p>Pressing the button stops every email notice and digest to <strong>{}</strong>. Nothing changes until you press it.</p><form method=\"post\" action=\"{}\"><input type=\"hidden\" name=\"List-Unsubscribe\" value=\"One-Click\"><input type=\"hidden\" name=\"source\" value=\"page\"><button type=\"submit\">Stop email notices</button></form><p class=\"meta\">To start them again, ask your pest coordinator.</p>",
                esc(name),
                esc(action)
            );
        }
    }
    layout("Stop email notices", None, &b)
}

/// After an unsubscribe POST.
pub fn unsubscribe_done(name: &str, closed: u64) -> String {
    let b = format!(
        "<h1>Email stopped</h1><p data-state=\"unsubscribed\">{} will get no further email notices.{}</p><p class=\"meta\">To start them again, ask your pest coordinator.</p>",
        esc(name),
        if closed > 0 {
            format!(" {} waiting to be sent will not be sent.", plural(closed, "notice", "notices"))
        } else {
            String::new()
        }
    );
    layout("Email stopped", None, &b)
}

/// A refusal or an error, in plain words.
pub fn message(title: &str, text: &str) -> String {
    let b = format!("<h1>{}</h1><p>{}</p>", esc(title), esc(text));
    layout(title, None, &b)
}

fn capitalise(s: &str) -> String {
    let mut c = s.chars();
    match c.next() {
        Some(f) => f.to_uppercase().chain(c).collect(),
        None => String::new(),
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::web::chart::NightsChart;

    const EVIL: &str = "<script>alert('x')</script>\"&";

    fn evil_notice() -> NoticeView {
        NoticeView {
            id: EVIL.into(),
            subscriber: format!("sub/{EVIL}"),
            subscriber_name: EVIL.into(),
            watch: EVIL.into(),
            trigger: "presence\" onmouseover=\"x".into(),
            disposition: "sent".into(),
            reason: EVIL.into(),
            deployment_id: EVIL.into(),
            scientific_name: Some(EVIL.into()),
            at: DateTime::<Utc>::default(),
            at_local: EVIL.into(),
            headline: EVIL.into(),
            facts: vec![EVIL.into()],
            image_url: Some("https://img.example/a.jpg?x=\"1\"&y=<2>".into()),
            evidence: serde_json::json!({}),
            deliveries: vec![DeliveryView {
                channel: EVIL.into(),
                state: "failed".into(),
                attempts: 1,
                last_error: Some(EVIL.into()),
            }],
        }
    }

    fn assert_clean(html: &str) {
        assert!(!html.contains("<script"), "unescaped script in:\n{html}");
        assert!(!html.contains("'x'"), "unescaped quote");
        assert!(!html.contains("onmouseover=\"x"), "attribute broken out");
        assert!(html.starts_with("<!DOCTYPE html>\n<html lang=\"en\">"));
        assert!(html.contains("<meta name=\"viewport\""));
        // No external asset: no script, stylesheet link or remote image.
        assert!(!html.contains("<img") && !html.contains("<iframe") && !html.contains("<script"));
        assert_eq!(
            html.matches("<link").count(),
            1,
            "only the inline icon: no stylesheet or other link"
        );
        assert!(html.contains("<link rel=\"icon\" href=\"data:image/svg+xml,"));
    }

    #[test]
    fn notices_escape_every_field_that_came_from_outside() {
        let page = NoticesPage {
            filter: NoticeFilter {
                subscriber: Some(EVIL.into()),
                ..Default::default()
            },
            notices: vec![evil_notice()],
            subscribers: vec![(EVIL.into(), EVIL.into())],
            species: vec![],
            triggers: vec!["presence".into()],
            dispositions: vec!["sent".into()],
        };
        let html = notices(&page);
        assert_clean(&html);
        assert!(html.contains("&lt;script&gt;alert(&#39;x&#39;)&lt;/script&gt;&quot;&amp;"));
        assert!(
            html.contains("href=\"/subscribers/sub%2F%3Cscript%3E"),
            "path part encoded"
        );
        assert!(html.contains("href=\"https://img.example/a.jpg?x=&quot;1&quot;&amp;y=&lt;2&gt;\""));
        assert!(html.contains("class=\"notice presence&quot; onmouseover=&quot;x\""));
        // The chosen filter is marked selected, escaped.
        assert!(html.contains("selected>&lt;script&gt;"));
        assert!(html.contains(CAUTION[2]), "the caution is on the page");
    }

    #[test]
    fn a_rejected_payload_is_shown_as_text_never_as_markup() {
        let page = RejectedPage {
            counts: [(EVIL.to_string(), 1)].into_iter().collect(),
            reason: Some(EVIL.into()),
            rows: vec![RejectedView {
                received_at: DateTime::<Utc>::default(),
                topic: EVIL.into(),
                reason: EVIL.into(),
                detail: EVIL.into(),
                payload: format!("{{\"x\":\"{EVIL}</pre><img src=x onerror=alert(1)>\"}}"),
                payload_encoding: "utf-8",
                payload_bytes: 99,
                shown_cut: false,
            }],
        };
        let html = rejected(&page);
        assert_clean(&html);
        assert!(html.contains("&lt;/pre&gt;&lt;img src=x onerror=alert(1)&gt;"));
        assert_eq!(html.matches("<pre>").count(), 1);
        assert_eq!(html.matches("</pre>").count(), 1);
        assert!(html.contains("href=\"/rejected?reason=%3Cscript%3E"));
    }

    #[test]
    fn the_overview_has_a_marker_per_site_the_counts_and_the_notices() {
        let site = |id: &str, level| SiteSummary {
            deployment_id: id.into(),
            label: EVIL.into(),
            latitude: -31.5,
            longitude: 148.0 + if id == "A" { 0.0 } else { 0.1 },
            level,
            level_words: "x".into(),
            effort_nights: 1.0,
            species: vec![],
            last_seen: None,
            silent: false,
        };
        let v = Overview {
            now: DateTime::<Utc>::default(),
            time_zone: "Australia/Sydney".into(),
            broker_connected: false,
            store_writable: true,
            counts: Counts {
                rejected_total: 3,
                people_and_vehicles_24h: 2,
                ..Default::default()
            },
            sites: vec![site("A", Level::High), site("B", Level::Silent)],
            notices: vec![evil_notice()],
        };
        let html = overview(&v);
        assert_clean(&html);
        assert_eq!(html.matches("data-marker=\"site\"").count(), 2);
        assert_eq!(html.matches("data-notice=").count(), 1);
        assert!(html.contains("<b>2</b>people or vehicles in 24 h (counted only)"));
        assert!(html.contains("not connected"));
        assert!(html.contains("aria-current=\"page\""));
    }

    #[test]
    fn the_unsubscribe_question_changes_nothing_and_posts_the_one_click_body() {
        let html = unsubscribe_confirm(EVIL, "/unsubscribe/abc.def", None);
        assert_clean(&html);
        assert!(html.contains("<form method=\"post\" action=\"/unsubscribe/abc.def\">"));
        assert!(html.contains("name=\"List-Unsubscribe\" value=\"One-Click\""));
        assert!(
            !html.contains("<nav"),
            "no coordinator menu on a public page"
        );
        let html = unsubscribe_done(EVIL, 2);
        assert!(html.contains("2 notices waiting to be sent will not be sent."));
    }

    #[test]
    fn a_subscriber_sees_no_coordinator_links_on_their_own_page() {
        let v = SubscriberPage {
            id: "stonecroft".into(),
            name: EVIL.into(),
            time_zone: "Australia/Sydney".into(),
            digest_at: "06:30".into(),
            quiet_hours: None,
            area: "within 6 km".into(),
            watches: vec![EVIL.into()],
            covered: vec![CoveredSite {
                deployment_id: "KB-01".into(),
                label: "Ridge".into(),
                distance_km: Some(1.24),
            }],
            notices: vec![evil_notice()],
            unsubscribed_at: None,
            map_sites: vec![],
            map_area: MapArea::None,
        };
        let own = subscriber(
            &v,
            &Viewer::Subscriber {
                unsubscribe: "/unsubscribe/t".into(),
            },
        );
        assert_clean(&own);
        assert!(!own.contains("href=\"/sites/") && !own.contains("href=\"/subscribers/"));
        assert!(!own.contains("<nav"));
        assert!(own.contains("action=\"/unsubscribe/t\""));
        assert!(!own.contains("&amp;lt;"), "escaped once, not twice");
        let coord = subscriber(&v, &Viewer::Coordinator);
        assert!(coord.contains("href=\"/sites/KB-01\""));
        assert!(!coord.contains("action=\"/unsubscribe"));
    }

    #[test]
    fn the_site_page_carries_the_chart_and_the_rai_table() {
        let v = SitePage {
            now: DateTime::<Utc>::default(),
            time_zone: "UTC".into(),
            site: SiteSummary {
                deployment_id: "KB-07".into(),
                label: "Swamp Corner".into(),
                latitude: -31.6,
                longitude: 148.1,
                level: Level::Usual,
                level_words: "usual activity".into(),
                effort_nights: 1.0,
                species: vec![],
                last_seen: None,
                silent: false,
            },
            camera_id: Some(EVIL.into()),
            deployment_start: DateTime::<Utc>::default(),
            deployment_end: None,
            heartbeat: Some(HeartbeatView {
                timestamp: DateTime::<Utc>::default(),
                battery_percent: Some(81.0),
                signal_dbm: Some(-97.0),
            }),
            nights: NightsChart {
                title: "t".into(),
                nights: vec![],
                series: vec![],
            },
            rai: vec![RaiView {
                scientific_name: "Vulpes vulpes".into(),
                name: "red fox".into(),
                events: 3,
                camera_nights: 0.0,
                rai: None,
            }],
            notices: vec![],
        };
        let html = site(&v);
        assert_clean(&html);
        assert!(html.contains("data-chart=\"nights\""));
        assert!(html.contains("<b>81 %</b>battery"));
        assert!(html.contains("<b>-97 dBm</b>signal"));
        assert!(html.contains("undefined (no effort)"));
    }

    #[test]
    fn url_parts_are_percent_encoded() {
        assert_eq!(url_part("KB-07"), "KB-07");
        assert_eq!(url_part("a b/c?d&e\"<"), "a%20b%2Fc%3Fd%26e%22%3C");
        assert_eq!(url_part("é"), "%C3%A9");
    }
}
