//! The test harness: a real outrider process, a real Mosquitto, an
//! independent MQTT client (Python paho-mqtt), all on free loopback ports in
//! a temporary directory. No fixed ports; every wait is bounded.

#![allow(dead_code)]

use std::io::Write;
use std::net::TcpListener;
use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};
use std::time::{Duration, Instant};

pub const BIN: &str = env!("CARGO_BIN_EXE_outrider");

pub fn repo() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
}

/// A free TCP port on loopback.
pub fn free_port() -> u16 {
    TcpListener::bind("127.0.0.1:0")
        .unwrap()
        .local_addr()
        .unwrap()
        .port()
}

/// Waits up to `limit` for `f` to return Some.
pub fn wait_for<T>(limit: Duration, what: &str, mut f: impl FnMut() -> Option<T>) -> T {
    let start = Instant::now();
    loop {
        if let Some(v) = f() {
            return v;
        }
        if start.elapsed() > limit {
            panic!("timed out after {limit:?} waiting for {what}");
        }
        std::thread::sleep(Duration::from_millis(50));
    }
}

/// The Python of the test virtual environment (tests/run-all.sh makes it).
pub fn python() -> PathBuf {
    if let Ok(p) = std::env::var("OUTRIDER_TEST_PYTHON") {
        return p.into();
    }
    let p = repo().join("target/py/bin/python");
    assert!(p.exists(), "no test Python at {}: run tests/run-all.sh once (it makes the virtual environment with paho-mqtt and the reference libraries)", p.display());
    p
}

/// The Mosquitto broker binary (Debian package `mosquitto`).
pub fn mosquitto_bin() -> PathBuf {
    for p in [
        "/usr/sbin/mosquitto",
        "/usr/bin/mosquitto",
        "/usr/local/sbin/mosquitto",
    ] {
        if Path::new(p).exists() {
            return p.into();
        }
    }
    panic!("Mosquitto is not installed: run tests/run-all.sh (apt-get install mosquitto)");
}

/// A Mosquitto broker with persistence on, started for one test.
pub struct Mosquitto {
    pub port: u16,
    pub dir: PathBuf,
    child: Option<Child>,
}

impl Mosquitto {
    /// A broker speaking only TLS (the given certificate and key), with one
    /// user and password, as deploy/mosquitto.conf sets up production.
    pub fn start_tls(dir: &Path, cert: &Path, key: &Path, user: &str, password: &str) -> Self {
        let dir = dir.join("mosquitto-tls");
        std::fs::create_dir_all(&dir).unwrap();
        let pw = dir.join("passwd");
        let ok = Command::new("mosquitto_passwd")
            .args(["-b", "-c"])
            .arg(&pw)
            .args([user, password])
            .status()
            .expect("mosquitto_passwd (Debian package mosquitto)");
        assert!(ok.success());
        let settings = format!(
            "certfile {}\nkeyfile {}\nallow_anonymous false\npassword_file {}\npersistence false\n",
            cert.display(),
            key.display(),
            pw.display()
        );
        Self::launch(dir, &settings)
    }

    /// A plain loopback broker that takes only `user` with `password`.
    pub fn start_with_password(dir: &Path, user: &str, password: &str) -> Self {
        let dir = dir.join("mosquitto-pw");
        std::fs::create_dir_all(&dir).unwrap();
        let pw = dir.join("passwd");
        let ok = Command::new("mosquitto_passwd")
            .args(["-b", "-c"])
            .arg(&pw)
            .args([user, password])
            .status()
            .expect("mosquitto_passwd (Debian package mosquitto)");
        assert!(ok.success());
        let settings = format!(
            "allow_anonymous false\npassword_file {}\npersistence false\n",
            pw.display()
        );
        Self::launch(dir, &settings)
    }

    pub fn start(dir: &Path) -> Self {
        let dir = dir.join("mosquitto");
        // The settings that matter are those of deploy/mosquitto.conf:
        // persistence on, no queue limit (the default of 1000 silently drops
        // QoS 1 messages for an offline subscriber).
        let settings = format!(
            "allow_anonymous true\npersistence true\npersistence_location {}/\nmax_queued_messages 0\nmax_inflight_messages 100\nautosave_on_changes true\nautosave_interval 1\n",
            dir.display()
        );
        Self::launch(dir, &settings)
    }

