//! The delivery channels against real servers, judged by independent code:
//! a real SMTP server (aiosmtpd 1.4.6, `tests/clients/smtp_sink.py`), a
//! real HTTP server (Python's http.server, `tests/clients/webhook_sink.py`),
//! MIME read back by Python's `email` package (policy=default), webhook
//! signatures recomputed by Python's `hmac` module, TLS through a test CA
//! made here with rcgen. No mocks; every server on 127.0.0.1 on a free
//! port; every wait bounded.

use std::io::{BufRead, BufReader};
use std::net::{IpAddr, Ipv4Addr};
use std::path::{Path, PathBuf};
use std::process::{Child, ChildStdin, Command, Stdio};
use std::time::Duration;

use chrono::{TimeZone, Utc};
use outrider::config::{Secret, Smtp, SmtpSecurity, Webhook};
use outrider::deliver::{
    DeliveryError, EmailOptions, EmailSender, ErrorKind, FolderSender, OutgoingEmail,
    OutgoingWebhook, WebhookSender,
};
use outrider::notify::render::list_unsubscribe_headers;
use outrider::notify::{render_email, Disposition, EmailContext, Evidence, Notice, Trigger};
use serde_json::Value;

use crate::util::{free_port, python, repo};

// ---------------------------------------------------------------- harness

/// A Python server started for one test; killed when dropped.
pub struct Sink {
    pub port: u16,
    pub dir: PathBuf,
    child: Child,
    _stdin: ChildStdin,
}

impl Sink {
    pub fn start(script: &str, dir: &Path, args: &[&str]) -> Sink {
        Sink::start_at(script, dir, free_port(), args)
    }

    /// A sink on a given port (e.g. one that comes back after being away).
    pub fn start_at(script: &str, dir: &Path, port: u16, args: &[&str]) -> Sink {
        std::fs::create_dir_all(dir).unwrap();
        let mut cmd = Command::new(python());
        cmd.arg(repo().join("tests/clients").join(script));
        if script == "smtp_sink.py" {
            cmd.arg("serve");
        }
        let mut child = cmd
            .args(["--port", &port.to_string()])
            .arg("--dir")
            .arg(dir)
            .args(args)
            .stdin(Stdio::piped())
            .stdout(Stdio::piped())
            .stderr(Stdio::inherit())
            .spawn()
            .expect("start the Python sink");
        let stdin = child.stdin.take().unwrap();
        let stdout = child.stdout.take().unwrap();
        let (tx, rx) = std::sync::mpsc::channel();
        std::thread::spawn(move || {
            let mut line = String::new();
            let _ = BufReader::new(stdout).read_line(&mut line);
            let _ = tx.send(line);
        });
        let line = rx
            .recv_timeout(Duration::from_secs(20))
            .expect("the sink to say ready within 20 s");
        assert_eq!(line.trim(), "ready", "{script} did not start");
        Sink {
            port,
            dir: dir.to_path_buf(),
            child,
            _stdin: stdin,
        }
    }

    pub fn smtp(dir: &Path, args: &[&str]) -> Sink {
        Sink::start("smtp_sink.py", dir, args)
    }

    pub fn webhook(dir: &Path, args: &[&str]) -> Sink {
        Sink::start("webhook_sink.py", dir, args)
    }

    /// The JSON lines the sink logged to `file`.
    pub fn log(&self, file: &str) -> Vec<Value> {
        std::fs::read_to_string(self.dir.join(file))
            .unwrap_or_default()
            .lines()
            .map(|l| serde_json::from_str(l).unwrap())
            .collect()
    }

    /// The `.eml` files the SMTP sink stored, in order.
    pub fn messages(&self) -> Vec<PathBuf> {
        eml_files(&self.dir)
    }
}

impl Drop for Sink {
    fn drop(&mut self) {
        let _ = self.child.kill();
        let _ = self.child.wait();
    }
}

fn eml_files(dir: &Path) -> Vec<PathBuf> {
    let mut v: Vec<PathBuf> = std::fs::read_dir(dir)
        .unwrap()
        .map(|e| e.unwrap().path())
        .filter(|p| p.extension().is_some_and(|x| x == "eml"))
        .collect();
    v.sort();
    v
}

