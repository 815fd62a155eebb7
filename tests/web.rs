//! The web part against outside judges: a real browser (Debian's Chromium
//! through chromium-driver, driven by Selenium), Prometheus's own text
//! parser (prometheus_client), an independent HTTP client (Python's
//! urllib; multipart bodies from urllib3), a real SMTP server (aiosmtpd),
//! Mosquitto and a real SQLite file. All on 127.0.0.1, free ports, bounded
//! waits. Clients: tests/clients/web_client.py.

use crate::delivery::{one_header, parse_eml, part, Sink};
use crate::util::*;
use chrono::{DateTime, Duration, Utc};
use outrider::clock::{Clock, SystemClock};
use serde_json::Value;
use std::io::{Read, Write};
use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};

// ---------------------------------------------------------------- helpers

/// Runs tests/clients/web_client.py and returns its JSON.
fn client(args: &[&str]) -> Value {
    let out = Command::new(python())
        .arg(repo().join("tests/clients/web_client.py"))
        .args(args)
        // Selenium: no usage statistics, no driver download (the driver
        // path is given).
        .env("SE_AVOID_STATS", "true")
        .output()
        .expect("run tests/clients/web_client.py");
    assert!(
        out.status.success(),
        "web_client {args:?} failed: {}",
        String::from_utf8_lossy(&out.stderr)
    );
    serde_json::from_slice(&out.stdout).unwrap()
}

/// One request through Python's urllib: (status, headers, body).
fn request(method: &str, url: &str, extra: &[&str]) -> (u64, Value, String) {
    let mut args = vec!["request", method, url];
    args.extend_from_slice(extra);
    let v = client(&args);
    (
        v["status"].as_u64().unwrap(),
        v["headers"].clone(),
        v["body"].as_str().unwrap().to_string(),
    )
}

/// A GET over a raw socket, for polling while a server starts (the checks
/// themselves go through the independent clients).
fn raw_get(port: u16, path: &str) -> Option<(u16, String)> {
    let mut s = std::net::TcpStream::connect(("127.0.0.1", port)).ok()?;
    s.set_read_timeout(Some(std::time::Duration::from_secs(10)))
        .ok()?;
    write!(
        s,
        "GET {path} HTTP/1.1\r\nHost: 127.0.0.1\r\nConnection: close\r\n\r\n"
    )
    .ok()?;
    let mut buf = Vec::new();
    s.read_to_end(&mut buf).ok()?;
    let text = String::from_utf8_lossy(&buf).to_string();
    let status = text.split(' ').nth(1)?.parse().ok()?;
    let body = text.split_once("\r\n\r\n")?.1.to_string();
    Some((status, body))
}

fn ts(t: DateTime<Utc>) -> String {
    t.with_timezone(&chrono_tz::Australia::Sydney).to_rfc3339()
}

fn dog(id: &str, dep: &str, at: DateTime<Utc>) -> Msg {
    let p = serde_json::json!({"observationID": id, "deploymentID": dep, "eventStart": ts(at), "observationType": "animal", "scientificName": "Canis familiaris", "vernacularName": "wild dog", "count": 1, "classificationProbability": 0.95});
    Msg {
        topic: format!("outrider/{dep}/observation"),
        payload: p.to_string().into_bytes(),
    }
}

/// Adds keys to the `[service]` table of a config written by `write_config`.
fn add_service_keys(cfg: &Path, keys: &str) {
    let text = std::fs::read_to_string(cfg).unwrap();
    std::fs::write(
        cfg,
        text.replacen("[service]\n", &format!("[service]\n{keys}\n"), 1),
    )
    .unwrap();
}

fn screenshots() -> PathBuf {
    let d = repo().join("target/screenshots");
    std::fs::create_dir_all(&d).unwrap();
    d
}

fn is_png(path: &str) -> bool {
    std::fs::read(path)
        .map(|b| b.starts_with(b"\x89PNG\r\n\x1a\n") && b.len() > 10_000)
        .unwrap_or(false)
}

/// Parsed by prometheus_client: the samples of `family` with their labels.
fn samples<'a>(m: &'a Value, family: &str) -> &'a Vec<Value> {
    m["families"][family]["samples"]
        .as_array()
        .unwrap_or_else(|| panic!("no family {family} in {}", m["families"]))
}

