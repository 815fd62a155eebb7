//! The outbox worker: takes due deliveries from the store, renders and
//! sends each on its channel (email through SMTP or into the mail folder,
//! signed webhook, MQTT; webhook and MQTT as the notice's JSON line or, per
//! subscriber, as a CAP 1.2 alert), and records the outcome at once.
//!
//! Retries follow [`crate::notify::RetrySchedule`] as `[delivery]` sets it
//! (by default 1 min doubling to 1 h, given up 24 h after the first
//! attempt); a permanent error (SMTP 5xx, HTTP 4xx other than 408/429)
//! fails the delivery at once.
//!
//! Each attempt is marked as under way in the store before it starts, and
//! its outcome is recorded right after the server answers, before
//! anything else. Only a crash between the server's acceptance and that
//! record can send a notice a second time; then the mark is still there at
//! the next start, the repeat is logged as such, and it carries the same
//! Message-ID / idempotency key, so the receiver can tell. (No protocol
//! lets a sender ask an SMTP server whether it already took a message, so
//! exactly once cannot be promised; docs/reliability.md.)

use crate::clock::Clock;
use crate::config::{Config, Subscriber};
use crate::deliver::email::{message_id, EmailSender, InlineImage, OutgoingEmail};
use crate::deliver::folder::FolderSender;
use crate::deliver::webhook::{OutgoingWebhook, WebhookSender};
use crate::deliver::DeliveryError;
use crate::digest::render::{render_digest, DigestContext, CHART_CID};
use crate::digest::Digest;
use crate::notify::token::{sign_token, Purpose, TokenKey};
use crate::notify::{render_email, EmailContext, Notice, RetrySchedule};
use crate::store::sqlite::{unsubscribed_reason, DeliveryUpdate, DueDelivery, DueDigest};
use crate::store::Store;
use crate::telemetry::Counters;
use chrono::{DateTime, Duration, Utc};
use std::path::Path;
use std::sync::Arc;
use tokio_util::sync::CancellationToken;

/// Sender used when no `[smtp]` `from` is configured (the mail folder).
const FOLDER_FROM: &str = "outrider <notices@outrider.invalid>";
/// How long an unsubscribe or page link stays valid.
pub const LINK_DAYS: i64 = 365;

/// How email leaves.
pub enum EmailRoute {
    Smtp {
        sender: Box<EmailSender>,
        from: String,
        mailto: Option<String>,
    },
    Folder {
        sender: FolderSender,
    },
}

/// The channels the worker can use.
pub struct Channels {
    pub email: Option<EmailRoute>,
    pub webhook: Option<WebhookSender>,
    pub mqtt: Option<(rumqttc::AsyncClient, String)>,
}

impl Channels {
    pub fn from_config(cfg: &Config, mqtt: Option<rumqttc::AsyncClient>) -> anyhow::Result<Self> {
        let email = if let Some(smtp) = &cfg.smtp {
            Some(EmailRoute::Smtp {
                sender: Box::new(EmailSender::new(smtp)?),
                from: smtp.from.clone(),
                mailto: smtp.unsubscribe_mailto.clone(),
            })
        } else {
            cfg.email_folder.as_ref().map(|dir| EmailRoute::Folder {
                sender: FolderSender::new(dir.clone()),
            })
        };
        let webhook = if cfg.subscribers.iter().any(|s| s.webhook.is_some()) {
            Some(WebhookSender::new()?)
        } else {
            None
        };
        Ok(Channels {
            email,
            webhook,
            mqtt: mqtt.map(|c| (c, cfg.mqtt.topic_prefix.clone())),
        })
    }
}

/// The key behind unsubscribe and page links: 32 random bytes in
/// `state_dir/link.key`, made on first start (mode 0600).
pub fn link_key(state_dir: &Path) -> anyhow::Result<TokenKey> {
    let path = state_dir.join("link.key");
    if let Ok(bytes) = std::fs::read(&path) {
        return Ok(TokenKey::new(bytes)?);
    }
    use rand::RngCore;
    let mut bytes = vec![0u8; 32];
    rand::rngs::OsRng.fill_bytes(&mut bytes);
    std::fs::create_dir_all(state_dir)?;
    let tmp = state_dir.join("link.key.tmp");
    std::fs::write(&tmp, &bytes)?;
    #[cfg(unix)]
    {
        use std::os::unix::fs::PermissionsExt;
        std::fs::set_permissions(&tmp, std::fs::Permissions::from_mode(0o600))?;
    }
    std::fs::rename(&tmp, &path)?;
    Ok(TokenKey::new(bytes)?)
}