fn block_on<F: std::future::Future>(f: F) -> F::Output {
    tokio::runtime::Builder::new_current_thread()
        .enable_all()
        .build()
        .unwrap()
        .block_on(f)
}

/// A stored message as Python's `email` package reads it
/// (`smtp_sink.py parse`).
pub fn parse_eml(path: &Path) -> Value {
    let out = Command::new(python())
        .arg(repo().join("tests/clients/smtp_sink.py"))
        .arg("parse")
        .arg(path)
        .output()
        .unwrap();
    assert!(
        out.status.success(),
        "parse failed: {}",
        String::from_utf8_lossy(&out.stderr)
    );
    serde_json::from_slice(&out.stdout).unwrap()
}

/// Every value of header `name` (case-insensitive), decoded.
fn header_values(parsed: &Value, name: &str) -> Vec<String> {
    parsed["headers"]
        .as_array()
        .unwrap()
        .iter()
        .filter(|h| h["name"].as_str().unwrap().eq_ignore_ascii_case(name))
        .map(|h| h["value"].as_str().unwrap().to_owned())
        .collect()
}

pub fn one_header(parsed: &Value, name: &str) -> String {
    let v = header_values(parsed, name);
    assert_eq!(v.len(), 1, "{name}: {v:?}");
    v[0].clone()
}

/// The decoded content of the leaf part with `content_type` directly
/// under a `multipart/alternative` root.
pub fn part(parsed: &Value, content_type: &str) -> String {
    let tree = &parsed["tree"];
    assert_eq!(tree["content_type"], "multipart/alternative", "{tree}");
    let parts = tree["parts"].as_array().unwrap();
    let p: Vec<&Value> = parts
        .iter()
        .filter(|p| p["content_type"] == content_type)
        .collect();
    assert_eq!(p.len(), 1, "{content_type} in {tree}");
    assert_eq!(p[0]["charset"], "utf-8");
    p[0]["content"].as_str().unwrap().replace("\r\n", "\n")
}

fn smtp(port: u16, security: SmtpSecurity) -> Smtp {
    Smtp {
        host: "127.0.0.1".into(),
        port,
        security,
        from: "outrider <notices@kellerby.example>".into(),
        username: None,
        password: None,
        unsubscribe_mailto: None,
    }
}

const UNSUBSCRIBE: &str = "https://outrider.kellerby.example/u/djE6dW5zdWJzY3JpYmU";
const MAILTO: &str = "mailto:unsubscribe@kellerby.example?subject=stonecroft";

/// A presence notice in the invented district.
fn notice() -> Notice {
    let t = Utc.with_ymd_and_hms(2025, 7, 14, 16, 14, 0).unwrap();
    Notice {
        subscriber_id: "stonecroft".into(),
        subscriber_name: "Stonecroft".into(),
        watch: "dogs and foxes at night".into(),
        urgent: true,
        trigger: Trigger::Presence,
        deployment_id: "KB-07".into(),
        site_label: "Swamp Corner".into(),
        latitude: -31.62,
        longitude: 148.07,
        scientific_name: Some("Canis familiaris".into()),
        vernacular_name: Some("wild dog".into()),
        event_id: "KB-07/Canis familiaris/2025-07-14T16:14:00Z".into(),
        event_time: t,
        at: t + chrono::Duration::minutes(1),
        disposition: Disposition::Sent,
        evidence: Evidence {
            count: Some(1),
            distance_km: Some(2.3),
            ..Evidence::default()
        },
        image_url: Some("https://media.kellerby.example/kb07/0001.jpg".into()),
        folded: vec![],
    }
}

/// The email the outbox would send for `n` to `to`.
fn email_for(n: &Notice, to: &str) -> OutgoingEmail {
    let rendered = render_email(
        n,
        &EmailContext {
            time_zone: chrono_tz::Australia::Sydney,
            chance_in_words: None,
            status_url: Some("https://outrider.kellerby.example/status"),
            unsubscribe_url: UNSUBSCRIBE,
        },
    );
    let from = "outrider <notices@kellerby.example>";
    OutgoingEmail {
        from: from.into(),
        to: to.into(),
        subject: rendered.subject,
        text: rendered.text,
        html: rendered.html,
        message_id: outrider::deliver::email::message_id(n.id().as_str(), from).unwrap(),
        date: n.at,
        headers: list_unsubscribe_headers(UNSUBSCRIBE, Some(MAILTO)),
        inline_images: vec![],
    }
}

