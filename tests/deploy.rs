//! Deployment: the systemd unit, user and directories (checked by systemd's
//! own tools: systemd-analyze, systemd-sysusers, systemd-tmpfiles, Debian
//! package `systemd`), `outrider backup` taken while the daemon stores
//! messages (checked by SQLite's `PRAGMA integrity_check` and
//! `foreign_key_check` on the copy), and upgrades of the database schema
//! (through the real binary, `outrider run` and `outrider status`).

use crate::util::*;
use chrono::{DateTime, Duration as ChronoDuration, Utc};
use outrider::clock::{Clock, SystemClock};
use outrider::store::sqlite::MIGRATIONS;
use std::os::unix::fs::MetadataExt;
use std::path::{Path, PathBuf};
use std::process::{Command, Output};
use std::time::Duration;

fn systemd_tool(name: &str) -> PathBuf {
    for dir in ["/usr/bin", "/bin", "/usr/sbin", "/sbin"] {
        let p = Path::new(dir).join(name);
        if p.exists() {
            return p;
        }
    }
    panic!("{name} is not installed: run tests/run-all.sh (Debian package `systemd`)");
}

fn text(out: &Output) -> (String, String) {
    (
        String::from_utf8_lossy(&out.stdout).into_owned(),
        String::from_utf8_lossy(&out.stderr).into_owned(),
    )
}

/// deploy/outrider.service with ExecStart pointed at the binary under test
/// (`systemd-analyze verify` checks that the program exists), as
/// `dir/outrider.service` (verify takes the unit name from the file name).
fn unit_copy(dir: &Path) -> PathBuf {
    let unit = std::fs::read_to_string(repo().join("deploy/outrider.service")).unwrap();
    let exec = "ExecStart=/usr/local/bin/outrider run -c /etc/outrider/outrider.toml";
    assert_eq!(
        unit.lines().filter(|l| *l == exec).count(),
        1,
        "the unit runs `{exec}` exactly once"
    );
    let copy = unit.replace(
        "ExecStart=/usr/local/bin/outrider",
        &format!("ExecStart={BIN}"),
    );
    let path = dir.join("outrider.service");
    std::fs::write(&path, copy).unwrap();
    path
}

/// Checked against systemd-analyze (systemd 252 in Debian 12): the unit
/// parses, every key is known, the binary exists; no warning names the unit.
#[test]
fn unit_passes_systemd_analyze_verify() {
    let dir = tempfile::tempdir().unwrap();
    let unit = unit_copy(dir.path());
    let out = Command::new(systemd_tool("systemd-analyze"))
        .arg("verify")
        .arg(&unit)
        .output()
        .unwrap();
    let (stdout, stderr) = text(&out);
    assert!(
        out.status.success(),
        "systemd-analyze verify failed:\n{stdout}{stderr}"
    );
    let about_unit: Vec<&str> = stdout
        .lines()
        .chain(stderr.lines())
        .filter(|l| l.contains("outrider.service"))
        .collect();
    assert!(
        about_unit.is_empty(),
        "systemd-analyze verify warned about the unit:\n{}",
        about_unit.join("\n")
    );
}

/// Checked against `systemd-analyze security --offline=true`: the overall
/// exposure (0 = fully confined, 10 = not at all) stays at or below 2.0;
/// docs/operations.md records the measured value.
#[test]
fn unit_exposure_stays_low() {
    let dir = tempfile::tempdir().unwrap();
    let unit = unit_copy(dir.path());
    // --threshold is on systemd's internal 0..100 scale: 20 = 2.0.
    let out = Command::new(systemd_tool("systemd-analyze"))
        .args(["security", "--offline=true", "--threshold=20", "--no-pager"])
        .arg(&unit)
        .output()
        .unwrap();
    let (stdout, stderr) = text(&out);
    let line = stdout
        .lines()
        .chain(stderr.lines())
        .find(|l| l.contains("Overall exposure level for outrider.service"))
        .unwrap_or_else(|| panic!("no exposure level in:\n{stdout}{stderr}"));
    let score: f64 = line
        .split(':')
        .nth(1)
        .and_then(|s| s.split_whitespace().next())
        .and_then(|s| s.parse().ok())
        .unwrap_or_else(|| panic!("cannot read the score in {line:?}"));
    eprintln!("{line}");
    assert!(score <= 2.0, "{line}");
    assert!(
        out.status.success(),
        "over the threshold:\n{stdout}{stderr}"
    );
}

