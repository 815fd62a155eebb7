//! `outrider digest` (preview a subscriber's digest from the store) and
//! `outrider send-test` (one clearly marked test message on each of a
//! subscriber's channels, now). Thin shells over the engine, the store and
//! the delivery channels; both are safe while the daemon runs (the store
//! is opened read-only; a test message is not a notice and is not stored).

use crate::config::{Channel, Config, Subscriber};
use crate::deliver::email::{build_message, message_id, OutgoingEmail};
use crate::deliver::webhook::{OutgoingWebhook, WebhookSender};
use crate::digest::Digest;
use crate::engine::Engine;
use crate::model::Message;
use crate::outbox::{link_key, Channels, EmailRoute};
use crate::store::sqlite::{fill_digest, load_history, Sqlite};
use anyhow::Context;
use chrono::{DateTime, Utc};
use std::path::Path;
use std::sync::Arc;

fn find<'c>(cfg: &'c Config, id: &str) -> anyhow::Result<(usize, &'c Subscriber)> {
    cfg.subscribers
        .iter()
        .enumerate()
        .find(|(_, s)| s.id == id)
        .ok_or_else(|| {
            let known: Vec<&str> = cfg.subscribers.iter().map(|s| s.id.as_str()).collect();
            anyhow::anyhow!(
                "no subscriber `{id}` in the configuration (known: {})",
                known.join(", ")
            )
        })
}

/// The digest of subscriber `id` due at `due` (default: the latest due at
/// or before now, the demo's simulated now for a demo's state), built from
/// the store exactly as the daemon builds it.
pub fn build_digest(
    cfg: &Config,
    id: &str,
    due: Option<DateTime<Utc>>,
    now: DateTime<Utc>,
) -> anyhow::Result<Digest> {
    let (index, sub) = find(cfg, id)?;
    let now = crate::status::effective_now(&cfg.service.state_dir, now);
    let due = due.unwrap_or_else(|| crate::digest::latest_due(now, sub.digest_at, sub.timezone));
    if !crate::store::db_path(&cfg.service.state_dir).exists() {
        anyhow::bail!(
            "no outrider store in {} (run the daemon or the demo first)",
            cfg.service.state_dir.display()
        );
    }
    let db = Sqlite::open_read_only(&cfg.service.state_dir)?;
    let mut engine = Engine::new(Arc::new(cfg.clone()));
    let history = load_history(db.connection(), due - engine.horizon())?;
    // What the daemon knew at `due`: signs of life after it do not count.
    let known = history.iter().filter(|m| match m {
        Message::Observation(o) => o.event_start < due,
        Message::Heartbeat(h) => h.timestamp < due,
        Message::Correction(_) => true,
    });
    engine.warm(known);
    let mut d = engine.digest(index, due, due);
    fill_digest(db.connection(), &mut d)?;
    Ok(d)
}

/// Writes the preview: `.eml` the whole message, `.html` the HTML part
/// (chart inlined as a data: URL so a browser shows it), `.json` the
/// digest's numbers, anything else the text part. Returns a line for the
/// terminal.
pub fn write_preview(cfg: &Config, d: &Digest, out: Option<&Path>) -> anyhow::Result<String> {
    let (_, sub) = find(cfg, &d.subscriber_id)?;
    let key = link_key(&cfg.service.state_dir)?;
    let now = d.due_at;
    let url = format!(
        "{}/unsubscribe/{}",
        cfg.service.public_url,
        crate::notify::token::sign_token(
            &key,
            crate::notify::token::Purpose::Unsubscribe,
            &sub.id,
            now + chrono::Duration::days(365)
        )
    );
    let from = cfg
        .smtp
        .as_ref()
        .map(|s| s.from.clone())
        .unwrap_or_else(|| "outrider <notices@outrider.invalid>".to_string());
    let mailto = cfg
        .smtp
        .as_ref()
        .and_then(|s| s.unsubscribe_mailto.as_deref());
    let email = crate::outbox::digest_email(cfg, sub, d, &from, mailto, &url, now)
        .map_err(|e| anyhow::anyhow!("{}", e.message))?;
    let ext = out
        .and_then(|p| p.extension())
        .and_then(|e| e.to_str())
        .unwrap_or("");
    let bytes = match ext {
        "eml" => build_message(&email)
            .map_err(|e| anyhow::anyhow!("{}", e.message))?
            .formatted(),
        "json" => serde_json::to_vec_pretty(d)?,
        "html" => {
            let mut html = email.html.clone();
            if let Some(img) = email.inline_images.first() {
                use base64::Engine as _;
                let data = base64::engine::general_purpose::STANDARD.encode(&img.bytes);
                html = html.replace(
                    &format!("cid:{}", img.content_id),
                    &format!("data:{};base64,{data}", img.content_type),
                );
            }
            html.into_bytes()
        }
        _ => format!("Subject: {}\n\n{}", email.subject, email.text).into_bytes(),
    };
    match out {
        Some(p) => {
            std::fs::write(p, &bytes).with_context(|| format!("writing {}", p.display()))?;
            Ok(format!(
                "wrote the digest of {} due {} to {}",
                sub.id,
                crate::notify::notice::rfc3339(d.due_at),
                p.display()
            ))
        }
        None => Ok(String::from_utf8_lossy(&bytes).into_owned()),
    }
}