fn expect_err(r: Result<(), DeliveryError>, kind: ErrorKind, code: Option<u16>) -> DeliveryError {
    let e = r.expect_err("the delivery should have failed");
    assert_eq!(e.kind, kind, "{e}");
    assert_eq!(e.code, code, "{e}");
    e
}

// ------------------------------------------------------------------ email

#[test]
fn email_is_multipart_alternative_with_rfc5322_headers_and_a_stable_message_id() {
    let tmp = tempfile::tempdir().unwrap();
    let sink = Sink::smtp(&tmp.path().join("smtp"), &[]);
    let sender = EmailSender::new(&smtp(sink.port, SmtpSecurity::None)).unwrap();
    let n = notice();
    let email = email_for(&n, "Stonecroft <owner@stonecroft.example>");
    // The same email twice: what a retry after a lost reply sends.
    block_on(sender.send(&email)).unwrap();
    block_on(sender.send(&email)).unwrap();
    let files = sink.messages();
    assert_eq!(files.len(), 2);
    let first = parse_eml(&files[0]);
    let second = parse_eml(&files[1]);

    for m in [&first, &second] {
        // Python's email parser found nothing malformed.
        assert_eq!(m["defects"], serde_json::json!([]), "{m}");
        assert_eq!(m["part_defects"], serde_json::json!([]), "{m}");
        // RFC 5322 §3.6 (from memory): Date and From exactly once; To,
        // Subject and Message-ID at most once (we always send them).
        for h in [
            "From",
            "To",
            "Subject",
            "Date",
            "Message-ID",
            "MIME-Version",
        ] {
            one_header(m, h);
        }
        assert_eq!(
            m["addresses"]["from"],
            serde_json::json!([["outrider", "notices@kellerby.example"]])
        );
        assert_eq!(
            m["addresses"]["to"],
            serde_json::json!([["Stonecroft", "owner@stonecroft.example"]])
        );
        assert_eq!(m["date_iso"], "2025-07-14T16:15:00+00:00");
        assert_eq!(one_header(m, "MIME-Version"), "1.0");
        // RFC 8058 §3.1: exactly this header field body.
        assert_eq!(
            one_header(m, "List-Unsubscribe-Post"),
            "List-Unsubscribe=One-Click"
        );
        // RFC 2369 §3.2: URIs in angle brackets, comma separated.
        assert_eq!(
            one_header(m, "List-Unsubscribe"),
            format!("<{UNSUBSCRIBE}>, <{MAILTO}>")
        );
        // RFC 5322 §2.1.1 line limit 998 octets; §2.2 headers are US-ASCII
        // (no SMTPUTF8 here) with CRLF line ends.
        assert!(m["max_line_octets"].as_u64().unwrap() <= 998);
        assert_eq!(m["non_ascii_in_header"], false);
        assert_eq!(m["bare_lf_in_header"], false);
        // Both parts, the same words as the renderer made.
        assert_eq!(part(m, "text/plain"), email.text);
        assert_eq!(part(m, "text/html"), email.html);
    }
    // The Subject decodes back to what the renderer wrote.
    assert!(!email.subject.is_empty());
    assert_eq!(one_header(&first, "Subject"), email.subject);
    let id = format!("<{}@kellerby.example>", n.id());
    assert_eq!(one_header(&first, "Message-ID"), id);
    assert_eq!(one_header(&second, "Message-ID"), id);

    // The SMTP envelope (aiosmtpd's record): the addresses only.
    let attempts = sink.log("attempts.jsonl");
    assert_eq!(attempts.len(), 2);
    for a in &attempts {
        assert_eq!(a["code"], 250);
        assert_eq!(a["mail_from"], "notices@kellerby.example");
        assert_eq!(
            a["rcpt_tos"],
            serde_json::json!(["owner@stonecroft.example"])
        );
        assert_eq!(a["tls"], false);
    }
}