fn sample(m: &Value, family: &str, name: &str, labels: &[(&str, &str)]) -> Option<f64> {
    samples(m, family)
        .iter()
        .find(|s| {
            s[0] == name
                && labels.iter().all(|(k, v)| s[1][*k].as_str() == Some(*v))
                && s[1].as_object().map(|o| o.len()) == Some(labels.len())
        })
        .and_then(|s| s[2].as_f64())
}

struct Demo(Child);

impl Drop for Demo {
    fn drop(&mut self) {
        let _ = self.0.kill();
        let _ = self.0.wait();
    }
}

// ---------------------------------------------------------------- tests

/// `outrider demo --web ADDR` in a real browser: one map marker per site,
/// a filled notice list, a site page with its 14-night chart, nothing
/// fetched from anywhere but the page, nothing wider than a phone.
#[test]
fn the_demo_status_page_in_a_real_browser() {
    let dir = tempfile::tempdir().unwrap();
    let state = dir.path().join("demo");
    let port = free_port();
    let log = std::fs::File::create(dir.path().join("demo.log")).unwrap();
    let demo = Demo(
        Command::new(BIN)
            .args(["demo", "--speed", "600", "--duration", "600", "--web"])
            .arg(format!("127.0.0.1:{port}"))
            .arg("--state-dir")
            .arg(&state)
            .stdout(Stdio::null())
            .stderr(log)
            .spawn()
            .expect("start outrider demo"),
    );
    // The demo loads five weeks of history, then the feed's incursions make
    // notices within a minute or two of simulated hours.
    let overview: Value = wait_for(
        std::time::Duration::from_secs(240),
        "the demo's overview to list a notice",
        || {
            let (status, body) = raw_get(port, "/api/overview")?;
            let v: Value = serde_json::from_str(&body).ok()?;
            (status == 200 && v["notices"].as_array().is_some_and(|n| !n.is_empty())).then_some(v)
        },
    );
    // The sites the demo wrote (Camtrap DP deployments CSV), read with the
    // csv crate: one marker per row.
    let mut rdr = csv::Reader::from_path(state.join("sites.csv")).unwrap();
    let sites = rdr.records().count();
    assert_eq!(sites, 16, "the invented district's 16 sites");
    let site = overview["notices"][0]["deploymentID"]
        .as_str()
        .unwrap()
        .to_string();

    let out = screenshots();
    let b = client(&[
        "browse",
        "--base",
        &format!("http://127.0.0.1:{port}"),
        "--site",
        &site,
        "--out",
        out.to_str().unwrap(),
    ]);
    drop(demo);

    let o = &b["overview"];
    assert_eq!(o["markers"], sites, "one marker per site: {o}");
    assert_eq!(o["marker_links"], sites, "each marker links to its site");
    assert!(
        o["notices"].as_u64().unwrap() >= 1,
        "a filled notice list: {o}"
    );
    assert_eq!(o["lang"], "en");
    assert_eq!(o["unlabelled_svgs"], 0, "every picture names its title");
    // Works offline: the browser fetched nothing besides the document.
    assert_eq!(o["resources"], serde_json::json!([]), "{o}");
    let s = &b["site"];
    assert_eq!(s["charts"], 1, "{s}");
    assert!(s["chart_series"].as_u64().unwrap() >= 1, "{s}");
    assert_eq!(s["resources"], serde_json::json!([]));
    assert!(
        s["notices"].as_u64().unwrap() >= 1,
        "the site of a notice lists it: {s}"
    );
    // Phone width: nothing sticks out sideways.
    let p = &b["phone"];
    assert!(
        p["scroll_width"].as_u64() <= p["inner_width"].as_u64(),
        "{p}"
    );
    assert_eq!(p["markers"], sites);
    // No Content-Security-Policy violation or script error in the console.
    assert_eq!(b["console"], serde_json::json!([]), "{}", b["console"]);
    for shot in [&o["screenshot"], &s["screenshot"], &p["screenshot"]] {
        assert!(is_png(shot.as_str().unwrap()), "{shot}");
    }
}

