//! What each page shows, as plain data: the same structs are rendered as
//! HTML (`pages`) and serialised as the JSON API, so the two cannot drift.
//! Pure: rows read from the store plus the config and `now` in, views out.
//!
//! Privacy: nothing here carries a human or vehicle observation beyond a
//! count (DESIGN.md). Events and notices are about animals only (the
//! engine never makes one from a person), and rejected payloads that say
//! they show a person were cut to their identifying keys when stored.

use crate::config::{AreaSpec, Config, Subscriber, TriggerKind, Watch};
use crate::geo::Area;
use crate::notify::Notice;
use crate::web::assess::{Level, SiteNow};
use crate::web::chart::NightsChart;
use crate::web::map::{MapArea, MapSite};
use chrono::{DateTime, Utc};
use chrono_tz::Tz;
use serde::Serialize;
use std::collections::BTreeMap;

/// Scientific name -> the name a person reads (from the observations'
/// `vernacularName`), with the scientific name itself as the fallback.
#[derive(Debug, Clone, Default)]
pub struct Names(pub BTreeMap<String, String>);

impl Names {
    pub fn of(&self, scientific: &str) -> String {
        self.0
            .get(scientific)
            .map(|v| crate::notify::header_safe(v))
            .filter(|v| !v.is_empty())
            .unwrap_or_else(|| crate::notify::header_safe(scientific))
    }
}

/// One delivery of a notice.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct DeliveryView {
    pub channel: String,
    /// pending, sent, failed or closed.
    pub state: String,
    pub attempts: u32,
    /// The last error, or why it was closed.
    pub last_error: Option<String>,
}

/// A stored notice as read back.
#[derive(Debug, Clone)]
pub struct NoticeRow {
    pub notice: Notice,
    pub reason: String,
    pub deliveries: Vec<DeliveryView>,
}

/// A notice, worded.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct NoticeView {
    pub id: String,
    pub subscriber: String,
    pub subscriber_name: String,
    pub watch: String,
    pub trigger: String,
    pub disposition: String,
    /// Why the fatigue control decided as it did.
    pub reason: String,
    #[serde(rename = "deploymentID")]
    pub deployment_id: String,
    #[serde(rename = "scientificName")]
    pub scientific_name: Option<String>,
    /// Decision time.
    pub at: DateTime<Utc>,
    /// Local decision time, for people.
    pub at_local: String,
    /// The email's headline and facts: the same words.
    pub headline: String,
    pub facts: Vec<String>,
    /// The photo link when it is a plain http(s) URL.
    pub image_url: Option<String>,
    /// The evidence as stored (replay JSON shape, docs/notices.md).
    pub evidence: serde_json::Value,
    pub deliveries: Vec<DeliveryView>,
}

impl NoticeView {
    /// Words `row` in `tz` (the subscriber's zone).
    pub fn new(row: &NoticeRow, tz: Tz) -> Self {
        let n = &row.notice;
        let chance = n
            .evidence
            .p_value
            .and_then(|p| crate::activity::chance_in_words(p, "nights"));
        let w = crate::notify::render::notice_words(n, tz, chance.as_deref());
        let line = n.replay_line();
        NoticeView {
            id: n.id().as_str().to_string(),
            subscriber: n.subscriber_id.to_string(),
            subscriber_name: crate::notify::header_safe(&n.subscriber_name),
            watch: crate::notify::header_safe(&n.watch),
            trigger: n.trigger.as_str().to_string(),
            disposition: n.disposition.as_str().to_string(),
            reason: row.reason.clone(),
            deployment_id: n.deployment_id.to_string(),
            scientific_name: n.scientific_name.as_deref().map(str::to_string),
            at: n.at,
            at_local: crate::notify::render::local_time(n.at, tz),
            headline: w.headline,
            facts: w.facts,
            image_url: n
                .image_url
                .as_deref()
                .and_then(crate::notify::render::safe_url)
                .map(str::to_string),
            evidence: line["evidence"].clone(),
            deliveries: row.deliveries.clone(),
        }
    }
}

/// The time zone notices of `subscriber_id` are worded in.
pub fn zone_of(cfg: &Config, subscriber_id: &str) -> Tz {
    cfg.subscribers
        .iter()
        .find(|s| s.id == subscriber_id)
        .map(|s| s.timezone)
        .unwrap_or(cfg.service.timezone)
}

