//! The MQTT client loop: QoS 1 subscriptions on a persistent session (fixed
//! client id, clean session off) with manual acknowledgement, so a message
//! is acknowledged only after the pipeline has committed it. A crash of
//! outrider therefore loses nothing: the broker redelivers.
//!
//! This loop never blocks on anything but handing a message to the pipeline
//! (a bounded channel): when the pipeline is full, polling pauses and the
//! unacknowledged messages wait at the broker.

use crate::config::Mqtt;
use crate::pipeline::Inbound;
use crate::telemetry::Counters;
use rumqttc::{
    AsyncClient, Event, EventLoop, MqttOptions, Packet, Publish, QoS, TlsConfiguration, Transport,
};
use std::collections::VecDeque;
use std::sync::atomic::Ordering::Relaxed;
use std::sync::Arc;
use std::time::Duration;
use tokio::sync::mpsc;
use tokio_util::sync::CancellationToken;

/// Requests (acks, publishes) that may wait for the event loop. Acks that
/// do not fit wait in the loop's own queue (see [`run`]), so this is only a
/// size for the fast path.
pub const REQUEST_CAPACITY: usize = 8192;

/// The system's CA bundle on Debian and its relatives.
const SYSTEM_CA_BUNDLE: &str = "/etc/ssl/certs/ca-certificates.crt";

#[derive(Debug, thiserror::Error)]
pub enum MqttSetupError {
    #[error("cannot read CA file {path}: {source}")]
    CaFile {
        path: String,
        source: std::io::Error,
    },
}

/// The client options for `cfg`, with `max_packet` as the incoming limit.
pub fn options(cfg: &Mqtt, max_packet: usize) -> Result<MqttOptions, MqttSetupError> {
    let mut o = MqttOptions::new(cfg.client_id.clone(), cfg.url.host.clone(), cfg.url.port);
    o.set_clean_session(false)
        .set_manual_acks(true)
        .set_keep_alive(Duration::from_secs(cfg.keep_alive_seconds))
        .set_request_channel_capacity(REQUEST_CAPACITY)
        .set_inflight(100)
        // Accept more than our own payload limit so that an oversize message
        // reaches the decoder and is rejected with a reason instead of
        // breaking the connection. Beyond this the connection drops.
        .set_max_packet_size(max_packet, 1024 * 1024);
    if let (Some(u), Some(p)) = (&cfg.username, &cfg.password) {
        o.set_credentials(u.clone(), p.expose().to_string());
    } else if let Some(u) = &cfg.username {
        o.set_credentials(u.clone(), String::new());
    }
    if cfg.url.tls {
        let path = cfg
            .ca_file
            .clone()
            .unwrap_or_else(|| SYSTEM_CA_BUNDLE.into());
        let ca = std::fs::read(&path).map_err(|source| MqttSetupError::CaFile {
            path: path.display().to_string(),
            source,
        })?;
        o.set_transport(Transport::tls_with_config(TlsConfiguration::Simple {
            ca,
            alpn: None,
            client_auth: None,
        }));
    }
    Ok(o)
}

/// The subscriptions outrider holds.
pub fn filters(prefix: &str) -> [String; 3] {
    [
        format!("{prefix}/+/observation"),
        format!("{prefix}/+/heartbeat"),
        format!("{prefix}/+/correction"),
    ]
}

/// Connects lazily: returns the client handle and the loop future's state.
pub fn connect(opts: MqttOptions) -> (AsyncClient, EventLoop) {
    AsyncClient::new(opts, REQUEST_CAPACITY)
}

/// Most messages held between the event loop and a full pipeline before
/// polling pauses. Polling must go on while the pipeline is busy, because
/// only polling sends acknowledgements (and pings) out; this bounds what
/// it buffers meanwhile. When it pauses the broker holds the rest.
pub const MAX_HELD: usize = 4096;