/// RFC 8058 one-click unsubscribe against a running daemon fed through
/// Mosquitto, with a real SMTP server: a GET asks and changes nothing; a
/// forged token, a page token and a POST without the one-click body are
/// refused; a POST with the body (urlencoded, and multipart) unsubscribes
/// without a redirect or a cookie; and no further email reaches the server.
#[test]
fn one_click_unsubscribe_stops_email_and_a_get_or_a_forged_token_does_not() {
    let dir = tempfile::tempdir().unwrap();
    let smtp = Sink::smtp(&dir.path().join("smtp"), &[]);
    let mosquitto = Mosquitto::start(dir.path());
    let web = free_port();
    let sub = |id: &str| {
        format!("[[subscriber]]\nid = \"{id}\"\nname = \"{id} station\"\nemail = \"owner@{id}.example\"\narea = {{ sites = [\"KB-02\"] }}\n[[subscriber.watch]]\nname = \"dogs\"\ntrigger = \"presence\"\nspecies = [\"Canis familiaris\"]\ncooldown_minutes = 0\nchannels = [\"email\"]\n")
    };
    let extra = format!(
        "[smtp]\nhost = \"127.0.0.1\"\nport = {}\nsecurity = \"none\"\nfrom = \"outrider <notices@kellerby.example>\"\n\n[web]\nlisten = \"127.0.0.1:{web}\"\n\n{}{}",
        smtp.port,
        sub("stonecroft"),
        sub("bellbird")
    );
    let cfg = write_config(dir.path(), mosquitto.port, false, &extra);
    add_service_keys(&cfg, &format!("public_url = \"http://127.0.0.1:{web}\""));
    let _daemon = Daemon::start(&cfg);
    let t0 = SystemClock.now() - Duration::hours(5);
    let corpus = dir.path().join("c1.jsonl");
    write_corpus(&corpus, &[dog("d1", "KB-02", t0)]);
    publish_corpus(mosquitto.port, &corpus, 0, "webpub1");
    let files = wait_for(std::time::Duration::from_secs(30), "two emails", || {
        let m = smtp.messages();
        (m.len() == 2).then_some(m)
    });
    // The links as a mail program reads them (Python's email package).
    let mut links = std::collections::BTreeMap::new();
    for f in &files {
        let parsed = parse_eml(f);
        let to = one_header(&parsed, "To");
        let h = one_header(&parsed, "List-Unsubscribe");
        let url = h
            .trim_start_matches('<')
            .split('>')
            .next()
            .unwrap()
            .to_string();
        assert!(
            url.starts_with(&format!("http://127.0.0.1:{web}/unsubscribe/")),
            "{url}"
        );
        let text = part(&parsed, "text/plain");
        let page = text
            .lines()
            .find_map(|l| l.strip_prefix("Status page: "))
            .unwrap()
            .to_string();
        links.insert(to, (url, page));
    }
    let (stone, stone_page) = links["owner@stonecroft.example"].clone();
    let (bell, _) = links["owner@bellbird.example"].clone();
    let db = dir.path().join("state/outrider.db");
    let unsubscribed = || -> i64 {
        let c =
            rusqlite::Connection::open_with_flags(&db, rusqlite::OpenFlags::SQLITE_OPEN_READ_ONLY)
                .unwrap();
        c.query_row("SELECT count(*) FROM unsubscribes", [], |r| r.get(0))
            .unwrap()
    };

    // RFC 8058 §3.2: a GET must not unsubscribe; it may ask.
    let (status, _, body) = request("GET", &stone, &[]);
    assert_eq!(status, 200);
    assert!(
        body.contains("name=\"List-Unsubscribe\" value=\"One-Click\""),
        "{body}"
    );
    assert_eq!(unsubscribed(), 0, "a GET changed nothing");

    // Forged: one character of the MAC changed.
    let mut forged = stone.clone();
    let last = forged.pop().unwrap();
    forged.push(if last == 'A' { 'B' } else { 'A' });
    let form = [
        "--form",
        "urlencoded",
        "--field",
        "List-Unsubscribe=One-Click",
    ];
    let (status, _, body) = request("POST", &forged, &form);
    assert_eq!(status, 403, "{body}");
    assert!(body.contains("not valid"), "{body}");
    // The subscriber's page link is signed too, but for another purpose.
    let page_as_unsub = stone_page.replace("/my/", "/unsubscribe/");
    let (status, _, _) = request("POST", &page_as_unsub, &form);
    assert_eq!(status, 403);
    // The right token without the one-click body.
    let (status, _, _) = request("POST", &stone, &["--form", "urlencoded", "--field", "x=y"]);
    assert_eq!(status, 400);
    assert_eq!(unsubscribed(), 0, "nothing refused changed anything");
    // The page link opens the subscriber's own page (no token needed beyond it).
    let (status, _, body) = request("GET", &stone_page, &[]);
    assert_eq!(status, 200);
    assert!(
        body.contains("stonecroft station") && !body.contains("bellbird"),
        "only their own"
    );

    // One-click, urlencoded: unsubscribed; the answer is the result itself.
    let (status, headers, body) = request("POST", &stone, &form);
    assert_eq!(status, 200, "{body}");
    assert!(headers.get("location").is_none(), "no redirect");
    assert!(headers.get("set-cookie").is_none(), "no cookie");
    assert!(body.contains("Email stopped"));
    assert_eq!(unsubscribed(), 1);
    // One-click, multipart/form-data (urllib3's encoder).
    let (status, _, _) = request(
        "POST",
        &bell,
        &[
            "--form",
            "multipart",
            "--field",
            "List-Unsubscribe=One-Click",
        ],
    );
    assert_eq!(status, 200);
    assert_eq!(unsubscribed(), 2);
    // Asking again says so and changes nothing.
    let (_, _, body) = request("GET", &stone, &[]);
    assert!(body.contains("already stopped"), "{body}");

    // A new dog two hours later: notices are decided, their email is closed,
    // not sent.
    let corpus = dir.path().join("c2.jsonl");
    write_corpus(&corpus, &[dog("d2", "KB-02", t0 + Duration::hours(2))]);
    publish_corpus(mosquitto.port, &corpus, 0, "webpub2");
    let s = wait_for(
        std::time::Duration::from_secs(30),
        "the email deliveries to be closed",
        || {
            let s = crate::util::status(&cfg);
            (s["deliveries"]["closed"] == 2).then_some(s)
        },
    );
    assert_eq!(s["notices"]["sent"], 4, "{s}");
    assert_eq!(s["deliveries"]["sent"], 2, "{s}");
    std::thread::sleep(std::time::Duration::from_secs(2));
    assert_eq!(
        smtp.messages().len(),
        2,
        "no further email reached the SMTP server"
    );
    // The status page says why.
    let (_, _, body) = request(
        "GET",
        &format!("http://127.0.0.1:{web}/api/notices?subscriber=stonecroft"),
        &[],
    );
    let v: Value = serde_json::from_str(&body).unwrap();
    let closed: Vec<&Value> = v["notices"]
        .as_array()
        .unwrap()
        .iter()
        .flat_map(|n| n["deliveries"].as_array().unwrap())
        .filter(|d| d["state"] == "closed")
        .collect();
    assert_eq!(closed.len(), 1, "{v}");
    assert!(closed[0]["last_error"]
        .as_str()
        .unwrap()
        .contains("unsubscribed from email"));
}

