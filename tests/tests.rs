//! Integration tests: the real binary, a real broker (embedded or
//! Mosquitto), an independent MQTT client (paho-mqtt), a real SQLite file.
//! `tests/util.rs` is the harness.

// Test code may unwrap: a panic is a failed test with its message.
#![allow(clippy::unwrap_used)]

mod config_examples;
mod delivery;
mod deploy;
mod digest;
mod faults;
mod hostile;
mod ingest;
mod interchange;
mod load;
mod notices;
mod replay;
mod secrets;
mod util;
mod web;
