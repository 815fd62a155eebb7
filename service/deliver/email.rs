//! Email over SMTP: one [`OutgoingEmail`] in, one RFC 5322 message out
//! through lettre's async SMTP transport, and the server's answer mapped to
//! `Ok(())` or a [`DeliveryError`].
//!
//! Role: the I/O shell of the email channel, plus [`build_message`], the one
//! place where a prepared email becomes a lettre [`Message`] (the mail
//! folder writes the very same message). The words come from
//! [`crate::notify::render_email`]; nothing here composes text, escapes HTML
//! or decides when to retry.
//!
//! What every message gets (DESIGN.md "Delivery"):
//! - `multipart/alternative` with a `text/plain` and a `text/html` part,
//!   both UTF-8 (lettre picks 7bit, quoted-printable or base64 and writes
//!   CRLF line ends);
//! - the caller's Message-ID (`<notice-id@host>`), checked for RFC 5322
//!   `msg-id` shape, so a retry carries the same id;
//! - the caller's Date (no clock read here);
//! - display names and the Subject passed through
//!   [`crate::notify::header_safe`] before lettre sees them: lettre 0.11
//!   panics when a mailbox display name holds CR or LF (measured, see the
//!   `tests` module and docs/delivery.md); lettre then RFC 2047-encodes
//!   non-ASCII words and quotes names;
//! - extra headers (`List-Unsubscribe`, `List-Unsubscribe-Post`) with their
//!   values cleaned the same way; names that lettre sets itself (From, To,
//!   Subject, Date, Message-ID, MIME and Content headers, Bcc, ...) are
//!   refused, so a caller cannot overwrite them.
//!
//! Transport: `security = "none"` is plain SMTP (config allows it only to
//! this machine), `starttls` upgrades and refuses to go on without TLS,
//! `tls` is TLS from the first byte. Certificates are checked against the
//! system's roots plus an optional extra CA file ([`EmailOptions::ca_file`]).
//! One connection per send (no pool): a failed connection never poisons the
//! next notice. Errors: a 5xx reply is permanent, a 4xx reply, a refused or
//! dropped connection, a timeout and a TLS failure are retriable
//! ([`crate::notify::classify_smtp`]); a message that cannot be built is
//! permanent.

use std::path::PathBuf;
use std::time::{Duration, SystemTime};

use chrono::{DateTime, Utc};
use lettre::message::header::{ContentType, HeaderName, HeaderValue};
use lettre::message::{Mailbox, MultiPart, SinglePart};
use lettre::transport::smtp::authentication::Credentials;
use lettre::transport::smtp::client::{Certificate, Tls, TlsParameters};
use lettre::{Address, AsyncSmtpTransport, AsyncTransport, Message, Tokio1Executor};

use crate::config::{Smtp, SmtpSecurity};
use crate::deliver::DeliveryError;
use crate::notify::{classify_smtp, header_safe};

/// Default limit for connecting and for each SMTP command.
pub const DEFAULT_SMTP_TIMEOUT: Duration = Duration::from_secs(30);

/// Header names the message builder sets itself; an extra header with one of
/// these names is refused (compared without regard to case).
const RESERVED_HEADERS: &[&str] = &[
    "from",
    "to",
    "cc",
    "bcc",
    "sender",
    "reply-to",
    "subject",
    "date",
    "message-id",
    "mime-version",
    "content-type",
    "content-transfer-encoding",
    "return-path",
];

/// One email, ready to go: the rendered words plus the envelope facts.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct OutgoingEmail {
    /// `Name <address>` or a bare address (config `smtp.from`).
    pub from: String,
    /// `Name <address>` or a bare address. The name may come from the
    /// config or a message: it is cleaned before use.
    pub to: String,
    /// One line; cleaned again here, then RFC 2047-encoded by lettre.
    pub subject: String,
    /// The plain-text part.
    pub text: String,
    /// The HTML part, already escaped by the renderer.
    pub html: String,
    /// `<local@domain>`; the same on every attempt (see [`message_id`]).
    pub message_id: String,
    /// The Date header. The caller's clock, so retries and tests control it.
    pub date: DateTime<Utc>,
    /// Extra header fields in order, e.g. the output of
    /// [`crate::notify::render::list_unsubscribe_headers`].
    pub headers: Vec<(&'static str, String)>,
    /// Images the HTML part shows by `cid:` (RFC 2392), sent with it in a
    /// multipart/related part (RFC 2387): no remote images.
    pub inline_images: Vec<InlineImage>,
}

