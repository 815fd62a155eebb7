//! Configuration: the TOML file (DESIGN.md "Config"), the sites CSV and the
//! optional `subscribers.d/` folder, checked into plain typed values.
//!
//! Loading is two steps (ripgrep's low/high args): [`load`] reads the files
//! (the only I/O here), [`parse`] checks the text and returns either a
//! [`Config`] or every problem at once ([`ConfigErrors`]) with file:line:col
//! and a hint. Secrets are read from `*_env` (a variable's name) or `*_file`
//! keys, never from the file itself, and are wrapped in [`Secret`] whose
//! `Debug`/`Display` never show them.

pub mod error;
pub mod sites;
mod walk;

pub use error::{ConfigError, ConfigErrors};
pub use sites::Site;

use crate::calendar::{Hours, LocalHours, Season};
use crate::geo::{Area, Circle, LatLon, PolygonArea};
use chrono::NaiveTime;
use chrono_tz::Tz;
use error::Reporter;
use std::collections::{BTreeMap, BTreeSet};
use std::fmt;
use std::net::SocketAddr;
use std::path::{Path, PathBuf};
use walk::{At, Table, Walker};

/// A secret value. Never printed.
#[derive(Clone, PartialEq, Eq)]
pub struct Secret(String);

impl Secret {
    pub fn new(s: impl Into<String>) -> Self {
        Self(s.into())
    }
    /// The value itself, for the one place that must send it.
    pub fn expose(&self) -> &str {
        &self.0
    }
}

impl fmt::Debug for Secret {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str("Secret(***)")
    }
}

impl fmt::Display for Secret {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str("***")
    }
}

/// The whole, checked configuration.
#[derive(Debug, Clone)]
pub struct Config {
    /// The file it was read from; relative paths inside are relative to it.
    pub path: PathBuf,
    pub service: Service,
    pub mqtt: Mqtt,
    pub broker: Option<EmbeddedBroker>,
    pub sites: SitesConfig,
    pub detection: Detection,
    pub baseline: Baseline,
    pub species: Species,
    pub smtp: Option<Smtp>,
    pub email_folder: Option<PathBuf>,
    pub delivery: Delivery,
    pub web: Web,
    pub subscribers: Vec<Subscriber>,
    /// Things worth saying that do not stop the start.
    pub warnings: Vec<String>,
    /// Secrets read from files: (key path, file).
    pub secret_files: Vec<(String, PathBuf)>,
    /// Values written in a configuration file that are secrets in
    /// themselves (a webhook URL with a password or a query string):
    /// (file, key path).
    pub secrets_in_text: Vec<(PathBuf, String)>,
}

/// Whether a webhook URL carries a secret of its own: a password in its
/// user part (`https://user:pw@host/...`) or a query string (`?token=...`),
/// the two places receivers put a shared secret when they take no signature.
pub fn url_holds_secret(url: &str) -> bool {
    let rest = url.split_once("://").map_or(url, |(_, r)| r);
    let authority = rest.split(['/', '?', '#']).next().unwrap_or("");
    authority.contains('@') || url.contains('?')
}

#[derive(Debug, Clone)]
pub struct Service {
    pub state_dir: PathBuf,
    pub timezone: Tz,
    pub public_url: String,
    pub retention_days: Option<u32>,
    pub shutdown_timeout_seconds: u64,
}

#[derive(Debug, Clone, PartialEq, Eq)]
pub struct MqttUrl {
    pub tls: bool,
    pub host: String,
    pub port: u16,
}

impl fmt::Display for MqttUrl {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        let scheme = if self.tls { "mqtts" } else { "mqtt" };
        write!(f, "{scheme}://{}:{}", self.host, self.port)
    }
}

#[derive(Debug, Clone)]
pub struct Mqtt {
    pub url: MqttUrl,
    pub client_id: String,
    pub topic_prefix: String,
    pub username: Option<String>,
    pub password: Option<Secret>,
    pub ca_file: Option<PathBuf>,
    pub keep_alive_seconds: u64,
}

#[derive(Debug, Clone)]
pub struct EmbeddedBroker {
    pub listen: SocketAddr,
    pub username: Option<String>,
    pub password: Option<Secret>,
}

#[derive(Debug, Clone)]
pub struct SitesConfig {
    pub file: PathBuf,
    pub silence_hours: f64,
    pub sites: Vec<Site>,
}

#[derive(Debug, Clone)]
pub struct Detection {
    pub min_probability: f64,
    pub independence_minutes: u32,
    pub max_payload_bytes: usize,
    pub future_tolerance_minutes: u32,
}

/// How the outbox retries a delivery that failed for a reason that may
/// pass (`[delivery]`): the first wait, doubling up to the longest wait,
/// and the deadline after the first attempt when it gives up and marks
/// the delivery failed.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Delivery {
    pub retry_first_seconds: u32,
    pub retry_max_seconds: u32,
    pub give_up_hours: u32,
}

impl Default for Delivery {
    /// DESIGN.md "Delivery": 1 min doubling to 1 h, give up after 24 h.
    fn default() -> Self {
        Delivery {
            retry_first_seconds: 60,
            retry_max_seconds: 3600,
            give_up_hours: 24,
        }
    }
}

#[derive(Debug, Clone)]
pub struct Baseline {
    pub window_days: u32,
    pub guard_days: u32,
    pub prior_nights: f64,
    pub alpha: f64,
}

#[derive(Debug, Clone, Default)]
pub struct Species {
    /// Group name (without `@`) -> scientific names.
    pub groups: BTreeMap<String, Vec<String>>,
    /// Classifier label -> scientific name.
    pub aliases: BTreeMap<String, String>,
}

impl Species {
    /// The scientific name a classifier label stands for.
    pub fn resolve<'a>(&'a self, label: &'a str) -> &'a str {
        self.aliases.get(label).map(String::as_str).unwrap_or(label)
    }
}

#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum SmtpSecurity {
    None,
    StartTls,
    Tls,
}

#[derive(Debug, Clone)]
pub struct Smtp {
    pub host: String,
    pub port: u16,
    pub security: SmtpSecurity,
    pub from: String,
    pub username: Option<String>,
    pub password: Option<Secret>,
    pub unsubscribe_mailto: Option<String>,
}

/// `[web]`: the status page, JSON API, `/metrics` and unsubscribe links
/// (service/web/, docs/web.md).
#[derive(Debug, Clone)]
pub struct Web {
    /// Where to serve; `None` (no `listen` key) serves nothing.
    pub listen: Option<SocketAddr>,
    /// The bearer token the coordinator's pages and the API need when
    /// `listen` is not a loopback address (`admin_token_env` or
    /// `admin_token_file`).
    pub admin_token: Option<Secret>,
}

#[derive(Debug, Clone, PartialEq)]
pub enum AreaSpec {
    Circle { lat: f64, lon: f64, radius_km: f64 },
    GeoJson { file: PathBuf, buffer_km: f64 },
    Sites(Vec<String>),
    All,
}

#[derive(Debug, Clone)]
pub struct Webhook {
    pub url: String,
    pub secret: Option<Secret>,
}

/// How a notice is written on the webhook and MQTT channels (subscriber
/// keys `webhook.format` and `mqtt.format`).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub enum NoticeFormat {
    /// The notice's JSON line ([`crate::notify::Notice::replay_line`]).
    #[default]
    Json,
    /// A CAP 1.2 alert, XML ([`crate::interchange::cap`]).
    Cap,
}

impl NoticeFormat {
    pub fn as_str(self) -> &'static str {
        match self {
            Self::Json => "json",
            Self::Cap => "cap",
        }
    }

    /// The `Content-Type` of a webhook body. CAP has no media type
    /// registered for general use, so it goes as XML (RFC 7303).
    pub fn content_type(self) -> &'static str {
        match self {
            Self::Json => "application/json",
            Self::Cap => "application/xml; charset=utf-8",
        }
    }
}