    /// A broker with the durability settings of deploy/mosquitto.conf (its
    /// section before "Listeners": persistence, autosave, queue and
    /// in-flight limits, message size limit), persistence in `dir`, on a
    /// loopback listener without TLS or passwords.
    pub fn start_deploy(dir: &Path) -> Self {
        let dir = dir.join("mosquitto-deploy");
        std::fs::create_dir_all(&dir).unwrap();
        let text = std::fs::read_to_string(repo().join("deploy/mosquitto.conf")).unwrap();
        let durability = text
            .split("# --- Listeners")
            .next()
            .unwrap()
            .lines()
            .filter(|l| !l.trim_start().starts_with('#') && !l.trim().is_empty())
            .map(|l| {
                if l.starts_with("persistence_location") {
                    format!("persistence_location {}/", dir.display())
                } else {
                    l.to_string()
                }
            })
            .collect::<Vec<_>>();
        assert!(
            durability.iter().any(|l| l == "persistence true"),
            "deploy/mosquitto.conf turns persistence on: {durability:?}"
        );
        let settings = format!("allow_anonymous true\n{}\n", durability.join("\n"));
        Self::launch(dir, &settings)
    }

    /// The settings lines this broker was started with (its mosquitto.conf).
    pub fn conf(&self) -> String {
        std::fs::read_to_string(self.dir.join("mosquitto.conf")).unwrap()
    }

    /// Writes `dir/mosquitto.conf` (a loopback listener on a free port, the
    /// log in `dir`, then `settings`) and starts the broker.
    fn launch(dir: PathBuf, settings: &str) -> Self {
        std::fs::create_dir_all(&dir).unwrap();
        let port = free_port();
        let conf = format!(
            "listener {port} 127.0.0.1\nuser root\nlog_dest file {}/mosquitto.log\n{settings}",
            dir.display()
        );
        std::fs::write(dir.join("mosquitto.conf"), conf).unwrap();
        let mut m = Mosquitto {
            port,
            dir,
            child: None,
        };
        m.spawn();
        m
    }

    fn spawn(&mut self) {
        let child = Command::new(mosquitto_bin())
            .arg("-c")
            .arg(self.dir.join("mosquitto.conf"))
            .stdout(Stdio::null())
            .stderr(Stdio::null())
            .spawn()
            .expect("start mosquitto");
        self.child = Some(child);
        let port = self.port;
        wait_for(Duration::from_secs(10), "mosquitto to listen", || {
            std::net::TcpStream::connect(("127.0.0.1", port)).ok()
        });
    }

    /// Stops the broker (SIGTERM: it saves its persistence file) and starts it again.
    pub fn restart(&mut self) {
        if let Some(mut c) = self.child.take() {
            signal(&c, "TERM");
            let _ = c.wait();
        }
        self.spawn();
    }
}

impl Drop for Mosquitto {
    fn drop(&mut self) {
        if let Some(mut c) = self.child.take() {
            let _ = c.kill();
            let _ = c.wait();
        }
    }
}

pub fn signal(child: &Child, sig: &str) {
    let _ = Command::new("kill")
        .arg(format!("-{sig}"))
        .arg(child.id().to_string())
        .status();
}

/// A few sites of the invented district, with deployments started long ago.
pub const SITES: &str =
    "deploymentID,locationID,locationName,latitude,longitude,deploymentStart,deploymentEnd\n\
KB-01,L01,Ridge Gate,-31.49179,147.97344,2026-01-15T09:00:00+11:00,\n\
KB-02,L02,Dry Creek Crossing,-31.49179,148.05781,2026-01-15T09:00:00+11:00,\n\
KB-03,L03,Bullock Flat,-31.49179,148.14219,2026-01-15T09:00:00+11:00,\n\
KB-04,L04,Tank Paddock,-31.49179,148.22656,2026-01-15T09:00:00+11:00,\n";