#[test]
fn line_breaks_markup_and_non_ascii_arrive_encoded_and_escaped() {
    let tmp = tempfile::tempdir().unwrap();
    let sink = Sink::smtp(&tmp.path().join("smtp"), &[]);
    let sender = EmailSender::new(&smtp(sink.port, SmtpSecurity::None)).unwrap();
    let mut n = notice();
    let evil_name = "Wattle Downs — Nörth\r\nBcc: victim@attacker.example";
    n.subscriber_name = evil_name.into();
    n.site_label = "<script>alert(1)</script>\r\nX-Injected: yes".into();
    n.vernacular_name = Some("wild dog\nX-Evil: 1".into());
    let mut email = email_for(&n, &format!("{evil_name} <owner@wattle.example>"));
    // The renderer already cleans the Subject; give the channel a raw one
    // to show it cleans it again.
    email.subject = format!("Wild dog near {evil_name}\r\nX-Subject-Injected: 1");
    block_on(sender.send(&email)).unwrap();
    let files = sink.messages();
    assert_eq!(files.len(), 1);
    let m = parse_eml(&files[0]);
    assert_eq!(m["defects"], serde_json::json!([]), "{m}");

    // No header beyond the ones we set (Python's email, every field name).
    let names: Vec<String> = m["headers"]
        .as_array()
        .unwrap()
        .iter()
        .map(|h| h["name"].as_str().unwrap().to_ascii_lowercase())
        .collect();
    let allowed = [
        "from",
        "to",
        "subject",
        "date",
        "message-id",
        "mime-version",
        "content-type",
        "list-unsubscribe",
        "list-unsubscribe-post",
    ];
    for name in &names {
        assert!(allowed.contains(&name.as_str()), "extra header {name}: {m}");
    }
    // Non-ASCII went out as RFC 2047 encoded words (raw header is ASCII)
    // and decodes back to the cleaned text.
    assert_eq!(m["non_ascii_in_header"], false);
    assert_eq!(
        one_header(&m, "Subject"),
        "Wild dog near Wattle Downs — Nörth Bcc: victim@attacker.example X-Subject-Injected: 1"
    );
    // The display name: one line, the address untouched. Read by RFC 2047
    // §6.2 rules (Python's getaddresses + decode_header) it is exactly the
    // cleaned name. policy.default's address parser puts a space where
    // lettre split the name into two encoded words (measured, a quirk of
    // that parser), so there only the words are compared.
    let clean = "Wattle Downs — Nörth Bcc: victim@attacker.example";
    assert_eq!(
        m["addresses_rfc2047"]["to"],
        serde_json::json!([[clean, "owner@wattle.example"]])
    );
    let to = &m["addresses"]["to"];
    assert_eq!(to.as_array().unwrap().len(), 1, "{to}");
    assert_eq!(to[0][1], "owner@wattle.example");
    let squash = |s: &str| s.split_whitespace().collect::<String>();
    assert_eq!(squash(to[0][0].as_str().unwrap()), squash(clean));
    // The envelope went to the one address only.
    let attempts = sink.log("attempts.jsonl");
    assert_eq!(
        attempts[0]["rcpt_tos"],
        serde_json::json!(["owner@wattle.example"])
    );
    // The HTML part escaped the markup; the text part kept the words.
    let html = part(&m, "text/html");
    assert!(
        html.contains("&lt;script&gt;alert(1)&lt;/script&gt;"),
        "{html}"
    );
    assert!(!html.contains("<script"), "{html}");
    let text = part(&m, "text/plain");
    assert!(text.contains("Wattle Downs — Nörth"), "{text}");
    assert!(!text.contains('\r'));
}

#[test]
fn smtp_451_is_retriable_and_the_retry_gets_through() {
    let tmp = tempfile::tempdir().unwrap();
    let sink = Sink::smtp(&tmp.path().join("smtp"), &["--fail-first", "1"]);
    let sender = EmailSender::new(&smtp(sink.port, SmtpSecurity::None)).unwrap();
    let email = email_for(&notice(), "owner@stonecroft.example");
    // RFC 5321 §4.2.1 (from memory): 4yz is a transient failure.
    let e = expect_err(
        block_on(sender.send(&email)),
        ErrorKind::Retriable,
        Some(451),
    );
    assert!(e.is_retriable());
    assert!(sink.messages().is_empty());
    block_on(sender.send(&email)).unwrap();
    assert_eq!(sink.messages().len(), 1);
    let codes: Vec<Value> = sink
        .log("attempts.jsonl")
        .iter()
        .map(|a| a["code"].clone())
        .collect();
    assert_eq!(codes, [451, 250]);
}