#[derive(Debug, Clone)]
pub struct Subscriber {
    pub id: String,
    pub name: String,
    pub email: Option<String>,
    pub timezone: Tz,
    pub digest_at: NaiveTime,
    /// Local window in which non-urgent notices wait for the digest.
    pub quiet_hours: Option<LocalHours>,
    pub max_per_hour: u32,
    /// The area as written (for people).
    pub area_spec: AreaSpec,
    /// The area, built (GeoJSON read and checked).
    pub area: Area,
    pub webhook: Option<Webhook>,
    /// What the webhook sends (`webhook.format`, default json).
    pub webhook_format: NoticeFormat,
    /// What an MQTT notice carries (`mqtt = { format = "cap" }`, default json).
    pub mqtt_format: NoticeFormat,
    pub watches: Vec<Watch>,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord)]
pub enum TriggerKind {
    Presence,
    Spike,
    BuildUp,
    FirstSeen,
    Silence,
}

impl TriggerKind {
    pub const NAMES: [&'static str; 5] = ["presence", "spike", "build-up", "first-seen", "silence"];

    pub fn as_str(self) -> &'static str {
        match self {
            Self::Presence => "presence",
            Self::Spike => "spike",
            Self::BuildUp => "build-up",
            Self::FirstSeen => "first-seen",
            Self::Silence => "silence",
        }
    }

    fn parse(s: &str) -> Option<Self> {
        Some(match s {
            "presence" => Self::Presence,
            "spike" => Self::Spike,
            "build-up" => Self::BuildUp,
            "first-seen" => Self::FirstSeen,
            "silence" => Self::Silence,
            _ => return None,
        })
    }
}

#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord)]
pub enum Channel {
    Email,
    Webhook,
    Mqtt,
}

impl Channel {
    pub fn as_str(self) -> &'static str {
        match self {
            Self::Email => "email",
            Self::Webhook => "webhook",
            Self::Mqtt => "mqtt",
        }
    }
}

#[derive(Debug, Clone)]
pub struct Watch {
    pub name: String,
    pub trigger: TriggerKind,
    /// Scientific names, groups expanded and aliases resolved.
    pub species: BTreeSet<String>,
    pub hours: Hours,
    pub season: Option<Season>,
    pub min_probability: f64,
    pub cooldown_minutes: u32,
    pub urgent: bool,
    pub channels: Vec<Channel>,
    pub window_hours: u32,
    pub ratio: f64,
    pub min_count: u32,
    pub quiet_days: u32,
    pub silence_hours: f64,
}

/// Reads and checks a configuration file and everything it points at.
pub fn load(path: &Path) -> Result<Config, ConfigErrors> {
    load_with_env(path, &|name| std::env::var(name).ok())
}

fn io_error(path: &Path, what: &str, e: &std::io::Error) -> ConfigErrors {
    ConfigErrors(vec![ConfigError {
        file: path.to_path_buf(),
        line: 0,
        col: 0,
        key: String::new(),
        message: format!("cannot read {what}: {e}"),
        hint: None,
    }])
}

/// [`load`] with an injected environment (tests).
pub fn load_with_env(
    path: &Path,
    env: &dyn Fn(&str) -> Option<String>,
) -> Result<Config, ConfigErrors> {
    let src =
        std::fs::read_to_string(path).map_err(|e| io_error(path, "the configuration file", &e))?;
    let base = path.parent().map(Path::to_path_buf).unwrap_or_default();
    let mut extra = Vec::new();
    let dropins = base.join("subscribers.d");
    if dropins.is_dir() {
        let mut files: Vec<PathBuf> = std::fs::read_dir(&dropins)
            .map_err(|e| io_error(&dropins, "the subscribers.d folder", &e))?
            .filter_map(|e| e.ok().map(|e| e.path()))
            .filter(|p| p.extension().is_some_and(|x| x == "toml"))
            .collect();
        files.sort();
        for f in files {
            let text =
                std::fs::read_to_string(&f).map_err(|e| io_error(&f, "a subscriber file", &e))?;
            extra.push((f, text));
        }
    }
    let files = Files {
        read: &|p: &Path| std::fs::read_to_string(p),
        env,
    };
    let mut cfg = parse(path, &src, &extra, &files)?;
    let mode = |p: &Path| file_mode(p);
    let more = permission_warnings(&cfg, &mode);
    cfg.warnings.extend(more);
    Ok(cfg)
}

/// The permission bits of a file (Unix), or `None` when they cannot be read.
fn file_mode(p: &Path) -> Option<u32> {
    #[cfg(unix)]
    {
        use std::os::unix::fs::PermissionsExt;
        std::fs::metadata(p)
            .ok()
            .map(|m| m.permissions().mode() & 0o7777)
    }
    #[cfg(not(unix))]
    {
        let _ = p;
        None
    }
}

/// Warnings for secrets every user of the machine may read: a `*_file`
/// secret whose file is world-readable, and a configuration file that is
/// world-readable while it holds a secret itself. `mode` gives a file's
/// permission bits (injected, so this stays testable without files).
pub fn permission_warnings(cfg: &Config, mode: &dyn Fn(&Path) -> Option<u32>) -> Vec<String> {
    let mut out = Vec::new();
    let readable_by_all = |p: &Path| mode(p).filter(|m| m & 0o004 != 0);
    for (key, file) in &cfg.secret_files {
        if let Some(m) = readable_by_all(file) {
            out.push(format!(
                "{key}: the secret file {} is readable by every user on this machine (mode {m:04o}); run chmod o-r on it (0600, or 0640 with the outrider group)",
                file.display()
            ));
        }
    }
    let mut files: BTreeMap<&Path, Vec<&str>> = BTreeMap::new();
    for (file, key) in &cfg.secrets_in_text {
        files.entry(file.as_path()).or_default().push(key);
    }
    for (file, keys) in files {
        if let Some(m) = readable_by_all(file) {
            out.push(format!(
                "{} is readable by every user on this machine (mode {m:04o}) and holds a secret ({}: a password or query string in a URL); run chmod o-r on it (0640 with the outrider group)",
                file.display(),
                keys.join(", ")
            ));
        }
    }
    out
}

/// What [`parse`] may look up outside the text: other files and the environment.
pub struct Files<'a> {
    pub read: &'a dyn Fn(&Path) -> std::io::Result<String>,
    pub env: &'a dyn Fn(&str) -> Option<String>,
}

const TOP_KEYS: &[&str] = &[
    "service",
    "mqtt",
    "broker",
    "sites",
    "detection",
    "baseline",
    "species",
    "smtp",
    "email_folder",
    "delivery",
    "web",
    "subscriber",
];