/// A configuration for a test, pointing at `mqtt_port`; `embedded` runs the
/// in-process broker on that port.
pub fn write_config(dir: &Path, mqtt_port: u16, embedded: bool, extra: &str) -> PathBuf {
    std::fs::create_dir_all(dir).unwrap();
    std::fs::write(dir.join("sites.csv"), SITES).unwrap();
    let broker = if embedded {
        format!("[broker]\nembedded = true\nlisten = \"127.0.0.1:{mqtt_port}\"\n")
    } else {
        String::new()
    };
    let cfg = format!(
        "[service]\nstate_dir = \"state\"\ntimezone = \"Australia/Sydney\"\nshutdown_timeout_seconds = 5\n\n[mqtt]\nurl = \"mqtt://127.0.0.1:{mqtt_port}\"\nclient_id = \"outridertest\"\nkeep_alive_seconds = 5\n\n{broker}\n[sites]\nfile = \"sites.csv\"\n{extra}"
    );
    let path = dir.join("outrider.toml");
    std::fs::write(&path, cfg).unwrap();
    path
}

/// A running `outrider run`.
pub struct Daemon {
    pub config: PathBuf,
    pub log: PathBuf,
    child: Option<Child>,
    starts: usize,
    env: Vec<(String, String)>,
}

impl Daemon {
    pub fn start(config: &Path) -> Self {
        Self::start_with_env(config, &[])
    }

    /// Starts `outrider run` with extra environment and waits for it to connect.
    pub fn start_with_env(config: &Path, env: &[(&str, &str)]) -> Self {
        let mut d = Self::new(config, env);
        d.spawn();
        d
    }

    /// Starts `outrider run` without waiting for it to connect.
    pub fn start_unconnected(config: &Path, env: &[(&str, &str)]) -> Self {
        let mut d = Self::new(config, env);
        d.launch();
        d
    }

    fn new(config: &Path, env: &[(&str, &str)]) -> Self {
        Daemon {
            config: config.to_path_buf(),
            log: config.with_extension("log"),
            child: None,
            starts: 0,
            env: env
                .iter()
                .map(|(k, v)| (k.to_string(), v.to_string()))
                .collect(),
        }
    }

    fn launch(&mut self) {
        let log = std::fs::OpenOptions::new()
            .create(true)
            .append(true)
            .open(&self.log)
            .unwrap();
        let child = Command::new(BIN)
            .args(["--log-format", "json", "run", "-c"])
            .arg(&self.config)
            .env("RUST_LOG", "info")
            .envs(self.env.iter().map(|(k, v)| (k.as_str(), v.as_str())))
            .stdout(Stdio::null())
            .stderr(log)
            .spawn()
            .expect("start outrider");
        self.child = Some(child);
        self.starts += 1;
    }

    fn spawn(&mut self) {
        self.launch();
        let want = self.starts;
        let log = self.log.clone();
        wait_for(
            Duration::from_secs(30),
            "outrider to connect to the broker",
            || {
                let text = std::fs::read_to_string(&log).unwrap_or_default();
                (text.matches("Connected to the MQTT broker").count() >= want).then_some(())
            },
        );
    }

    /// SIGKILL: no chance to commit or acknowledge anything in hand.
    pub fn kill9(&mut self) {
        if let Some(mut c) = self.child.take() {
            let _ = c.kill();
            let _ = c.wait();
        }
    }

    pub fn restart(&mut self) {
        self.kill9();
        self.spawn();
    }

    /// SIGTERM and wait; returns the exit status and how long it took.
    pub fn stop(&mut self) -> (std::process::ExitStatus, Duration) {
        let mut c = self.child.take().expect("running");
        let t = Instant::now();
        signal(&c, "TERM");
        let status = wait_for(Duration::from_secs(20), "outrider to exit", || {
            c.try_wait().unwrap()
        });
        (status, t.elapsed())
    }

    pub fn log_text(&self) -> String {
        std::fs::read_to_string(&self.log).unwrap_or_default()
    }