/// The effective user id (the owner of /proc/self).
fn euid() -> u32 {
    std::fs::metadata("/proc/self").unwrap().uid()
}

/// Checked against systemd-sysusers and systemd-tmpfiles run on a scratch
/// root: the user is a system user with no login, and /etc/outrider and the
/// secrets file get the owners and modes the unit and docs/operations.md
/// rely on.
#[test]
fn sysusers_and_tmpfiles_make_user_and_directories() {
    let root = tempfile::tempdir().unwrap();
    std::fs::create_dir_all(root.path().join("etc")).unwrap();
    let out = Command::new(systemd_tool("systemd-sysusers"))
        .arg(format!("--root={}", root.path().display()))
        .arg(repo().join("deploy/outrider.sysusers"))
        .output()
        .unwrap();
    let (stdout, stderr) = text(&out);
    assert!(out.status.success(), "systemd-sysusers:\n{stdout}{stderr}");
    let passwd = std::fs::read_to_string(root.path().join("etc/passwd")).unwrap();
    let user: Vec<&str> = passwd
        .lines()
        .find(|l| l.starts_with("outrider:"))
        .unwrap_or_else(|| panic!("no outrider user in\n{passwd}"))
        .split(':')
        .collect();
    let uid: u32 = user[2].parse().unwrap();
    let gid: u32 = user[3].parse().unwrap();
    assert!(uid > 0 && uid < 1000, "a system user: {user:?}");
    assert_eq!(user[5], "/var/lib/outrider", "{user:?}");
    assert_eq!(user[6], "/usr/sbin/nologin", "{user:?}");
    let group = std::fs::read_to_string(root.path().join("etc/group")).unwrap();
    assert!(
        group
            .lines()
            .any(|l| l.starts_with(&format!("outrider:x:{gid}:"))),
        "{group}"
    );

    if euid() != 0 {
        eprintln!("not root: systemd-tmpfiles cannot set owners; checked the user only");
        return;
    }
    let out = Command::new(systemd_tool("systemd-tmpfiles"))
        .arg(format!("--root={}", root.path().display()))
        .arg("--create")
        .arg(repo().join("deploy/outrider.tmpfiles"))
        .output()
        .unwrap();
    let (stdout, stderr) = text(&out);
    assert!(out.status.success(), "systemd-tmpfiles:\n{stdout}{stderr}");
    let etc = std::fs::metadata(root.path().join("etc/outrider")).unwrap();
    assert_eq!(etc.mode() & 0o7777, 0o750);
    assert_eq!((etc.uid(), etc.gid()), (0, gid), "root:outrider");
    let secrets = std::fs::metadata(root.path().join("etc/outrider/secrets.env")).unwrap();
    assert_eq!(secrets.mode() & 0o7777, 0o600);
    assert_eq!((secrets.uid(), secrets.gid()), (0, 0), "root:root");
}

fn ts(t: DateTime<Utc>) -> String {
    t.with_timezone(&chrono_tz::Australia::Sydney).to_rfc3339()
}

fn observations(n: usize, base: DateTime<Utc>) -> Vec<Msg> {
    (0..n)
        .map(|i| {
            let dep = format!("KB-0{}", 1 + i % 4);
            let payload = serde_json::json!({"observationID": format!("bk-{i}"), "deploymentID": dep, "eventStart": ts(base + ChronoDuration::seconds(i as i64)), "observationType": "animal", "scientificName": "Vulpes vulpes", "count": 1, "classificationProbability": 0.9});
            Msg {
                topic: format!("outrider/{dep}/observation"),
                payload: payload.to_string().into_bytes(),
            }
        })
        .collect()
}

fn backup(config: &Path, to: &Path, force: bool) -> Output {
    let mut cmd = Command::new(BIN);
    // One page per step: many steps, so the daemon commits between them.
    cmd.args(["backup", "--pages-per-step", "1", "-c"])
        .arg(config)
        .arg("--to")
        .arg(to);
    if force {
        cmd.arg("--force");
    }
    cmd.output().unwrap()
}

