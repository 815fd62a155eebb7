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
//!
//! I/O shells, thin, wired together only in [`app`]:
//! - [`ingest::mqtt`]: the MQTT client loop (QoS 1, persistent session,
//!   acknowledgement only after the store commits).
//! - [`ingest::broker`]: the optional in-process broker for demos.
//! - [`store`]: the [`store::Store`] handle over one SQLite connection owned
//!   by one thread.
//! - [`pipeline`]: batches decoded messages into store commits, then acks.
//! - [`demo`]: the invented district's synthetic feed.
//! - [`app`]: starts and stops the tasks in order.

pub mod activity;
pub mod app;
pub mod check;
pub mod cli;
pub mod clock;
pub mod config;
pub mod demo;
pub mod ingest;
pub mod model;
pub mod pipeline;
pub mod status;
pub mod store;
pub mod telemetry;

/// Largest MQTT packet outrider reads off the wire. Larger than any payload
/// limit so that an oversize message is rejected with a reason rather than
/// breaking the connection.
pub const MAX_WIRE_PAYLOAD: usize = 16 * 1024 * 1024 + 1024;