    /// The log as JSON lines (the harness runs with `--log-format json`).
    pub fn log_lines(&self) -> Vec<serde_json::Value> {
        self.log_text()
            .lines()
            .filter_map(|l| serde_json::from_str(l).ok())
            .collect()
    }

    pub fn is_running(&mut self) -> bool {
        self.child
            .as_mut()
            .is_some_and(|c| c.try_wait().ok().flatten().is_none())
    }
}

impl Drop for Daemon {
    fn drop(&mut self) {
        self.kill9();
    }
}

/// `outrider status -c FILE --json`.
pub fn status(config: &Path) -> serde_json::Value {
    let out = Command::new(BIN)
        .args(["status", "--json", "-c"])
        .arg(config)
        .output()
        .unwrap();
    assert!(
        out.status.success(),
        "status failed: {}",
        String::from_utf8_lossy(&out.stderr)
    );
    serde_json::from_slice(&out.stdout).unwrap()
}

/// `outrider status --state-dir DIR --json`: needs no config (so no secrets
/// in the environment).
pub fn status_of(state_dir: &Path) -> serde_json::Value {
    let out = Command::new(BIN)
        .args(["status", "--json", "--state-dir"])
        .arg(state_dir)
        .output()
        .unwrap();
    assert!(
        out.status.success(),
        "status failed: {}",
        String::from_utf8_lossy(&out.stderr)
    );
    serde_json::from_slice(&out.stdout).unwrap()
}

pub fn n(v: &serde_json::Value, key: &str) -> u64 {
    v[key].as_u64().unwrap_or(0)
}

pub fn rejected_total(v: &serde_json::Value) -> u64 {
    v["rejected"]
        .as_object()
        .map(|m| m.values().filter_map(|x| x.as_u64()).sum())
        .unwrap_or(0)
}

/// One corpus entry: topic and raw payload.
pub struct Msg {
    pub topic: String,
    pub payload: Vec<u8>,
}

pub fn write_corpus(path: &Path, msgs: &[Msg]) {
    use base64::Engine;
    let mut f = std::fs::File::create(path).unwrap();
    for m in msgs {
        let line = serde_json::json!({"topic": m.topic, "payload_b64": base64::engine::general_purpose::STANDARD.encode(&m.payload)});
        writeln!(f, "{line}").unwrap();
    }
}

/// Publishes the corpus with paho-mqtt and returns what came back on `_rejected`.
pub fn publish_corpus(
    port: u16,
    corpus: &Path,
    expect_rejections: usize,
    client_id: &str,
) -> serde_json::Value {
    publish_corpus_at(port, corpus, expect_rejections, client_id, 0.0)
}

/// [`publish_corpus`] at most `rate` messages a second (0: full speed).
pub fn publish_corpus_at(
    port: u16,
    corpus: &Path,
    expect_rejections: usize,
    client_id: &str,
    rate: f64,
) -> serde_json::Value {
    publish_corpus_as(port, corpus, expect_rejections, client_id, rate, None)
}

/// [`publish_corpus_at`] logged in as (user, password).
pub fn publish_corpus_as(
    port: u16,
    corpus: &Path,
    expect_rejections: usize,
    client_id: &str,
    rate: f64,
    login: Option<(&str, &str)>,
) -> serde_json::Value {
    let mut cmd = Command::new(python());
    cmd.arg(repo().join("tests/clients/mqtt_corpus.py"));
    if let Some((user, password)) = login {
        cmd.args(["--username", user, "--password", password]);
    }
    let out = cmd
        .args([
            "--port",
            &port.to_string(),
            "--expect-rejections",
            &expect_rejections.to_string(),
            "--timeout",
            "90",
            "--client-id",
            client_id,
            "--rate",
            &rate.to_string(),
        ])
        .arg("--corpus")
        .arg(corpus)
        .output()
        .expect("run the paho-mqtt publisher");
    assert!(
        out.status.success(),
        "publisher failed: {}",
        String::from_utf8_lossy(&out.stderr)
    );
    serde_json::from_slice(&out.stdout).expect("publisher output")
}