/// Words every row in its subscriber's zone.
pub fn notice_views(cfg: &Config, rows: &[NoticeRow]) -> Vec<NoticeView> {
    rows.iter()
        .map(|r| NoticeView::new(r, zone_of(cfg, &r.notice.subscriber_id)))
        .collect()
}

/// The counts on the overview.
#[derive(Debug, Clone, Default, PartialEq, Serialize)]
pub struct Counts {
    pub observations_stored: u64,
    pub heartbeats_stored: u64,
    pub corrections_stored: u64,
    pub duplicates_ignored: u64,
    pub rejected_total: u64,
    pub rejected: BTreeMap<String, u64>,
    pub events: u64,
    pub notices: BTreeMap<String, u64>,
    pub deliveries: BTreeMap<String, u64>,
    pub outbox_pending: u64,
    pub deliveries_failed: u64,
    pub deployments_silent: u64,
    /// Observations of people and vehicles in the last 24 hours: a count
    /// and nothing more.
    pub people_and_vehicles_24h: u64,
    pub unsubscribed: u64,
}

/// A species at a site in the last 24 hours, named.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct SpeciesNowView {
    #[serde(rename = "scientificName")]
    pub scientific_name: String,
    pub name: String,
    pub count: u64,
    pub expected: f64,
    pub p_value: f64,
    /// "about once in 300 nights"
    pub chance: Option<String>,
}

/// A site on the overview.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct SiteSummary {
    #[serde(rename = "deploymentID")]
    pub deployment_id: String,
    #[serde(rename = "locationName")]
    pub label: String,
    pub latitude: f64,
    pub longitude: f64,
    pub level: Level,
    pub level_words: String,
    /// Camera-nights in the last 24 hours.
    pub effort_nights: f64,
    pub species: Vec<SpeciesNowView>,
    /// Last heartbeat or observation.
    pub last_seen: Option<DateTime<Utc>>,
    pub silent: bool,
}

/// Combines the config's sites with their last 24 hours.
pub fn site_summaries(
    cfg: &Config,
    now: &[SiteNow],
    last_seen: &BTreeMap<String, DateTime<Utc>>,
    names: &Names,
) -> Vec<SiteSummary> {
    cfg.sites
        .sites
        .iter()
        .zip(now)
        .map(|(s, n)| SiteSummary {
            deployment_id: s.deployment_id.clone(),
            label: crate::notify::header_safe(s.label()),
            latitude: s.latitude,
            longitude: s.longitude,
            level: n.level,
            level_words: n.level.words().to_string(),
            effort_nights: round(n.effort_nights, 3),
            species: n
                .species
                .iter()
                .map(|sp| SpeciesNowView {
                    scientific_name: sp.scientific_name.clone(),
                    name: names.of(&sp.scientific_name),
                    count: sp.count,
                    expected: round(sp.expected, 3),
                    p_value: sp.p_value,
                    chance: crate::activity::chance_in_words(sp.p_value, "days"),
                })
                .collect(),
            last_seen: last_seen.get(&s.deployment_id).copied(),
            silent: n.level == Level::Silent,
        })
        .collect()
}

/// `/` and `/api/overview`.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Overview {
    pub now: DateTime<Utc>,
    pub time_zone: String,
    pub broker_connected: bool,
    pub store_writable: bool,
    pub counts: Counts,
    pub sites: Vec<SiteSummary>,
    pub notices: Vec<NoticeView>,
}

/// The last heartbeat of a camera.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct HeartbeatView {
    pub timestamp: DateTime<Utc>,
    #[serde(rename = "batteryPercent")]
    pub battery_percent: Option<f64>,
    #[serde(rename = "signalDbm")]
    pub signal_dbm: Option<f64>,
}

/// RAI of one species over the chart's nights.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct RaiView {
    #[serde(rename = "scientificName")]
    pub scientific_name: String,
    pub name: String,
    pub events: u64,
    pub camera_nights: f64,
    /// Events per 100 camera-nights; `None` with no effort (undefined).
    pub rai: Option<f64>,
}

/// `/sites/<id>` and `/api/sites/<id>`.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct SitePage {
    pub now: DateTime<Utc>,
    pub time_zone: String,
    pub site: SiteSummary,
    #[serde(rename = "cameraID")]
    pub camera_id: Option<String>,
    #[serde(rename = "deploymentStart")]
    pub deployment_start: DateTime<Utc>,
    #[serde(rename = "deploymentEnd")]
    pub deployment_end: Option<DateTime<Utc>>,
    pub heartbeat: Option<HeartbeatView>,
    pub nights: NightsChart,
    pub rai: Vec<RaiView>,
    pub notices: Vec<NoticeView>,
}

