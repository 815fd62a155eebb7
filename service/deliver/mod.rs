//! The delivery channels: the I/O shells that hand one rendered notice to
//! the outside world and say whether it arrived.
//!
//! Role: thin senders, one per channel, each turning a prepared value into
//! bytes on a socket or a file and the answer into `Ok(())` or a
//! [`DeliveryError`] that says whether waiting could help. They hold no
//! state about notices: retry timing, the outbox and the give-up deadline
//! belong to the outbox worker, which calls these and then
//! [`crate::notify::RetrySchedule`]. Wording, escaping, signatures and the
//! retriable / permanent tables are pure code in [`crate::notify`]; nothing
//! here reads the wall clock (the caller passes the time).
//!
//! # Layout
//! - [`email`]: [`EmailSender`] over SMTP (lettre; none / STARTTLS / TLS,
//!   optional auth), and [`build_message`], the one place an
//!   [`OutgoingEmail`] becomes an RFC 5322 message.
//! - [`folder`]: [`FolderSender`], the demo's mail folder: the same message
//!   written atomically as one `.eml` file per email.
//! - [`webhook`]: [`WebhookSender`], a signed JSON POST (reqwest; no
//!   redirects followed).
//!
//! `docs/delivery.md` tells users what each channel sends and what counts
//! as permanent.

pub mod email;
pub mod folder;
pub mod webhook;

pub use email::{build_message, EmailOptions, EmailSender, OutgoingEmail};
pub use folder::FolderSender;
pub use webhook::{OutgoingWebhook, WebhookSender, WEBHOOK_TIMEOUT};

use crate::notify::Outcome;
use std::fmt;

/// Whether a failed delivery may succeed later.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum ErrorKind {
    /// Try again per the retry schedule: a 4xx SMTP reply, HTTP 408, 429 or
    /// 5xx, a refused or dropped connection, a timeout, a TLS failure, a
    /// full disk.
    Retriable,
    /// Waiting will not help: a 5xx SMTP reply, another HTTP 4xx or a 3xx,
    /// a message that cannot be built (bad address, bad Message-ID).
    Permanent,
}

impl fmt::Display for ErrorKind {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(match self {
            Self::Retriable => "retriable",
            Self::Permanent => "permanent",
        })
    }
}

/// A delivery that did not arrive. `message` is for logs and the status
/// page: it never holds a password or a webhook secret.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
#[error("{kind} delivery error: {message}")]
pub struct DeliveryError {
    pub kind: ErrorKind,
    pub message: String,
    /// The SMTP reply code or HTTP status behind the error, when there was
    /// one (None for a connection error, a timeout or a bad message).
    pub code: Option<u16>,
}

impl DeliveryError {
    pub fn retriable(message: impl Into<String>) -> Self {
        Self {
            kind: ErrorKind::Retriable,
            message: message.into(),
            code: None,
        }
    }

    pub fn permanent(message: impl Into<String>) -> Self {
        Self {
            kind: ErrorKind::Permanent,
            message: message.into(),
            code: None,
        }
    }

    /// The error for an answer code, classified by `classify` (one of
    /// [`crate::notify::classify_smtp`] / [`crate::notify::classify_http`]).
    /// A code the table calls delivered is not an error; if one gets here
    /// anyway it is treated as retriable.
    pub(crate) fn from_code(
        code: u16,
        classify: fn(u16) -> Outcome,
        message: impl Into<String>,
    ) -> Self {
        let kind = match classify(code) {
            Outcome::Permanent => ErrorKind::Permanent,
            Outcome::Retriable | Outcome::Delivered => ErrorKind::Retriable,
        };
        Self {
            kind,
            message: message.into(),
            code: Some(code),
        }
    }

    pub fn is_retriable(&self) -> bool {
        self.kind == ErrorKind::Retriable
    }

    /// The outbox outcome of this failure.
    pub fn outcome(&self) -> Outcome {
        match self.kind {
            ErrorKind::Retriable => Outcome::Retriable,
            ErrorKind::Permanent => Outcome::Permanent,
        }
    }
}

/// [`crate::notify::Outcome`] of a whole attempt: `Ok` is delivered.
pub fn outcome_of(result: &Result<(), DeliveryError>) -> Outcome {
    match result {
        Ok(()) => Outcome::Delivered,
        Err(e) => e.outcome(),
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::notify::{classify_http, classify_smtp};

    #[test]
    fn codes_follow_the_notify_tables() {
        // RFC 5321 §4.2.1 (from memory): 4yz transient, 5yz permanent.
        assert!(DeliveryError::from_code(451, classify_smtp, "x").is_retriable());
        assert!(!DeliveryError::from_code(550, classify_smtp, "x").is_retriable());
        // RFC 9110 §15 (from memory); 408/429 retriable is common practice.
        for (c, retriable) in [(500, true), (429, true), (404, false), (302, false)] {
            let e = DeliveryError::from_code(c, classify_http, "x");
            assert_eq!(e.is_retriable(), retriable, "{c}");
            assert_eq!(e.code, Some(c));
        }
        assert_eq!(outcome_of(&Ok(())), Outcome::Delivered);
        assert_eq!(
            outcome_of(&Err(DeliveryError::permanent("no"))),
            Outcome::Permanent
        );
        assert_eq!(
            DeliveryError::retriable("connection refused").to_string(),
            "retriable delivery error: connection refused"
        );
    }
}
