//! The store: one SQLite database in `state_dir`, owned by one thread.
//!
//! Callers hold a cheap, cloneable [`Store`] handle and send it commands over
//! a bounded channel (the actor pattern: SQLite has one writer, blocking
//! calls stay off the async runtime, and a full channel is backpressure).
//! The database itself sits behind the [`Backend`] trait so that a
//! PostgreSQL backend can be added later without touching the callers.

pub mod sqlite;

use crate::model::{Message, Rejection};
use chrono::{DateTime, Utc};
use serde::Serialize;
use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use tokio::sync::{mpsc, oneshot};

/// The database file inside `state_dir`.
pub const DB_FILE: &str = "outrider.db";

pub fn db_path(state_dir: &Path) -> PathBuf {
    state_dir.join(DB_FILE)
}

#[derive(Debug, thiserror::Error)]
pub enum StoreError {
    #[error("database: {0}")]
    Sqlite(#[from] rusqlite::Error),
    #[error("cannot create state directory {path}: {source}")]
    StateDir {
        path: PathBuf,
        source: std::io::Error,
    },
    #[error("database schema version {found} is newer than this outrider knows ({known}); upgrade outrider")]
    TooNew { found: i64, known: i64 },
    #[error("the store has stopped")]
    Stopped,
}

impl StoreError {
    /// A full disk or a read-only file: the store cannot take writes now but
    /// may later. The caller stops acknowledging and retries.
    pub fn is_transient(&self) -> bool {
        match self {
            StoreError::Sqlite(rusqlite::Error::SqliteFailure(e, _)) => matches!(
                e.code,
                rusqlite::ErrorCode::DiskFull
                    | rusqlite::ErrorCode::DatabaseBusy
                    | rusqlite::ErrorCode::DatabaseLocked
                    | rusqlite::ErrorCode::SystemIoFailure
                    | rusqlite::ErrorCode::ReadOnly
                    | rusqlite::ErrorCode::CannotOpen
            ),
            _ => false,
        }
    }
}

/// One thing to commit.
#[derive(Debug, Clone)]
pub enum Ingest {
    Message {
        message: Message,
        received_at: DateTime<Utc>,
    },
    Rejected {
        topic: String,
        payload: Vec<u8>,
        payload_bytes: usize,
        rejection: Rejection,
        received_at: DateTime<Utc>,
    },
}

/// What happened to one [`Ingest`].
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum Outcome {
    Stored,
    /// Seen before (same observationID, heartbeat or correction): ignored.
    Duplicate,
    /// The store refused it (e.g. a correction of an unknown observation);
    /// the refusal itself was stored as a rejection.
    Rejected(Rejection),
    /// The rejection given to it was stored.
    RejectionStored,
}

/// Counts for `outrider status --json` (DESIGN.md lists the keys).
#[derive(Debug, Clone, Default, Serialize, PartialEq)]
pub struct StatusCounts {
    pub observations_stored: u64,
    pub duplicates_ignored: u64,
    pub rejected: BTreeMap<String, u64>,
    pub events: u64,
    pub notices: BTreeMap<String, u64>,
    pub outbox_pending: u64,
    /// Deliveries by state (pending, sent, failed).
    pub deliveries: BTreeMap<String, u64>,
    /// Daily digests by state (pending, sent, failed).
    pub digests: BTreeMap<String, u64>,
    pub deployments_silent: u64,
    pub heartbeats_stored: u64,
    pub corrections_stored: u64,
    /// Last sign of life (heartbeat or observation) per deployment.
    #[serde(skip)]
    pub last_seen: BTreeMap<String, DateTime<Utc>>,
}

/// The storage operations outrider needs. Implementations are used from one
/// thread at a time.
pub trait Backend: Send + 'static {
    /// Commits the whole batch and what the engine derived from it in one
    /// transaction, or nothing.
    fn commit(
        &mut self,
        batch: &[Ingest],
        derived: &[crate::engine::Output],
    ) -> Result<Vec<Outcome>, StoreError>;
    fn status(&mut self) -> Result<StatusCounts, StoreError>;
    /// Stored messages since `since`, oldest first (observations and
    /// heartbeats by their own time), then the corrections of those
    /// observations in arrival order: what the engine needs to warm up.
    fn history(&mut self, since: DateTime<Utc>) -> Result<Vec<Message>, StoreError>;
    /// Notice decisions made at or after `since`, oldest first (decision
    /// time, then the order they were stored): what the engine takes back
    /// after a restart (`Engine::restore`).
    fn decisions(&mut self, since: DateTime<Utc>)
        -> Result<Vec<crate::notify::Notice>, StoreError>;
    /// Pending deliveries due at `now`, oldest first.
    fn due_deliveries(
        &mut self,
        now: DateTime<Utc>,
        limit: usize,
    ) -> Result<Vec<sqlite::DueDelivery>, StoreError>;
    /// Marks a delivery as under way, durably, just before its attempt; the
    /// outcome ([`Backend::finish_delivery`]) ends the mark.
    fn begin_delivery(&mut self, id: i64) -> Result<(), StoreError>;
    /// The same for a digest.
    fn begin_digest(&mut self, id: i64) -> Result<(), StoreError>;
    /// Deliveries still marked as under way (the process stopped between
    /// an attempt and its outcome), put back as pending: (notice id,
    /// channel) of each.
    fn reclaim_interrupted(&mut self) -> Result<Vec<(String, String)>, StoreError>;
    /// Records the outcome of a delivery attempt.
    fn finish_delivery(
        &mut self,
        id: i64,
        update: &sqlite::DeliveryUpdate,
    ) -> Result<(), StoreError>;
    /// Pending digests due at `now`, oldest first.
    fn due_digests(
        &mut self,
        now: DateTime<Utc>,
        limit: usize,
    ) -> Result<Vec<sqlite::DueDigest>, StoreError>;
    /// Records the outcome of a digest's delivery attempt.
    fn finish_digest(&mut self, id: i64, update: &sqlite::DeliveryUpdate)
        -> Result<(), StoreError>;
    /// The due instant of the last digest recorded per subscriber.
    fn last_digests(
        &mut self,
    ) -> Result<std::collections::HashMap<String, DateTime<Utc>>, StoreError>;
    /// Records that a subscriber wants no more email and closes their
    /// pending email deliveries ([`sqlite::Sqlite::unsubscribe`]).
    fn unsubscribe(
        &mut self,
        subscriber_id: &str,
        at: DateTime<Utc>,
        via: &str,
    ) -> Result<sqlite::Unsubscribed, StoreError>;
    /// Flushes what can be flushed before the process exits.
    fn close(&mut self) -> Result<(), StoreError>;
}

