//! Builds each page's view: reads the rows it needs through a [`Reader`]
//! and hands them, with the config and `now`, to the pure modules. Runs on
//! a blocking thread (see `web::serve`); holds no state between requests.

use crate::config::Config;
use crate::engine::rules::RuleBook;
use crate::store::StoreError;
use crate::web::assess::{self, ActivityData};
use crate::web::map::MapSite;
use crate::web::read::Reader;
use crate::web::view::*;
use chrono::{DateTime, Duration, Utc};

/// Notices on the overview and on a site's or subscriber's page.
const RECENT: u32 = 12;
/// Rejections on one page.
const REJECTED_ROWS: u32 = 200;

/// The activity data for the views at `now`, and the species' names.
fn activity(
    cfg: &Config,
    r: &Reader,
    now: DateTime<Utc>,
) -> Result<(ActivityData, Names), StoreError> {
    let (from, to) = ActivityData::span(cfg, now);
    let (signs, events) = r.activity(from, to)?;
    Ok((ActivityData::build(cfg, signs, events), r.names(from)?))
}

fn counts(
    cfg: &Config,
    r: &mut Reader,
    now: DateTime<Utc>,
) -> Result<(Counts, crate::store::StatusCounts, Vec<String>), StoreError> {
    let s = r.status()?;
    let silent: Vec<String> = crate::status::silent(&s, cfg, now)
        .into_iter()
        .map(str::to_string)
        .collect();
    let c = Counts {
        observations_stored: s.observations_stored,
        heartbeats_stored: s.heartbeats_stored,
        corrections_stored: s.corrections_stored,
        duplicates_ignored: s.duplicates_ignored,
        rejected_total: s.rejected.values().sum(),
        rejected: s.rejected.clone(),
        events: s.events,
        notices: s.notices.clone(),
        deliveries: s.deliveries.clone(),
        outbox_pending: s.outbox_pending,
        deliveries_failed: s.deliveries.get("failed").copied().unwrap_or(0),
        deployments_silent: silent.len() as u64,
        people_and_vehicles_24h: r.private_count(now - Duration::hours(24))?,
        unsubscribed: r.unsubscribes()?.len() as u64,
    };
    Ok((c, s, silent))
}

/// `/`.
pub fn overview(
    cfg: &Config,
    r: &mut Reader,
    now: DateTime<Utc>,
    broker_connected: bool,
    store_writable: bool,
) -> Result<Overview, StoreError> {
    let (counts, status, silent) = counts(cfg, r, now)?;
    let (data, names) = activity(cfg, r, now)?;
    let silent: Vec<&str> = silent.iter().map(String::as_str).collect();
    let now_sites = assess::sites_now(cfg, &data, now, &silent);
    let notices = r.notices(&NoticeFilter {
        limit: Some(RECENT),
        ..Default::default()
    })?;
    Ok(Overview {
        now,
        time_zone: cfg.service.timezone.name().to_string(),
        broker_connected,
        store_writable,
        counts,
        sites: site_summaries(cfg, &now_sites, &status.last_seen, &names),
        notices: notice_views(cfg, &notices),
    })
}

/// `/sites/<id>`; `None` for an unknown deployment.
pub fn site(
    cfg: &Config,
    r: &mut Reader,
    id: &str,
    now: DateTime<Utc>,
) -> Result<Option<SitePage>, StoreError> {
    let Some(i) = cfg.sites.sites.iter().position(|s| s.deployment_id == id) else {
        return Ok(None);
    };
    let status = r.status()?;
    let silent = crate::status::silent(&status, cfg, now);
    let (data, names) = activity(cfg, r, now)?;
    let now_sites = assess::sites_now(cfg, &data, now, &silent);
    let summary = site_summaries(cfg, &now_sites, &status.last_seen, &names)
        .into_iter()
        .nth(i);
    let Some(summary) = summary else {
        return Ok(None);
    };
    let (nights, rai) = assess::site_nights(cfg, &data, i, now, &|s| names.of(s));
    let heartbeat = r
        .last_heartbeats()?
        .remove(id)
        .map(|(t, b, s)| HeartbeatView {
            timestamp: t,
            battery_percent: b,
            signal_dbm: s,
        });
    let notices = r.notices(&NoticeFilter {
        deployment_id: Some(id.to_string()),
        limit: Some(RECENT),
        ..Default::default()
    })?;
    let site = &cfg.sites.sites[i];
    Ok(Some(SitePage {
        now,
        time_zone: cfg.service.timezone.name().to_string(),
        site: summary,
        camera_id: site.camera_id.clone(),
        deployment_start: site.deployment_start,
        deployment_end: site.deployment_end,
        heartbeat,
        nights,
        rai: rai
            .into_iter()
            .map(|(sp, events, nights, rai)| RaiView {
                name: names.of(&sp),
                scientific_name: sp,
                events,
                camera_nights: (nights * 100.0).round() / 100.0,
                rai,
            })
            .collect(),
        notices: notice_views(cfg, &notices),
    }))
}