/// `/metrics` read by prometheus_client's text parser, with values that
/// match what was published, and the histogram's shape (cumulative
/// buckets ending at +Inf = count).
#[test]
fn metrics_parse_with_prometheus_client_and_count_what_happened() {
    let dir = tempfile::tempdir().unwrap();
    let mqtt = free_port();
    let web = free_port();
    let extra = format!(
        "[email_folder]\ndir = \"mail\"\n\n[web]\nlisten = \"127.0.0.1:{web}\"\n\n[[subscriber]]\nid = \"stonecroft\"\nemail = \"owner@stonecroft.example\"\narea = \"all\"\n[[subscriber.watch]]\ntrigger = \"presence\"\nspecies = [\"Canis familiaris\"]\nchannels = [\"email\"]\n"
    );
    let cfg = write_config(dir.path(), mqtt, true, &extra);
    let _daemon = Daemon::start(&cfg);
    let t0 = SystemClock.now() - Duration::hours(3);
    let msgs = vec![
        dog("m1", "KB-01", t0),
        dog("m1", "KB-01", t0), // a duplicate
        dog("m2", "KB-03", t0 + Duration::minutes(1)),
        Msg {
            topic: "outrider/KB-01/observation".into(),
            payload: b"{not json".to_vec(),
        },
        Msg {
            topic: "outrider/KB-99/heartbeat".into(),
            payload: serde_json::json!({"deploymentID": "KB-99", "timestamp": ts(t0)})
                .to_string()
                .into_bytes(),
        },
    ];
    let corpus = dir.path().join("m.jsonl");
    write_corpus(&corpus, &msgs);
    publish_corpus(mqtt, &corpus, 2, "metricspub");
    wait_for(
        std::time::Duration::from_secs(20),
        "two email files",
        || {
            let n = std::fs::read_dir(dir.path().join("mail"))
                .ok()?
                .filter(|e| {
                    e.as_ref()
                        .is_ok_and(|e| e.path().extension().is_some_and(|x| x == "eml"))
                })
                .count();
            (n == 2).then_some(())
        },
    );
    let m = wait_for(
        std::time::Duration::from_secs(10),
        "both deliveries counted",
        || {
            let m = client(&["metrics", &format!("http://127.0.0.1:{web}/metrics")]);
            (sample(
                &m,
                "outrider_delivery_outcomes",
                "outrider_delivery_outcomes_total",
                &[("channel", "email"), ("outcome", "sent")],
            ) == Some(2.0))
            .then_some(m)
        },
    );
    assert!(m["content_type"]
        .as_str()
        .unwrap()
        .starts_with("text/plain; version=0.0.4"));
    // prometheus_client names a counter family without `_total`.
    assert_eq!(
        m["families"]["outrider_messages_received"]["type"],
        "counter"
    );
    assert_eq!(
        sample(
            &m,
            "outrider_messages_received",
            "outrider_messages_received_total",
            &[]
        ),
        Some(5.0)
    );
    assert_eq!(
        sample(&m, "outrider_duplicates", "outrider_duplicates_total", &[]),
        Some(1.0)
    );
    assert_eq!(
        sample(
            &m,
            "outrider_messages_rejected",
            "outrider_messages_rejected_total",
            &[("reason", "invalid-json")]
        ),
        Some(1.0)
    );
    assert_eq!(
        sample(
            &m,
            "outrider_messages_rejected",
            "outrider_messages_rejected_total",
            &[("reason", "unknown-deployment")]
        ),
        Some(1.0)
    );
    assert_eq!(
        sample(
            &m,
            "outrider_notices",
            "outrider_notices_total",
            &[("trigger", "presence"), ("disposition", "sent")]
        ),
        Some(2.0)
    );
    assert_eq!(
        sample(
            &m,
            "outrider_deliveries",
            "outrider_deliveries",
            &[("channel", "email"), ("state", "sent")]
        ),
        Some(2.0)
    );
    assert_eq!(
        sample(
            &m,
            "outrider_outbox_pending",
            "outrider_outbox_pending",
            &[]
        ),
        Some(0.0)
    );
    assert_eq!(
        sample(&m, "outrider_events", "outrider_events", &[]),
        Some(2.0)
    );
    assert_eq!(
        sample(
            &m,
            "outrider_broker_connected",
            "outrider_broker_connected",
            &[]
        ),
        Some(1.0)
    );
    assert_eq!(
        sample(
            &m,
            "outrider_store_writable",
            "outrider_store_writable",
            &[]
        ),
        Some(1.0)
    );
    assert_eq!(
        sample(
            &m,
            "outrider_store_readable",
            "outrider_store_readable",
            &[]
        ),
        Some(1.0)
    );
    // Histogram: one observation per message taken, cumulative buckets.
    let h = "outrider_ingest_to_commit_seconds";
    assert_eq!(m["families"][h]["type"], "histogram");
    assert_eq!(sample(&m, h, &format!("{h}_count"), &[]), Some(5.0));
    let buckets: Vec<(f64, f64)> = samples(&m, h)
        .iter()
        .filter(|s| s[0] == format!("{h}_bucket").as_str())
        .map(|s| {
            let le = s[1]["le"].as_str().unwrap();
            let le = if le == "+Inf" {
                f64::INFINITY
            } else {
                le.parse().unwrap()
            };
            (le, s[2].as_f64().unwrap())
        })
        .collect();
    assert!(
        buckets
            .windows(2)
            .all(|w| w[0].0 < w[1].0 && w[0].1 <= w[1].1),
        "{buckets:?}"
    );
    assert_eq!(buckets.last(), Some(&(f64::INFINITY, 5.0)));
    let d = "outrider_notice_to_delivery_seconds";
    assert_eq!(sample(&m, d, &format!("{d}_count"), &[]), Some(2.0));
}

