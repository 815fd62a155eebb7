//! The one wiring place: starts the store, the optional embedded broker, the
//! MQTT loop and the pipeline, and stops them in order.
//!
//! Shutdown order: stop reading MQTT and stop taking web requests -> the
//! pipeline commits and acknowledges the batch in hand and exits -> the
//! MQTT loop sends the last acknowledgements and disconnects -> the outbox
//! and the web server finish what they have in hand -> the store
//! checkpoints and exits last.

use crate::clock::Clock;
use crate::config::Config;
use crate::ingest::mqtt;
use crate::pipeline::{self, DecodeFacts, MqttReply};
use crate::store::sqlite::{Durability, Sqlite};
use crate::store::Store;
use crate::telemetry::Counters;
use anyhow::Context;
use std::future::Future;
use std::sync::Arc;
use std::time::Duration;
use tokio_util::sync::CancellationToken;

/// Messages that may wait between the MQTT loop and the pipeline. When full
/// the MQTT loop pauses and the broker holds the rest, unacknowledged.
const PIPELINE_QUEUE: usize = 2048;

/// How often the outbox worker looks for due deliveries.
const OUTBOX_EVERY: Duration = Duration::from_millis(500);

/// How often the time-driven checks (silent cameras) run.
const TICK_EVERY: Duration = Duration::from_secs(1);

/// The engine, warmed with the stored history it needs (its horizon) and
/// the decisions it made over it, so a restart needs no full rebuild and
/// decides as if it had never stopped.
async fn warm_engine(
    cfg: Arc<Config>,
    store: &Store,
    now: chrono::DateTime<chrono::Utc>,
) -> anyhow::Result<crate::engine::Engine> {
    let started = std::time::Instant::now();
    let mut engine = crate::engine::Engine::new(cfg);
    let since = now - engine.horizon();
    let history = store.with(move |b| b.history(since)).await??;
    let digests = store.with(|b| b.last_digests()).await??;
    engine.schedule_digests(digests);
    let n = history.len();
    engine.warm(history.iter());
    // The decisions already made: cooldowns, held events and the hourly
    // cap go on where they were, so a restart sends nothing twice.
    let decisions = store.with(move |b| b.decisions(since)).await??;
    engine.restore(decisions.iter());
    tracing::info!(
        messages = n,
        decisions = decisions.len(),
        took_ms = started.elapsed().as_millis() as u64,
        "Engine warmed from the store"
    );
    Ok(engine)
}

/// A running service, for callers that need its parts (demo, tests).
pub struct Running {
    pub store: Store,
    pub counters: Arc<Counters>,
}