/// The retry schedule `[delivery]` asks for.
pub fn schedule(d: &crate::config::Delivery) -> RetrySchedule {
    RetrySchedule {
        base: Duration::seconds(i64::from(d.retry_first_seconds)),
        cap: Duration::seconds(i64::from(d.retry_max_seconds)),
        give_up_after: Duration::hours(i64::from(d.give_up_hours)),
    }
}

/// How many sends may be in flight at once per channel. A slow SMTP
/// server then holds up only email; webhooks and MQTT go on.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Concurrency {
    pub email: usize,
    pub webhook: usize,
    pub mqtt: usize,
}

impl Default for Concurrency {
    fn default() -> Self {
        Concurrency {
            email: 4,
            webhook: 8,
            mqtt: 16,
        }
    }
}

/// One thing to send: a notice on one channel, or a digest (email).
#[derive(Debug, Clone)]
enum Work {
    Notice(Box<DueDelivery>),
    Digest(Box<DueDigest>),
}

impl Work {
    fn key(&self) -> (bool, i64) {
        match self {
            Work::Notice(d) => (false, d.id),
            Work::Digest(d) => (true, d.id),
        }
    }
    fn channel(&self) -> &str {
        match self {
            Work::Notice(d) => &d.channel,
            Work::Digest(_) => "email",
        }
    }
}

/// What each send task shares.
struct Shared {
    store: Store,
    cfg: Arc<Config>,
    channels: Channels,
    key: TokenKey,
    clock: Arc<dyn Clock>,
    schedule: RetrySchedule,
    stop: CancellationToken,
    counters: Arc<Counters>,
}

/// Runs until `stop` is cancelled, checking for due deliveries and digests
/// every `every`, and at once when `wake` is notified (the pipeline does
/// after committing a notice to send), sending up to the [`Concurrency`] limit per channel.
/// A delivery whose channel is busy stays pending for the next round.
#[allow(clippy::too_many_arguments)]
pub async fn run(
    store: Store,
    cfg: Arc<Config>,
    channels: Channels,
    key: TokenKey,
    clock: Arc<dyn Clock>,
    every: std::time::Duration,
    limits: Concurrency,
    wake: Arc<tokio::sync::Notify>,
    stop: CancellationToken,
    counters: Arc<Counters>,
) {
    use std::collections::HashSet;
    use std::sync::Mutex;
    use tokio::sync::Semaphore;
    let retry = schedule(&cfg.delivery);
    let shared = Arc::new(Shared {
        store,
        cfg,
        channels,
        key,
        clock,
        schedule: retry,
        stop: stop.clone(),
        counters,
    });
    let permits = |n: usize| Arc::new(Semaphore::new(n.max(1)));
    let (email, webhook, mqtt) = (
        permits(limits.email),
        permits(limits.webhook),
        permits(limits.mqtt),
    );
    let in_flight: Arc<Mutex<HashSet<(bool, i64)>>> = Arc::default();
    let mut tasks = tokio::task::JoinSet::new();
    // Attempts a previous process started but never finished: their
    // outcome is unknown, so they are sent again (same Message-ID and
    // idempotency key).
    match shared.store.with(|b| b.reclaim_interrupted()).await {
        Ok(Ok(list)) => {
            for (notice, channel) in list {
                tracing::warn!(%notice, %channel, "A delivery was under way when outrider last stopped; sending it again with the same Message-ID or idempotency key");
            }
        }
        Ok(Err(error)) => tracing::warn!(%error, "Could not check for interrupted deliveries"),
        Err(_) => return,
    }
    loop {
        tokio::select! {
            _ = stop.cancelled() => break,
            _ = tokio::time::sleep(every) => {}
            _ = wake.notified() => {}
        }
        while tasks.try_join_next().is_some() {}
        let now = shared.clock.now();
        let due = shared
            .store
            .with(move |b| -> Result<Vec<Work>, crate::store::StoreError> {
                let mut w: Vec<Work> = b
                    .due_deliveries(now, 256)?
                    .into_iter()
                    .map(|d| Work::Notice(Box::new(d)))
                    .collect();
                w.extend(
                    b.due_digests(now, 64)?
                        .into_iter()
                        .map(|d| Work::Digest(Box::new(d))),
                );
                Ok(w)
            })
            .await;
        let due = match due {
            Ok(Ok(d)) => d,
            Ok(Err(error)) => {
                tracing::warn!(%error, "Could not read the outbox");
                continue;
            }
            Err(_) => break,
        };
        for work in due {
            if stop.is_cancelled() {
                break;
            }
            let sem = match work.channel() {
                "email" => &email,
                "webhook" => &webhook,
                _ => &mqtt,
            };
            let key = work.key();
            if in_flight.lock().map(|s| s.contains(&key)).unwrap_or(true) {
                continue;
            }
            let Ok(permit) = sem.clone().try_acquire_owned() else {
                continue; // channel busy: next round
            };
            if let Ok(mut s) = in_flight.lock() {
                s.insert(key);
            }
            let (shared, in_flight) = (shared.clone(), in_flight.clone());
            tasks.spawn(async move {
                attempt(&shared, work).await;
                if let Ok(mut s) = in_flight.lock() {
                    s.remove(&key);
                }
                drop(permit);
            });
        }
    }
    // Sends in progress finish (each is bounded by its channel's timeout)
    // unless the caller's shutdown deadline aborts this task first.
    while tasks.join_next().await.is_some() {}
}