/// On an address other than loopback the coordinator's pages need the
/// bearer token, and without a configured token they are off; health
/// checks, unsubscribe links and subscriber pages stay public.
#[test]
fn off_loopback_the_coordinators_pages_need_the_bearer_token() {
    let token = "kellerby-test-admin-token-0123456789abcdef";
    let dir = tempfile::tempdir().unwrap();
    // Bound on every interface of this machine; every request below goes to
    // 127.0.0.1.
    let web = free_port();
    let extra = format!(
        "[web]\nlisten = \"0.0.0.0:{web}\"\nadmin_token_env = \"OUTRIDER_ADMIN_TOKEN\"\n\n[[subscriber]]\nid = \"stonecroft\"\nname = \"Stonecroft\"\narea = \"all\"\n[[subscriber.watch]]\ntrigger = \"silence\"\nchannels = [\"mqtt\"]\n"
    );
    let cfg = write_config(&dir.path().join("a"), free_port(), true, &extra);
    let _a = Daemon::start_with_env(&cfg, &[("OUTRIDER_ADMIN_TOKEN", token)]);
    let base = format!("http://127.0.0.1:{web}");
    wait_for(std::time::Duration::from_secs(10), "the web server", || {
        raw_get(web, "/healthz")
    });
    let bearer = format!("Authorization: Bearer {token}");
    let wrong = format!("Authorization: Bearer {token}x");
    for path in [
        "/",
        "/api/overview",
        "/notices",
        "/rejected",
        "/subscribers",
        "/sites/KB-01",
        "/metrics",
    ] {
        let url = format!("{base}{path}");
        let (s, h, _) = request("GET", &url, &[]);
        assert_eq!(s, 401, "{path} without a token");
        // RFC 6750 §3: a 401 names the Bearer scheme.
        assert!(
            h["www-authenticate"]
                .as_str()
                .unwrap()
                .starts_with("Bearer"),
            "{path}"
        );
        let (s, _, _) = request("GET", &url, &["--header", &wrong]);
        assert_eq!(s, 401, "{path} with a wrong token");
        let (s, _, _) = request("GET", &url, &["--header", &bearer]);
        assert_eq!(s, 200, "{path} with the token");
    }
    let (s, h, body) = request(
        "GET",
        &format!("{base}/api/overview"),
        &["--header", &bearer],
    );
    assert_eq!(s, 200);
    assert_eq!(h["content-type"], "application/json");
    let v: Value = serde_json::from_str(&body).unwrap();
    assert_eq!(v["sites"].as_array().unwrap().len(), 4);
    // Public without a token.
    assert_eq!(request("GET", &format!("{base}/healthz"), &[]).0, 200);
    assert_eq!(
        request("GET", &format!("{base}/readyz"), &[]).0,
        200,
        "broker connected, store writable"
    );
    // A subscriber page link, signed with the service's own key.
    let key = outrider::notify::TokenKey::new(
        std::fs::read(dir.path().join("a/state/link.key")).unwrap(),
    )
    .unwrap();
    let page = outrider::notify::sign_token(
        &key,
        outrider::notify::Purpose::Page,
        "stonecroft",
        SystemClock.now() + Duration::days(1),
    );
    let (s, _, body) = request("GET", &format!("{base}/my/{page}"), &[]);
    assert_eq!(s, 200);
    assert!(body.contains("Stonecroft"));
    let expired = outrider::notify::sign_token(
        &key,
        outrider::notify::Purpose::Page,
        "stonecroft",
        SystemClock.now() - Duration::seconds(5),
    );
    let (s, _, body) = request("GET", &format!("{base}/my/{expired}"), &[]);
    assert_eq!(s, 403);
    assert!(body.contains("expired"));

    // The same without a configured token: off, with a message saying why.
    let web2 = free_port();
    let extra = format!("[web]\nlisten = \"0.0.0.0:{web2}\"\n");
    let cfg = write_config(&dir.path().join("b"), free_port(), true, &extra);
    let _b = Daemon::start(&cfg);
    wait_for(
        std::time::Duration::from_secs(10),
        "the second web server",
        || raw_get(web2, "/healthz"),
    );
    let base2 = format!("http://127.0.0.1:{web2}");
    let (s, _, body) = request("GET", &format!("{base2}/"), &["--header", &bearer]);
    assert_eq!(s, 403, "no token configured: nothing opens it");
    assert!(body.contains("admin_token_env"), "{body}");
    let (s, _, body) = request("GET", &format!("{base2}/api/overview"), &[]);
    assert_eq!(s, 403);
    let v: Value = serde_json::from_str(&body).unwrap();
    assert!(v["error"].as_str().unwrap().contains("admin_token_env"));
    assert_eq!(request("GET", &format!("{base2}/metrics"), &[]).0, 403);
    assert_eq!(request("GET", &format!("{base2}/healthz"), &[]).0, 200);
}