#[test]
fn smtp_550_is_permanent() {
    let tmp = tempfile::tempdir().unwrap();
    let sink = Sink::smtp(&tmp.path().join("smtp"), &["--reject-rcpt"]);
    let sender = EmailSender::new(&smtp(sink.port, SmtpSecurity::None)).unwrap();
    let email = email_for(&notice(), "nobody@stonecroft.example");
    // RFC 5321 §4.2.1 (from memory): 5yz is a permanent failure.
    let e = expect_err(
        block_on(sender.send(&email)),
        ErrorKind::Permanent,
        Some(550),
    );
    assert!(!e.is_retriable());
    assert!(sink.messages().is_empty());
    assert_eq!(sink.log("attempts.jsonl")[0]["stage"], "rcpt");
}

#[test]
fn smtp_connection_refused_is_retriable() {
    // A port nobody listens on: the kernel refuses the connection.
    let port = free_port();
    let sender = EmailSender::new(&smtp(port, SmtpSecurity::None)).unwrap();
    let email = email_for(&notice(), "owner@stonecroft.example");
    expect_err(block_on(sender.send(&email)), ErrorKind::Retriable, None);
}

/// A test CA and a server certificate for 127.0.0.1 signed by it, as PEM
/// files in `dir`: (ca.pem, cert.pem, key.pem).
pub fn test_certificates(dir: &Path) -> (PathBuf, PathBuf, PathBuf) {
    use rcgen::{
        BasicConstraints, CertificateParams, DnType, ExtendedKeyUsagePurpose, IsCa, KeyPair,
        KeyUsagePurpose, SanType,
    };
    let ca_key = KeyPair::generate().unwrap();
    let mut ca = CertificateParams::new(Vec::<String>::new()).unwrap();
    ca.is_ca = IsCa::Ca(BasicConstraints::Unconstrained);
    ca.distinguished_name
        .push(DnType::CommonName, "Kellerby Basin test CA");
    ca.key_usages = vec![KeyUsagePurpose::KeyCertSign, KeyUsagePurpose::CrlSign];
    let ca_cert = ca.self_signed(&ca_key).unwrap();

    let key = KeyPair::generate().unwrap();
    let mut leaf = CertificateParams::new(vec!["localhost".to_owned()]).unwrap();
    leaf.subject_alt_names
        .push(SanType::IpAddress(IpAddr::V4(Ipv4Addr::LOCALHOST)));
    leaf.distinguished_name
        .push(DnType::CommonName, "relay.kellerby.example");
    leaf.extended_key_usages = vec![ExtendedKeyUsagePurpose::ServerAuth];
    let cert = leaf.signed_by(&key, &ca_cert, &ca_key).unwrap();

    let paths = (
        dir.join("ca.pem"),
        dir.join("cert.pem"),
        dir.join("key.pem"),
    );
    std::fs::create_dir_all(dir).unwrap();
    std::fs::write(&paths.0, ca_cert.pem()).unwrap();
    std::fs::write(&paths.1, cert.pem()).unwrap();
    std::fs::write(&paths.2, key.serialize_pem()).unwrap();
    paths
}