/// One attempt: close it instead when its subscriber unsubscribed from
/// email; else mark it under way, send, decide, record at once.
async fn attempt(sh: &Shared, work: Work) {
    let (digest, id) = work.key();
    let closed = match &work {
        Work::Notice(d) => closed_instead(d, sh.clock.now()),
        Work::Digest(d) => d.unsubscribed_at.map(|since| DeliveryUpdate::Closed {
            at: sh.clock.now(),
            reason: unsubscribed_reason(since),
        }),
    };
    let channel = work.channel().to_string();
    let (what, subscriber) = match &work {
        Work::Notice(d) => (
            d.notice.id().as_str().to_string(),
            d.notice.subscriber_id.to_string(),
        ),
        Work::Digest(d) => (d.digest.id(), d.digest.subscriber_id.clone()),
    };
    let update = match closed {
        Some(c) => c,
        None => {
            let marked = sh
                .store
                .with(move |b| {
                    if digest {
                        b.begin_digest(id)
                    } else {
                        b.begin_delivery(id)
                    }
                })
                .await;
            if !matches!(marked, Ok(Ok(()))) {
                // Without the mark a crash could repeat it unnoticed: wait.
                tracing::warn!(
                    delivery = id,
                    "Could not mark a delivery as under way; trying later"
                );
                return;
            }
            let now = sh.clock.now();
            let started = std::time::Instant::now();
            let (result, attempts, first) = match &work {
                Work::Notice(d) => (
                    send(&sh.cfg, &sh.channels, &sh.key, d, now).await,
                    d.attempts,
                    d.first_attempt_at,
                ),
                Work::Digest(d) => (
                    send_digest(&sh.cfg, &sh.channels, &sh.key, &d.digest, now).await,
                    d.attempts,
                    d.first_attempt_at,
                ),
            };
            sh.counters
                .delivery_attempt
                .observe(started.elapsed().as_secs_f64());
            decide(&sh.schedule, attempts, first, result, sh.clock.now())
        }
    };
    let metric_channel = if digest { "digest" } else { channel.as_str() };
    sh.counters
        .count_delivery(metric_channel, outcome_name(&update));
    match &update {
        DeliveryUpdate::Sent { at } => {
            if let Work::Notice(d) = &work {
                let took = (*at - d.notice.at).num_milliseconds() as f64 / 1000.0;
                sh.counters.notice_to_delivery.observe(took);
            }
            tracing::info!(notice = %what, %channel, %subscriber, "Delivered")
        }
        DeliveryUpdate::Closed { reason, .. } => {
            tracing::info!(notice = %what, %channel, %subscriber, %reason, "Delivery closed")
        }
        DeliveryUpdate::Retry { next, error, .. } => {
            tracing::warn!(notice = %what, %channel, %error, next = %next, "Delivery failed; will retry")
        }
        DeliveryUpdate::Failed { error, .. } => {
            tracing::error!(notice = %what, %channel, %error, "Delivery failed for good")
        }
    }
    record(&sh.store, digest, id, update, &sh.stop).await;
}

