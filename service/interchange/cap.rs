//! A notice as a CAP 1.2 alert (OASIS Common Alerting Protocol 1.2).
//!
//! Role: pure. [`alert`] turns a [`Notice`] and a [`CapContext`] into the
//! XML text of one `<alert>`; [`mapping`] is the documented table from our
//! triggers to CAP's urgency, severity and certainty (docs/interchange.md
//! shows the same table). Elements come in the order the CAP 1.2 XSD's
//! sequences require.
//!
//! - `identifier`: the notice id; `sender`: `outrider@<host of
//!   service.public_url>`; `sent`: the decision time in the subscriber's
//!   zone, CAP's form (`2026-07-14T02:10:00+10:00`, UTC as `-00:00`).
//! - `scope` `Private`, `addresses` the subscriber id: each alert is for one
//!   subscriber.
//! - `incidents`: the event the notice is about, so a follow-up (a
//!   retraction, `msgType` `Cancel`) can be tied to the alert it cancels;
//!   `references` names that alert when the caller knows it (the export
//!   looks it up in the store).
//! - One `info` in English, `category` `Env`; headline and description are
//!   the email's own words ([`crate::notify::render::notice_words`]);
//!   `instruction` the project's caution; the figures as `parameter`s; the
//!   photo as a `resource`.
//! - Areas: the camera site as a circle of radius 0 (a point), and the
//!   subscriber's area as a circle (a `lat, lon, radius_km` area) or
//!   polygons (a GeoJSON area: each polygon's outer ring; holes and
//!   `buffer_km` are said in `areaDesc`, as CAP polygons have no holes).
//!   Site-list and whole-district areas add nothing beyond the site.
//!
//! Every piece of text that came from a message or the config is passed
//! through [`xml_escape`] (and single-line fields through
//! [`header_safe`]) before it goes into the XML.

use super::text::{cap_datetime, xml_escape};
use crate::config::{Config, Subscriber};
use crate::geo::Area;
use crate::notify::render::{header_safe, notice_words, safe_url, CAUTION};
use crate::notify::{Notice, Trigger};
use chrono::{DateTime, Utc};
use chrono_tz::Tz;
use std::fmt::Write as _;

/// The CAP 1.2 XML namespace.
pub const NAMESPACE: &str = "urn:oasis:names:tc:emergency:cap:1.2";

/// An earlier alert this one refers to (CAP `references`).
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct CapReference {
    pub sender: String,
    pub identifier: String,
    pub sent: DateTime<Utc>,
}

/// What an alert needs besides the notice.
#[derive(Debug, Clone, Copy)]
pub struct CapContext<'a> {
    /// CAP `sender` ([`sender_for`]).
    pub sender: &'a str,
    /// The subscriber's time zone (date-times and the words).
    pub time_zone: Tz,
    /// The subscriber's area, when the subscriber is still configured.
    pub area: Option<&'a Area>,
    /// A link for `web` (the status page), if it is a plain http(s) URL.
    pub web: Option<&'a str>,
    /// Earlier alerts a follow-up cancels.
    pub references: &'a [CapReference],
}

/// CAP `sender` for a service at `public_url`: `outrider@` and the URL's
/// host (letters, digits, `.` and `-` only: CAP forbids spaces, commas and
/// restricted characters there), or `outrider@outrider.invalid`.
pub fn sender_for(public_url: &str) -> String {
    let rest = public_url.split_once("://").map_or(public_url, |(_, r)| r);
    let host: String = rest
        .split(['/', ':', '?', '#', '@'])
        .next()
        .unwrap_or("")
        .chars()
        .filter(|c| c.is_ascii_alphanumeric() || matches!(c, '.' | '-'))
        .collect();
    let host = if host.is_empty() {
        "outrider.invalid"
    } else {
        &host
    };
    format!("outrider@{host}")
}

/// The context for a notice to `sub` (or to a subscriber no longer in the
/// config: then the service's zone and no area).
pub fn context_for<'a>(
    cfg: &'a Config,
    sub: Option<&'a Subscriber>,
    sender: &'a str,
    references: &'a [CapReference],
) -> CapContext<'a> {
    CapContext {
        sender,
        time_zone: sub.map_or(cfg.service.timezone, |s| s.timezone),
        area: sub.map(|s| &s.area),
        web: safe_url(&cfg.service.public_url),
        references,
    }
}