/// The filters of the notice log (query parameters).
#[derive(Debug, Clone, Default, PartialEq, Eq, Serialize, serde::Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct NoticeFilter {
    pub subscriber: Option<String>,
    /// A scientific name.
    pub species: Option<String>,
    pub trigger: Option<String>,
    pub disposition: Option<String>,
    #[serde(rename = "deploymentID")]
    pub deployment_id: Option<String>,
    pub limit: Option<u32>,
}

impl NoticeFilter {
    /// Empty strings (an unset select in a form) mean no filter.
    pub fn normalised(mut self) -> Self {
        for f in [
            &mut self.subscriber,
            &mut self.species,
            &mut self.trigger,
            &mut self.disposition,
            &mut self.deployment_id,
        ] {
            if f.as_deref().is_some_and(|s| s.trim().is_empty()) {
                *f = None;
            }
        }
        self
    }

    /// Rows to show: 100 unless asked, at most 1,000.
    pub fn row_limit(&self) -> u32 {
        self.limit.unwrap_or(100).clamp(1, 1000)
    }
}

/// `/notices` and `/api/notices`.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct NoticesPage {
    pub filter: NoticeFilter,
    pub notices: Vec<NoticeView>,
    /// Choices for the filter form: (value, label).
    pub subscribers: Vec<(String, String)>,
    pub species: Vec<(String, String)>,
    pub triggers: Vec<String>,
    pub dispositions: Vec<String>,
}

/// The trigger names a notice can carry.
pub const TRIGGERS: [&str; 7] = [
    "presence",
    "spike",
    "build-up",
    "first-seen",
    "silence",
    "silence-ended",
    "retraction",
];
/// The dispositions a notice can carry.
pub const DISPOSITIONS: [&str; 3] = ["sent", "folded", "deferred"];

/// A stored rejection as read back.
#[derive(Debug, Clone, PartialEq)]
pub struct RejectedRow {
    pub received_at: DateTime<Utc>,
    pub topic: String,
    pub reason: String,
    pub detail: String,
    pub payload: Vec<u8>,
    pub payload_bytes: u64,
}

/// A rejection for people and the API. Every text field is as received
/// (hostile input): the HTML renderer escapes it, JSON encodes it.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct RejectedView {
    pub received_at: DateTime<Utc>,
    pub topic: String,
    pub reason: String,
    pub detail: String,
    /// The kept payload as text when it is UTF-8, else hex.
    pub payload: String,
    pub payload_encoding: &'static str,
    /// The full size received (the kept copy may be cut to the limit).
    pub payload_bytes: u64,
    /// The payload shown here is cut to [`SHOWN_PAYLOAD`] bytes.
    pub shown_cut: bool,
}

/// Bytes of a rejected payload shown per row.
pub const SHOWN_PAYLOAD: usize = 2048;

impl RejectedView {
    pub fn new(r: &RejectedRow) -> Self {
        let cut = r.payload.len() > SHOWN_PAYLOAD;
        let shown = &r.payload[..r.payload.len().min(SHOWN_PAYLOAD)];
        let (payload, payload_encoding) = match std::str::from_utf8(shown) {
            Ok(s) => (s.to_string(), "utf-8"),
            // A cut may split a character: show the valid prefix as text.
            Err(e) if cut && e.error_len().is_none() => (
                String::from_utf8_lossy(&shown[..e.valid_up_to()]).into_owned(),
                "utf-8",
            ),
            Err(_) => (crate::notify::token::to_hex(shown), "hex"),
        };
        RejectedView {
            received_at: r.received_at,
            topic: r.topic.clone(),
            reason: r.reason.clone(),
            detail: r.detail.clone(),
            payload,
            payload_encoding,
            payload_bytes: r.payload_bytes,
            shown_cut: cut,
        }
    }
}

/// `/rejected` and `/api/rejected`.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct RejectedPage {
    pub counts: BTreeMap<String, u64>,
    pub reason: Option<String>,
    pub rows: Vec<RejectedView>,
}