#[test]
fn starttls_with_a_test_ca_and_auth() {
    let tmp = tempfile::tempdir().unwrap();
    let (ca, cert, key) = test_certificates(&tmp.path().join("pki"));
    let sink = Sink::smtp(
        &tmp.path().join("smtp"),
        &[
            "--tls-cert",
            cert.to_str().unwrap(),
            "--tls-key",
            key.to_str().unwrap(),
            "--auth",
            "kellerby-relay:correct horse",
        ],
    );
    let mut cfg = smtp(sink.port, SmtpSecurity::StartTls);
    cfg.username = Some("kellerby-relay".into());
    cfg.password = Some(Secret::new("correct horse"));
    let options = EmailOptions {
        timeout: Duration::from_secs(10),
        ca_file: Some(ca.clone()),
    };
    let email = email_for(&notice(), "owner@stonecroft.example");

    // Without our CA the server's certificate is not trusted: nothing is
    // sent, and the failure is retriable (the relay's certificate may be
    // fixed).
    let untrusted = EmailSender::with_options(
        &cfg,
        &EmailOptions {
            ca_file: None,
            ..options.clone()
        },
    )
    .unwrap();
    let e = expect_err(block_on(untrusted.send(&email)), ErrorKind::Retriable, None);
    assert!(e.message.contains("tls"), "{e}");
    assert!(sink.messages().is_empty());

    // A wrong password: aiosmtpd answers 535 (RFC 4954 §6, from memory),
    // permanent.
    let mut wrong = cfg.clone();
    wrong.password = Some(Secret::new("wrong"));
    let bad = EmailSender::with_options(&wrong, &options).unwrap();
    let e = expect_err(block_on(bad.send(&email)), ErrorKind::Permanent, Some(535));
    assert!(!e.message.contains("wrong"), "the password leaked: {e}");

    // With the CA: STARTTLS, AUTH, delivered.
    let sender = EmailSender::with_options(&cfg, &options).unwrap();
    block_on(sender.send(&email)).unwrap();
    assert_eq!(sink.messages().len(), 1);
    let ok: Vec<Value> = sink
        .log("attempts.jsonl")
        .into_iter()
        .filter(|a| a["code"] == 250)
        .collect();
    assert_eq!(ok.len(), 1);
    assert_eq!(ok[0]["tls"], true);
    assert_eq!(ok[0]["auth_user"], "kellerby-relay");
}

#[test]
fn implicit_tls_with_a_test_ca() {
    let tmp = tempfile::tempdir().unwrap();
    let (ca, cert, key) = test_certificates(&tmp.path().join("pki"));
    let sink = Sink::smtp(
        &tmp.path().join("smtp"),
        &[
            "--tls-cert",
            cert.to_str().unwrap(),
            "--tls-key",
            key.to_str().unwrap(),
            "--implicit-tls",
        ],
    );
    let sender = EmailSender::with_options(
        &smtp(sink.port, SmtpSecurity::Tls),
        &EmailOptions {
            timeout: Duration::from_secs(10),
            ca_file: Some(ca),
        },
    )
    .unwrap();
    block_on(sender.send(&email_for(&notice(), "owner@stonecroft.example"))).unwrap();
    let attempts = sink.log("attempts.jsonl");
    assert_eq!(attempts.len(), 1);
    assert_eq!(attempts[0]["tls"], true);
    assert_eq!(
        parse_eml(&sink.messages()[0])["defects"],
        serde_json::json!([])
    );
}

// ----------------------------------------------------------------- folder

#[test]
fn folder_writes_one_eml_per_email_that_python_reads() {
    let tmp = tempfile::tempdir().unwrap();
    let dir = tmp.path().join("mail");
    let folder = FolderSender::new(&dir);
    let n = notice();
    let email = email_for(&n, "Stonecroft <owner@stonecroft.example>");
    let path = block_on(folder.send(&email)).unwrap();
    assert_eq!(
        path.file_name().unwrap().to_str().unwrap(),
        format!("{}@kellerby.example.eml", n.id())
    );
    // Written again (a retry): the same one file, no temporary left over.
    block_on(folder.send(&email)).unwrap();
    let names: Vec<String> = std::fs::read_dir(&dir)
        .unwrap()
        .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
        .collect();
    assert_eq!(names.len(), 1, "{names:?}");

    let m = parse_eml(&path);
    assert_eq!(m["defects"], serde_json::json!([]), "{m}");
    assert_eq!(
        one_header(&m, "Message-ID"),
        format!("<{}@kellerby.example>", n.id())
    );
    one_header(&m, "Date");
    assert_eq!(one_header(&m, "Subject"), email.subject);
    assert_eq!(
        one_header(&m, "List-Unsubscribe-Post"),
        "List-Unsubscribe=One-Click"
    );
    assert_eq!(part(&m, "text/plain"), email.text);
    assert_eq!(part(&m, "text/html"), email.html);
    // CRLF line ends throughout (RFC 5322 §2.1), as mail programs expect
    // of an .eml file (common practice).
    let raw = std::fs::read(&path).unwrap();
    let bare_lf = raw
        .iter()
        .enumerate()
        .filter(|(i, b)| **b == b'\n' && (*i == 0 || raw[i - 1] != b'\r'))
        .count();
    assert_eq!(bare_lf, 0);

    // The one-line reader docs/delivery.md gives (standard library only).
    let out = Command::new(python())
        .arg("-c")
        .arg(READ_EML_ONE_LINER)
        .arg(&path)
        .output()
        .unwrap();
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let shown = String::from_utf8(out.stdout).unwrap();
    assert!(
        shown.starts_with(&format!("Subject: {}\n", email.subject)),
        "{shown}"
    );
    assert!(
        shown.contains(email.text.lines().next().unwrap()),
        "{shown}"
    );
}