/// `/api/report.csv` serves the rows of `outrider report` (whose numbers
/// tests/interchange.rs checks against an independent Python count), and
/// refuses a bad period with 400.
#[test]
fn the_report_endpoint_serves_the_report_commands_rows() {
    let dir = tempfile::tempdir().unwrap();
    let mqtt = free_port();
    let web = free_port();
    let extra = format!("[web]\nlisten = \"127.0.0.1:{web}\"\n");
    let cfg = write_config(dir.path(), mqtt, true, &extra);
    let mut daemon = Daemon::start(&cfg);
    let t0 = SystemClock.now() - Duration::days(2);
    let msgs = vec![
        dog("r1", "KB-01", t0),
        dog("r2", "KB-01", t0 + Duration::hours(2)),
        dog("r3", "KB-02", t0 + Duration::hours(30)),
    ];
    let corpus = dir.path().join("r.jsonl");
    write_corpus(&corpus, &msgs);
    publish_corpus(mqtt, &corpus, 0, "reportpub");
    wait_for(
        std::time::Duration::from_secs(20),
        "three observations",
        || (n(&status(&cfg), "observations_stored") == 3).then_some(()),
    );
    let (code, body) = raw_get(web, "/api/report.csv?by=day").unwrap();
    assert_eq!(code, 200, "{body}");
    let (bad, _) = raw_get(web, "/api/report.csv?by=fortnight").unwrap();
    assert_eq!(bad, 400);
    daemon.stop();
    let out = std::process::Command::new(BIN)
        .args(["report", "-c", cfg.to_str().unwrap(), "--by", "day"])
        .output()
        .unwrap();
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let cli = String::from_utf8_lossy(&out.stdout);
    // Effort runs to "now", which moved between the two calls: compare the
    // rows up to events and individuals, without camera-nights and RAI, and
    // without the period's end (the last, partial period ends at "now").
    let rows = |s: &str| -> Vec<String> {
        s.lines()
            .filter(|l| l.contains("Canis familiaris"))
            .map(|l| {
                l.split(',')
                    .take(8)
                    .enumerate()
                    .filter(|(i, _)| *i != 2)
                    .map(|(_, f)| f)
                    .collect::<Vec<_>>()
                    .join(",")
            })
            .collect()
    };
    assert_eq!(rows(&body), rows(&cli));
    assert!(!rows(&body).is_empty(), "{body}");
    let header = body.lines().next().unwrap_or("");
    assert!(
        header.contains(",events,") && header.contains("camera_nights"),
        "{header}"
    );
}