/// The row counts `outrider backup` printed, by table.
fn reported_rows(stdout: &str) -> Vec<(String, u64)> {
    stdout
        .lines()
        .skip_while(|l| !l.starts_with("table"))
        .skip(1)
        .filter_map(|l| {
            let mut w = l.split_whitespace();
            Some((w.next()?.to_string(), w.next()?.parse().ok()?))
        })
        .collect()
}

/// (rowid, observationID) in insertion order.
fn observation_rows(db: &rusqlite::Connection) -> Vec<(i64, String)> {
    let mut stmt = db
        .prepare("SELECT rowid, observation_id FROM observations ORDER BY rowid")
        .unwrap();
    let rows = stmt
        .query_map([], |r| Ok((r.get(0)?, r.get(1)?)))
        .unwrap()
        .map(|r| r.unwrap())
        .collect();
    rows
}

/// A backup taken while the daemon stores a burst from Mosquitto is a
/// sound database (SQLite's integrity_check and foreign_key_check) holding
/// exactly the first N observations the daemon committed, N between the
/// counts just before and just after the backup.
#[test]
fn backup_while_storing_is_a_consistent_prefix() {
    const TOTAL: usize = 6000;
    let dir = tempfile::tempdir().unwrap();
    let mosquitto = Mosquitto::start(dir.path());
    let port = mosquitto.port;
    let cfg = write_config(dir.path(), port, false, "");
    let mut daemon = Daemon::start(&cfg);
    let corpus = dir.path().join("corpus.jsonl");
    write_corpus(
        &corpus,
        &observations(TOTAL, SystemClock.now() - ChronoDuration::hours(3)),
    );
    let publisher = {
        let corpus = corpus.clone();
        std::thread::spawn(move || publish_corpus(port, &corpus, 0, "backuppublisher"))
    };
    wait_for(
        Duration::from_secs(60),
        "the first 1000 observations",
        || (n(&status(&cfg), "observations_stored") >= 1000).then_some(()),
    );

    let to = dir.path().join("backups/outrider-1.db");
    std::fs::create_dir_all(to.parent().unwrap()).unwrap();
    let before = n(&status(&cfg), "observations_stored");
    let out = backup(&cfg, &to, false);
    let after = n(&status(&cfg), "observations_stored");
    let (stdout, stderr) = text(&out);
    assert!(out.status.success(), "backup failed: {stderr}");
    eprintln!("{stdout}");
    assert!(
        (before as usize) < TOTAL,
        "the burst was still being stored when the backup began ({before} of {TOTAL})"
    );

    let copy =
        rusqlite::Connection::open_with_flags(&to, rusqlite::OpenFlags::SQLITE_OPEN_READ_ONLY)
            .unwrap();
    // SQLite's own checks of the file's structure and of its references.
    let check: Vec<String> = copy
        .prepare("PRAGMA integrity_check")
        .unwrap()
        .query_map([], |r| r.get(0))
        .unwrap()
        .map(|r| r.unwrap())
        .collect();
    assert_eq!(check, vec!["ok".to_string()]);
    let dangling: i64 = copy
        .query_row("SELECT count(*) FROM pragma_foreign_key_check", [], |r| {
            r.get(0)
        })
        .unwrap();
    assert_eq!(dangling, 0);
    let held = observation_rows(&copy);
    let b = held.len() as u64;
    assert!(
        before <= b && b <= after,
        "backup holds {b} observations; {before} before and {after} after"
    );
    // What the backup says it holds is what it holds.
    // The daemon committed between the backup's steps, so SQLite restarted
    // the copy at least once: the backup ran against a live writer.
    let restarts: u32 = stdout
        .split_whitespace()
        .zip(stdout.split_whitespace().skip(1))
        .find(|(_, w)| *w == "restart(s)")
        .and_then(|(v, _)| v.parse().ok())
        .unwrap_or_else(|| panic!("no restart count in {stdout}"));
    assert!(restarts >= 1, "no commit during the backup: {stdout}");
    let rows = reported_rows(&stdout);
    assert!(
        rows.contains(&("observations".to_string(), b)),
        "reported {rows:?}, counted {b}"
    );

    let result = publisher.join().unwrap();
    assert_eq!(result["published"].as_u64(), Some(TOTAL as u64));
    wait_for(Duration::from_secs(90), "every observation stored", || {
        (n(&status(&cfg), "observations_stored") == TOTAL as u64).then_some(())
    });
    let (exit, _) = daemon.stop();
    assert!(exit.success(), "exit status {exit:?}");

    // A prefix: the first b rows the daemon committed, in order, no gaps.
    let live = rusqlite::Connection::open(dir.path().join("state").join(outrider::store::DB_FILE))
        .unwrap();
    let all = observation_rows(&live);
    assert_eq!(all.len(), TOTAL);
    assert_eq!(held[..], all[..held.len()], "the backup is a prefix");

    // An existing backup is kept unless --force.
    let kept = std::fs::read(&to).unwrap();
    let out = backup(&cfg, &to, false);
    let (_, stderr) = text(&out);
    assert_eq!(out.status.code(), Some(2), "{stderr}");
    assert!(
        stderr.contains("already exists") && stderr.contains("--force"),
        "{stderr}"
    );
    assert_eq!(
        std::fs::read(&to).unwrap(),
        kept,
        "the old backup is untouched"
    );
    // --state-dir instead of -c: no config (and so no secrets) needed.
    let out = Command::new(BIN)
        .args(["backup", "--force", "--state-dir"])
        .arg(dir.path().join("state"))
        .arg("--to")
        .arg(&to)
        .output()
        .unwrap();
    let (stdout, stderr) = text(&out);
    assert!(out.status.success(), "backup --force failed: {stderr}");
    assert!(
        reported_rows(&stdout).contains(&("observations".to_string(), TOTAL as u64)),
        "{stdout}"
    );
    let copy = rusqlite::Connection::open(&to).unwrap();
    assert_eq!(observation_rows(&copy), all);
    drop(copy);

    // Restore as docs/operations.md says: the backup becomes outrider.db in
    // an empty state directory; the daemon starts on it, back in WAL mode,
    // and `outrider status` counts everything.
    let restored = dir.path().join("restored");
    std::fs::create_dir_all(restored.join("state")).unwrap();
    std::fs::copy(&to, restored.join("state").join(outrider::store::DB_FILE)).unwrap();
    let cfg2 = write_config(&restored, free_port(), true, "");
    let mut daemon = Daemon::start(&cfg2);
    assert_eq!(n(&status(&cfg2), "observations_stored"), TOTAL as u64);
    let (exit, _) = daemon.stop();
    assert!(exit.success(), "exit status {exit:?}");
    let db =
        rusqlite::Connection::open(restored.join("state").join(outrider::store::DB_FILE)).unwrap();
    let mode: String = db
        .query_row("PRAGMA journal_mode", [], |r| r.get(0))
        .unwrap();
    assert_eq!(mode, "wal");
    assert_eq!(observation_rows(&db), all);
}