/// How a notice reads in CAP's vocabulary.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Mapping {
    /// `info/event`: the kind of happening.
    pub event: &'static str,
    /// `msgType`: `Alert`, or `Cancel` for a retraction.
    pub msg_type: &'static str,
    pub response_type: &'static str,
    pub urgency: &'static str,
    pub severity: &'static str,
    pub certainty: &'static str,
}

/// The table (docs/interchange.md, "CAP"). Meanings from CAP 1.2 §3.2.2
/// (from memory): urgency Immediate "act now", Expected "within the next
/// hour", Future "in the near future", Past "no longer required"; severity
/// Moderate "possible threat to life or property" (stock), Minor "minimal
/// to no known threat"; certainty Observed "determined to have occurred",
/// Likely "p > ~50 %", Unlikely "not expected to occur".
pub fn mapping(trigger: Trigger, urgent: bool) -> Mapping {
    let now_or = |later: &'static str| if urgent { "Immediate" } else { later };
    let m = |event, msg_type, response_type, urgency, severity, certainty| Mapping {
        event,
        msg_type,
        response_type,
        urgency,
        severity,
        certainty,
    };
    match trigger {
        // A machine-classified detection: probably right, not confirmed.
        Trigger::Presence => m(
            "Animal detected",
            "Alert",
            "Monitor",
            now_or("Expected"),
            "Moderate",
            "Likely",
        ),
        Trigger::FirstSeen => m(
            "Animal back after a quiet spell",
            "Alert",
            "Monitor",
            now_or("Expected"),
            "Moderate",
            "Likely",
        ),
        // A statistical test at level alpha: likely, not observed.
        Trigger::Spike => m(
            "Animal activity above its usual level",
            "Alert",
            "Monitor",
            now_or("Expected"),
            "Moderate",
            "Likely",
        ),
        Trigger::BuildUp => m(
            "Animal activity building up",
            "Alert",
            "Monitor",
            now_or("Future"),
            "Minor",
            "Likely",
        ),
        // The missing messages are themselves observed.
        Trigger::Silence => m(
            "Camera not reporting",
            "Alert",
            "Assess",
            now_or("Expected"),
            "Minor",
            "Observed",
        ),
        Trigger::SilenceEnded => m(
            "Camera reporting again",
            "Alert",
            "AllClear",
            "Past",
            "Minor",
            "Observed",
        ),
        Trigger::Retraction => m(
            "Detection not confirmed",
            "Cancel",
            "AllClear",
            "Past",
            "Minor",
            "Unlikely",
        ),
    }
}

/// The incident a notice is about: its event id, without a retraction's
/// suffix (so a follow-up carries the id of the alert it cancels).
pub fn incident(n: &Notice) -> &str {
    match n.event_id.split_once(":retracted:") {
        Some((head, _)) if n.trigger == Trigger::Retraction => head,
        _ => &n.event_id,
    }
}

/// A value for a CAP list element (`addresses`, `incidents`): quoted when
/// it holds white space (CAP 1.2 §3.2.1), quotes inside dropped.
fn list_value(s: &str) -> String {
    let s = header_safe(s).replace('"', "");
    if s.contains(' ') {
        format!("\"{s}\"")
    } else {
        s
    }
}

fn element(out: &mut String, indent: usize, name: &str, text: &str) {
    let _ = writeln!(
        out,
        "{:indent$}<{name}>{}</{name}>",
        "",
        xml_escape(text, false)
    );
}

fn parameter(out: &mut String, name: &str, value: &str) {
    out.push_str("    <parameter>\n");
    element(out, 6, "valueName", name);
    element(out, 6, "value", value);
    out.push_str("    </parameter>\n");
}

/// `lat,lon` as CAP writes points (WGS 84, decimal degrees).
fn point(lat: f64, lon: f64) -> String {
    format!("{lat},{lon}")
}