/// Copied from docs/delivery.md "The mail folder"; keep the two the same.
const READ_EML_ONE_LINER: &str = r#"import sys, email, email.policy as p; m = email.message_from_binary_file(open(sys.argv[1], "rb"), policy=p.default); print("Subject:", m["subject"]); print(m.get_body(("plain",)).get_content())"#;

#[test]
fn folder_refuses_a_bad_message_id_permanently() {
    let tmp = tempfile::tempdir().unwrap();
    let folder = FolderSender::new(tmp.path().join("mail"));
    let mut email = email_for(&notice(), "owner@stonecroft.example");
    email.message_id = "<../escape@kellerby.example>".into();
    let e = block_on(folder.send(&email)).unwrap_err();
    assert_eq!(e.kind, ErrorKind::Permanent, "{e}");
    assert!(!tmp.path().join("escape@kellerby.example.eml").exists());
}

// ---------------------------------------------------------------- webhook

const HOOK_SECRET: &str = "kellerby-hook-secret";

fn hook(port: u16, secret: Option<&str>) -> Webhook {
    Webhook {
        url: format!("http://127.0.0.1:{port}/outrider"),
        secret: secret.map(Secret::new),
    }
}

fn body(n: &Notice) -> Vec<u8> {
    serde_json::to_vec(&n.replay_line()).unwrap()
}

fn request_header<'a>(req: &'a Value, name: &str) -> Vec<&'a str> {
    req["headers"]
        .as_array()
        .unwrap()
        .iter()
        .filter(|h| h[0].as_str().unwrap().eq_ignore_ascii_case(name))
        .map(|h| h[1].as_str().unwrap())
        .collect()
}

fn request_body(req: &Value) -> Vec<u8> {
    use base64::Engine;
    base64::engine::general_purpose::STANDARD
        .decode(req["body_b64"].as_str().unwrap())
        .unwrap()
}

#[test]
fn webhook_500_is_retriable_then_200_delivers_with_a_signature_python_accepts() {
    let tmp = tempfile::tempdir().unwrap();
    let sink = Sink::webhook(
        &tmp.path().join("hook"),
        &["--statuses", "500,200", "--secret", HOOK_SECRET],
    );
    let sender = WebhookSender::new().unwrap();
    let n = notice();
    let req = OutgoingWebhook::to(
        &hook(sink.port, Some(HOOK_SECRET)),
        n.id().as_str(),
        body(&n),
        1752545700,
    );
    // RFC 9110 §15.6 (from memory): 5xx is the server's fault; try later.
    expect_err(block_on(sender.send(&req)), ErrorKind::Retriable, Some(500));
    block_on(sender.send(&req)).unwrap();

    let seen = sink.log("requests.jsonl");
    assert_eq!(seen.len(), 2);
    for r in &seen {
        assert_eq!(r["method"], "POST");
        assert_eq!(r["path"], "/outrider");
        // Python's hmac module over the raw body (docs/notices.md §6).
        assert_eq!(r["signature_ok"], true, "{r}");
        assert_eq!(request_header(r, "Content-Type"), ["application/json"]);
        assert_eq!(request_header(r, "Idempotency-Key"), [n.id().as_str()]);
        assert_eq!(request_header(r, "Outrider-Timestamp"), ["1752545700"]);
        assert_eq!(request_body(r), body(&n));
        // The body is the notice's JSON line.
        let v: Value = serde_json::from_slice(&request_body(r)).unwrap();
        assert_eq!(v["noticeID"], n.id().as_str());
    }
}

#[test]
fn webhook_signed_with_another_secret_fails_pythons_check() {
    // The check above can fail: the sink knows a different secret.
    let tmp = tempfile::tempdir().unwrap();
    let sink = Sink::webhook(&tmp.path().join("hook"), &["--secret", "another-secret"]);
    let sender = WebhookSender::new().unwrap();
    let n = notice();
    let req = OutgoingWebhook::to(
        &hook(sink.port, Some(HOOK_SECRET)),
        n.id().as_str(),
        body(&n),
        1752545700,
    );
    block_on(sender.send(&req)).unwrap();
    assert_eq!(sink.log("requests.jsonl")[0]["signature_ok"], false);
}