/// Checks configuration text. `subscriber_files` are the `subscribers.d/`
/// files, each holding one subscriber's keys at top level.
pub fn parse(
    path: &Path,
    src: &str,
    subscriber_files: &[(PathBuf, String)],
    files: &Files<'_>,
) -> Result<Config, ConfigErrors> {
    let base = path.parent().map(Path::to_path_buf).unwrap_or_default();
    let mut all_errors = Vec::new();
    let mut rep = Reporter::new(path, src);
    let (doc, parse_errors) = toml::de::DeTable::parse_recoverable(src);
    for e in &parse_errors {
        let at = e.span().map(|s| s.start).unwrap_or(0);
        rep.at(
            at,
            "",
            format!("not valid TOML: {}", e.message().trim()),
            None,
        );
    }
    if !parse_errors.is_empty() {
        return Err(ConfigErrors(rep.errors));
    }
    let mut w = Walker::new(&mut rep);
    let mut top = Table::new(doc.get_ref(), "", doc.span());
    let mut warnings = Vec::new();

    let service = read_service(&mut w, &mut top, &base);
    let mqtt = read_mqtt(&mut w, &mut top, &base, files);
    let broker = read_broker(&mut w, &mut top, files, &base);
    let sites_cfg = read_sites(&mut w, &mut top, &base);
    let detection = read_detection(&mut w, &mut top);
    let baseline = read_baseline(&mut w, &mut top);
    let species = read_species(&mut w, &mut top);
    let smtp = read_smtp(&mut w, &mut top, files, &base);
    let email_folder = w.table(&mut top, "email_folder").and_then(|mut t| {
        let dir = w.req_str(
            &mut t,
            "dir",
            "the folder where each email is written as one .eml file",
        );
        w.finish(t, &["dir"]);
        dir.map(|d| base.join(d.value))
    });
    let delivery = read_delivery(&mut w, &mut top);
    let web = read_web(&mut w, &mut top, files, &base);
    let defaults = SubscriberDefaults {
        timezone: service.as_ref().map(|s| s.timezone).unwrap_or(Tz::UTC),
        min_probability: detection.min_probability,
        silence_hours: sites_cfg.as_ref().map(|s| s.1).unwrap_or(36.0),
        has_email_transport: smtp.is_some() || email_folder.is_some(),
        species: &species,
    };
    let mut subscribers = Vec::new();
    for mut t in w.tables(&mut top, "subscriber") {
        if let Some(s) = read_subscriber(&mut w, &mut t, &base, files, &defaults) {
            subscribers.push((s, t.span.start, path.to_path_buf()));
        }
        w.finish(t, SUBSCRIBER_KEYS);
    }
    w.finish(top, TOP_KEYS);
    let mut secret_files = std::mem::take(&mut w.secret_files);
    all_errors.append(&mut rep.errors);

    for (file, text) in subscriber_files {
        let mut rep = Reporter::new(file, text);
        let (doc, errs) = toml::de::DeTable::parse_recoverable(text);
        for e in &errs {
            rep.at(
                e.span().map(|s| s.start).unwrap_or(0),
                "",
                format!("not valid TOML: {}", e.message().trim()),
                None,
            );
        }
        if errs.is_empty() {
            let mut w = Walker::new(&mut rep);
            let mut t = Table::new(doc.get_ref(), "", doc.span());
            let fbase = file.parent().map(Path::to_path_buf).unwrap_or_default();
            if let Some(s) = read_subscriber(&mut w, &mut t, &fbase, files, &defaults) {
                subscribers.push((s, 0, file.clone()));
            }
            w.finish(t, SUBSCRIBER_KEYS);
            secret_files.append(&mut w.secret_files);
        }
        all_errors.append(&mut rep.errors);
    }

    // Subscriber ids are unique across the file and the drop-in folder.
    let mut seen: BTreeMap<String, PathBuf> = BTreeMap::new();
    for (s, at, file) in &subscribers {
        if let Some(prev) = seen.get(&s.id) {
            let text = if file == path {
                src
            } else {
                subscriber_files
                    .iter()
                    .find(|(f, _)| f == file)
                    .map(|(_, t)| t.as_str())
                    .unwrap_or("")
            };
            let mut r = Reporter::new(file, text);
            r.at(
                *at,
                "subscriber.id",
                format!("`{}` is already used in {}", s.id, prev.display()),
                Some("each subscriber needs its own id".into()),
            );
            all_errors.append(&mut r.errors);
        } else {
            seen.insert(s.id.clone(), file.clone());
        }
    }

    // The sites file is read once the config text itself is sound enough.
    let mut sites = Vec::new();
    if let Some((file, _)) = &sites_cfg {
        match (files.read)(file) {
            Ok(text) => match sites::parse_sites(file, &text) {
                Ok(s) => sites = s,
                Err(mut e) => all_errors.append(&mut e),
            },
            Err(e) => all_errors.push(ConfigError {
                file: path.to_path_buf(),
                line: 0,
                col: 0,
                key: "sites.file".into(),
                message: format!("cannot read {}: {e}", file.display()),
                hint: Some("the path is relative to the configuration file".into()),
            }),
        }
    }
    // Site lists in areas must name known deployments.
    let known: BTreeSet<&str> = sites.iter().map(|s| s.deployment_id.as_str()).collect();
    if !sites.is_empty() {
        for (s, _, file) in &subscribers {
            if let AreaSpec::Sites(list) = &s.area_spec {
                for id in list.iter().filter(|id| !known.contains(id.as_str())) {
                    all_errors.push(ConfigError {
                        file: file.clone(),
                        line: 0,
                        col: 0,
                        key: format!("subscriber `{}` area.sites", s.id),
                        message: format!("`{id}` is not a deploymentID in the sites file"),
                        hint: None,
                    });
                }
            }
        }
    }
    let secrets_in_text = subscribers
        .iter()
        .filter(|(s, _, _)| s.webhook.as_ref().is_some_and(|h| url_holds_secret(&h.url)))
        .map(|(s, _, file)| (file.clone(), format!("subscriber `{}` webhook.url", s.id)))
        .collect();
    if matches!(&broker, Some(Some(b)) if b.password.is_none() && !b.listen.ip().is_loopback()) {
        warnings.push("embedded broker is not on loopback".into());
    }
    if !all_errors.is_empty() {
        all_errors.sort_by(|a, b| (&a.file, a.line, a.col).cmp(&(&b.file, b.line, b.col)));
        return Err(ConfigErrors(all_errors));
    }
    let (Some(service), Some(mqtt), Some(sites_cfg), Some(web)) = (service, mqtt, sites_cfg, web)
    else {
        // Every None above recorded an error, so this is not reached.
        return Err(ConfigErrors(vec![ConfigError {
            file: path.to_path_buf(),
            line: 0,
            col: 0,
            key: String::new(),
            message: "incomplete configuration".into(),
            hint: None,
        }]));
    };
    Ok(Config {
        path: path.to_path_buf(),
        service,
        mqtt,
        broker: broker.flatten(),
        sites: SitesConfig {
            file: sites_cfg.0,
            silence_hours: sites_cfg.1,
            sites,
        },
        detection,
        baseline,
        species,
        smtp,
        email_folder,
        delivery,
        web,
        subscribers: subscribers.into_iter().map(|(s, _, _)| s).collect(),
        warnings,
        secret_files,
        secrets_in_text,
    })
}

fn parse_tz(w: &mut Walker<'_, '_>, at: &At<String>, key: &str) -> Option<Tz> {
    match at.value.parse::<Tz>() {
        Ok(tz) => Some(tz),
        Err(_) => {
            w.error(
                &at.span,
                key,
                format!("`{}` is not a known time zone", at.value),
                Some(
                    "an IANA zone name such as Australia/Sydney, Australia/Brisbane or UTC".into(),
                ),
            );
            None
        }
    }
}

/// A secret given as `<name>_env` (a variable's name) or `<name>_file`.
/// A plain `<name>` key is refused so that secrets stay out of config files.
fn read_secret(
    w: &mut Walker<'_, '_>,
    t: &mut Table<'_, '_>,
    name: &str,
    files: &Files<'_>,
    base: &Path,
) -> Option<Secret> {
    if let Some(node) = t.get(name) {
        w.error(&node.span(), &t.key_path(name), "secrets are not written in the configuration file", Some(format!("put it in an environment variable and write {name}_env = \"VAR\", or in a file and write {name}_file = \"path\"")));
    }
    let env_key = format!("{name}_env");
    let file_key = format!("{name}_file");
    let from_env = w.str(t, &env_key);
    let from_file = w.str(t, &file_key);
    match (from_env, from_file) {
        (Some(e), Some(_)) => {
            w.error(
                &e.span,
                &t.key_path(&env_key),
                format!("give either {env_key} or {file_key}, not both"),
                None,
            );
            None
        }
        (Some(e), None) => match (files.env)(&e.value) {
            Some(v) if !v.is_empty() => Some(Secret(v)),
            _ => {
                w.error(
                    &e.span,
                    &t.key_path(&env_key),
                    format!("environment variable {} is not set", e.value),
                    Some(format!("export {}=... before starting outrider", e.value)),
                );
                None
            }
        },
        // Relative to the file that names it, like every other path.
        (None, Some(f)) => match (files.read)(&base.join(&f.value)) {
            Ok(v) => {
                w.secret_files
                    .push((t.key_path(&file_key), base.join(&f.value)));
                Some(Secret(v.trim_end_matches(['\r', '\n']).to_string()))
            }
            Err(err) => {
                w.error(
                    &f.span,
                    &t.key_path(&file_key),
                    format!("cannot read {}: {err}", f.value),
                    None,
                );
                None
            }
        },
        (None, None) => None,
    }
}