/// An image carried inside the message.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct InlineImage {
    /// The Content-ID without angle brackets, e.g. `chart@outrider`.
    pub content_id: String,
    /// A MIME type such as `image/png`.
    pub content_type: String,
    pub bytes: Vec<u8>,
}

/// Transport settings that are not part of the `[smtp]` config.
#[derive(Debug, Clone)]
pub struct EmailOptions {
    /// Limit for the connection and for each SMTP command.
    pub timeout: Duration,
    /// A PEM file of extra CA certificates to trust besides the system's
    /// (a private relay, the tests' own CA).
    pub ca_file: Option<PathBuf>,
}

impl Default for EmailOptions {
    fn default() -> Self {
        Self {
            timeout: DEFAULT_SMTP_TIMEOUT,
            ca_file: None,
        }
    }
}

/// Sends emails through one SMTP server. Cheap to share by reference; each
/// [`EmailSender::send`] opens its own connection.
pub struct EmailSender {
    transport: AsyncSmtpTransport<Tokio1Executor>,
    /// `host:port`, for error messages.
    server: String,
}

impl std::fmt::Debug for EmailSender {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("EmailSender")
            .field("server", &self.server)
            .finish_non_exhaustive()
    }
}

impl EmailSender {
    /// A sender for the `[smtp]` section with the default options.
    pub fn new(smtp: &Smtp) -> Result<Self, DeliveryError> {
        Self::with_options(smtp, &EmailOptions::default())
    }

    /// A sender with a timeout and an extra CA file. Fails (permanently)
    /// when the CA file cannot be read or the TLS settings cannot be built.
    pub fn with_options(smtp: &Smtp, options: &EmailOptions) -> Result<Self, DeliveryError> {
        ensure_crypto_provider();
        let tls = match smtp.security {
            SmtpSecurity::None => Tls::None,
            SmtpSecurity::StartTls => Tls::Required(tls_parameters(&smtp.host, options)?),
            SmtpSecurity::Tls => Tls::Wrapper(tls_parameters(&smtp.host, options)?),
        };
        let mut builder = AsyncSmtpTransport::<Tokio1Executor>::builder_dangerous(&smtp.host)
            .port(smtp.port)
            .tls(tls)
            .timeout(Some(options.timeout));
        if let Some(user) = &smtp.username {
            let password = smtp
                .password
                .as_ref()
                .map(|p| p.expose().to_owned())
                .unwrap_or_default();
            builder = builder.credentials(Credentials::new(user.clone(), password));
        }
        Ok(Self {
            transport: builder.build(),
            server: format!("{}:{}", smtp.host, smtp.port),
        })
    }

    /// Sends one email. `Ok(())` once the server accepted the message
    /// (2xx after DATA).
    pub async fn send(&self, email: &OutgoingEmail) -> Result<(), DeliveryError> {
        let message = build_message(email)?;
        self.transport
            .send(message)
            .await
            .map(|_| ())
            .map_err(|e| smtp_error(&self.server, &e))
    }
}

/// Installs ring as the process's rustls provider when none is installed
/// yet (`main` installs it first; tests and tools may not have). Installing
/// fails harmlessly when a provider is already there.
pub(crate) fn ensure_crypto_provider() {
    if rustls::crypto::CryptoProvider::get_default().is_none() {
        let _ = rustls::crypto::ring::default_provider().install_default();
    }
}