/// Polls the event loop, handing each publish to the pipeline, and sends
/// the pipeline's acknowledgements (`acks`) back to the broker, until
/// `stop_reading` is cancelled. Then it stops handing on (undelivered
/// messages stay unacknowledged at the broker, which redelivers them), drops
/// its sender so the pipeline can finish its batch, keeps polling so the
/// pipeline's last acknowledgements go out, and disconnects once
/// `pipeline_done` is cancelled. Reconnects with back-off (1 s doubling to
/// 30 s), logging one line per change of state.
///
/// Nothing here awaits anything but the `select!` below, so the pipeline
/// (which waits on the store) and the event loop (which alone moves
/// acknowledgements out) can never wait on each other.
#[allow(clippy::too_many_arguments)]
pub async fn run(
    client: AsyncClient,
    mut eventloop: EventLoop,
    prefix: String,
    tx: mpsc::Sender<Inbound>,
    mut acks: mpsc::Receiver<Publish>,
    counters: Arc<Counters>,
    stop_reading: CancellationToken,
    pipeline_done: CancellationToken,
) {
    let mut tx = Some(tx);
    let mut held: VecDeque<Inbound> = VecDeque::new();
    let mut unsent_acks: VecDeque<Publish> = VecDeque::new();
    let mut backoff = Duration::from_secs(1);
    let mut connected = false;
    let mut down_until: Option<tokio::time::Instant> = None;
    let mut last_error = String::new();
    loop {
        // Move acknowledgements into the client's request queue while it has room.
        while let Some(p) = unsent_acks.front() {
            if client.try_ack(p).is_err() {
                break;
            }
            unsent_acks.pop_front();
        }
        let can_forward = tx.is_some() && !held.is_empty();
        let may_poll = held.len() < MAX_HELD && down_until.is_none();
        let sender = tx.clone();
        tokio::select! {
            _ = stop_reading.cancelled(), if tx.is_some() => {
                tx = None;
                held.clear();
            }
            _ = pipeline_done.cancelled() => break,
            a = acks.recv() => {
                if let Some(p) = a {
                    unsent_acks.push_back(p);
                    while let Ok(p) = acks.try_recv() {
                        unsent_acks.push_back(p);
                    }
                }
            }
            permit = async { sender.as_ref().expect("guarded by can_forward").reserve().await }, if can_forward => {
                match permit {
                    Ok(permit) => {
                        if let Some(m) = held.pop_front() {
                            permit.send(m);
                        }
                    }
                    Err(_) => tx = None,
                }
            }
            _ = async { if let Some(t) = down_until { tokio::time::sleep_until(t).await } }, if down_until.is_some() => {
                down_until = None;
            }
            event = eventloop.poll(), if may_poll => match event {
                Ok(Event::Incoming(Packet::ConnAck(ack))) => {
                    connected = true;
                    backoff = Duration::from_secs(1);
                    last_error.clear();
                    counters.broker_connected.store(true, Relaxed);
                    tracing::info!(session_present = ack.session_present, "Connected to the MQTT broker");
                    for f in filters(&prefix) {
                        if let Err(error) = client.try_subscribe(f.clone(), QoS::AtLeastOnce) {
                            tracing::error!(%error, filter = %f, "Could not subscribe");
                        }
                    }
                }
                Ok(Event::Incoming(Packet::Publish(p))) => {
                    if tx.is_some() {
                        held.push_back(Inbound { topic: p.topic.clone(), payload: p.payload.clone(), publish: Some(p), arrived: std::time::Instant::now() });
                    }
                }
                Ok(_) => {}
                Err(error) => {
                    counters.broker_connected.store(false, Relaxed);
                    let text = error.to_string();
                    if connected || text != last_error {
                        tracing::warn!(error = %text, retry_in_s = backoff.as_secs(), "MQTT connection lost or refused; retrying");
                    }
                    connected = false;
                    last_error = text;
                    down_until = Some(tokio::time::Instant::now() + backoff);
                    backoff = (backoff * 2).min(Duration::from_secs(30));
                }
            },
        }
    }
    // Let the last acknowledgements and the DISCONNECT reach the broker.
    while let Ok(p) = acks.try_recv() {
        unsent_acks.push_back(p);
    }
    if connected {
        let _ = tokio::time::timeout(Duration::from_millis(1500), async {
            loop {
                while let Some(p) = unsent_acks.front() {
                    if client.try_ack(p).is_err() {
                        break;
                    }
                    unsent_acks.pop_front();
                }
                if unsent_acks.is_empty() {
                    let _ = client.try_disconnect();
                }
                match eventloop.poll().await {
                    Ok(Event::Outgoing(rumqttc::Outgoing::Disconnect)) | Err(_) => break,
                    Ok(_) => {}
                }
            }
        })
        .await;
    }
    counters.broker_connected.store(false, Relaxed);
}
