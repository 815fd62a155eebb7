//! The embedded MQTT broker (rumqttd, in-process) for the demo and a first
//! evaluation with no external service.
//!
//! It is not durable: its queues live in memory. What it has accepted from
//! a publisher but outrider has not yet committed is lost if the process
//! dies, and it drops the oldest messages when its in-memory log is full.
//! `run` warns about this; docs/durability.md says what survives what.

use crate::config::EmbeddedBroker;
use std::collections::HashMap;

#[derive(Debug, thiserror::Error)]
pub enum BrokerError {
    #[error("embedded broker configuration: {0}")]
    Config(String),
    #[error("embedded broker: cannot start a thread: {0}")]
    Thread(std::io::Error),
}

/// Largest payload the embedded broker passes on. Larger than outrider's own
/// limit so that outrider, not the broker, rejects an oversize message with
/// a reason.
pub const BROKER_MAX_PAYLOAD: usize = 1024 * 1024 + 1024;

/// Starts the broker on its own thread. It runs until the process exits.
pub fn start(cfg: &EmbeddedBroker) -> Result<(), BrokerError> {
    let auth = match (&cfg.username, &cfg.password) {
        (Some(u), Some(p)) => {
            let mut m = HashMap::new();
            m.insert(u.clone(), p.expose().to_string());
            Some(m)
        }
        _ => None,
    };
    let connections = rumqttd::ConnectionSettings {
        connection_timeout_ms: 60_000,
        max_payload_size: BROKER_MAX_PAYLOAD,
        max_inflight_count: 500,
        auth,
        external_auth: None,
        dynamic_filters: true,
    };
    let server = rumqttd::ServerSettings {
        name: "v4-embedded".into(),
        listen: cfg.listen,
        tls: None,
        next_connection_delay_ms: 1,
        connections,
    };
    let mut v4 = HashMap::new();
    v4.insert("v4-embedded".to_string(), server);
    let router = rumqttd::RouterConfig {
        max_connections: 1010,
        max_outgoing_packet_count: 200,
        max_segment_size: 100 * 1024 * 1024,
        max_segment_count: 10,
        custom_segment: None,
        initialized_filters: None,
        shared_subscriptions_strategy: Default::default(),
    };
    let config = rumqttd::Config {
        id: 0,
        router,
        v4: Some(v4),
        ..Default::default()
    };
    let mut broker = rumqttd::Broker::new(config);
    std::thread::Builder::new()
        .name("outrider-broker".into())
        .spawn(move || {
            if let Err(error) = broker.start() {
                tracing::error!(%error, "Embedded broker stopped");
            }
        })
        .map_err(BrokerError::Thread)?;
    Ok(())
}