fn read_service(w: &mut Walker<'_, '_>, top: &mut Table<'_, '_>, base: &Path) -> Option<Service> {
    let mut out = Service {
        state_dir: base.join("outrider-state"),
        timezone: Tz::UTC,
        public_url: "http://127.0.0.1:8080".into(),
        retention_days: None,
        shutdown_timeout_seconds: 5,
    };
    let Some(mut t) = w.table(top, "service") else {
        return Some(out);
    };
    let mut ok = true;
    if let Some(d) = w.str(&mut t, "state_dir") {
        out.state_dir = base.join(d.value);
    }
    if let Some(z) = w.str(&mut t, "timezone") {
        match parse_tz(w, &z, "service.timezone") {
            Some(tz) => out.timezone = tz,
            None => ok = false,
        }
    }
    if let Some(u) = w.str(&mut t, "public_url") {
        if u.value.starts_with("http://") || u.value.starts_with("https://") {
            out.public_url = u.value.trim_end_matches('/').to_string();
        } else {
            w.error(
                &u.span,
                "service.public_url",
                "must start with http:// or https://",
                Some("the base of links in notices, e.g. https://outrider.example.org".into()),
            );
            ok = false;
        }
    }
    if let Some(r) = w.int(&mut t, "retention_days", 1, 36_500) {
        out.retention_days = Some(r.value as u32);
    }
    if let Some(s) = w.int(&mut t, "shutdown_timeout_seconds", 1, 600) {
        out.shutdown_timeout_seconds = s.value as u64;
    }
    w.finish(
        t,
        &[
            "state_dir",
            "timezone",
            "public_url",
            "retention_days",
            "shutdown_timeout_seconds",
        ],
    );
    ok.then_some(out)
}

/// Parses `mqtt://HOST[:PORT]` or `mqtts://HOST[:PORT]` (default ports 1883, 8883).
pub fn parse_mqtt_url(s: &str) -> Result<MqttUrl, String> {
    let (tls, rest) = if let Some(r) = s.strip_prefix("mqtts://") {
        (true, r)
    } else if let Some(r) = s.strip_prefix("mqtt://") {
        (false, r)
    } else {
        return Err("must start with mqtt:// or mqtts://".into());
    };
    let rest = rest.trim_end_matches('/');
    let (host, port) = match rest.rsplit_once(':') {
        Some((h, p)) if !h.ends_with(']') || h.starts_with('[') => match p.parse::<u16>() {
            Ok(port) if port > 0 => (h, port),
            _ => return Err(format!("`{p}` is not a port number")),
        },
        _ => (rest, if tls { 8883 } else { 1883 }),
    };
    let host = host.trim_start_matches('[').trim_end_matches(']');
    if host.is_empty() || host.contains(['/', '@', ' ']) {
        return Err("needs a host name, e.g. mqtt://127.0.0.1:1883".into());
    }
    Ok(MqttUrl {
        tls,
        host: host.to_string(),
        port,
    })
}

fn read_mqtt(
    w: &mut Walker<'_, '_>,
    top: &mut Table<'_, '_>,
    base: &Path,
    files: &Files<'_>,
) -> Option<Mqtt> {
    let mut out = Mqtt {
        url: MqttUrl {
            tls: false,
            host: "127.0.0.1".into(),
            port: 1883,
        },
        client_id: "outrider".into(),
        topic_prefix: "outrider".into(),
        username: None,
        password: None,
        ca_file: None,
        keep_alive_seconds: 30,
    };
    let Some(mut t) = w.table(top, "mqtt") else {
        return Some(out);
    };
    let mut ok = true;
    if let Some(u) = w.str(&mut t, "url") {
        match parse_mqtt_url(&u.value) {
            Ok(url) => out.url = url,
            Err(msg) => {
                w.error(
                    &u.span,
                    "mqtt.url",
                    msg,
                    Some("mqtt://HOST:PORT, or mqtts://HOST:PORT for TLS".into()),
                );
                ok = false;
            }
        }
    }
    if let Some(c) = w.str(&mut t, "client_id") {
        if c.value.is_empty()
            || c.value.len() > 23
            || !c.value.chars().all(|ch| ch.is_ascii_alphanumeric())
        {
            w.error(&c.span, "mqtt.client_id", "must be 1 to 23 letters or digits", Some("MQTT 3.1.1 section 3.1.3.1: every broker must accept such ids; a persistent session needs a fixed one".into()));
            ok = false;
        } else {
            out.client_id = c.value;
        }
    }
    if let Some(p) = w.str(&mut t, "topic_prefix") {
        if p.value.is_empty()
            || p.value.contains(['+', '#'])
            || p.value.starts_with('/')
            || p.value.ends_with('/')
            || p.value.starts_with('$')
        {
            w.error(
                &p.span,
                "mqtt.topic_prefix",
                "must be a topic path without wildcards or leading/trailing '/'",
                Some("e.g. outrider or kellerby/cameras".into()),
            );
            ok = false;
        } else {
            out.topic_prefix = p.value;
        }
    }
    out.username = w.str(&mut t, "username").map(|u| u.value);
    out.password = read_secret(w, &mut t, "password", files, base);
    out.ca_file = w.str(&mut t, "ca_file").map(|f| base.join(f.value));
    if let Some(k) = w.int(&mut t, "keep_alive_seconds", 5, 3600) {
        out.keep_alive_seconds = k.value as u64;
    }
    if out.password.is_some() && out.username.is_none() {
        w.error(
            &t.span,
            "mqtt.username",
            "a password is set but no username",
            None,
        );
        ok = false;
    }
    w.finish(
        t,
        &[
            "url",
            "client_id",
            "topic_prefix",
            "username",
            "password_env",
            "password_file",
            "ca_file",
            "keep_alive_seconds",
        ],
    );
    ok.then_some(out)
}

fn read_broker(
    w: &mut Walker<'_, '_>,
    top: &mut Table<'_, '_>,
    files: &Files<'_>,
    base: &Path,
) -> Option<Option<EmbeddedBroker>> {
    let Some(mut t) = w.table(top, "broker") else {
        return Some(None);
    };
    let embedded = w.bool(&mut t, "embedded").map(|b| b.value).unwrap_or(false);
    let mut listen: SocketAddr = SocketAddr::from(([127, 0, 0, 1], 1883));
    let mut ok = true;
    if let Some(l) = w.str(&mut t, "listen") {
        match l.value.parse::<SocketAddr>() {
            Ok(a) => listen = a,
            Err(_) => {
                w.error(
                    &l.span,
                    "broker.listen",
                    format!("`{}` is not an address:port", l.value),
                    Some("e.g. 127.0.0.1:1883".into()),
                );
                ok = false;
            }
        }
    }
    let username = w.str(&mut t, "username").map(|u| u.value);
    let password = read_secret(w, &mut t, "password", files, base);
    if embedded && ok && !listen.ip().is_loopback() && (username.is_none() || password.is_none()) {
        w.error(
            &t.span,
            "broker.listen",
            format!(
                "the embedded broker listens on {listen}, beyond this machine, without a password"
            ),
            Some("set username and password_env, or listen on 127.0.0.1".into()),
        );
        ok = false;
    }
    w.finish(
        t,
        &[
            "embedded",
            "listen",
            "username",
            "password_env",
            "password_file",
        ],
    );
    if !ok {
        return None;
    }
    Some(embedded.then_some(EmbeddedBroker {
        listen,
        username,
        password,
    }))
}

fn read_sites(
    w: &mut Walker<'_, '_>,
    top: &mut Table<'_, '_>,
    base: &Path,
) -> Option<(PathBuf, f64)> {
    let Some(mut t) = w.table(top, "sites") else {
        w.missing(
            top,
            "sites",
            "add [sites] with file = \"sites.csv\" (Camtrap DP deployments columns)",
        );
        return None;
    };
    let file = w.req_str(
        &mut t,
        "file",
        "the CSV of camera deployments, e.g. file = \"sites.csv\"",
    );
    let silence = if t.has("silence_hours") {
        w.positive(
            &mut t,
            "silence_hours",
            24.0 * 365.0,
            "hours without a heartbeat or image before a camera counts as silent, e.g. 36",
        )
    } else {
        Some(36.0)
    };
    w.finish(t, &["file", "silence_hours"]);
    Some((base.join(file?.value), silence?))
}