/// Work run on the store thread.
type Job = Box<dyn FnOnce(&mut dyn Backend) + Send>;

enum Cmd {
    Commit(
        Vec<Ingest>,
        Vec<crate::engine::Output>,
        oneshot::Sender<Result<Vec<Outcome>, StoreError>>,
    ),
    /// Runs a closure on the backend's thread (start-up loads, workers).
    With(Job),
    Status(oneshot::Sender<Result<StatusCounts, StoreError>>),
}

/// Handle to the store thread. Dropping every handle stops the thread after
/// it has finished the commands in hand.
#[derive(Clone)]
pub struct Store {
    tx: mpsc::Sender<Cmd>,
}

/// How many commands may wait for the store thread. When full, callers wait:
/// the pipeline then stops taking messages and MQTT keeps them unacknowledged.
const STORE_QUEUE: usize = 16;

impl Store {
    /// Starts the store thread over `backend`. Returns the handle and the
    /// thread's join handle (join it last at shutdown).
    pub fn start(
        mut backend: Box<dyn Backend>,
    ) -> std::io::Result<(Store, std::thread::JoinHandle<()>)> {
        let (tx, mut rx) = mpsc::channel::<Cmd>(STORE_QUEUE);
        let handle = std::thread::Builder::new()
            .name("outrider-store".into())
            .spawn(move || {
                while let Some(cmd) = rx.blocking_recv() {
                    match cmd {
                        Cmd::Commit(batch, derived, reply) => {
                            let _ = reply.send(backend.commit(&batch, &derived));
                        }
                        Cmd::With(f) => f(backend.as_mut()),
                        Cmd::Status(reply) => {
                            let _ = reply.send(backend.status());
                        }
                    }
                }
                if let Err(error) = backend.close() {
                    tracing::warn!(%error, "Store close failed");
                }
            })?;
        Ok((Store { tx }, handle))
    }

    pub async fn commit(
        &self,
        batch: Vec<Ingest>,
        derived: Vec<crate::engine::Output>,
    ) -> Result<Vec<Outcome>, StoreError> {
        let (reply, rx) = oneshot::channel();
        self.tx
            .send(Cmd::Commit(batch, derived, reply))
            .await
            .map_err(|_| StoreError::Stopped)?;
        rx.await.map_err(|_| StoreError::Stopped)?
    }

    /// Runs `f` on the store thread with the backend and returns its result.
    pub async fn with<T: Send + 'static>(
        &self,
        f: impl FnOnce(&mut dyn Backend) -> T + Send + 'static,
    ) -> Result<T, StoreError> {
        let (reply, rx) = oneshot::channel();
        let job: Job = Box::new(move |b| {
            let _ = reply.send(f(b));
        });
        self.tx
            .send(Cmd::With(job))
            .await
            .map_err(|_| StoreError::Stopped)?;
        rx.await.map_err(|_| StoreError::Stopped)
    }

    pub async fn status(&self) -> Result<StatusCounts, StoreError> {
        let (reply, rx) = oneshot::channel();
        self.tx
            .send(Cmd::Status(reply))
            .await
            .map_err(|_| StoreError::Stopped)?;
        rx.await.map_err(|_| StoreError::Stopped)?
    }
}