fn tls_parameters(host: &str, options: &EmailOptions) -> Result<TlsParameters, DeliveryError> {
    let mut builder = TlsParameters::builder(host.to_owned());
    if let Some(path) = &options.ca_file {
        let pem = std::fs::read(path).map_err(|e| {
            DeliveryError::permanent(format!("cannot read the CA file {}: {e}", path.display()))
        })?;
        let cert = Certificate::from_pem(&pem).map_err(|e| {
            DeliveryError::permanent(format!(
                "the CA file {} holds no usable certificate: {e}",
                path.display()
            ))
        })?;
        builder = builder.add_root_certificate(cert);
    }
    builder
        .build_rustls()
        .map_err(|e| DeliveryError::permanent(format!("cannot set up TLS for {host}: {e}")))
}

/// A lettre SMTP error as a delivery error: a reply code goes through
/// [`classify_smtp`] (5xx permanent, 4xx retriable); everything else
/// (connection refused or dropped, timeout, TLS, an unreadable reply, a
/// server without STARTTLS) is about the server or the network, not this
/// message, and is retriable.
fn smtp_error(server: &str, e: &lettre::transport::smtp::Error) -> DeliveryError {
    match e.status() {
        Some(code) => {
            let n = code.severity as u16 * 100 + code.category as u16 * 10 + code.detail as u16;
            DeliveryError::from_code(n, classify_smtp, format!("smtp {server}: {e}"))
        }
        None => {
            let what = if e.is_timeout() {
                "timed out"
            } else if e.is_tls() || is_tls_failure(e) {
                "tls failed"
            } else {
                "failed"
            };
            DeliveryError::retriable(format!("smtp {server} {what}: {e}"))
        }
    }
}