fn read_detection(w: &mut Walker<'_, '_>, top: &mut Table<'_, '_>) -> Detection {
    let mut out = Detection {
        min_probability: 0.8,
        independence_minutes: 30,
        max_payload_bytes: 64 * 1024,
        future_tolerance_minutes: 10,
    };
    let Some(mut t) = w.table(top, "detection") else {
        return out;
    };
    if let Some(p) = w.f64_in(
        &mut t,
        "min_probability",
        0.0,
        1.0,
        "a classification probability from 0 to 1, e.g. 0.80",
    ) {
        out.min_probability = p;
    }
    if let Some(m) = w.int(&mut t, "independence_minutes", 1, 24 * 60) {
        out.independence_minutes = m.value as u32;
    }
    if let Some(b) = w.int(&mut t, "max_payload_bytes", 256, 1024 * 1024) {
        out.max_payload_bytes = b.value as usize;
    }
    if let Some(m) = w.int(&mut t, "future_tolerance_minutes", 0, 24 * 60) {
        out.future_tolerance_minutes = m.value as u32;
    }
    w.finish(
        t,
        &[
            "min_probability",
            "independence_minutes",
            "max_payload_bytes",
            "future_tolerance_minutes",
        ],
    );
    out
}

fn read_delivery(w: &mut Walker<'_, '_>, top: &mut Table<'_, '_>) -> Delivery {
    let mut out = Delivery::default();
    let Some(mut t) = w.table(top, "delivery") else {
        return out;
    };
    // From 1 s (tests) to a day; the deadline from 1 h to a year.
    if let Some(v) = w.int(&mut t, "retry_first_seconds", 1, 86_400) {
        out.retry_first_seconds = v.value as u32;
    }
    let max = w.int(&mut t, "retry_max_seconds", 1, 86_400);
    if let Some(v) = &max {
        out.retry_max_seconds = v.value as u32;
    }
    if let Some(v) = w.int(&mut t, "give_up_hours", 1, 8_760) {
        out.give_up_hours = v.value as u32;
    }
    if out.retry_max_seconds < out.retry_first_seconds {
        let span = max.map(|m| m.span).unwrap_or(t.span.clone());
        w.error(
            &span,
            "delivery.retry_max_seconds",
            format!(
                "{} is shorter than retry_first_seconds ({})",
                out.retry_max_seconds, out.retry_first_seconds
            ),
            Some("the longest wait between attempts must be at least the first wait".into()),
        );
    }
    w.finish(
        t,
        &["retry_first_seconds", "retry_max_seconds", "give_up_hours"],
    );
    out
}

fn read_baseline(w: &mut Walker<'_, '_>, top: &mut Table<'_, '_>) -> Baseline {
    let mut out = Baseline {
        window_days: 28,
        guard_days: 1,
        prior_nights: 14.0,
        alpha: 0.01,
    };
    let Some(mut t) = w.table(top, "baseline") else {
        return out;
    };
    if let Some(v) = w.int(&mut t, "window_days", 1, 3650) {
        out.window_days = v.value as u32;
    }
    if let Some(v) = w.int(&mut t, "guard_days", 0, 365) {
        out.guard_days = v.value as u32;
    }
    if let Some(v) = w.positive(
        &mut t,
        "prior_nights",
        100_000.0,
        "camera-nights the regional prior is worth, e.g. 14",
    ) {
        out.prior_nights = v;
    }
    if let Some(a) = w.f64(&mut t, "alpha") {
        if a.value > 0.0 && a.value < 0.5 {
            out.alpha = a.value;
        } else {
            w.error(
                &a.span,
                "baseline.alpha",
                format!("{} is out of range: must be above 0 and below 0.5", a.value),
                Some("the chance of a false spike per test, e.g. 0.01".into()),
            );
        }
    }
    w.finish(t, &["window_days", "guard_days", "prior_nights", "alpha"]);
    out
}

/// A scientific name: a capitalised genus, optionally followed by lower-case
/// epithets (`Canis familiaris`, `Sus scrofa`, `Canis lupus dingo`, `Macropus`).
pub fn looks_like_scientific_name(s: &str) -> bool {
    let mut words = s.split(' ');
    let Some(genus) = words.next() else {
        return false;
    };
    let mut g = genus.chars();
    let genus_ok = g.next().is_some_and(|c| c.is_ascii_uppercase())
        && g.all(|c| c.is_ascii_lowercase())
        && genus.len() >= 2;
    genus_ok
        && words.all(|w| !w.is_empty() && w.chars().all(|c| c.is_ascii_lowercase() || c == '-'))
}

fn read_species(w: &mut Walker<'_, '_>, top: &mut Table<'_, '_>) -> Species {
    let mut out = Species::default();
    let Some(mut t) = w.table(top, "species") else {
        return out;
    };
    if let Some(groups) = w.table(&mut t, "groups") {
        let mut g = groups;
        let names: Vec<String> = g.map.iter().map(|(k, _)| k.get_ref().to_string()).collect();
        for name in names {
            let path = g.key_path(&name);
            let Some(list) = w.str_list(&mut g, &name) else {
                continue;
            };
            let mut members = Vec::new();
            for item in list {
                if looks_like_scientific_name(&item.value) {
                    members.push(item.value);
                } else {
                    w.error(&item.span, &path, format!("`{}` is not a scientific name", item.value), Some("write Genus species, e.g. \"Vulpes vulpes\"; groups cannot contain groups".into()));
                }
            }
            out.groups.insert(name, members);
        }
        w.finish(g, &[]);
    }
    if let Some(mut a) = w.table(&mut t, "aliases") {
        let names: Vec<String> = a.map.iter().map(|(k, _)| k.get_ref().to_string()).collect();
        for label in names {
            let path = a.key_path(&label);
            if let Some(target) = w.str(&mut a, &label) {
                if looks_like_scientific_name(&target.value) {
                    out.aliases.insert(label, target.value);
                } else {
                    w.error(
                        &target.span,
                        &path,
                        format!("`{}` is not a scientific name", target.value),
                        Some("an alias maps a classifier label to a scientific name".into()),
                    );
                }
            }
        }
        w.finish(a, &[]);
    }
    w.finish(t, &["groups", "aliases"]);
    out
}

fn read_smtp(
    w: &mut Walker<'_, '_>,
    top: &mut Table<'_, '_>,
    files: &Files<'_>,
    base: &Path,
) -> Option<Smtp> {
    let mut t = w.table(top, "smtp")?;
    let host = w.req_str(
        &mut t,
        "host",
        "the mail server's host name, e.g. host = \"smtp.example.org\"",
    );
    let security = match w.str(&mut t, "security") {
        None => Some(SmtpSecurity::StartTls),
        Some(s) => match s.value.as_str() {
            "none" => Some(SmtpSecurity::None),
            "starttls" => Some(SmtpSecurity::StartTls),
            "tls" => Some(SmtpSecurity::Tls),
            other => {
                w.error(
                    &s.span,
                    "smtp.security",
                    format!("`{other}` is not one of none, starttls, tls"),
                    None,
                );
                None
            }
        },
    };
    let port = match w.int(&mut t, "port", 1, 65535) {
        Some(p) => p.value as u16,
        None => match security {
            Some(SmtpSecurity::Tls) => 465,
            Some(SmtpSecurity::None) => 25,
            _ => 587,
        },
    };
    let from = w.req_str(
        &mut t,
        "from",
        "the sender, e.g. from = \"outrider <notices@example.org>\"",
    );
    let username = w.str(&mut t, "username").map(|u| u.value);
    let password = read_secret(w, &mut t, "password", files, base);
    let unsubscribe_mailto = w.str(&mut t, "unsubscribe_mailto").map(|m| m.value);
    if let (Some(h), Some(SmtpSecurity::None)) = (&host, security) {
        let loopback = h.value == "localhost"
            || h.value
                .parse::<std::net::IpAddr>()
                .is_ok_and(|ip| ip.is_loopback());
        if !loopback {
            w.error(
                &h.span,
                "smtp.security",
                "security = \"none\" is allowed only for a mail server on this machine",
                Some("use starttls or tls for a remote server".into()),
            );
        }
    }
    if let Some(f) = &from {
        if !f.value.contains('@') || f.value.chars().any(char::is_control) {
            w.error(
                &f.span,
                "smtp.from",
                format!("`{}` is not a mail address", f.value),
                Some("e.g. \"outrider <notices@example.org>\"".into()),
            );
        }
    }
    w.finish(
        t,
        &[
            "host",
            "port",
            "security",
            "from",
            "username",
            "password_env",
            "password_file",
            "unsubscribe_mailto",
        ],
    );
    Some(Smtp {
        host: host?.value,
        port,
        security: security?,
        from: from?.value,
        username,
        password,
        unsubscribe_mailto,
    })
}

