//! outrider: turns a live MQTT stream of camera-trap detections into
//! pest-incursion notices, a daily digest and silent-camera warnings.
//!
//! # Layout
//! Pure modules take plain values (and the time as a value) and return
//! values; they never touch sockets, files, the database or the wall clock:
//! - [`model`]: identifiers, messages, rejection reasons.
//! - [`config`]: the TOML and sites CSV checked into typed values, every
//!   problem reported at once with file:line:col ([`config::load`] is the one
//!   function there that reads files).
//! - [`ingest::decode`]: topic + bytes -> message or rejection.
//! - [`activity`]: independent events, effort, baselines, spike and
//!   build-up tests (METHODS.md 1-4, 7).
//! - [`geo`]: geodesic distance, GeoJSON areas, site coverage (R-tree),
//!   civil dusk and dawn (METHODS.md 5, 6).
//! - [`calendar`]: local time windows, seasons, DST-safe schedules.
//! - [`notify`]: the notice model, fatigue control, retry schedule, signed
//!   tokens, and the email text/HTML renderers.
//! - [`digest`]: the daily digest's model, schedule rules, wording and
//!   14-night PNG chart.
//!
//! - [`engine`]: the one core the daemon and replay both run: messages in,
//!   event changes and notice decisions out.
//! - [`interchange`]: Camtrap DP packages, CAP 1.2 alerts and CSV reports
//!   (formats only: data in, bytes out).
//!
//! I/O shells, thin, wired together only in [`app`]:
//! - [`ingest::mqtt`]: the MQTT client loop (QoS 1, persistent session,
//!   acknowledgement only after the store commits).
//! - [`ingest::broker`]: the optional in-process broker for demos.
//! - [`store`]: the [`store::Store`] handle over one SQLite connection owned
//!   by one thread.
//! - [`pipeline`]: batches decoded messages into store commits, then acks.
//! - [`deliver`]: the email (SMTP), mail-folder and webhook senders; each
//!   says whether a failure is retriable.
//! - [`web`]: the status page, JSON API, `/metrics`, health checks and
//!   one-click unsubscribe (axum); its renderers are pure.
//! - [`demo`]: the invented district's synthetic feed.
//! - [`load`]: `outrider load`, that feed (or a grid of N sites) published
//!   to a broker at a given rate, for load tests and benchmarks.
//! - [`app`]: starts and stops the tasks in order.
//! - [`backup`]: `outrider backup`, a checked online copy of the store.
//! - [`outbox`]: sends due notices and digests, per-channel concurrency,
//!   back-off, each outcome recorded at once.
//! - [`tools`]: `outrider digest` (preview) and `outrider send-test`.
//! - [`export`], [`import`], [`report`]: `outrider export` (Camtrap DP,
//!   CAP), `outrider import` (Camtrap DP) and `outrider report` (CSV), the
//!   shells over the pure formats in [`interchange`].

pub mod activity;
pub mod app;
pub mod backup;
pub mod calendar;
pub mod check;
pub mod cli;
pub mod clock;
pub mod config;
pub mod deliver;
pub mod demo;
pub mod digest;
pub mod engine;
pub mod export;
pub mod geo;
pub mod import;
pub mod ingest;
pub mod interchange;
pub mod load;
pub mod model;
pub mod notify;
pub mod outbox;
pub mod pipeline;
pub mod replay;
pub mod report;
pub mod status;
pub mod store;
pub mod telemetry;
pub mod tools;
pub mod web;

/// Largest MQTT packet outrider reads off the wire. Larger than any payload
/// limit so that an oversize message is rejected with a reason rather than
/// breaking the connection.
pub const MAX_WIRE_PAYLOAD: usize = 16 * 1024 * 1024 + 1024;