/// Runs the daemon until `shutdown` completes. `on_start` is called once the
/// parts are up (the demo starts its feed there).
pub async fn run<F, S>(
    cfg: Config,
    clock: Arc<dyn Clock>,
    shutdown: F,
    on_start: S,
) -> anyhow::Result<()>
where
    F: Future<Output = ()>,
    S: FnOnce(&Running),
{
    for w in &cfg.warnings {
        tracing::warn!(warning = %w, "Configuration");
    }
    // Bind the status page first: a taken port stops the start before
    // anything else has begun.
    let web_listener = match cfg.web.listen {
        Some(addr) => Some(
            tokio::net::TcpListener::bind(addr)
                .await
                .with_context(|| format!("binding the status page to {addr} ([web] listen)"))?,
        ),
        None => None,
    };
    if let Some(b) = &cfg.broker {
        start_embedded_broker(b)?;
        tracing::warn!(
            listen = %b.listen,
            "Embedded MQTT broker started. It keeps messages in memory only: what it holds is lost if outrider stops. Use an external broker (Mosquitto) for production; see docs/durability.md"
        );
    }
    let backend = Sqlite::open(&cfg.service.state_dir, Durability::Full)
        .with_context(|| format!("opening the store in {}", cfg.service.state_dir.display()))?;
    let (store, store_thread) =
        Store::start(Box::new(backend)).context("starting the store thread")?;
    let counters = Arc::new(Counters::new());
    // One shared copy of the configuration for the engine and the outbox.
    let shared = Arc::new(cfg.clone());
    let engine = warm_engine(shared.clone(), &store, clock.now()).await?;
    let facts = Arc::new(DecodeFacts::from_config(&cfg));

    let opts = mqtt::options(
        &cfg.mqtt,
        cfg.detection.max_payload_bytes.max(crate::MAX_WIRE_PAYLOAD),
    )?;
    let (client, eventloop) = mqtt::connect(opts);
    let client_for_outbox = client.clone();
    let (tx, rx) = tokio::sync::mpsc::channel(PIPELINE_QUEUE);
    // Acknowledgements from the pipeline to the MQTT loop. The loop always
    // drains this channel, so the pipeline waits here only briefly.
    let (ack_tx, ack_rx) = tokio::sync::mpsc::channel(PIPELINE_QUEUE);
    let stop_reading = CancellationToken::new();
    let wake_outbox = Arc::new(tokio::sync::Notify::new());
    let pipeline_done = CancellationToken::new();

    let reply = MqttReply {
        client: client.clone(),
        acks: ack_tx,
        topic_prefix: cfg.mqtt.topic_prefix.clone(),
    };
    let pipeline_task = {
        let (store, counters, clock, done, wake) = (
            store.clone(),
            counters.clone(),
            clock.clone(),
            pipeline_done.clone(),
            wake_outbox.clone(),
        );
        tokio::spawn(async move {
            pipeline::run(
                rx,
                store,
                facts,
                engine,
                clock,
                Some(reply),
                counters,
                TICK_EVERY,
                wake,
            )
            .await;
            done.cancel();
        })
    };
    let mqtt_task = tokio::spawn(mqtt::run(
        client,
        eventloop,
        cfg.mqtt.topic_prefix.clone(),
        tx,
        ack_rx,
        counters.clone(),
        stop_reading.clone(),
        pipeline_done.clone(),
    ));
    let outbox_stop = CancellationToken::new();
    let key = crate::outbox::link_key(&cfg.service.state_dir)?;
    let outbox_task = {
        let channels = crate::outbox::Channels::from_config(&cfg, Some(client_for_outbox))?;
        tokio::spawn(crate::outbox::run(
            store.clone(),
            shared.clone(),
            channels,
            key.clone(),
            clock.clone(),
            OUTBOX_EVERY,
            crate::outbox::Concurrency::default(),
            wake_outbox.clone(),
            outbox_stop.clone(),
            counters.clone(),
        ))
    };
    let web_stop = CancellationToken::new();
    let web_task = web_listener.map(|listener| {
        let addr = listener
            .local_addr()
            .map(|a| a.to_string())
            .unwrap_or_default();
        let loopback = listener.local_addr().is_ok_and(|a| a.ip().is_loopback());
        if !loopback && cfg.web.admin_token.is_none() {
            tracing::warn!(listen = %addr, "Status page on an address other than loopback without [web] admin_token_env: the coordinator's pages and the API are off; unsubscribe links, subscriber pages and health checks are served");
        }
        tracing::info!(listen = %addr, url = %cfg.service.public_url, "Status page listening");
        let web = crate::web::Web::new(
            shared.clone(),
            store.clone(),
            counters.clone(),
            clock.clone(),
            key.clone(),
            loopback,
        );
        tokio::spawn(crate::web::serve(listener, web, web_stop.clone()))
    });
    tracing::info!(broker = %cfg.mqtt.url, state_dir = %cfg.service.state_dir.display(), sites = cfg.sites.sites.len(), subscribers = cfg.subscribers.len(), "outrider running");
    on_start(&Running {
        store: store.clone(),
        counters: counters.clone(),
    });

    shutdown.await;
    tracing::info!("Shutting down: finishing the batch in hand");
    stop_reading.cancel();
    outbox_stop.cancel();
    web_stop.cancel();
    // The whole stop fits in shutdown_timeout_seconds (default 5 s): a task
    // that is still busy then is aborted; what it had in hand stays
    // unacknowledged (the broker redelivers) or pending (retried at start).
    let deadline =
        tokio::time::Instant::now() + Duration::from_secs(cfg.service.shutdown_timeout_seconds);
    let mut pipeline_task = pipeline_task;
    if tokio::time::timeout_at(deadline - Duration::from_millis(1500), &mut pipeline_task)
        .await
        .is_err()
    {
        tracing::warn!(
            "Pipeline did not finish in time; its messages stay unacknowledged at the broker"
        );
        pipeline_task.abort();
        pipeline_done.cancel();
        let _ = pipeline_task.await;
    }
    let mut mqtt_task = mqtt_task;
    if tokio::time::timeout_at(deadline - Duration::from_millis(500), &mut mqtt_task)
        .await
        .is_err()
    {
        mqtt_task.abort();
    }
    let mut outbox_task = outbox_task;
    if tokio::time::timeout_at(deadline, &mut outbox_task)
        .await
        .is_err()
    {
        tracing::warn!("A delivery in progress did not finish in time; it stays pending and is retried at the next start");
        outbox_task.abort();
        let _ = outbox_task.await;
    }
    if let Some(mut web_task) = web_task {
        // Its handlers hold store handles: it must be gone before the store.
        if tokio::time::timeout_at(deadline, &mut web_task)
            .await
            .is_err()
        {
            web_task.abort();
            let _ = web_task.await;
        }
    }
    drop(store);
    // The store thread exits once every handle is gone; wait for it off the runtime.
    let _ = tokio::task::spawn_blocking(move || store_thread.join()).await;
    tracing::info!("Stopped");
    Ok(())
}

#[cfg(feature = "embedded-broker")]
fn start_embedded_broker(b: &crate::config::EmbeddedBroker) -> anyhow::Result<()> {
    crate::ingest::broker::start(b)?;
    Ok(())
}

#[cfg(not(feature = "embedded-broker"))]
fn start_embedded_broker(_: &crate::config::EmbeddedBroker) -> anyhow::Result<()> {
    anyhow::bail!("this outrider was built without the embedded broker (feature `embedded-broker`); remove [broker] embedded = true or rebuild with the feature")
}

/// Resolves on SIGINT or SIGTERM.
pub async fn shutdown_signal() {
    let ctrl_c = tokio::signal::ctrl_c();
    #[cfg(unix)]
    {
        let mut term =
            match tokio::signal::unix::signal(tokio::signal::unix::SignalKind::terminate()) {
                Ok(s) => s,
                Err(_) => {
                    let _ = ctrl_c.await;
                    return;
                }
            };
        tokio::select! {
            _ = ctrl_c => {}
            _ = term.recv() => {}
        }
    }
    #[cfg(not(unix))]
    {
        let _ = ctrl_c.await;
    }
}