/// `/notices`.
pub fn notices(
    cfg: &Config,
    r: &Reader,
    filter: NoticeFilter,
    now: DateTime<Utc>,
) -> Result<NoticesPage, StoreError> {
    let rows = r.notices(&filter)?;
    let (from, _) = ActivityData::span(cfg, now);
    let names = r.names(from - Duration::days(365))?;
    Ok(NoticesPage {
        notices: notice_views(cfg, &rows),
        subscribers: cfg
            .subscribers
            .iter()
            .map(|s| (s.id.clone(), s.name.clone()))
            .collect(),
        species: r
            .notice_species()?
            .into_iter()
            .map(|s| {
                let label = names.of(&s);
                (s, label)
            })
            .collect(),
        triggers: TRIGGERS.iter().map(|s| s.to_string()).collect(),
        dispositions: DISPOSITIONS.iter().map(|s| s.to_string()).collect(),
        filter,
    })
}

/// `/rejected`.
pub fn rejected(r: &mut Reader, reason: Option<String>) -> Result<RejectedPage, StoreError> {
    let rows = r.rejected(reason.as_deref(), REJECTED_ROWS)?;
    Ok(RejectedPage {
        counts: r.status()?.rejected,
        reason,
        rows: rows.iter().map(RejectedView::new).collect(),
    })
}

/// `/subscribers`.
pub fn subscribers(
    cfg: &Config,
    rules: &RuleBook,
    r: &Reader,
) -> Result<Vec<SubscriberRow>, StoreError> {
    let unsub = r.unsubscribes()?;
    Ok(cfg
        .subscribers
        .iter()
        .enumerate()
        .map(|(i, s)| SubscriberRow {
            id: s.id.clone(),
            name: s.name.clone(),
            area: area_words(s),
            watches: s.watches.len(),
            sites_covered: rules.sites_of(i).len(),
            unsubscribed_at: unsub.get(&s.id).copied(),
        })
        .collect())
}

/// A subscriber's page; `own` limits the map to the sites in their area
/// (their own link shows nothing of the rest of the district).
pub fn subscriber(
    cfg: &Config,
    rules: &RuleBook,
    r: &Reader,
    id: &str,
    own: bool,
    now: DateTime<Utc>,
) -> Result<Option<SubscriberPage>, StoreError> {
    let Some(si) = cfg.subscribers.iter().position(|s| s.id == id) else {
        return Ok(None);
    };
    let s = &cfg.subscribers[si];
    let covered = rules.sites_of(si);
    let (from, _) = ActivityData::span(cfg, now);
    let names = r.names(from - Duration::days(365))?;
    let map_sites: Vec<MapSite> = cfg
        .sites
        .sites
        .iter()
        .enumerate()
        .filter_map(|(i, site)| {
            let inside = covered.binary_search(&(i as u32)).is_ok();
            (inside || !own).then(|| MapSite {
                deployment_id: site.deployment_id.clone(),
                label: site.label().to_string(),
                lat: site.latitude,
                lon: site.longitude,
                level: None,
                href: (!own).then(|| {
                    format!(
                        "/sites/{}",
                        crate::web::pages::url_part(&site.deployment_id)
                    )
                }),
                covered: Some(inside),
            })
        })
        .collect();
    let notices = r.notices(&NoticeFilter {
        subscriber: Some(id.to_string()),
        limit: Some(RECENT * 2),
        ..Default::default()
    })?;
    Ok(Some(SubscriberPage {
        id: s.id.clone(),
        name: s.name.clone(),
        time_zone: s.timezone.name().to_string(),
        digest_at: s.digest_at.format("%H:%M").to_string(),
        quiet_hours: s
            .quiet_hours
            .map(|q| format!("{}-{}", q.start().format("%H:%M"), q.end().format("%H:%M"))),
        area: area_words(s),
        watches: s.watches.iter().map(|w| watch_words(w, &names)).collect(),
        covered: covered
            .iter()
            .map(|&i| {
                let i = i as usize;
                let site = &cfg.sites.sites[i];
                let d = rules.distance_km(&s.area, i);
                CoveredSite {
                    deployment_id: site.deployment_id.clone(),
                    label: site.label().to_string(),
                    distance_km: matches!(
                        s.area_spec,
                        crate::config::AreaSpec::Circle { .. }
                            | crate::config::AreaSpec::GeoJson { .. }
                    )
                    .then(|| (d * 100.0).round() / 100.0),
                }
            })
            .collect(),
        notices: notice_views(cfg, &notices),
        unsubscribed_at: r.unsubscribes()?.get(id).copied(),
        map_sites,
        map_area: map_area(s),
    }))
}

/// What `/metrics` reads from the store.
pub fn store_facts(
    cfg: &Config,
    r: &mut Reader,
    now: DateTime<Utc>,
) -> Result<crate::web::metrics::StoreFacts, StoreError> {
    let s = r.status()?;
    Ok(crate::web::metrics::StoreFacts {
        deliveries: r.deliveries_by_channel()?,
        outbox_pending: s.outbox_pending,
        events: s.events,
        deployments_silent: crate::status::silent(&s, cfg, now).len() as u64,
        unsubscribed: r.unsubscribes()?.len() as u64,
        store_readable: true,
    })
}