/// Records an outcome, trying again (1 s doubling to 30 s) while the store
/// cannot take it (a full disk): an outcome left unrecorded would make the
/// next start send the notice again. Gives up only when the service stops;
/// the delivery then stays marked as under way and is reclaimed at start.
async fn record(
    store: &Store,
    digest: bool,
    id: i64,
    update: DeliveryUpdate,
    stop: &CancellationToken,
) {
    let mut wait = std::time::Duration::from_secs(1);
    loop {
        let u = update.clone();
        let done = if digest {
            store.with(move |b| b.finish_digest(id, &u)).await
        } else {
            store.with(move |b| b.finish_delivery(id, &u)).await
        };
        match done {
            Ok(Ok(())) => return,
            Ok(Err(error)) => {
                tracing::error!(delivery = id, %error, retry_in_s = wait.as_secs(), "Could not record a delivery outcome; trying again")
            }
            Err(_) => return,
        }
        tokio::select! {
            _ = stop.cancelled() => return,
            _ = tokio::time::sleep(wait) => {}
        }
        wait = (wait * 2).min(std::time::Duration::from_secs(30));
    }
}

/// A due delivery that must not be sent at all: email to a subscriber who
/// has unsubscribed. Checked before every send, so a notice decided after
/// the unsubscribe (its delivery row made by the pipeline) is closed too.
pub fn closed_instead(d: &DueDelivery, at: DateTime<Utc>) -> Option<DeliveryUpdate> {
    let since = d.unsubscribed_at?;
    (d.channel == "email").then(|| DeliveryUpdate::Closed {
        at,
        reason: unsubscribed_reason(since),
    })
}

/// The outcome's name in metrics.
pub fn outcome_name(u: &DeliveryUpdate) -> &'static str {
    match u {
        DeliveryUpdate::Sent { .. } => "sent",
        DeliveryUpdate::Retry { .. } => "retry",
        DeliveryUpdate::Failed { .. } => "failed",
        DeliveryUpdate::Closed { .. } => "closed",
    }
}

/// The outcome of one attempt, as the store should record it: `attempts`
/// made before this one, the first made at `first_attempt_at`.
pub fn decide(
    schedule: &RetrySchedule,
    attempts: u32,
    first_attempt_at: Option<DateTime<Utc>>,
    result: Result<(), DeliveryError>,
    at: DateTime<Utc>,
) -> DeliveryUpdate {
    match result {
        Ok(()) => DeliveryUpdate::Sent { at },
        Err(e) if !e.is_retriable() => DeliveryUpdate::Failed {
            at,
            error: e.message,
        },
        Err(e) => {
            let first = first_attempt_at.unwrap_or(at);
            match schedule.next_attempt(first, attempts + 1, at) {
                Some(next) => DeliveryUpdate::Retry {
                    at,
                    next,
                    error: e.message,
                },
                None => DeliveryUpdate::Failed {
                    at,
                    error: format!(
                        "gave up after {} h: {}",
                        schedule.give_up_after.num_hours(),
                        e.message
                    ),
                },
            }
        }
    }
}

/// The subscriber's unsubscribe link, signed now.
fn unsubscribe_url(cfg: &Config, key: &TokenKey, sub: &Subscriber, now: DateTime<Utc>) -> String {
    let token = sign_token(
        key,
        Purpose::Unsubscribe,
        &sub.id,
        now + Duration::days(LINK_DAYS),
    );
    format!("{}/unsubscribe/{token}", cfg.service.public_url)
}

/// Sends one email on the configured route (SMTP or the mail folder).
async fn send_email(route: &EmailRoute, email: &OutgoingEmail) -> Result<(), DeliveryError> {
    match route {
        EmailRoute::Smtp { sender, .. } => sender.send(email).await,
        EmailRoute::Folder { sender } => sender.send(email).await.map(|_| ()),
    }
}

fn sender_of(route: &EmailRoute) -> (&str, Option<&str>) {
    match route {
        EmailRoute::Smtp { from, mailto, .. } => (from.as_str(), mailto.as_deref()),
        EmailRoute::Folder { .. } => (FOLDER_FROM, None),
    }
}

