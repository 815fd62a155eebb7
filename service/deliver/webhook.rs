//! The webhook channel: one HTTP POST of a notice's JSON line, signed with
//! the subscriber's secret, and the answer mapped to `Ok(())` or a
//! [`DeliveryError`].
//!
//! Role: the I/O shell of the webhook channel. The body is given as bytes
//! (the notice's `replay_line` JSON, serialised once by the caller) and is
//! sent and signed exactly as given. The signature recipe and header names
//! live in [`crate::notify::token`]; the status-code table in
//! [`crate::notify::classify_http`]; the time of signing is passed in.
//!
//! Each request carries `Content-Type: application/json` (or XML for a
//! subscriber whose webhook has `format = "cap"`),
//! `Idempotency-Key: <delivery id>` (the same on every retry) and, when the
//! subscriber has a secret, `Outrider-Timestamp` and `Outrider-Signature`.
//! The client has a 10 s limit for the whole exchange, follows no redirect
//! (a signed body is never re-sent to an address the subscriber did not
//! configure), reads no proxy settings from the environment, and speaks
//! HTTP/1.1 over rustls (ring) with the system's trust store.
//!
//! Answers: 2xx delivered; 408, 429 and 5xx retriable; 3xx and other 4xx
//! permanent; a refused connection, a timeout or a TLS failure retriable;
//! a URL that is not `http(s)` permanent.

use std::time::Duration;

use crate::config::{Secret, Webhook};
use crate::deliver::email::ensure_crypto_provider;
use crate::deliver::DeliveryError;
use crate::notify::token::{
    WEBHOOK_IDEMPOTENCY_HEADER, WEBHOOK_SIGNATURE_HEADER, WEBHOOK_TIMESTAMP_HEADER,
};
use crate::notify::{classify_http, header_safe, webhook_signature, Outcome};

/// Limit for one webhook exchange, connection included.
pub const WEBHOOK_TIMEOUT: Duration = Duration::from_secs(10);

/// One webhook request, ready to go.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct OutgoingWebhook {
    /// The subscriber's `http://` or `https://` URL.
    pub url: String,
    /// The subscriber's secret; without one the request is not signed.
    pub secret: Option<Secret>,
    /// The delivery id; the same on every attempt so the receiver can drop
    /// repeats. Visible ASCII only.
    pub idempotency_key: String,
    /// The body, sent and signed byte for byte.
    pub body: Vec<u8>,
    /// Its `Content-Type`: `application/json` for the notice's JSON line,
    /// XML for a CAP alert ([`crate::config::NoticeFormat::content_type`]).
    pub content_type: &'static str,
    /// Unix seconds of the attempt (the caller's clock): the signed
    /// timestamp.
    pub timestamp: i64,
}

impl OutgoingWebhook {
    /// A request to `hook` (a subscriber's `webhook = {...}` config).
    pub fn to(hook: &Webhook, idempotency_key: &str, body: Vec<u8>, timestamp: i64) -> Self {
        Self {
            url: hook.url.clone(),
            secret: hook.secret.clone(),
            idempotency_key: idempotency_key.to_owned(),
            body,
            content_type: "application/json",
            timestamp,
        }
    }

    /// The same request with another `Content-Type`.
    pub fn with_content_type(mut self, content_type: &'static str) -> Self {
        self.content_type = content_type;
        self
    }

    /// The header fields this request carries besides those of HTTP itself
    /// (Host, Content-Length, User-Agent), in order.
    pub fn headers(&self) -> Vec<(&'static str, String)> {
        let mut h = vec![
            ("Content-Type", self.content_type.to_owned()),
            (WEBHOOK_IDEMPOTENCY_HEADER, self.idempotency_key.clone()),
        ];
        if let Some(secret) = &self.secret {
            h.push((WEBHOOK_TIMESTAMP_HEADER, self.timestamp.to_string()));
            h.push((
                WEBHOOK_SIGNATURE_HEADER,
                webhook_signature(secret.expose().as_bytes(), self.timestamp, &self.body),
            ));
        }
        h
    }
}

/// Sends webhooks. One client (and its connection pool) for every
/// subscriber; cheap to share by reference.
#[derive(Debug, Clone)]
pub struct WebhookSender {
    client: reqwest::Client,
}

impl WebhookSender {
    /// A sender with the 10 s limit.
    pub fn new() -> Result<Self, DeliveryError> {
        Self::with_timeout(WEBHOOK_TIMEOUT)
    }