#[test]
fn webhook_404_is_permanent_and_unsigned_without_a_secret() {
    let tmp = tempfile::tempdir().unwrap();
    let sink = Sink::webhook(&tmp.path().join("hook"), &["--statuses", "404"]);
    let sender = WebhookSender::new().unwrap();
    let n = notice();
    let req = OutgoingWebhook::to(
        &hook(sink.port, None),
        n.id().as_str(),
        body(&n),
        1752545700,
    );
    // RFC 9110 §15.5.5 (from memory): 404 Not Found; waiting will not help.
    expect_err(block_on(sender.send(&req)), ErrorKind::Permanent, Some(404));
    let r = &sink.log("requests.jsonl")[0];
    assert!(request_header(r, "Outrider-Signature").is_empty());
    assert!(request_header(r, "Outrider-Timestamp").is_empty());
    assert_eq!(request_header(r, "Idempotency-Key"), [n.id().as_str()]);
}

#[test]
fn webhook_redirect_is_not_followed_and_is_permanent() {
    let tmp = tempfile::tempdir().unwrap();
    let port_holder = Sink::webhook(&tmp.path().join("other"), &[]);
    let location = format!("http://127.0.0.1:{}/elsewhere", port_holder.port);
    let sink = Sink::webhook(
        &tmp.path().join("hook"),
        &["--statuses", "307", "--location", &location],
    );
    let sender = WebhookSender::new().unwrap();
    let n = notice();
    let req = OutgoingWebhook::to(
        &hook(sink.port, Some(HOOK_SECRET)),
        n.id().as_str(),
        body(&n),
        1752545700,
    );
    let e = expect_err(block_on(sender.send(&req)), ErrorKind::Permanent, Some(307));
    assert!(e.message.contains("/elsewhere"), "{e}");
    assert_eq!(sink.log("requests.jsonl").len(), 1);
    // Nothing reached the address the redirect pointed to.
    assert!(port_holder.log("requests.jsonl").is_empty());
}

#[test]
fn webhook_429_timeout_and_refused_connection_are_retriable() {
    let tmp = tempfile::tempdir().unwrap();
    let sink = Sink::webhook(&tmp.path().join("hook"), &["--statuses", "429"]);
    let sender = WebhookSender::with_timeout(Duration::from_secs(2)).unwrap();
    let n = notice();
    let req = OutgoingWebhook::to(
        &hook(sink.port, None),
        n.id().as_str(),
        body(&n),
        1752545700,
    );
    // 429 Too Many Requests: try later (RFC 6585 §4, from memory).
    expect_err(block_on(sender.send(&req)), ErrorKind::Retriable, Some(429));

    // A listener that accepts and never answers: the client's limit ends
    // the attempt.
    let silent = std::net::TcpListener::bind("127.0.0.1:0").unwrap();
    let port = silent.local_addr().unwrap().port();
    let req = OutgoingWebhook::to(&hook(port, None), n.id().as_str(), body(&n), 1752545700);
    let started = std::time::Instant::now();
    let e = expect_err(block_on(sender.send(&req)), ErrorKind::Retriable, None);
    assert!(e.message.contains("timed out"), "{e}");
    assert!(started.elapsed() < Duration::from_secs(10));
    drop(silent);

    // Nobody listening at all. The URL's query (a receiver's token) stays
    // out of the error message.
    let mut req = OutgoingWebhook::to(
        &hook(free_port(), None),
        n.id().as_str(),
        body(&n),
        1752545700,
    );
    req.url.push_str("?token=s3cr3t-kellerby");
    let e = expect_err(block_on(sender.send(&req)), ErrorKind::Retriable, None);
    assert!(!e.message.contains("s3cr3t"), "{e}");
    assert!(!e.message.contains("/outrider"), "{e}");

    // Not an http(s) URL: permanent, nothing sent.
    let mut bad = req.clone();
    bad.url = "ftp://127.0.0.1/outrider".into();
    expect_err(block_on(sender.send(&bad)), ErrorKind::Permanent, None);
}
