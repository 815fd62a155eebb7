//! The pure notice core: what a notice is, whether it goes out now, when a
//! failed delivery is tried again, how links and webhooks are signed, and
//! how a notice reads in an email.
//!
//! Role: plain values in, plain values out. Nothing here does I/O, reads the
//! wall clock (every function that needs the time takes `now`), spawns a
//! task or knows about SQLite, SMTP or HTTP clients. The shells (outbox
//! worker, email, webhook and MQTT channels, web unsubscribe handler) call
//! into this module and act on what it returns.
//!
//! # Layout
//! - [`notice`]: [`Notice`], its [`Trigger`], [`Disposition`] and
//!   [`Evidence`]; the stable notice id and the replay / webhook JSON line.
//! - [`policy`]: fatigue control as a sans-I/O state machine
//!   ([`Policy::on_candidate`] -> [`Decision`]): cooldown per camera and
//!   species, hourly cap per subscriber, quiet hours.
//! - [`backoff`]: the delivery retry schedule and the retriable / permanent
//!   classification of SMTP reply codes and HTTP status codes.
//! - [`token`]: HMAC-SHA256 signed link tokens (one-click unsubscribe,
//!   subscriber page) and the webhook signature header.
//! - [`render`]: Subject, plain-text and HTML bodies of a notice email, plus
//!   the `header_safe` / `html_escape` helpers and the RFC 2369 / RFC 8058
//!   unsubscribe headers.
//!
//! Wording rules, the fatigue rules, the back-off table, the token format and
//! the webhook recipe are written down for users in `docs/notices.md`.
//!
//! This module depends on no other module of the crate, so it can be built
//! and tested on its own.

pub mod backoff;
pub mod notice;
pub mod policy;
pub mod render;
pub mod token;

pub use backoff::{classify_http, classify_smtp, next_attempt, Outcome, RetrySchedule};
pub use notice::{Disposition, Evidence, FoldedEvent, Notice, NoticeId, Trigger};
pub use policy::{Candidate, Decision, FoldKey, Policy};
pub use render::{header_safe, html_escape, render_email, EmailContext, RenderedEmail};
pub use token::{
    sign_token, verify_token, webhook_signature, Claims, Purpose, TokenError, TokenKey,
};
