//! `outrider backup`: a consistent copy of the store, safe while the daemon
//! runs and writes.
//!
//! Uses SQLite's online backup API over a read-only connection: pages are
//! copied a step at a time with a short pause between steps, so the daemon's
//! commits are never held up (in WAL mode a reader does not block the
//! writer). If the daemon commits between two steps, SQLite restarts the
//! copy; after a few restarts the rest is copied in one step, which reads
//! one snapshot from start to end. The copy is written beside the target
//! under a temporary name, switched out of WAL mode so that it is one
//! self-contained file, checked with `PRAGMA integrity_check`, flushed to
//! disk, and only then given its name. An existing target is kept unless
//! the caller forces it.
//!
//! Owns no state and never writes to the live database.

use rusqlite::backup::{Backup, StepResult};
use rusqlite::{Connection, OpenFlags};
use std::path::{Path, PathBuf};
use std::time::{Duration, Instant};

/// How the copy proceeds. [`Options::default`] suits a live daemon.
#[derive(Debug, Clone)]
pub struct Options {
    /// Pages copied per step (256 pages of 4 KiB: 1 MiB per step).
    pub pages_per_step: i32,
    /// Pause between steps, so the daemon's commits go ahead.
    pub pause: Duration,
    /// Restarts (the daemon committed between steps) tolerated before the
    /// rest is copied in one step.
    pub max_restarts: u32,
    /// How long to wait in total while the source is busy or locked.
    pub busy_limit: Duration,
}

impl Default for Options {
    fn default() -> Self {
        Self {
            pages_per_step: 256,
            pause: Duration::from_millis(5),
            max_restarts: 3,
            busy_limit: Duration::from_secs(30),
        }
    }
}

/// What a finished backup holds.
#[derive(Debug, Clone, PartialEq)]
pub struct Report {
    pub path: PathBuf,
    /// `PRAGMA user_version` of the copy: the migrations it has.
    pub schema_version: i64,
    pub pages: i64,
    pub page_size: i64,
    /// Rows per table, by table name.
    pub tables: Vec<(String, u64)>,
    /// Times SQLite restarted the copy because the daemon committed.
    pub restarts: u32,
    pub took: Duration,
}

#[derive(Debug, thiserror::Error)]
pub enum BackupError {
    #[error("no outrider store at {0}")]
    NoStore(PathBuf),
    #[error("{0} already exists; give another path, or --force to replace it")]
    Exists(PathBuf),
    #[error("{0} is a directory; give the path of the backup file")]
    IsDirectory(PathBuf),
    #[error("{0} is the live database itself; give another path")]
    SameFile(PathBuf),
    #[error("the source stayed busy for {0:?}; try again")]
    Busy(Duration),
    #[error("the copy failed its integrity check: {0}")]
    Integrity(String),
    #[error("database: {0}")]
    Sqlite(#[from] rusqlite::Error),
    #[error("{path}: {source}")]
    Io {
        path: PathBuf,
        source: std::io::Error,
    },
}

fn io(path: &Path) -> impl FnOnce(std::io::Error) -> BackupError + '_ {
    move |source| BackupError::Io {
        path: path.to_path_buf(),
        source,
    }
}

/// Copies the store in `state_dir` to `to`. Refuses to replace an existing
/// `to` unless `force`.
pub fn run(
    state_dir: &Path,
    to: &Path,
    force: bool,
    opts: &Options,
) -> Result<Report, BackupError> {
    let started = Instant::now();
    let source = crate::store::db_path(state_dir);
    if !source.is_file() {
        return Err(BackupError::NoStore(source));
    }
    if to.is_dir() {
        return Err(BackupError::IsDirectory(to.to_path_buf()));
    }
    if let (Ok(a), Ok(b)) = (source.canonicalize(), to.canonicalize()) {
        if a == b {
            return Err(BackupError::SameFile(to.to_path_buf()));
        }
    }
    if to.exists() && !force {
        return Err(BackupError::Exists(to.to_path_buf()));
    }
    let name = to
        .file_name()
        .map(|n| n.to_string_lossy().into_owned())
        .unwrap_or_else(|| "outrider-backup.db".into());
    let partial = to.with_file_name(format!(".{name}.partial-{}", std::process::id()));
    remove_copy(&partial);

    let result = copy_and_check(&source, &partial, opts).and_then(|report| {
        sync_file(&partial)?;
        put_in_place(&partial, to, force)?;
        Ok(Report {
            path: to.to_path_buf(),
            took: started.elapsed(),
            ..report
        })
    });
    if result.is_err() {
        remove_copy(&partial);
    }
    result
}