    /// A sender with another limit (tests).
    pub fn with_timeout(timeout: Duration) -> Result<Self, DeliveryError> {
        ensure_crypto_provider();
        let client = reqwest::Client::builder()
            .timeout(timeout)
            .connect_timeout(timeout)
            .redirect(reqwest::redirect::Policy::none())
            .no_proxy()
            .user_agent(concat!("outrider/", env!("CARGO_PKG_VERSION")))
            .build()
            .map_err(|e| {
                DeliveryError::permanent(format!("cannot set up the webhook client: {e}"))
            })?;
        Ok(Self { client })
    }

    /// POSTs `hook`. `Ok(())` on any 2xx answer.
    pub async fn send(&self, hook: &OutgoingWebhook) -> Result<(), DeliveryError> {
        let url = reqwest::Url::parse(&hook.url)
            .ok()
            .filter(|u| matches!(u.scheme(), "http" | "https") && u.host().is_some())
            .ok_or_else(|| {
                DeliveryError::permanent(format!(
                    "webhook url {:?} is not an http(s) url",
                    header_safe(&hook.url)
                ))
            })?;
        if hook.idempotency_key.is_empty()
            || !hook
                .idempotency_key
                .bytes()
                .all(|b| (0x21..=0x7e).contains(&b))
        {
            return Err(DeliveryError::permanent(format!(
                "idempotency key {:?} is not visible ascii",
                header_safe(&hook.idempotency_key)
            )));
        }
        // Never log the URL's query: it may hold the receiver's token.
        let shown = format!(
            "{}://{}{}",
            url.scheme(),
            url.host_str().unwrap_or(""),
            url.port().map(|p| format!(":{p}")).unwrap_or_default()
        );
        let mut request = self.client.post(url).body(hook.body.clone());
        for (name, value) in hook.headers() {
            request = request.header(name, value);
        }
        let response = request.send().await.map_err(|e| {
            // reqwest's message names the full URL; keep it to `shown`.
            let e = e.without_url();
            let what = if e.is_timeout() {
                "timed out"
            } else if e.is_connect() {
                "could not connect"
            } else {
                "failed"
            };
            // A request that cannot even be built (a header value reqwest
            // refuses) will not build next time either.
            if e.is_builder() {
                DeliveryError::permanent(format!("webhook {shown}: {e}"))
            } else {
                DeliveryError::retriable(format!("webhook {shown} {what}: {e}"))
            }
        })?;
        let status = response.status();
        let code = status.as_u16();
        if classify_http(code) == Outcome::Delivered {
            return Ok(());
        }
        let mut message = format!("webhook {shown} answered {status}");
        if status.is_redirection() {
            message.push_str(" (redirects are not followed; fix the url");
            if let Some(to) = response
                .headers()
                .get(reqwest::header::LOCATION)
                .and_then(|v| v.to_str().ok())
            {
                let to: String = header_safe(to).chars().take(200).collect();
                message.push_str(&format!(", it points to {to}"));
            }
            message.push(')');
        }
        Err(DeliveryError::from_code(code, classify_http, message))
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn signed_only_with_a_secret() {
        let body = br#"{"noticeID":"2b65300baab149c9cfd5913a126e242d","subscriber":"stonecroft"}"#;
        let mut h = OutgoingWebhook {
            url: "https://hooks.stonecroft.example/outrider".into(),
            secret: Some(Secret::new("kellerby-hook-secret")),
            idempotency_key: "2b65300baab149c9cfd5913a126e242d".into(),
            body: body.to_vec(),
            content_type: "application/json",
            timestamp: 1752545700,
        };
        // docs/notices.md §6 worked example (computed there with Python's
        // hmac module).
        assert_eq!(
            h.headers(),
            vec![
                ("Content-Type", "application/json".to_owned()),
                (
                    "Idempotency-Key",
                    "2b65300baab149c9cfd5913a126e242d".to_owned()
                ),
                ("Outrider-Timestamp", "1752545700".to_owned()),
                (
                    "Outrider-Signature",
                    "sha256=9eaadd538265355f67b1c61a6dd972d081f33bb9fced4563cc3e022f1b3a112a"
                        .to_owned()
                ),
            ]
        );
        h.secret = None;
        assert_eq!(h.headers().len(), 2);
    }
}