/// Result of one channel in `send-test`.
#[derive(Debug)]
pub struct TestResult {
    pub channel: &'static str,
    pub outcome: Result<String, String>,
}

/// Sends one test message on each channel the subscriber has.
pub async fn send_test(
    cfg: &Config,
    id: &str,
    now: DateTime<Utc>,
) -> anyhow::Result<Vec<TestResult>> {
    let (_, sub) = find(cfg, id)?;
    let mut uses: Vec<Channel> = sub
        .watches
        .iter()
        .flat_map(|w| w.channels.iter().copied())
        .collect();
    if sub.email.is_some() {
        uses.push(Channel::Email);
    }
    uses.sort_by_key(|c| c.as_str());
    uses.dedup();
    let text = format!(
        "This is a test message from outrider for {}. If you can read it, notices on this channel will reach you. Nothing was seen; no action is needed.",
        crate::notify::header_safe(&sub.name)
    );
    let body = serde_json::json!({
        "test": true,
        "subscriber": sub.id,
        "at": crate::notify::notice::rfc3339(now),
        "message": text,
    })
    .to_string()
    .into_bytes();
    let test_id = format!("test-{}-{}", sub.id, now.timestamp());
    let mut out = Vec::new();
    for c in uses {
        let outcome = match c {
            Channel::Email => test_email(cfg, sub, &text, &test_id, now).await,
            Channel::Webhook => match &sub.webhook {
                Some(hook) => match WebhookSender::new() {
                    Ok(s) => s
                        .send(&OutgoingWebhook::to(
                            hook,
                            &test_id,
                            body.clone(),
                            now.timestamp(),
                        ))
                        .await
                        .map(|_| format!("POST {} accepted", hook.url))
                        .map_err(|e| e.message),
                    Err(e) => Err(e.message),
                },
                None => {
                    Err("a watch uses the webhook channel but the subscriber has no webhook".into())
                }
            },
            Channel::Mqtt => test_mqtt(cfg, sub, body.clone()).await,
        };
        out.push(TestResult {
            channel: c.as_str(),
            outcome,
        });
    }
    Ok(out)
}

async fn test_email(
    cfg: &Config,
    sub: &Subscriber,
    text: &str,
    test_id: &str,
    now: DateTime<Utc>,
) -> Result<String, String> {
    let Some(to) = &sub.email else {
        return Err("a watch uses email but the subscriber has no email address".into());
    };
    let channels = Channels::from_config(cfg, None).map_err(|e| e.to_string())?;
    let Some(route) = &channels.email else {
        return Err("no [smtp] section and no mail folder: email cannot leave".into());
    };
    let from = match route {
        EmailRoute::Smtp { from, .. } => from.clone(),
        EmailRoute::Folder { .. } => "outrider <notices@outrider.invalid>".to_string(),
    };
    let email = OutgoingEmail {
        from: from.clone(),
        to: to.clone(),
        subject: "Test message from outrider".into(),
        text: format!("{text}\n"),
        html: format!("<p>{}</p>\n", crate::notify::html_escape(text)),
        message_id: message_id(test_id, &from).ok_or("cannot form a Message-ID from the sender")?,
        date: now,
        headers: Vec::new(),
        inline_images: Vec::new(),
    };
    match route {
        EmailRoute::Smtp { sender, .. } => sender
            .send(&email)
            .await
            .map(|_| format!("accepted by the SMTP server for {to}"))
            .map_err(|e| e.message),
        EmailRoute::Folder { sender } => sender
            .send(&email)
            .await
            .map(|p| format!("written to {}", p.display()))
            .map_err(|e| e.message),
    }
}

async fn test_mqtt(cfg: &Config, sub: &Subscriber, body: Vec<u8>) -> Result<String, String> {
    let mut mqtt = cfg.mqtt.clone();
    mqtt.client_id = format!("{}-send-test", mqtt.client_id);
    let mut opts =
        crate::ingest::mqtt::options(&mqtt, crate::MAX_WIRE_PAYLOAD).map_err(|e| e.to_string())?;
    opts.set_clean_session(true);
    let (client, mut ev) = crate::ingest::mqtt::connect(opts);
    let topic = format!("{}/_notices/{}", cfg.mqtt.topic_prefix, sub.id);
    client
        .publish(topic.clone(), rumqttc::QoS::AtLeastOnce, false, body)
        .await
        .map_err(|e| e.to_string())?;
    let wait = async {
        loop {
            match ev.poll().await {
                Ok(rumqttc::Event::Incoming(rumqttc::Packet::PubAck(_))) => return Ok(()),
                Ok(_) => {}
                Err(e) => return Err(format!("MQTT: {e}")),
            }
        }
    };
    match tokio::time::timeout(std::time::Duration::from_secs(10), wait).await {
        Ok(Ok(())) => {
            let _ = client.disconnect().await;
            Ok(format!("published to {topic}, acknowledged by the broker"))
        }
        Ok(Err(e)) => Err(e),
        Err(_) => Err(format!(
            "no acknowledgement from {} within 10 s",
            cfg.mqtt.url
        )),
    }
}