fn read_web(
    w: &mut Walker<'_, '_>,
    top: &mut Table<'_, '_>,
    files: &Files<'_>,
    base: &Path,
) -> Option<Web> {
    let mut out = Web {
        listen: None,
        admin_token: None,
    };
    let Some(mut t) = w.table(top, "web") else {
        return Some(out);
    };
    let mut ok = true;
    if let Some(l) = w.str(&mut t, "listen") {
        match l.value.parse::<SocketAddr>() {
            Ok(a) => out.listen = Some(a),
            Err(_) => {
                w.error(
                    &l.span,
                    "web.listen",
                    format!("`{}` is not an address:port", l.value),
                    Some("e.g. 127.0.0.1:8080".into()),
                );
                ok = false;
            }
        }
    }
    out.admin_token = read_secret(w, &mut t, "admin_token", files, base);
    if let Some(token) = &out.admin_token {
        // A bearer token is compared as sent: one that could be guessed in
        // a few tries protects nothing, and it must fit in a header.
        let problem = if token.expose().len() < MIN_ADMIN_TOKEN_BYTES {
            Some(format!(
                "the admin token is {} bytes; at least {MIN_ADMIN_TOKEN_BYTES} are needed",
                token.expose().len()
            ))
        } else if token.expose().bytes().any(|b| !(0x21..=0x7e).contains(&b)) {
            Some("the admin token must be printable ASCII without spaces (it travels in an Authorization header)".into())
        } else {
            None
        };
        let key = if t.has("admin_token_env") {
            "admin_token_env"
        } else {
            "admin_token_file"
        };
        if let (Some(message), Some(node)) = (problem, t.map.get(key)) {
            w.error(
                &node.span(),
                &format!("web.{key}"),
                message,
                Some("make one with: openssl rand -hex 32".into()),
            );
            ok = false;
        }
    }
    w.finish(t, &["listen", "admin_token_env", "admin_token_file"]);
    ok.then_some(out)
}

/// Shortest admin token accepted (bytes): 16 random bytes written as hex.
pub const MIN_ADMIN_TOKEN_BYTES: usize = 32;

struct SubscriberDefaults<'a> {
    timezone: Tz,
    min_probability: f64,
    silence_hours: f64,
    has_email_transport: bool,
    species: &'a Species,
}

const SUBSCRIBER_KEYS: &[&str] = &[
    "id",
    "name",
    "email",
    "timezone",
    "digest_at",
    "quiet_hours",
    "max_per_hour",
    "area",
    "webhook",
    "mqtt",
    "watch",
];

const WATCH_KEYS: &[&str] = &[
    "name",
    "trigger",
    "species",
    "hours",
    "season",
    "min_probability",
    "cooldown_minutes",
    "urgent",
    "channels",
    "window_hours",
    "ratio",
    "min_count",
    "quiet_days",
    "silence_hours",
];

/// `HH:MM` on a 24-hour clock.
pub fn parse_hhmm(s: &str) -> Option<NaiveTime> {
    let (h, m) = s.split_once(':')?;
    if h.len() != 2 || m.len() != 2 {
        return None;
    }
    NaiveTime::from_hms_opt(h.parse().ok()?, m.parse().ok()?, 0)
}

/// Builds the area: reads and checks a GeoJSON file, whose faults are
/// reported against that file (and where the config names it).
fn build_area(
    w: &mut Walker<'_, '_>,
    spec: &AreaSpec,
    at: usize,
    key: &str,
    files: &Files<'_>,
) -> Option<Area> {
    // Worked out only for an error: indexing the whole file per subscriber
    // made loading many subscribers quadratic.
    let named_at = |w: &Walker<'_, '_>| {
        let (line, col) = error::LineIndex::new(w.rep.src).locate(w.rep.src, at);
        format!("{}:{line}:{col}", w.rep.file.display())
    };
    match spec {
        AreaSpec::All => Some(Area::All),
        AreaSpec::Sites(list) => Some(Area::Sites(list.clone())),
        AreaSpec::Circle {
            lat,
            lon,
            radius_km,
        } => {
            let built = LatLon::new(*lat, *lon)
                .map_err(|e| e.to_string())
                .and_then(|c| Circle::new(c, *radius_km).map_err(|e| e.to_string()));
            match built {
                Ok(c) => Some(Area::Circle(c)),
                Err(msg) => {
                    w.rep.at(at, key, msg, None);
                    None
                }
            }
        }
        AreaSpec::GeoJson { file, buffer_km } => {
            let text = match (files.read)(file) {
                Ok(t) => t,
                Err(e) => {
                    w.rep.at(
                        at,
                        key,
                        format!("cannot read {}: {e}", file.display()),
                        Some("the path is relative to the configuration file".into()),
                    );
                    return None;
                }
            };
            match PolygonArea::from_geojson(&text, *buffer_km) {
                Ok(p) => Some(Area::Polygon(p)),
                Err(e) => {
                    let (line, col, hint) = match &e {
                        crate::geo::AreaError::GeoJson(g) => {
                            let (l, c) = match g {
                                crate::geo::GeoJsonError::InvalidJson { line, column, .. } => {
                                    (*line, *column)
                                }
                                _ => (0, 0),
                            };
                            (
                                l,
                                c,
                                Some(format!("{} (named at {})", g.hint(), named_at(w))),
                            )
                        }
                        _ => (0, 0, Some(format!("named at {}", named_at(w)))),
                    };
                    w.rep.errors.push(ConfigError {
                        file: file.clone(),
                        line,
                        col,
                        key: key.to_string(),
                        message: e.to_string(),
                        hint,
                    });
                    None
                }
            }
        }
    }
}