/// The digest email for `d` (shared by the worker and `outrider digest`).
pub fn digest_email(
    cfg: &Config,
    sub: &Subscriber,
    d: &Digest,
    from: &str,
    mailto: Option<&str>,
    unsubscribe_url: &str,
    now: DateTime<Utc>,
) -> Result<OutgoingEmail, DeliveryError> {
    let Some(to) = &sub.email else {
        return Err(DeliveryError::permanent(
            "no email address for this subscriber",
        ));
    };
    let ctx = DigestContext {
        subscriber_name: &sub.name,
        time_zone: sub.timezone,
        status_url: Some(&cfg.service.public_url),
        unsubscribe_url,
    };
    let r = render_digest(d, &ctx);
    let message_id = message_id(&d.id(), from).ok_or_else(|| {
        DeliveryError::permanent("cannot form a Message-ID from the sender address")
    })?;
    Ok(OutgoingEmail {
        from: from.to_string(),
        to: to.clone(),
        subject: r.subject,
        text: r.text,
        html: r.html,
        message_id,
        date: now,
        headers: crate::notify::render::list_unsubscribe_headers(unsubscribe_url, mailto),
        inline_images: r
            .chart_png
            .map(|bytes| InlineImage {
                content_id: CHART_CID.to_string(),
                content_type: "image/png".to_string(),
                bytes,
            })
            .into_iter()
            .collect(),
    })
}

async fn send_digest(
    cfg: &Config,
    ch: &Channels,
    key: &TokenKey,
    d: &Digest,
    now: DateTime<Utc>,
) -> Result<(), DeliveryError> {
    let Some(sub) = cfg.subscribers.iter().find(|s| s.id == d.subscriber_id) else {
        return Err(DeliveryError::permanent(format!(
            "subscriber `{}` is no longer in the configuration",
            d.subscriber_id
        )));
    };
    let Some(route) = &ch.email else {
        return Err(DeliveryError::permanent("no email route"));
    };
    let (from, mailto) = sender_of(route);
    let url = unsubscribe_url(cfg, key, sub, now);
    let email = digest_email(cfg, sub, d, from, mailto, &url, now)?;
    send_email(route, &email).await
}

/// What a webhook or MQTT notice carries: the notice's JSON line, or a
/// CAP 1.2 alert (without `references`: the live path does not look the
/// earlier alert up; its `incidents` ties a follow-up to it).
pub fn channel_body(
    cfg: &Config,
    sub: &Subscriber,
    n: &Notice,
    format: crate::config::NoticeFormat,
) -> Vec<u8> {
    match format {
        crate::config::NoticeFormat::Json => n.replay_line().to_string().into_bytes(),
        crate::config::NoticeFormat::Cap => {
            let sender = crate::interchange::cap::sender_for(&cfg.service.public_url);
            let ctx = crate::interchange::cap::context_for(cfg, Some(sub), &sender, &[]);
            crate::interchange::cap::alert(n, &ctx).into_bytes()
        }
    }
}

fn subscriber<'c>(cfg: &'c Config, n: &Notice) -> Option<&'c Subscriber> {
    cfg.subscribers.iter().find(|s| *s.id == *n.subscriber_id)
}

async fn send(
    cfg: &Config,
    ch: &Channels,
    key: &TokenKey,
    d: &DueDelivery,
    now: DateTime<Utc>,
) -> Result<(), DeliveryError> {
    let n = &d.notice;
    let Some(sub) = subscriber(cfg, n) else {
        return Err(DeliveryError::permanent(format!(
            "subscriber `{}` is no longer in the configuration",
            n.subscriber_id
        )));
    };
    match d.channel.as_str() {
        "email" => {
            let (Some(route), Some(to)) = (&ch.email, &sub.email) else {
                return Err(DeliveryError::permanent(
                    "no email route or address for this subscriber",
                ));
            };
            let unsubscribe_url = unsubscribe_url(cfg, key, sub, now);
            // The "status page" link of a notice opens the subscriber's own
            // page (their area and notices), which works on a public
            // address where the coordinator's pages need a token.
            let page = sign_token(key, Purpose::Page, &sub.id, now + Duration::days(LINK_DAYS));
            let page_url = format!("{}/my/{page}", cfg.service.public_url);
            let chance = n
                .evidence
                .p_value
                .and_then(|p| crate::activity::chance_in_words(p, "nights"));
            let ctx = EmailContext {
                time_zone: sub.timezone,
                chance_in_words: chance.as_deref(),
                status_url: Some(&page_url),
                unsubscribe_url: &unsubscribe_url,
            };
            let r = render_email(n, &ctx);
            let (from, mailto) = sender_of(route);
            let message_id = message_id(n.id().as_str(), from).ok_or_else(|| {
                DeliveryError::permanent("cannot form a Message-ID from the sender address")
            })?;
            let email = OutgoingEmail {
                from: from.to_string(),
                to: to.clone(),
                subject: r.subject,
                text: r.text,
                html: r.html,
                message_id,
                date: now,
                headers: crate::notify::render::list_unsubscribe_headers(&unsubscribe_url, mailto),
                inline_images: Vec::new(),
            };
            send_email(route, &email).await
        }
        "webhook" => {
            let (Some(sender), Some(hook)) = (&ch.webhook, &sub.webhook) else {
                return Err(DeliveryError::permanent("no webhook for this subscriber"));
            };
            let format = sub.webhook_format;
            sender
                .send(
                    &OutgoingWebhook::to(
                        hook,
                        n.id().as_str(),
                        channel_body(cfg, sub, n, format),
                        now.timestamp(),
                    )
                    .with_content_type(format.content_type()),
                )
                .await
        }
        "mqtt" => {
            let Some((client, prefix)) = &ch.mqtt else {
                return Err(DeliveryError::retriable("no MQTT connection"));
            };
            client
                .publish(
                    format!("{prefix}/_notices/{}", sub.id),
                    rumqttc::QoS::AtLeastOnce,
                    false,
                    channel_body(cfg, sub, n, sub.mqtt_format),
                )
                .await
                .map_err(|e| DeliveryError::retriable(format!("MQTT publish: {e}")))
        }
        other => Err(DeliveryError::permanent(format!(
            "unknown channel `{other}`"
        ))),
    }
}