/// Whether a rustls error (a certificate that does not verify, a failed
/// handshake) is somewhere in `e`'s chain. lettre reports those as
/// connection errors, not as TLS errors (measured with lettre 0.11.23).
/// `io::Error::source` skips the error it wraps, so that one is looked at
/// through `get_ref`.
fn is_tls_failure(e: &(dyn std::error::Error + 'static)) -> bool {
    let mut next: Option<&(dyn std::error::Error + 'static)> = Some(e);
    while let Some(err) = next {
        if err.is::<rustls::Error>() {
            return true;
        }
        if let Some(io) = err.downcast_ref::<std::io::Error>() {
            if io
                .get_ref()
                .is_some_and(|inner| inner.is::<rustls::Error>())
            {
                return true;
            }
        }
        next = err.source();
    }
    false
}

/// `<local@domain>` for a notice: the notice id as the local part and the
/// domain of the `from` address (e.g. `kellerby.example` for
/// `outrider <notices@kellerby.example>`). `None` when `from` has no usable
/// domain or `local` is not a dot-atom.
pub fn message_id(local: &str, from: &str) -> Option<String> {
    let mailbox = parse_mailbox(from, "from").ok()?;
    let id = format!("<{local}@{}>", mailbox.email.domain());
    is_message_id(&id).then_some(id)
}

/// Whether `s` is an RFC 5322 `msg-id` of the dot-atom form
/// `"<" dot-atom-text "@" dot-atom-text ">"`, at most 250 bytes.
pub fn is_message_id(s: &str) -> bool {
    let Some(inner) = s.strip_prefix('<').and_then(|r| r.strip_suffix('>')) else {
        return false;
    };
    let Some((left, right)) = inner.split_once('@') else {
        return false;
    };
    s.len() <= 250 && is_dot_atom(left) && is_dot_atom(right)
}

/// RFC 5322 §3.2.3 `dot-atom-text`: atext runs joined by single dots.
fn is_dot_atom(s: &str) -> bool {
    let atext = |b: u8| b.is_ascii_alphanumeric() || b"!#$%&'*+-/=?^_`{|}~".contains(&b);
    !s.is_empty()
        && s.split('.')
            .all(|run| !run.is_empty() && run.bytes().all(atext))
}

/// `Name <address>`, `"Name" <address>` or a bare address as a lettre
/// mailbox. The name is cleaned with [`header_safe`] (an empty name becomes
/// none); the address must parse as an addr-spec and hold no control or
/// space characters. Split at the last `<`, so a name holding `<` survives.
pub fn parse_mailbox(s: &str, what: &str) -> Result<Mailbox, DeliveryError> {
    let s = s.trim();
    let (name, addr) = match (s.rfind('<'), s.strip_suffix('>')) {
        (Some(i), Some(_)) => (&s[..i], &s[i + 1..s.len() - 1]),
        _ => ("", s),
    };
    let addr = addr.trim();
    if addr.is_empty() || addr.chars().any(|c| c.is_control() || c.is_whitespace()) {
        return Err(DeliveryError::permanent(format!(
            "{what} address {:?} is not a mail address",
            header_safe(addr)
        )));
    }
    let address: Address = addr.parse().map_err(|e| {
        DeliveryError::permanent(format!(
            "{what} address {:?} is not a mail address: {e}",
            header_safe(addr)
        ))
    })?;
    let name = name.trim();
    let name = name
        .strip_prefix('"')
        .and_then(|n| n.strip_suffix('"'))
        .unwrap_or(name);
    let name = header_safe(name);
    Ok(Mailbox::new((!name.is_empty()).then_some(name), address))
}

/// The RFC 5322 message for `email`: the single builder shared by SMTP and
/// the mail folder. Fails (permanently) on a bad address, a bad Message-ID
/// or a reserved or malformed extra header name.
pub fn build_message(email: &OutgoingEmail) -> Result<Message, DeliveryError> {
    if !is_message_id(&email.message_id) {
        return Err(DeliveryError::permanent(format!(
            "message id {:?} is not <local@domain>",
            header_safe(&email.message_id)
        )));
    }
    let from = parse_mailbox(&email.from, "from")?;
    let to = parse_mailbox(&email.to, "to")?;
    let text = SinglePart::builder()
        .header(ContentType::TEXT_PLAIN)
        .body(email.text.clone());
    let html = SinglePart::builder()
        .header(ContentType::TEXT_HTML)
        .body(email.html.clone());
    let body = if email.inline_images.is_empty() {
        MultiPart::alternative().singlepart(text).singlepart(html)
    } else {
        // multipart/alternative { text, multipart/related { html, images } }
        let mut related = MultiPart::related().singlepart(html);
        for img in &email.inline_images {
            let ct = ContentType::parse(&img.content_type).map_err(|e| {
                DeliveryError::permanent(format!("bad image type {:?}: {e}", img.content_type))
            })?;
            related = related.singlepart(
                lettre::message::Attachment::new_inline(header_safe(&img.content_id))
                    .body(lettre::message::Body::new(img.bytes.clone()), ct),
            );
        }
        MultiPart::alternative().singlepart(text).multipart(related)
    };
    let mut builder = Message::builder()
        .from(from)
        .to(to)
        .subject(header_safe(&email.subject))
        .date(SystemTime::from(email.date))
        .message_id(Some(email.message_id.clone()));
    for (name, value) in &email.headers {
        builder = builder.raw_header(extra_header(name, value)?);
    }
    builder
        .multipart(body)
        .map_err(|e| DeliveryError::permanent(format!("cannot build the email: {e}")))
}

fn extra_header(name: &str, value: &str) -> Result<HeaderValue, DeliveryError> {
    if RESERVED_HEADERS
        .iter()
        .any(|r| r.eq_ignore_ascii_case(name))
    {
        return Err(DeliveryError::permanent(format!(
            "header {name} is set by the message builder"
        )));
    }
    // RFC 5322 §2.2 field-name: printable US-ASCII except colon. lettre's
    // own check is the same but is also enforced here so that its message
    // is ours.
    let ok = !name.is_empty() && name.bytes().all(|b| (33..=126).contains(&b) && b != b':');
    let header = ok
        .then(|| HeaderName::new_from_ascii(name.to_owned()).ok())
        .flatten()
        .ok_or_else(|| {
            DeliveryError::permanent(format!(
                "{:?} is not a header field name",
                header_safe(name)
            ))
        })?;
    Ok(HeaderValue::new(header, header_safe(value)))
}

#[cfg(test)]
mod tests {
    use super::*;
    use chrono::TimeZone;

    fn email() -> OutgoingEmail {
        OutgoingEmail {
            from: "outrider <notices@kellerby.example>".into(),
            to: "Stonecroft <owner@stonecroft.example>".into(),
            subject: "Wild dog seen near Stonecroft".into(),
            text: "A wild dog was seen.\n".into(),
            html: "<p>A wild dog was seen.</p>\n".into(),
            message_id: "<2b65300baab149c9cfd5913a126e242d@kellerby.example>".into(),
            date: Utc.with_ymd_and_hms(2025, 7, 14, 16, 15, 0).unwrap(),
            headers: vec![
                (
                    "List-Unsubscribe",
                    "<https://kellerby.example/u/abc>".into(),
                ),
                ("List-Unsubscribe-Post", "List-Unsubscribe=One-Click".into()),
            ],
            inline_images: vec![],
        }
    }

    fn formatted(e: &OutgoingEmail) -> String {
        String::from_utf8(build_message(e).unwrap().formatted()).unwrap()
    }

    /// The header block, unfolded (RFC 5322 §2.2.3: CRLF followed by WSP).
    fn header_lines(raw: &str) -> Vec<String> {
        let head = raw.split("\r\n\r\n").next().unwrap();
        head.replace("\r\n ", " ")
            .replace("\r\n\t", "\t")
            .split("\r\n")
            .map(str::to_owned)
            .collect()
    }

    #[test]
    fn lettre_panics_on_cr_lf_in_a_display_name() {
        // The measured fact behind cleaning names before lettre sees them:
        // lettre 0.11's quoted-string encoder hits an unreachable branch on
        // a control character. If a future lettre stops panicking this test
        // fails and the comment in the module docs should be revisited.
        let r = std::panic::catch_unwind(|| {
            let mb = Mailbox::new(
                Some("Evil\r\nBcc: x@attacker.example".into()),
                "owner@stonecroft.example".parse().unwrap(),
            );
            Message::builder()
                .from(mb.clone())
                .to(mb)
                .body(String::from("x"))
                .map(|m| m.formatted())
        });
        assert!(r.is_err(), "lettre no longer panics on CR/LF in a name");
    }

    #[test]
    fn lettre_encodes_cr_lf_in_a_subject_as_an_encoded_word() {
        // Measured with lettre 0.11.23: a raw CR/LF in a Subject does not
        // start a new header line; it goes inside an RFC 2047 encoded word
        // (a reader would decode a line break into the subject, which is
        // why the Subject is still cleaned first).
        let mb: Mailbox = "owner@stonecroft.example".parse().unwrap();
        let m = Message::builder()
            .from(mb.clone())
            .to(mb)
            .subject("Hi\r\nBcc: x@attacker.example")
            .body(String::from("x"))
            .unwrap();
        let raw = String::from_utf8(m.formatted()).unwrap();
        assert!(
            raw.contains("Subject: =?utf-8?b?SGkNCkJjYzo=?= x@attacker.example\r\n"),
            "{raw}"
        );
        assert!(!header_lines(&raw).iter().any(|l| l.starts_with("Bcc:")));
    }

    #[test]
    fn names_with_line_breaks_are_cleaned_not_injected() {
        let mut e = email();
        e.to = "Stone\r\ncroft\r\nBcc: x@attacker.example <owner@stonecroft.example>".into();
        e.subject = "Wild dog\r\nBcc: x@attacker.example".into();
        let raw = formatted(&e);
        let lines = header_lines(&raw);
        assert!(
            !lines
                .iter()
                .any(|l| l.to_ascii_lowercase().starts_with("bcc:")),
            "{raw}"
        );
        assert!(lines
            .iter()
            .any(|l| l == "Subject: Wild dog Bcc: x@attacker.example"));
        // The mailbox keeps the address; the name is one line.
        let to = lines.iter().find(|l| l.starts_with("To: ")).unwrap();
        assert!(to.ends_with("<owner@stonecroft.example>"), "{to}");
        assert!(!to.contains('\r') && !to.contains('\n'));
    }

    #[test]
    fn message_id_and_date_are_the_callers() {
        let raw = formatted(&email());
        let lines = header_lines(&raw);
        assert!(lines
            .iter()
            .any(|l| l == "Message-ID: <2b65300baab149c9cfd5913a126e242d@kellerby.example>"));
        // RFC 5322 §3.3 date-time; the day and zone as lettre writes them.
        assert!(
            lines
                .iter()
                .any(|l| l == "Date: Mon, 14 Jul 2025 16:15:00 +0000"),
            "{lines:?}"
        );
        assert!(lines
            .iter()
            .any(|l| l == "List-Unsubscribe-Post: List-Unsubscribe=One-Click"));
        // Same input, same headers (the MIME boundary is random).
        let again = header_lines(&formatted(&email()));
        let keep = |v: &Vec<String>| -> Vec<String> {
            v.iter()
                .filter(|l| !l.starts_with("Content-Type: multipart"))
                .cloned()
                .collect()
        };
        assert_eq!(keep(&lines), keep(&again));
    }

    #[test]
    fn bad_inputs_are_permanent_errors() {
        let cases: Vec<fn(&mut OutgoingEmail)> = vec![
            |e| e.message_id = "no-angle@kellerby.example".into(),
            |e| e.message_id = "<two words@kellerby.example>".into(),
            |e| e.message_id = "<id@kellerby.example>\r\nBcc: x@y.example".into(),
            |e| e.to = "Stonecroft <not an address>".into(),
            |e| e.to = "owner@stonecroft.example\r\nBcc: x@y.example".into(),
            |e| e.from = "outrider".into(),
            |e| e.headers.push(("Bcc", "x@attacker.example".into())),
            |e| e.headers.push(("subject", "again".into())),
            |e| e.headers.push(("X-Bad:Name", "v".into())),
            |e| e.headers.push(("X-Bad Name", "v".into())),
        ];
        for (i, change) in cases.iter().enumerate() {
            let mut e = email();
            change(&mut e);
            let err = build_message(&e).unwrap_err();
            assert!(!err.is_retriable(), "case {i}: {err}");
        }
    }

    #[test]
    fn extra_header_values_cannot_add_headers() {
        let mut e = email();
        e.headers = vec![(
            "List-Unsubscribe",
            "<https://kellerby.example/u/abc>\r\nBcc: x@attacker.example".into(),
        )];
        let lines = header_lines(&formatted(&e));
        assert!(!lines
            .iter()
            .any(|l| l.to_ascii_lowercase().starts_with("bcc:")));
    }

    #[test]
    fn mailboxes_and_message_ids() {
        let m = parse_mailbox("\"Wattle Downs\" <owner@wattle.example>", "to").unwrap();
        assert_eq!(m.name.as_deref(), Some("Wattle Downs"));
        assert_eq!(m.email.to_string(), "owner@wattle.example");
        let m = parse_mailbox("owner@wattle.example", "to").unwrap();
        assert_eq!(m.name, None);
        let m = parse_mailbox("A <b> <owner@wattle.example>", "to").unwrap();
        assert_eq!(m.name.as_deref(), Some("A <b>"));
        assert_eq!(
            message_id(
                "2b65300baab149c9cfd5913a126e242d",
                "outrider <notices@kellerby.example>"
            )
            .as_deref(),
            Some("<2b65300baab149c9cfd5913a126e242d@kellerby.example>")
        );
        assert_eq!(message_id("a b", "notices@kellerby.example"), None);
        // RFC 5322 §3.6.4 msg-id, dot-atom form (from memory).
        for ok in ["<a@b>", "<a.b@c.d>", "<a+b=c@d-e.example>"] {
            assert!(is_message_id(ok), "{ok}");
        }
        for bad in [
            "a@b", "<a@b", "<@b>", "<a@>", "<a..b@c>", "<.a@c>", "<a@b@c>", "<a b@c>",
        ] {
            assert!(!is_message_id(bad), "{bad}");
        }
    }
}