fn read_area(w: &mut Walker<'_, '_>, t: &mut Table<'_, '_>, base: &Path) -> Option<AreaSpec> {
    let hint = "area = { lat = -31.62, lon = 148.05, radius_km = 6.0 }, { geojson = \"areas/x.geojson\", buffer_km = 1.0 }, { sites = [\"KB-03\"] } or \"all\"";
    let Some(node) = t.get("area") else {
        w.missing(t, "area", hint);
        return None;
    };
    let path = t.key_path("area");
    if let toml::de::DeValue::String(s) = node.get_ref() {
        if s.as_ref() == "all" {
            return Some(AreaSpec::All);
        }
        w.error(
            &node.span(),
            &path,
            format!("`{s}` is not an area"),
            Some(hint.into()),
        );
        return None;
    }
    let mut a = w.node_table(node, path.clone())?;
    let spec = if a.has("radius_km") || a.has("lat") || a.has("lon") {
        let lat = if a.has("lat") {
            w.f64_in(
                &mut a,
                "lat",
                -90.0,
                90.0,
                "latitude in decimal degrees; lat/lon swapped?",
            )
        } else {
            w.missing(&a, "lat", hint);
            None
        };
        let lon = if a.has("lon") {
            w.f64_in(
                &mut a,
                "lon",
                -180.0,
                180.0,
                "longitude in decimal degrees; lat/lon swapped?",
            )
        } else {
            w.missing(&a, "lon", hint);
            None
        };
        let radius = if a.has("radius_km") {
            w.positive(
                &mut a,
                "radius_km",
                20_000.0,
                "the circle's radius in kilometres, greater than 0",
            )
        } else {
            w.missing(&a, "radius_km", hint);
            None
        };
        match (lat, lon, radius) {
            (Some(lat), Some(lon), Some(radius_km)) => Some(AreaSpec::Circle {
                lat,
                lon,
                radius_km,
            }),
            _ => None,
        }
    } else if a.has("geojson") {
        let file = w.str(&mut a, "geojson");
        let buffer = if a.has("buffer_km") {
            let b = w.f64(&mut a, "buffer_km");
            match b {
                Some(b) if (0.0..=500.0).contains(&b.value) => Some(b.value),
                Some(b) => {
                    w.error(
                        &b.span,
                        &a.key_path("buffer_km"),
                        format!("{} is out of range: must be from 0 to 500", b.value),
                        None,
                    );
                    None
                }
                None => None,
            }
        } else {
            Some(0.0)
        };
        match (file, buffer) {
            (Some(f), Some(buffer_km)) => Some(AreaSpec::GeoJson {
                file: base.join(f.value),
                buffer_km,
            }),
            _ => None,
        }
    } else if a.has("sites") {
        let list = w.str_list(&mut a, "sites")?;
        if list.is_empty() {
            w.error(
                &a.span,
                &a.key_path("sites"),
                "is empty",
                Some("name at least one deploymentID".into()),
            );
            None
        } else {
            Some(AreaSpec::Sites(list.into_iter().map(|s| s.value).collect()))
        }
    } else {
        w.error(
            &a.span,
            &path,
            "has none of radius_km, geojson, sites",
            Some(hint.into()),
        );
        None
    };
    w.finish(
        a,
        &["lat", "lon", "radius_km", "geojson", "buffer_km", "sites"],
    );
    spec
}

fn read_subscriber(
    w: &mut Walker<'_, '_>,
    t: &mut Table<'_, '_>,
    base: &Path,
    files: &Files<'_>,
    d: &SubscriberDefaults<'_>,
) -> Option<Subscriber> {
    let id = w.req_str(
        t,
        "id",
        "a short unique id made of letters, digits, '-' or '_', e.g. id = \"stonecroft\"",
    );
    let id = id.and_then(|i| {
        if sites::valid_id(&i.value) {
            Some(i.value)
        } else {
            w.error(
                &i.span,
                &t.key_path("id"),
                format!("`{}` cannot be used in a topic or link", i.value),
                Some("letters, digits, '-', '_' and '.' only".into()),
            );
            None
        }
    });
    let name = w.str(t, "name").map(|n| n.value);
    let email = w.str(t, "email").and_then(|e| {
        let v = e.value.trim();
        let ok = v
            .split_once('@')
            .is_some_and(|(l, h)| !l.is_empty() && h.contains('.'))
            && !v
                .chars()
                .any(|c| c.is_control() || c.is_whitespace() || c == '<' || c == '>');
        if ok {
            Some(v.to_string())
        } else {
            w.error(
                &e.span,
                &t.key_path("email"),
                format!("`{}` is not a mail address", e.value),
                Some("e.g. email = \"owner@stonecroft.example\"".into()),
            );
            None
        }
    });
    let mut ok = true;
    let timezone = match w.str(t, "timezone") {
        Some(z) => parse_tz(w, &z, &t.key_path("timezone")),
        None => Some(d.timezone),
    };
    let digest_at = match w.str(t, "digest_at") {
        None => Some(NaiveTime::from_hms_opt(6, 30, 0).unwrap_or_default()),
        Some(s) => parse_hhmm(&s.value).or_else(|| {
            w.error(
                &s.span,
                &t.key_path("digest_at"),
                format!("`{}` is not a time of day", s.value),
                Some("HH:MM on a 24-hour clock, e.g. \"06:30\"".into()),
            );
            None
        }),
    };
    let quiet_hours = match w.str(t, "quiet_hours") {
        None => None,
        Some(q) => match Hours::parse(&q.value) {
            Ok(Hours::Local(h)) => Some(h),
            Ok(_) => {
                w.error(&q.span, &t.key_path("quiet_hours"), format!("`{}` is not a local time window", q.value), Some("quiet hours are HH:MM-HH:MM on the local clock, may wrap midnight, e.g. \"21:30-05:00\"".into()));
                ok = false;
                None
            }
            Err(e) => {
                w.error(
                    &q.span,
                    &t.key_path("quiet_hours"),
                    e.to_string(),
                    Some(e.hint().into()),
                );
                ok = false;
                None
            }
        },
    };
    let max_per_hour = w
        .int(t, "max_per_hour", 1, 10_000)
        .map(|v| v.value as u32)
        .unwrap_or(6);
    let area_at = t
        .map
        .get("area")
        .map(|n| n.span().start)
        .unwrap_or(t.span.start);
    let area_spec = read_area(w, t, base);
    let area = area_spec
        .as_ref()
        .and_then(|a| build_area(w, a, area_at, &t.key_path("area"), files));
    let mut webhook_format = NoticeFormat::Json;
    let webhook = w.table(t, "webhook").and_then(|mut h| {
        let url = w.req_str(&mut h, "url", "the address outrider POSTs each notice to");
        let secret = read_secret(w, &mut h, "secret", files, base);
        webhook_format = read_notice_format(w, &mut h);
        w.finish(h, &["url", "secret_env", "secret_file", "format"]);
        let url = url?;
        if url.value.starts_with("http://") || url.value.starts_with("https://") {
            Some(Webhook {
                url: url.value,
                secret,
            })
        } else {
            w.error(
                &url.span,
                "webhook.url",
                "must start with http:// or https://",
                None,
            );
            None
        }
    });
    let mqtt_format = w
        .table(t, "mqtt")
        .map(|mut m| {
            let f = read_notice_format(w, &mut m);
            w.finish(m, &["format"]);
            f
        })
        .unwrap_or_default();
    let watch_tables = w.tables(t, "watch");
    let mut watches = Vec::new();
    for mut wt in watch_tables {
        if let Some(watch) = read_watch(
            w,
            &mut wt,
            d,
            email.is_some(),
            webhook.is_some(),
            watches.len() + 1,
        ) {
            watches.push(watch);
        } else {
            ok = false;
        }
        w.finish(wt, WATCH_KEYS);
    }
    let (Some(id), Some(timezone), Some(digest_at), Some(area_spec), Some(area), true) =
        (id, timezone, digest_at, area_spec, area, ok)
    else {
        return None;
    };
    Some(Subscriber {
        name: name.unwrap_or_else(|| id.clone()),
        id,
        email,
        timezone,
        digest_at,
        quiet_hours,
        max_per_hour,
        area_spec,
        area,
        webhook,
        webhook_format,
        mqtt_format,
        watches,
    })
}

/// A channel table's `format` key: `json` (default) or `cap`.
fn read_notice_format(w: &mut Walker<'_, '_>, t: &mut Table<'_, '_>) -> NoticeFormat {
    match w.str(t, "format") {
        None => NoticeFormat::Json,
        Some(f) => match f.value.as_str() {
            "json" => NoticeFormat::Json,
            "cap" => NoticeFormat::Cap,
            other => {
                w.error(
                    &f.span,
                    &t.key_path("format"),
                    format!("`{other}` is not a notice format"),
                    Some("json (the notice as a JSON object, the default) or cap (a CAP 1.2 alert in XML)".into()),
                );
                NoticeFormat::Json
            }
        },
    }
}