/// A database at schema version 1 (only MIGRATIONS[0] applied), as an older
/// outrider left it, with rows in each table.
fn version_1_store(state_dir: &Path, user_version: i64) {
    std::fs::create_dir_all(state_dir).unwrap();
    let db = rusqlite::Connection::open(state_dir.join(outrider::store::DB_FILE)).unwrap();
    db.pragma_update(None, "journal_mode", "WAL").unwrap();
    db.execute_batch(MIGRATIONS[0].1).unwrap();
    db.execute_batch(
        "INSERT INTO observations (observation_id, deployment_id, event_start, observation_type, scientific_name, count, classification_probability, received_at) VALUES
           ('v1-a', 'KB-01', 1780000000000, 'animal', 'Canis familiaris', 1, 0.93, 1780000001000),
           ('v1-b', 'KB-02', 1780000100000, 'animal', 'Sus scrofa', 4, 0.88, 1780000101000),
           ('v1-c', 'KB-03', 1780000200000, 'blank', NULL, 1, NULL, 1780000201000);
         INSERT INTO heartbeats (deployment_id, timestamp, battery_percent, received_at) VALUES
           ('KB-01', 1780000000000, 81.0, 1780000000500),
           ('KB-02', 1780000000000, 64.0, 1780000000600);
         INSERT INTO corrections (observation_id, deployment_id, scientific_name, received_at, content_key) VALUES
           ('v1-b', 'KB-02', 'Dama dama', 1780000300000, 'v1-b/Dama dama');
         INSERT INTO rejected (received_at, topic, reason, detail, payload, payload_bytes) VALUES
           (1780000400000, 'outrider/KB-01/observation', 'invalid-json', 'expected value at line 1 column 1', X'7b', 1);
         INSERT INTO counters (name, value) VALUES ('duplicates_ignored', 4);",
    )
    .unwrap();
    db.pragma_update(None, "user_version", user_version)
        .unwrap();
}