/// A covered site on a subscriber's page.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct CoveredSite {
    #[serde(rename = "deploymentID")]
    pub deployment_id: String,
    #[serde(rename = "locationName")]
    pub label: String,
    /// As notices report it (docs/geography-and-time.md); `None` for an
    /// area given as a list of sites or as every site.
    pub distance_km: Option<f64>,
}

/// A subscriber's page: `/subscribers/<id>` for the coordinator and
/// `/my/<token>` for the subscriber.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct SubscriberPage {
    pub id: String,
    pub name: String,
    pub time_zone: String,
    pub digest_at: String,
    pub quiet_hours: Option<String>,
    pub area: String,
    pub watches: Vec<String>,
    pub covered: Vec<CoveredSite>,
    pub notices: Vec<NoticeView>,
    /// When they unsubscribed from email, if they did.
    pub unsubscribed_at: Option<DateTime<Utc>>,
    #[serde(skip)]
    pub map_sites: Vec<MapSite>,
    #[serde(skip)]
    pub map_area: MapArea,
}

/// A subscriber in the coordinator's list.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct SubscriberRow {
    pub id: String,
    pub name: String,
    pub area: String,
    pub watches: usize,
    pub sites_covered: usize,
    pub unsubscribed_at: Option<DateTime<Utc>>,
}

/// The subscriber's area in words.
pub fn area_words(s: &Subscriber) -> String {
    match &s.area_spec {
        AreaSpec::All => "every camera site".into(),
        AreaSpec::Sites(list) => format!(
            "the camera {} {}",
            if list.len() == 1 { "site" } else { "sites" },
            list.join(", ")
        ),
        AreaSpec::Circle {
            lat,
            lon,
            radius_km,
        } => format!("within {radius_km} km of {lat:.4}, {lon:.4}"),
        AreaSpec::GeoJson { buffer_km, .. } => {
            if *buffer_km > 0.0 {
                format!("the mapped paddocks and {buffer_km} km around them")
            } else {
                "the mapped paddocks".into()
            }
        }
    }
}

/// The area as the map draws it.
pub fn map_area(s: &Subscriber) -> MapArea {
    match &s.area {
        Area::Circle(c) => MapArea::Circle {
            lat: c.center().lat(),
            lon: c.center().lon(),
            radius_km: c.radius_km(),
        },
        Area::Polygon(p) => MapArea::Polygons(
            p.shape()
                .0
                .iter()
                .map(|poly| {
                    std::iter::once(poly.exterior())
                        .chain(poly.interiors())
                        .map(|ring| ring.0.iter().map(|c| (c.x, c.y)).collect())
                        .collect()
                })
                .collect(),
        ),
        Area::Sites(_) | Area::All => MapArea::None,
    }
}

/// A list in words: "a", "a and b", "a, b and c".
pub fn and_list(items: &[String]) -> String {
    match items {
        [] => String::new(),
        [a] => a.clone(),
        [rest @ .., last] => format!("{} and {last}", rest.join(", ")),
    }
}