#[cfg(test)]
#[allow(clippy::unwrap_used)]
mod tests {
    use super::*;
    use crate::notify::notice::tests::{sample, utc};

    #[test]
    fn the_configured_schedule_drives_retries_and_the_give_up_message() {
        let s = schedule(&crate::config::Delivery {
            retry_first_seconds: 5,
            retry_max_seconds: 20,
            give_up_hours: 1,
        });
        let first = utc(2026, 7, 14, 2, 0);
        let mut d = DueDelivery {
            id: 1,
            channel: "email".into(),
            attempts: 0,
            first_attempt_at: None,
            notice: sample(),
            unsubscribed_at: None,
        };
        // 5 s, 10 s, 20 s, then 20 s: doubling to the cap.
        let mut at = first;
        let mut waits = Vec::new();
        for _ in 0..5 {
            match decide(
                &s,
                d.attempts,
                d.first_attempt_at,
                Err(DeliveryError::retriable("451")),
                at,
            ) {
                DeliveryUpdate::Retry { next, .. } => {
                    waits.push((next - at).num_seconds());
                    d.attempts += 1;
                    d.first_attempt_at.get_or_insert(at);
                    at = next;
                }
                other => panic!("{other:?}"),
            }
        }
        assert_eq!(waits, [5, 10, 20, 20, 20]);
        // At the 1 h deadline it gives up, and says after how long.
        match decide(
            &s,
            d.attempts,
            d.first_attempt_at,
            Err(DeliveryError::retriable("451")),
            first + Duration::hours(1),
        ) {
            DeliveryUpdate::Failed { error, .. } => {
                assert!(error.starts_with("gave up after 1 h: "), "{error}")
            }
            other => panic!("{other:?}"),
        }
        // The default is DESIGN.md's: 1 min doubling to 1 h, 24 h.
        assert_eq!(
            schedule(&crate::config::Delivery::default()),
            RetrySchedule::default()
        );
    }

    fn due(channel: &str, unsubscribed_at: Option<DateTime<Utc>>) -> DueDelivery {
        DueDelivery {
            id: 1,
            channel: channel.into(),
            attempts: 0,
            first_attempt_at: None,
            notice: sample(),
            unsubscribed_at,
        }
    }

    #[test]
    fn email_to_an_unsubscribed_subscriber_is_closed_instead_of_sent() {
        let at = utc(2025, 7, 15, 2, 0);
        let since = utc(2025, 7, 15, 1, 0);
        assert_eq!(
            closed_instead(&due("email", Some(since)), at),
            Some(DeliveryUpdate::Closed {
                at,
                reason: "not sent: the subscriber unsubscribed from email at 2025-07-15T01:00:00Z"
                    .into()
            })
        );
        assert_eq!(closed_instead(&due("email", None), at), None);
        assert_eq!(
            closed_instead(&due("webhook", Some(since)), at),
            None,
            "a machine feed set up by the operator is not an email list"
        );
        assert_eq!(
            outcome_name(&closed_instead(&due("email", Some(since)), at).unwrap()),
            "closed"
        );
    }
}