fn user_version(state_dir: &Path) -> i64 {
    rusqlite::Connection::open(state_dir.join(outrider::store::DB_FILE))
        .unwrap()
        .query_row("PRAGMA user_version", [], |r| r.get(0))
        .unwrap()
}

/// The current binary opens a version-1 database, applies the later
/// migrations at start (one log line each) and keeps every row: the real
/// `outrider run`, then `outrider status` and the rows themselves.
#[test]
fn version_1_database_migrates_forward_keeping_rows() {
    let dir = tempfile::tempdir().unwrap();
    let state = dir.path().join("state");
    version_1_store(&state, 1);
    let cfg = write_config(dir.path(), free_port(), true, "");
    let mut daemon = Daemon::start(&cfg);
    let (exit, _) = daemon.stop();
    assert!(exit.success(), "exit status {exit:?}");
    let applied = daemon
        .log_text()
        .matches("Applied database migration")
        .count();
    assert_eq!(applied, MIGRATIONS.len() - 1, "{}", daemon.log_text());
    assert_eq!(user_version(&state), MIGRATIONS.len() as i64);

    let s = status(&cfg);
    assert_eq!(n(&s, "observations_stored"), 3, "{s}");
    assert_eq!(n(&s, "heartbeats_stored"), 2, "{s}");
    assert_eq!(n(&s, "corrections_stored"), 1, "{s}");
    assert_eq!(n(&s, "duplicates_ignored"), 4, "{s}");
    assert_eq!(s["rejected"], serde_json::json!({"invalid-json": 1}), "{s}");
    let db = rusqlite::Connection::open(state.join(outrider::store::DB_FILE)).unwrap();
    let kept: Vec<(String, Option<String>, i64)> = db
        .prepare("SELECT observation_id, scientific_name, count FROM observations ORDER BY observation_id")
        .unwrap()
        .query_map([], |r| Ok((r.get(0)?, r.get(1)?, r.get(2)?)))
        .unwrap()
        .map(|r| r.unwrap())
        .collect();
    assert_eq!(
        kept,
        vec![
            ("v1-a".into(), Some("Canis familiaris".into()), 1),
            ("v1-b".into(), Some("Sus scrofa".into()), 4),
            ("v1-c".into(), None, 1),
        ]
    );
}

/// A database from a newer outrider (user_version above what this binary
/// knows) is refused with a clear message and exit code 2, by `status` and
/// by `run`, and is left as it was.
#[test]
fn newer_database_is_refused() {
    let dir = tempfile::tempdir().unwrap();
    let state = dir.path().join("state");
    let newer = MIGRATIONS.len() as i64 + 1;
    version_1_store(&state, newer);
    // No broker at this port: the store is opened before the broker is tried.
    let cfg = write_config(dir.path(), free_port(), false, "");
    let want = format!(
        "database schema version {newer} is newer than this outrider knows ({}); upgrade outrider",
        MIGRATIONS.len()
    );

    let out = Command::new(BIN)
        .args(["status", "--json", "-c"])
        .arg(&cfg)
        .output()
        .unwrap();
    let (_, stderr) = text(&out);
    assert_eq!(out.status.code(), Some(2), "{stderr}");
    assert!(stderr.contains(&want), "{stderr}");

    let mut child = Command::new(BIN)
        .args(["run", "-c"])
        .arg(&cfg)
        .stdout(std::process::Stdio::null())
        .stderr(std::process::Stdio::piped())
        .spawn()
        .unwrap();
    let status = wait_for(Duration::from_secs(20), "outrider run to refuse", || {
        child.try_wait().unwrap()
    });
    let mut stderr = String::new();
    std::io::Read::read_to_string(child.stderr.as_mut().unwrap(), &mut stderr).unwrap();
    assert_eq!(status.code(), Some(2), "{stderr}");
    assert!(stderr.contains(&want), "{stderr}");

    assert_eq!(user_version(&state), newer, "left as it was");
    let db = rusqlite::Connection::open(state.join(outrider::store::DB_FILE)).unwrap();
    let rows: i64 = db
        .query_row("SELECT count(*) FROM observations", [], |r| r.get(0))
        .unwrap();
    assert_eq!(rows, 3);
}