/// One watch in plain words, e.g. "dogs and foxes at night: a notice as
/// soon as a wild dog, red fox or feral cat is seen, from dusk to dawn,
/// when the classifier is at least 85 % sure; urgent (not held back by
/// quiet hours); then 120 minutes before the next one from the same camera;
/// by email."
pub fn watch_words(w: &Watch, names: &Names) -> String {
    let mut species: Vec<String> = w.species.iter().map(|s| names.of(s)).collect();
    species.sort();
    let any = if species.len() > 1 {
        format!(
            "{} or {}",
            species[..species.len() - 1].join(", "),
            species[species.len() - 1]
        )
    } else {
        species
            .first()
            .cloned()
            .unwrap_or_else(|| "an animal".into())
    };
    let mut s = format!("{}: ", crate::notify::header_safe(&w.name));
    match w.trigger {
        TriggerKind::Presence => s.push_str(&format!("a notice as soon as a {any} is seen")),
        TriggerKind::Spike => s.push_str(&format!(
            "a notice when {any} visits in {} hours at a camera are at least {} and at least {} times the usual number",
            w.window_hours, w.min_count, trim(w.ratio)
        )),
        TriggerKind::BuildUp => s.push_str(&format!(
            "a notice when {any} visits build up over several days to about {} times the usual",
            trim(w.ratio)
        )),
        TriggerKind::FirstSeen => s.push_str(&format!(
            "a notice when a {any} turns up after {} days without one",
            w.quiet_days
        )),
        TriggerKind::Silence => s.push_str(&format!(
            "a notice when a camera sends nothing for {} hours",
            trim(w.silence_hours)
        )),
    }
    if w.trigger != TriggerKind::Silence {
        match w.hours {
            crate::calendar::Hours::Any => {}
            crate::calendar::Hours::DuskToDawn => s.push_str(", from dusk to dawn"),
            crate::calendar::Hours::Local(h) => s.push_str(&format!(
                ", between {} and {}",
                h.start().format("%H:%M"),
                h.end().format("%H:%M")
            )),
        }
        if let Some(season) = &w.season {
            s.push_str(&format!(", {}", season_words(&season.to_string())));
        }
        s.push_str(&format!(
            ", when the classifier is at least {} % sure",
            trim(w.min_probability * 100.0)
        ));
    }
    if w.urgent {
        s.push_str("; urgent (not held back by quiet hours)");
    }
    if w.cooldown_minutes > 0 && w.trigger != TriggerKind::Silence {
        s.push_str(&format!(
            "; then {} minutes before the next one from the same camera",
            w.cooldown_minutes
        ));
    }
    let channels: Vec<String> = w
        .channels
        .iter()
        .map(|c| match c {
            crate::config::Channel::Email => "email".to_string(),
            crate::config::Channel::Webhook => "webhook".to_string(),
            crate::config::Channel::Mqtt => "MQTT".to_string(),
        })
        .collect();
    if !channels.is_empty() {
        s.push_str(&format!("; by {}", and_list(&channels)));
    }
    s.push('.');
    s
}

/// "07-01..08-31" -> "from 1 Jul to 31 Aug".
fn season_words(s: &str) -> String {
    let date = |t: &str| {
        let (m, d) = t.split_once('-')?;
        chrono::NaiveDate::from_ymd_opt(2000, m.parse().ok()?, d.parse().ok()?)
            .map(|d| d.format("%-d %b").to_string())
    };
    match s.split_once("..").map(|(a, b)| (date(a), date(b))) {
        Some((Some(a), Some(b))) => format!("from {a} to {b}"),
        _ => format!("in the season {s}"),
    }
}

/// 3.0 -> "3", 2.5 -> "2.5".
fn trim(v: f64) -> String {
    let s = format!("{v:.2}");
    s.trim_end_matches('0').trim_end_matches('.').to_string()
}

fn round(v: f64, places: i32) -> f64 {
    let k = 10f64.powi(places);
    (v * k).round() / k
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_rejected_payload_is_shown_as_text_or_hex_and_cut() {
        let r = RejectedRow {
            received_at: DateTime::<Utc>::default(),
            topic: "outrider/KB-01/observation".into(),
            reason: "invalid-json".into(),
            detail: "x".into(),
            payload: b"<script>alert(1)</script>".to_vec(),
            payload_bytes: 25,
        };
        let v = RejectedView::new(&r);
        assert_eq!(
            v.payload, "<script>alert(1)</script>",
            "kept as is; HTML escapes it"
        );
        assert_eq!(v.payload_encoding, "utf-8");
        let v = RejectedView::new(&RejectedRow {
            payload: vec![0xff, 0x00, 0x41],
            ..r.clone()
        });
        assert_eq!((v.payload.as_str(), v.payload_encoding), ("ff0041", "hex"));
        // A cut inside a two-byte character keeps the text before it.
        let mut long = vec![b'a'; SHOWN_PAYLOAD - 1];
        long.extend("é and more".as_bytes());
        let v = RejectedView::new(&RejectedRow { payload: long, ..r });
        assert!(v.shown_cut);
        assert_eq!(v.payload_encoding, "utf-8");
        assert_eq!(v.payload.len(), SHOWN_PAYLOAD - 1);
    }

    #[test]
    fn lists_and_seasons_in_words() {
        assert_eq!(
            and_list(&["a".into(), "b".into(), "c".into()]),
            "a, b and c"
        );
        assert_eq!(and_list(&["a".into()]), "a");
        assert_eq!(season_words("07-01..08-31"), "from 1 Jul to 31 Aug");
        assert_eq!(season_words("12-01..02-29"), "from 1 Dec to 29 Feb");
        assert_eq!(trim(3.0), "3");
        assert_eq!(trim(2.5), "2.5");
    }
}