fn read_watch(
    w: &mut Walker<'_, '_>,
    t: &mut Table<'_, '_>,
    d: &SubscriberDefaults<'_>,
    has_email: bool,
    has_webhook: bool,
    n: usize,
) -> Option<Watch> {
    let name = w
        .str(t, "name")
        .map(|s| s.value)
        .unwrap_or_else(|| format!("watch {n}"));
    let trigger = w
        .req_str(
            t,
            "trigger",
            "one of presence, spike, build-up, first-seen, silence",
        )
        .and_then(|s| {
            TriggerKind::parse(&s.value).or_else(|| {
                w.error(
                    &s.span,
                    &t.key_path("trigger"),
                    format!("`{}` is not a trigger", s.value),
                    Some(format!("one of {}", TriggerKind::NAMES.join(", "))),
                );
                None
            })
        });
    let mut ok = trigger.is_some();
    // Species: names, @groups, or aliases of names.
    let mut species = BTreeSet::new();
    match w.str_list(t, "species") {
        Some(list) => {
            if list.is_empty() {
                w.error(
                    &t.span,
                    &t.key_path("species"),
                    "is empty",
                    Some("name at least one species or @group".into()),
                );
                ok = false;
            }
            for item in list {
                if let Some(group) = item.value.strip_prefix('@') {
                    match d.species.groups.get(group) {
                        Some(members) => species.extend(members.iter().cloned()),
                        None => {
                            let known: Vec<&str> =
                                d.species.groups.keys().map(String::as_str).collect();
                            w.error(
                                &item.span,
                                &t.key_path("species"),
                                format!("group `@{group}` is not defined"),
                                Some(if known.is_empty() {
                                    "define it under [species.groups]".into()
                                } else {
                                    format!(
                                        "defined groups: {}",
                                        known
                                            .iter()
                                            .map(|g| format!("@{g}"))
                                            .collect::<Vec<_>>()
                                            .join(", ")
                                    )
                                }),
                            );
                            ok = false;
                        }
                    }
                } else if looks_like_scientific_name(d.species.resolve(&item.value)) {
                    species.insert(d.species.resolve(&item.value).to_string());
                } else {
                    w.error(&item.span, &t.key_path("species"), format!("`{}` is not a scientific name or @group", item.value), Some("write Genus species, e.g. \"Sus scrofa\", or a group such as \"@predators\"".into()));
                    ok = false;
                }
            }
        }
        None => {
            if trigger.is_some_and(|k| k != TriggerKind::Silence) {
                w.missing(
                    t,
                    "species",
                    "e.g. species = [\"@predators\"] or [\"Sus scrofa\"]",
                );
                ok = false;
            }
        }
    }
    let hours = match w.str(t, "hours") {
        None => Hours::Any,
        Some(h) => Hours::parse(&h.value).unwrap_or_else(|e| {
            w.error(
                &h.span,
                &t.key_path("hours"),
                e.to_string(),
                Some(e.hint().into()),
            );
            ok = false;
            Hours::Any
        }),
    };
    let season = w.str(t, "season").and_then(|s| {
        Season::parse(&s.value)
            .map_err(|e| {
                w.error(
                    &s.span,
                    &t.key_path("season"),
                    e.to_string(),
                    Some(e.hint().into()),
                );
                ok = false;
            })
            .ok()
    });
    let min_probability = if t.has("min_probability") {
        let p = w.f64_in(
            t,
            "min_probability",
            0.0,
            1.0,
            "a classification probability from 0 to 1, e.g. 0.85",
        );
        ok &= p.is_some();
        p.unwrap_or(d.min_probability)
    } else {
        d.min_probability
    };
    let cooldown_minutes = w
        .int(t, "cooldown_minutes", 0, 7 * 24 * 60)
        .map(|v| v.value as u32)
        .unwrap_or(60);
    let urgent = w.bool(t, "urgent").map(|b| b.value).unwrap_or(false);
    let mut channels = Vec::new();
    match w.str_list(t, "channels") {
        None => {
            w.missing(
                t,
                "channels",
                "e.g. channels = [\"email\"]; one or more of email, webhook, mqtt",
            );
            ok = false;
        }
        Some(list) => {
            if list.is_empty() {
                w.error(
                    &t.span,
                    &t.key_path("channels"),
                    "is empty: this watch could never tell anyone",
                    Some("one or more of email, webhook, mqtt".into()),
                );
                ok = false;
            }
            for c in list {
                let ch = match c.value.as_str() {
                    "email" => Channel::Email,
                    "webhook" => Channel::Webhook,
                    "mqtt" => Channel::Mqtt,
                    other => {
                        w.error(
                            &c.span,
                            &t.key_path("channels"),
                            format!("`{other}` is not a channel"),
                            Some("one of email, webhook, mqtt".into()),
                        );
                        ok = false;
                        continue;
                    }
                };
                let problem = match ch {
                    Channel::Email if !has_email => Some((
                        "the subscriber has no email address",
                        "add email = \"...\" to the subscriber",
                    )),
                    Channel::Email if !d.has_email_transport => Some((
                        "there is no [smtp] (or [email_folder]) section to send email with",
                        "add an [smtp] section",
                    )),
                    Channel::Webhook if !has_webhook => Some((
                        "the subscriber has no webhook",
                        "add webhook = { url = \"https://...\", secret_env = \"...\" }",
                    )),
                    _ => None,
                };
                if let Some((msg, hint)) = problem {
                    w.error(
                        &c.span,
                        &t.key_path("channels"),
                        format!("`{}`: {msg}", c.value),
                        Some(hint.into()),
                    );
                    ok = false;
                }
                if !channels.contains(&ch) {
                    channels.push(ch);
                }
            }
        }
    }
    // Keys that only some triggers use.
    let kind = trigger.unwrap_or(TriggerKind::Presence);
    let only =
        |w: &mut Walker<'_, '_>, t: &mut Table<'_, '_>, key: &str, kinds: &[TriggerKind]| -> bool {
            if t.has(key) && !kinds.contains(&kind) {
                let span = t.map.get(key).map(|n| n.span()).unwrap_or(t.span.clone());
                let names: Vec<&str> = kinds.iter().map(|k| k.as_str()).collect();
                w.error(
                    &span,
                    &t.key_path(key),
                    format!(
                        "applies only to {} watches, not {}",
                        names.join(" and "),
                        kind.as_str()
                    ),
                    Some("remove it, or change trigger".into()),
                );
                t.get(key);
                false
            } else {
                true
            }
        };
    let rate = [TriggerKind::Spike, TriggerKind::BuildUp];
    ok &= only(w, t, "window_hours", &[TriggerKind::Spike]);
    ok &= only(w, t, "ratio", &rate);
    ok &= only(w, t, "min_count", &rate);
    ok &= only(w, t, "quiet_days", &[TriggerKind::FirstSeen]);
    ok &= only(w, t, "silence_hours", &[TriggerKind::Silence]);
    let window_hours = w
        .int(t, "window_hours", 1, 24 * 90)
        .map(|v| v.value as u32)
        .unwrap_or(24);
    let ratio = if t.has("ratio") {
        let r = w.f64(t, "ratio");
        match r {
            Some(r) if r.value >= 1.0 && r.value <= 1000.0 => r.value,
            Some(r) => {
                w.error(
                    &r.span,
                    &t.key_path("ratio"),
                    format!("{} is out of range: must be from 1 to 1000", r.value),
                    Some("how many times the usual level counts as a spike, e.g. 3.0".into()),
                );
                ok = false;
                3.0
            }
            None => {
                ok = false;
                3.0
            }
        }
    } else {
        3.0
    };
    let min_count = w
        .int(t, "min_count", 1, 100_000)
        .map(|v| v.value as u32)
        .unwrap_or(3);
    let quiet_days = w
        .int(t, "quiet_days", 1, 3650)
        .map(|v| v.value as u32)
        .unwrap_or(30);
    let silence_hours = if t.has("silence_hours") {
        w.positive(
            t,
            "silence_hours",
            24.0 * 365.0,
            "hours without a sign of life, e.g. 36",
        )
        .unwrap_or(d.silence_hours)
    } else {
        d.silence_hours
    };
    if !ok {
        return None;
    }
    Some(Watch {
        name,
        trigger: trigger?,
        species,
        hours,
        season,
        min_probability,
        cooldown_minutes,
        urgent,
        channels,
        window_hours,
        ratio,
        min_count,
        quiet_days,
        silence_hours,
    })
}

#[cfg(test)]
mod tests;