/// A polygon ring as CAP writes it: `lat,lon` pairs separated by spaces,
/// first == last, at least four pairs; `None` for a ring that cannot be one.
pub fn cap_polygon(ring: &[(f64, f64)]) -> Option<String> {
    let mut pts: Vec<(f64, f64)> = ring.to_vec();
    if pts.first() != pts.last() {
        if let Some(&first) = pts.first() {
            pts.push(first);
        }
    }
    if pts.len() < 4 || pts.iter().any(|(x, y)| !x.is_finite() || !y.is_finite()) {
        return None;
    }
    Some(
        pts.iter()
            .map(|(lon, lat)| point(*lat, *lon))
            .collect::<Vec<_>>()
            .join(" "),
    )
}

/// The CAP 1.2 alert for `n`, as XML text (UTF-8, with an XML declaration).
pub fn alert(n: &Notice, ctx: &CapContext<'_>) -> String {
    let tz = ctx.time_zone;
    let map = mapping(n.trigger, n.urgent);
    let chance = n
        .evidence
        .p_value
        .and_then(|p| crate::activity::chance_in_words(p, "nights"));
    let words = notice_words(n, tz, chance.as_deref());
    let sent = cap_datetime(n.at, tz);
    let mut x = String::with_capacity(4096);
    x.push_str("<?xml version=\"1.0\" encoding=\"UTF-8\"?>\n");
    let _ = writeln!(x, "<alert xmlns=\"{NAMESPACE}\">");
    element(&mut x, 2, "identifier", n.id().as_str());
    element(&mut x, 2, "sender", ctx.sender);
    element(&mut x, 2, "sent", &sent);
    element(&mut x, 2, "status", "Actual");
    element(&mut x, 2, "msgType", map.msg_type);
    element(&mut x, 2, "scope", "Private");
    element(&mut x, 2, "addresses", &list_value(&n.subscriber_id));
    if n.trigger == Trigger::Retraction {
        element(
            &mut x,
            2,
            "note",
            "A person checked the photo and changed the label: the earlier alert about this event no longer stands.",
        );
    }
    if !ctx.references.is_empty() {
        let refs: Vec<String> = ctx
            .references
            .iter()
            .map(|r| {
                format!(
                    "{},{},{}",
                    list_value(&r.sender).replace(',', ""),
                    list_value(&r.identifier).replace(',', ""),
                    cap_datetime(r.sent, tz)
                )
            })
            .collect();
        element(&mut x, 2, "references", &refs.join(" "));
    }
    element(&mut x, 2, "incidents", &list_value(incident(n)));
    x.push_str("  <info>\n");
    element(&mut x, 4, "language", "en");
    element(&mut x, 4, "category", "Env");
    element(&mut x, 4, "event", map.event);
    element(&mut x, 4, "responseType", map.response_type);
    element(&mut x, 4, "urgency", map.urgency);
    element(&mut x, 4, "severity", map.severity);
    element(&mut x, 4, "certainty", map.certainty);
    x.push_str("    <eventCode>\n");
    element(&mut x, 6, "valueName", "outrider:trigger");
    element(&mut x, 6, "value", n.trigger.as_str());
    x.push_str("    </eventCode>\n");
    element(&mut x, 4, "effective", &sent);
    element(&mut x, 4, "onset", &cap_datetime(n.event_time, tz));
    element(&mut x, 4, "senderName", "outrider");
    // CAP 1.2 asks headlines to stay within 160 characters.
    let headline: String = words.subject.chars().take(160).collect();
    element(&mut x, 4, "headline", &headline);
    let mut description = words.headline.clone();
    for f in &words.facts {
        description.push('\n');
        description.push_str(f);
    }
    let _ = writeln!(
        x,
        "    <description>{}</description>",
        xml_escape(&description, true)
    );
    element(&mut x, 4, "instruction", &CAUTION.join(" "));
    if let Some(web) = ctx.web.and_then(safe_url) {
        element(&mut x, 4, "web", web);
    }
    parameter(&mut x, "noticeID", n.id().as_str());
    parameter(&mut x, "watch", &header_safe(&n.watch));
    parameter(&mut x, "deploymentID", &header_safe(&n.deployment_id));
    if let Some(s) = &n.scientific_name {
        parameter(&mut x, "scientificName", &header_safe(s));
    }
    parameter(&mut x, "eventID", &header_safe(&n.event_id));
    parameter(&mut x, "disposition", n.disposition.as_str());
    if let Some(ev) = n.replay_line()["evidence"].as_object() {
        for (k, v) in ev {
            let text = match v {
                serde_json::Value::String(s) => header_safe(s),
                other => other.to_string(),
            };
            parameter(&mut x, &format!("evidence.{k}"), &text);
        }
    }
    if let Some(uri) = n.image_url.as_deref().and_then(safe_url) {
        x.push_str("    <resource>\n");
        element(&mut x, 6, "resourceDesc", "Photo");
        element(&mut x, 6, "mimeType", super::camtrap::media_type(uri));
        element(&mut x, 6, "uri", uri);
        x.push_str("    </resource>\n");
    }
    // The camera site, a point.
    let dep = header_safe(&n.deployment_id);
    let site = header_safe(&n.site_label);
    x.push_str("    <area>\n");
    element(
        &mut x,
        6,
        "areaDesc",
        &if site.is_empty() || site == dep {
            format!("Camera {dep}")
        } else {
            format!("Camera {dep} at {site}")
        },
    );
    if n.latitude.is_finite() && n.longitude.is_finite() {
        element(
            &mut x,
            6,
            "circle",
            &format!("{} 0", point(n.latitude, n.longitude)),
        );
    }
    x.push_str("    </area>\n");
    // The subscriber's area.
    let who = header_safe(&n.subscriber_name);
    match ctx.area {
        Some(Area::Circle(c)) => {
            x.push_str("    <area>\n");
            element(
                &mut x,
                6,
                "areaDesc",
                &format!("Area of {who}: {} km around its centre", c.radius_km()),
            );
            element(
                &mut x,
                6,
                "circle",
                &format!(
                    "{} {}",
                    point(c.center().lat(), c.center().lon()),
                    c.radius_km()
                ),
            );
            x.push_str("    </area>\n");
        }
        Some(Area::Polygon(p)) => {
            let mut rings = Vec::new();
            let mut holes = false;
            for poly in p.shape() {
                holes |= !poly.interiors().is_empty();
                let ring: Vec<(f64, f64)> = poly.exterior().coords().map(|c| (c.x, c.y)).collect();
                rings.extend(cap_polygon(&ring));
            }
            if !rings.is_empty() {
                let mut desc = format!("Area of {who}");
                if p.buffer_km() > 0.0 {
                    let _ = write!(desc, ", and {} km around it", p.buffer_km());
                }
                if holes {
                    desc.push_str(" (outer boundaries only: holes are left out)");
                }
                x.push_str("    <area>\n");
                element(&mut x, 6, "areaDesc", &desc);
                for r in rings {
                    element(&mut x, 6, "polygon", &r);
                }
                x.push_str("    </area>\n");
            }
        }
        _ => {}
    }
    x.push_str("  </info>\n</alert>\n");
    x
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::notify::{Disposition, Evidence};
    use chrono::TimeZone;

    pub(crate) fn sample() -> Notice {
        let t = Utc.with_ymd_and_hms(2026, 7, 13, 16, 10, 0).unwrap();
        Notice {
            subscriber_id: "stonecroft".into(),
            subscriber_name: "Stonecroft".into(),
            watch: "dogs and foxes at night".into(),
            urgent: true,
            trigger: Trigger::Presence,
            deployment_id: "KB-07".into(),
            site_label: "Swamp Corner".into(),
            latitude: -31.56393,
            longitude: 148.14219,
            scientific_name: Some("Canis familiaris".into()),
            vernacular_name: Some("wild dog".into()),
            event_id: "KB-07:Canis_familiaris:2026-07-13T16:09:00Z".into(),
            event_time: t - chrono::Duration::minutes(1),
            at: t,
            disposition: Disposition::Sent,
            evidence: Evidence {
                count: Some(2),
                distance_km: Some(2.3),
                ..Evidence::default()
            },
            image_url: Some("https://images.kellerby.example/kb07/0001.jpg".into()),
            folded: vec![],
        }
    }

    fn ctx<'a>(area: Option<&'a Area>, refs: &'a [CapReference]) -> CapContext<'a> {
        CapContext {
            sender: "outrider@outrider.kellerby.example",
            time_zone: chrono_tz::Australia::Sydney,
            area,
            web: Some("https://outrider.kellerby.example"),
            references: refs,
        }
    }

    #[test]
    fn sender_is_a_host_address_without_forbidden_characters() {
        // CAP 1.2 §3.2.1 "sender": no spaces, commas or restricted
        // characters (< and &), from memory.
        assert_eq!(
            sender_for("https://outrider.kellerby.example:8443/x"),
            "outrider@outrider.kellerby.example"
        );
        assert_eq!(sender_for("http://127.0.0.1:8080"), "outrider@127.0.0.1");
        assert_eq!(sender_for("not a url, <&>"), "outrider@notaurl");
        assert_eq!(sender_for(""), "outrider@outrider.invalid");
    }

    #[test]
    fn the_table_uses_only_values_cap_defines() {
        // Enumerations of the CAP 1.2 XSD (tests/reference/cap-1.2/).
        for t in Trigger::ALL {
            for urgent in [false, true] {
                let m = mapping(t, urgent);
                assert!(["Immediate", "Expected", "Future", "Past", "Unknown"].contains(&m.urgency));
                assert!(["Extreme", "Severe", "Moderate", "Minor", "Unknown"].contains(&m.severity));
                assert!(["Observed", "Likely", "Possible", "Unlikely", "Unknown"]
                    .contains(&m.certainty));
                assert!(["Alert", "Update", "Cancel"].contains(&m.msg_type));
                assert!([
                    "Shelter", "Evacuate", "Prepare", "Execute", "Avoid", "Monitor", "Assess",
                    "AllClear", "None"
                ]
                .contains(&m.response_type));
            }
        }
        assert_eq!(mapping(Trigger::Presence, true).urgency, "Immediate");
        assert_eq!(mapping(Trigger::Presence, false).urgency, "Expected");
        assert_eq!(mapping(Trigger::Retraction, true).msg_type, "Cancel");
    }

    #[test]
    fn polygons_are_closed_lat_lon_pairs() {
        // CAP 1.2 §3.2.4 "polygon": space-separated "lat,lon" pairs, first
        // and last the same, at least four (shared/standards/README.md).
        let ring = [(148.0, -31.6), (148.1, -31.6), (148.1, -31.5)];
        assert_eq!(
            cap_polygon(&ring).unwrap(),
            "-31.6,148 -31.6,148.1 -31.5,148.1 -31.6,148"
        );
        assert_eq!(cap_polygon(&ring[..2]), None);
    }

    #[test]
    fn alert_fields_and_escaping() {
        let mut n = sample();
        n.site_label = "Swamp <Corner> & \"Dam\"\u{0}".into();
        n.vernacular_name = Some("wild </description><x>dog".into());
        let area = Area::Circle(
            crate::geo::Circle::new(crate::geo::LatLon::new(-31.62, 148.05).unwrap(), 6.0).unwrap(),
        );
        let xml = alert(&n, &ctx(Some(&area), &[]));
        assert!(
            xml.contains("<sent>2026-07-14T02:10:00+10:00</sent>"),
            "{xml}"
        );
        assert!(xml.contains("<onset>2026-07-14T02:09:00+10:00</onset>"));
        assert!(xml.contains("<category>Env</category>"));
        assert!(xml.contains("<circle>-31.56393,148.14219 0</circle>"));
        assert!(xml.contains("<circle>-31.62,148.05 6</circle>"));
        assert!(
            xml.contains("Swamp &lt;Corner&gt; &amp; &quot;Dam&quot;"),
            "{xml}"
        );
        assert!(!xml.contains("<x>") && !xml.contains('\u{0}'));
        assert!(xml.contains("<instruction>Follow local pest-control codes"));
        assert!(xml.contains("<valueName>evidence.count</valueName>"));
        // A retraction cancels, names the incident and the earlier alert.
        let mut r = sample();
        r.trigger = Trigger::Retraction;
        r.event_id = format!("{}:retracted:o17", r.event_id).into();
        let refs = [CapReference {
            sender: "outrider@outrider.kellerby.example".into(),
            identifier: sample().id().to_string(),
            sent: sample().at,
        }];
        let xml = alert(&r, &ctx(None, &refs));
        assert!(xml.contains("<msgType>Cancel</msgType>"));
        assert!(xml.contains(&format!("<references>outrider@outrider.kellerby.example,{},2026-07-14T02:10:00+10:00</references>", sample().id())));
        assert!(xml.contains("<incidents>KB-07:Canis_familiaris:2026-07-13T16:09:00Z</incidents>"));
    }
}