/// The copy with its journal files, if any.
fn remove_copy(path: &Path) {
    for suffix in ["", "-journal", "-wal", "-shm"] {
        let mut p = path.as_os_str().to_owned();
        p.push(suffix);
        let _ = std::fs::remove_file(PathBuf::from(p));
    }
}

fn copy_and_check(source: &Path, partial: &Path, opts: &Options) -> Result<Report, BackupError> {
    let src = Connection::open_with_flags(
        source,
        OpenFlags::SQLITE_OPEN_READ_ONLY | OpenFlags::SQLITE_OPEN_NO_MUTEX,
    )?;
    src.busy_timeout(Duration::from_secs(5))?;
    // The copy holds what the live database holds: readable by its owner only.
    create_private(partial)?;
    let mut dst = Connection::open(partial)?;
    let restarts = {
        let backup = Backup::new(&src, &mut dst)?;
        copy_pages(&backup, opts)?
    };
    drop(dst);
    drop(src);

    // The pages carry the live database's WAL flag; make the copy one
    // self-contained file (no -wal beside it) that opens read-only anywhere.
    let dst = Connection::open(partial)?;
    let mode: String = dst.query_row("PRAGMA journal_mode = DELETE", [], |r| r.get(0))?;
    if !mode.eq_ignore_ascii_case("delete") {
        return Err(BackupError::Integrity(format!(
            "could not leave WAL mode (journal_mode is {mode})"
        )));
    }
    let problems = integrity_check(&dst)?;
    if !(problems.len() == 1 && problems[0] == "ok") {
        return Err(BackupError::Integrity(problems.join("; ")));
    }
    let report = Report {
        path: partial.to_path_buf(),
        schema_version: dst.query_row("PRAGMA user_version", [], |r| r.get(0))?,
        pages: dst.query_row("PRAGMA page_count", [], |r| r.get(0))?,
        page_size: dst.query_row("PRAGMA page_size", [], |r| r.get(0))?,
        tables: row_counts(&dst)?,
        restarts,
        took: Duration::ZERO,
    };
    dst.close().map_err(|(_, e)| e)?;
    Ok(report)
}

fn create_private(path: &Path) -> Result<(), BackupError> {
    let mut o = std::fs::OpenOptions::new();
    o.write(true).create_new(true);
    #[cfg(unix)]
    std::os::unix::fs::OpenOptionsExt::mode(&mut o, 0o600);
    o.open(path).map(drop).map_err(io(path))
}

/// Steps through the copy; returns how often SQLite restarted it.
fn copy_pages(backup: &Backup<'_, '_>, opts: &Options) -> Result<u32, BackupError> {
    let mut restarts = 0;
    let mut last_remaining = i32::MAX;
    let mut busy_since: Option<Instant> = None;
    loop {
        let pages = if restarts >= opts.max_restarts {
            -1
        } else {
            opts.pages_per_step
        };
        match backup.step(pages)? {
            StepResult::Done => return Ok(restarts),
            StepResult::More => {
                busy_since = None;
                let remaining = backup.progress().remaining;
                if remaining > last_remaining {
                    restarts += 1;
                    tracing::debug!(restarts, "Backup restarted: the database changed");
                }
                last_remaining = remaining;
            }
            StepResult::Busy | StepResult::Locked => {
                let since = *busy_since.get_or_insert_with(Instant::now);
                if since.elapsed() > opts.busy_limit {
                    return Err(BackupError::Busy(opts.busy_limit));
                }
            }
            // StepResult is non-exhaustive; treat anything new as "try again".
            _ => {}
        }
        std::thread::sleep(opts.pause);
    }
}

/// `PRAGMA integrity_check`: the single row "ok", or the problems found.
pub fn integrity_check(conn: &Connection) -> rusqlite::Result<Vec<String>> {
    let mut stmt = conn.prepare("PRAGMA integrity_check")?;
    let rows = stmt.query_map([], |r| r.get::<_, String>(0))?;
    rows.collect()
}

