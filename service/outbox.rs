//! The outbox worker: takes due deliveries from the store, renders and
//! sends each on its channel (email through SMTP or into the mail folder,
//! signed webhook, MQTT), and records the outcome at once.
//!
//! Retries follow [`crate::notify::RetrySchedule`] (1 min doubling to 1 h,
//! given up 24 h after the first attempt); a permanent error (SMTP 5xx,
//! HTTP 4xx other than 408/429) fails the delivery at once. A delivery is
//! recorded as sent right after the server accepts it, before anything
//! else; only a crash in between can send it a second time, and then with
//! the same Message-ID / idempotency key, so the receiver can tell.

use crate::clock::Clock;
use crate::config::{Config, Subscriber};
use crate::deliver::email::{message_id, EmailSender, OutgoingEmail};
use crate::deliver::folder::FolderSender;
use crate::deliver::webhook::{OutgoingWebhook, WebhookSender};
use crate::deliver::DeliveryError;
use crate::notify::token::{sign_token, Purpose, TokenKey};
use crate::notify::{render_email, EmailContext, Notice, RetrySchedule};
use crate::store::sqlite::{unsubscribed_reason, DeliveryUpdate, DueDelivery};
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

/// Runs until `stop` is cancelled, checking for due deliveries every `every`.
#[allow(clippy::too_many_arguments)]
pub async fn run(
    store: Store,
    cfg: Arc<Config>,
    channels: Channels,
    key: TokenKey,
    clock: Arc<dyn Clock>,
    every: std::time::Duration,
    stop: CancellationToken,
    counters: Arc<Counters>,
) {
    let schedule = RetrySchedule::default();
    loop {
        tokio::select! {
            _ = stop.cancelled() => break,
            _ = tokio::time::sleep(every) => {}
        }
        let now = clock.now();
        let due = match store.with(move |b| b.due_deliveries(now, 64)).await {
            Ok(Ok(d)) => d,
            Ok(Err(error)) => {
                tracing::warn!(%error, "Could not read the outbox");
                continue;
            }
            Err(_) => break,
        };
        for d in due {
            if stop.is_cancelled() {
                break;
            }
            let update = match closed_instead(&d, clock.now()) {
                Some(closed) => closed,
                None => {
                    let started = std::time::Instant::now();
                    let result = send(&cfg, &channels, &key, &d, clock.now()).await;
                    counters
                        .delivery_attempt
                        .observe(started.elapsed().as_secs_f64());
                    decide(&schedule, &d, result, clock.now())
                }
            };
            counters.count_delivery(&d.channel, outcome_name(&update));
            match &update {
                DeliveryUpdate::Sent { at } => {
                    let took = (*at - d.notice.at).num_milliseconds() as f64 / 1000.0;
                    counters.notice_to_delivery.observe(took);
                    tracing::info!(notice = %d.notice.id(), channel = %d.channel, subscriber = %d.notice.subscriber_id, "Delivered")
                }
                DeliveryUpdate::Closed { reason, .. } => {
                    tracing::info!(notice = %d.notice.id(), channel = %d.channel, subscriber = %d.notice.subscriber_id, %reason, "Delivery closed")
                }
                DeliveryUpdate::Retry { next, error, .. } => {
                    tracing::warn!(notice = %d.notice.id(), channel = %d.channel, %error, next = %next, "Delivery failed; will retry")
                }
                DeliveryUpdate::Failed { error, .. } => {
                    tracing::error!(notice = %d.notice.id(), channel = %d.channel, %error, "Delivery failed for good")
                }
            }
            let id = d.id;
            if !matches!(
                store.with(move |b| b.finish_delivery(id, &update)).await,
                Ok(Ok(()))
            ) {
                tracing::error!(delivery = id, "Could not record a delivery outcome");
            }
        }
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

/// The outcome of one attempt, as the store should record it.
pub fn decide(
    schedule: &RetrySchedule,
    d: &DueDelivery,
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
            let first = d.first_attempt_at.unwrap_or(at);
            match schedule.next_attempt(first, d.attempts + 1, at) {
                Some(next) => DeliveryUpdate::Retry {
                    at,
                    next,
                    error: e.message,
                },
                None => DeliveryUpdate::Failed {
                    at,
                    error: format!("gave up after 24 h: {}", e.message),
                },
            }
        }
    }
}

fn subscriber<'c>(cfg: &'c Config, n: &Notice) -> Option<&'c Subscriber> {
    cfg.subscribers.iter().find(|s| s.id == n.subscriber_id)
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
    let body = n.replay_line().to_string().into_bytes();
    match d.channel.as_str() {
        "email" => {
            let (Some(route), Some(to)) = (&ch.email, &sub.email) else {
                return Err(DeliveryError::permanent(
                    "no email route or address for this subscriber",
                ));
            };
            let token = sign_token(
                key,
                Purpose::Unsubscribe,
                &sub.id,
                now + Duration::days(LINK_DAYS),
            );
            let unsubscribe_url = format!("{}/unsubscribe/{token}", cfg.service.public_url);
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
            let (from, mailto) = match route {
                EmailRoute::Smtp { from, mailto, .. } => (from.as_str(), mailto.as_deref()),
                EmailRoute::Folder { .. } => (FOLDER_FROM, None),
            };
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
            };
            match route {
                EmailRoute::Smtp { sender, .. } => sender.send(&email).await,
                EmailRoute::Folder { sender } => sender.send(&email).await.map(|_| ()),
            }
        }
        "webhook" => {
            let (Some(sender), Some(hook)) = (&ch.webhook, &sub.webhook) else {
                return Err(DeliveryError::permanent("no webhook for this subscriber"));
            };
            sender
                .send(&OutgoingWebhook::to(
                    hook,
                    n.id().as_str(),
                    body,
                    now.timestamp(),
                ))
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
                    body,
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