/// Rows in every table of the database, by table name.
pub fn row_counts(conn: &Connection) -> rusqlite::Result<Vec<(String, u64)>> {
    let names: Vec<String> = {
        let mut stmt = conn.prepare(
            "SELECT name FROM sqlite_schema WHERE type = 'table' AND name NOT LIKE 'sqlite_%' ORDER BY name",
        )?;
        let rows = stmt.query_map([], |r| r.get::<_, String>(0))?;
        rows.collect::<rusqlite::Result<_>>()?
    };
    names
        .into_iter()
        .map(|name| {
            let quoted = format!("\"{}\"", name.replace('"', "\"\""));
            let n: i64 =
                conn.query_row(&format!("SELECT count(*) FROM {quoted}"), [], |r| r.get(0))?;
            Ok((name, n.max(0) as u64))
        })
        .collect()
}

fn sync_file(path: &Path) -> Result<(), BackupError> {
    std::fs::File::open(path)
        .and_then(|f| f.sync_all())
        .map_err(io(path))
}

/// Gives the checked copy its name. Without `force` a hard link does it, so
/// a file that appeared at `to` meanwhile is not replaced either.
fn put_in_place(partial: &Path, to: &Path, force: bool) -> Result<(), BackupError> {
    if force {
        std::fs::rename(partial, to).map_err(io(to))?;
    } else {
        match std::fs::hard_link(partial, to) {
            Ok(()) => std::fs::remove_file(partial).map_err(io(partial))?,
            Err(e) if e.kind() == std::io::ErrorKind::AlreadyExists => {
                return Err(BackupError::Exists(to.to_path_buf()))
            }
            // A file system without hard links: check, then rename.
            Err(_) if to.exists() => return Err(BackupError::Exists(to.to_path_buf())),
            Err(_) => std::fs::rename(partial, to).map_err(io(to))?,
        }
    }
    // The new name is on disk too.
    if let Some(dir) = to.parent().filter(|d| !d.as_os_str().is_empty()) {
        if let Ok(d) = std::fs::File::open(dir) {
            let _ = d.sync_all();
        }
    }
    Ok(())
}

/// Plain text for people: where, how big, checked, and the rows per table.
pub fn render_text(r: &Report) -> String {
    let mut out = format!(
        "backup written to {}\nschema version {}, {} pages of {} bytes, integrity ok, {:.2} s, {} restart(s)\n\n{:<24}{:>12}\n",
        r.path.display(),
        r.schema_version,
        r.pages,
        r.page_size,
        r.took.as_secs_f64(),
        r.restarts,
        "table",
        "rows"
    );
    for (name, n) in &r.tables {
        out.push_str(&format!("{name:<24}{n:>12}\n"));
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    fn store_with_rows(dir: &Path, n: usize) {
        let conn = Connection::open(crate::store::db_path(dir)).unwrap();
        conn.pragma_update(None, "journal_mode", "WAL").unwrap();
        conn.execute_batch("CREATE TABLE t (id INTEGER PRIMARY KEY, v TEXT)")
            .unwrap();
        for i in 0..n {
            conn.execute("INSERT INTO t (v) VALUES (?1)", [format!("row {i}")])
                .unwrap();
        }
    }

    #[test]
    fn copies_checks_and_counts() {
        let dir = tempfile::tempdir().unwrap();
        store_with_rows(dir.path(), 1000);
        let to = dir.path().join("copy.db");
        let opts = Options {
            pages_per_step: 1,
            ..Options::default()
        };
        let r = run(dir.path(), &to, false, &opts).unwrap();
        assert_eq!(r.tables, vec![("t".to_string(), 1000)]);
        // The copy is one file, not in WAL mode: byte 18 of the header is 1
        // for a rollback journal, 2 for WAL (sqlite.org/fileformat.html 1.3.4).
        let header = std::fs::read(&to).unwrap();
        assert_eq!(header[18], 1);
        assert!(!dir.path().join("copy.db-wal").exists());
        let names: Vec<_> = std::fs::read_dir(dir.path())
            .unwrap()
            .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
            .filter(|n| n.contains("partial"))
            .collect();
        assert!(names.is_empty(), "left behind: {names:?}");
    }

    /// Another connection commits throughout the copy: SQLite restarts the
    /// copy, the last attempt reads one snapshot, and the copy holds exactly
    /// the first rows committed, with no gap.
    #[test]
    fn a_concurrent_writer_gives_a_consistent_prefix() {
        let dir = tempfile::tempdir().unwrap();
        store_with_rows(dir.path(), 2000);
        let stop = std::sync::Arc::new(std::sync::atomic::AtomicBool::new(false));
        let started = std::sync::Arc::new(std::sync::atomic::AtomicBool::new(false));
        let writer = {
            let (path, stop, started) = (
                crate::store::db_path(dir.path()),
                stop.clone(),
                started.clone(),
            );
            std::thread::spawn(move || {
                let conn = Connection::open(path).unwrap();
                let mut n = 0;
                while !stop.load(std::sync::atomic::Ordering::Relaxed) {
                    conn.execute("INSERT INTO t (v) VALUES ('more')", [])
                        .unwrap();
                    n += 1;
                    started.store(true, std::sync::atomic::Ordering::Relaxed);
                }
                n
            })
        };
        // On a loaded machine the writer thread may not have run yet: the
        // copy must start while it is writing, or there is nothing to test.
        while !started.load(std::sync::atomic::Ordering::Relaxed) {
            std::thread::yield_now();
        }
        let to = dir.path().join("copy.db");
        let opts = Options {
            pages_per_step: 1,
            ..Options::default()
        };
        let r = run(dir.path(), &to, false, &opts).unwrap();
        stop.store(true, std::sync::atomic::Ordering::Relaxed);
        let written = writer.join().unwrap();
        assert!(r.restarts >= 1, "the writer committed between steps");
        let copy = Connection::open(&to).unwrap();
        let (count, max): (i64, i64) = copy
            .query_row("SELECT count(*), max(id) FROM t", [], |r| {
                Ok((r.get(0)?, r.get(1)?))
            })
            .unwrap();
        assert_eq!(count, max, "no gap");
        assert!((2000..=2000 + written).contains(&count), "{count}");
        assert_eq!(r.tables, vec![("t".to_string(), count as u64)]);
    }

    #[test]
    fn refuses_to_replace_unless_forced() {
        let dir = tempfile::tempdir().unwrap();
        store_with_rows(dir.path(), 3);
        let to = dir.path().join("copy.db");
        std::fs::write(&to, b"keep me").unwrap();
        let err = run(dir.path(), &to, false, &Options::default()).unwrap_err();
        assert!(matches!(err, BackupError::Exists(_)), "{err}");
        assert_eq!(std::fs::read(&to).unwrap(), b"keep me");
        run(dir.path(), &to, true, &Options::default()).unwrap();
        assert_ne!(std::fs::read(&to).unwrap(), b"keep me");
        let live = crate::store::db_path(dir.path());
        let err = run(dir.path(), &live, true, &Options::default()).unwrap_err();
        assert!(matches!(err, BackupError::SameFile(_)), "{err}");
    }

    /// Reading a WAL database no one has open makes SQLite create its -wal
    /// and -shm files. Run as root against a stopped daemon, they must still
    /// belong to the database's owner, or the daemon could not open them:
    /// SQLite's unix VFS does that itself (it chowns journal files to the
    /// database's owner when running as root). Needs root to set up; as
    /// another user it checks only that the copy is private.
    #[test]
    fn journal_files_stay_with_the_owner_and_the_copy_is_private() {
        use std::os::unix::fs::{MetadataExt, PermissionsExt};
        let dir = tempfile::tempdir().unwrap();
        store_with_rows(dir.path(), 3);
        let db = crate::store::db_path(dir.path());
        let root = std::fs::metadata("/proc/self").unwrap().uid() == 0;
        if root {
            // nobody:nogroup on Debian.
            std::os::unix::fs::chown(&db, Some(65534), Some(65534)).unwrap();
        }
        let to = dir.path().join("copy.db");
        run(dir.path(), &to, false, &Options::default()).unwrap();
        let mode = std::fs::metadata(&to).unwrap().permissions().mode();
        assert_eq!(mode & 0o777, 0o600);
        if root {
            let mut seen = 0;
            for suffix in ["-wal", "-shm"] {
                let p = dir
                    .path()
                    .join(format!("{}{suffix}", crate::store::DB_FILE));
                if let Ok(m) = std::fs::metadata(&p) {
                    assert_eq!((m.uid(), m.gid()), (65534, 65534), "{}", p.display());
                    seen += 1;
                }
            }
            let names: Vec<_> = std::fs::read_dir(dir.path())
                .unwrap()
                .map(|e| e.unwrap().file_name())
                .collect();
            // The bundled SQLite makes them when it reads a closed WAL database.
            assert!(seen > 0, "no journal file to check: {names:?}");
        }
    }

    #[test]
    fn no_store_is_an_error() {
        let dir = tempfile::tempdir().unwrap();
        let err = run(
            dir.path(),
            &dir.path().join("x.db"),
            false,
            &Options::default(),
        )
        .unwrap_err();
        assert!(matches!(err, BackupError::NoStore(_)), "{err}");
    }
}
