//! Reading one archive file for `outrider replay`: a CSV with Camtrap DP
//! observation columns, a CSV of heartbeats, or JSON lines of messages.
//!
//! Every record is turned into the topic and payload bytes the daemon would
//! have received and passed through the daemon's own decoder
//! ([`crate::ingest::decode::decode`]), so a record replay accepts is one
//! the daemon accepts. A record the decoder refuses is counted under its
//! reason with its line number and the replay goes on; only a file that
//! cannot be read, or a CSV without the columns its kind needs, is an error.
//!
//! Must not: feed the engine, print, or read the clock.

use crate::ingest::decode::{decode, DecodeContext};
use crate::model::{Message, RejectReason, Rejection};
use crate::pipeline::DecodeFacts;
use base64::Engine as _;
use chrono::{DateTime, Duration, Utc};
use serde::Deserialize;
use serde_json::value::RawValue;
use std::borrow::Cow;
use std::collections::BTreeMap;
use std::io::{BufRead, BufReader};
use std::path::{Path, PathBuf};

/// One decoded message with the instant it sorts by (its own time).
#[derive(Debug, Clone)]
pub struct Record {
    pub at: DateTime<Utc>,
    pub message: Message,
}

/// The instants a replay keeps: `[from, to)`; either end may be open.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub struct TimeFilter {
    pub from: Option<DateTime<Utc>>,
    pub to: Option<DateTime<Utc>>,
}

impl TimeFilter {
    pub fn keeps(&self, t: DateTime<Utc>) -> bool {
        self.from.is_none_or(|f| t >= f) && self.to.is_none_or(|e| t < e)
    }
}

/// What a file turned out to hold.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub enum Format {
    /// Camtrap DP observations (a header with `eventStart`).
    #[default]
    ObservationsCsv,
    /// Heartbeats (a header with `timestamp`).
    HeartbeatsCsv,
    /// `{"topic": ..., "payload": {...}}` per line.
    JsonLines,
}

impl Format {
    pub fn describe(self) -> &'static str {
        match self {
            Self::ObservationsCsv => "Camtrap DP observations CSV",
            Self::HeartbeatsCsv => "heartbeats CSV",
            Self::JsonLines => "JSON lines of messages",
        }
    }
}

/// Records refused for one reason.
#[derive(Debug, Clone, Default, PartialEq, Eq)]
pub struct Tally {
    pub count: u64,
    /// The first few line numbers (line 1 is a CSV's header).
    pub lines: Vec<u64>,
    /// What the first one was told.
    pub example: String,
}

/// Line numbers kept per reason.
pub const LINES_KEPT: usize = 5;

/// What reading one file found.
#[derive(Debug, Clone, Default)]
pub struct FileStats {
    pub path: PathBuf,
    pub format: Format,
    /// Records read (CSV rows after the header; non-blank JSON lines).
    pub records: u64,
    /// Records that decoded and lie inside `--from`/`--to`.
    pub kept: u64,
    /// Records that decoded but lie outside `--from`/`--to`.
    pub outside_window: u64,
    /// Camtrap DP rows with `observationLevel` = `media` left out because
    /// the file also holds event-level rows (the same detections again,
    /// one per image).
    pub media_level_skipped: u64,
    pub rejected: BTreeMap<RejectReason, Tally>,
}

impl FileStats {
    pub fn rejected_total(&self) -> u64 {
        self.rejected.values().map(|t| t.count).sum()
    }

    fn reject(&mut self, line: u64, r: Rejection) {
        let t = self.rejected.entry(r.reason).or_default();
        t.count += 1;
        if t.lines.len() < LINES_KEPT {
            t.lines.push(line);
        }
        if t.example.is_empty() {
            t.example = r.detail;
        }
    }
}

/// Why a file could not be replayed at all.
#[derive(Debug, thiserror::Error)]
pub enum ArchiveError {
    #[error("cannot read {}: {source}", path.display())]
    Io {
        path: PathBuf,
        source: std::io::Error,
    },
    #[error("{}: {message}", path.display())]
    Shape { path: PathBuf, message: String },
}

/// The decoder's "now" for archive records. The daemon refuses a timestamp
/// more than the future tolerance after the moment it received the message;
/// an archive's records were received long ago, at about their own times,
/// so that check cannot be re-run and is switched off by a "now" far in the
/// future. (Setting "now" to each record's own time would do the same for
/// `eventStart` but wrongly refuse an `eventEnd` more than twice the
/// tolerance after it.) The lower bound, a day before the deployment
/// started, still holds. Far from chrono's limit, so `now + tolerance`
/// cannot overflow.
fn decode_now() -> DateTime<Utc> {
    DateTime::<Utc>::MAX_UTC - Duration::days(3650)
}

/// Camtrap DP missing values (observations table schema, `missingValues`).
fn missing(field: &[u8]) -> bool {
    matches!(field, b"" | b"NA" | b"NaN" | b"nan")
}

/// How a CSV column becomes a JSON value of the message.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Kind {
    Text,
    /// An integer; anything else is passed on as written and the decoder
    /// refuses it with its own reason.
    Integer,
    Number,
}

/// Observation message fields (DESIGN "Messages") that a Camtrap DP
/// observations CSV may carry. `filePath` and `vernacularName` belong to
/// other Camtrap DP tables but are taken when present. Other columns are
/// ignored.
const OBSERVATION_COLUMNS: [(&str, Kind); 15] = [
    ("observationID", Kind::Text),
    ("deploymentID", Kind::Text),
    ("eventStart", Kind::Text),
    ("eventEnd", Kind::Text),
    ("observationType", Kind::Text),
    ("scientificName", Kind::Text),
    ("count", Kind::Integer),
    ("classificationProbability", Kind::Number),
    ("classificationMethod", Kind::Text),
    ("mediaID", Kind::Text),
    ("filePath", Kind::Text),
    ("vernacularName", Kind::Text),
    ("lifeStage", Kind::Text),
    ("sex", Kind::Text),
    ("behavior", Kind::Text),
];
const OBSERVATION_REQUIRED: [&str; 4] = [
    "observationID",
    "deploymentID",
    "eventStart",
    "observationType",
];

const HEARTBEAT_COLUMNS: [(&str, Kind); 5] = [
    ("deploymentID", Kind::Text),
    ("timestamp", Kind::Text),
    ("batteryPercent", Kind::Number),
    ("signalDbm", Kind::Number),
    ("imagesSinceLast", Kind::Integer),
];
const HEARTBEAT_REQUIRED: [&str; 2] = ["deploymentID", "timestamp"];

/// A record the decoder refused, with what the daemon would have received
/// (kept by [`read_keeping`] for `outrider import`, which stores it as a
/// rejection like the daemon does).
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct RefusedRecord {
    pub line: u64,
    pub topic: String,
    pub payload: Vec<u8>,
    pub rejection: Rejection,
}

/// Reads `path`, appending what it keeps to `out` in file order.
/// `progress` is told the bytes read so far, now and then.
pub fn read(
    path: &Path,
    facts: &DecodeFacts,
    filter: TimeFilter,
    out: &mut Vec<Record>,
    progress: &mut dyn FnMut(u64),
) -> Result<FileStats, ArchiveError> {
    read_keeping(path, facts, filter, out, None, progress)
}

/// [`read`], also keeping every record the decoder refused (with its topic
/// and payload) in `refused` when given.
pub fn read_keeping(
    path: &Path,
    facts: &DecodeFacts,
    filter: TimeFilter,
    out: &mut Vec<Record>,
    refused: Option<&mut Vec<RefusedRecord>>,
    progress: &mut dyn FnMut(u64),
) -> Result<FileStats, ArchiveError> {
    let io = |source| ArchiveError::Io {
        path: path.to_path_buf(),
        source,
    };
    let file = std::fs::File::open(path).map_err(io)?;
    let size = file.metadata().map(|m| m.len()).unwrap_or(0);
    let mut reader = BufReader::with_capacity(1 << 20, file);
    let head = reader.fill_buf().map_err(io)?;
    let head = head.strip_prefix(b"\xEF\xBB\xBF").unwrap_or(head);
    let json = head
        .iter()
        .find(|b| !b.is_ascii_whitespace())
        .is_some_and(|b| *b == b'{');
    let ctx = DecodeContext {
        topic_prefix: &facts.topic_prefix,
        deployments: &facts.deployments,
        species: &facts.species,
        now: decode_now(),
        max_payload_bytes: facts.max_payload_bytes,
        future_tolerance: facts.future_tolerance,
    };
    let mut sink = Sink {
        stats: FileStats {
            path: path.to_path_buf(),
            ..Default::default()
        },
        filter,
        out,
        last_time: None,
        pending: Vec::new(),
        refused,
    };
    // Room for the records up front, so a vector of a million messages is
    // not copied over at every doubling. Lines are rarely shorter than
    // these (an observation message is about 400 bytes, a heartbeat 200, a
    // CSV row 100); a file of shorter lines just grows as usual.
    let per_record = if json { 200 } else { 100 };
    let estimate = usize::try_from(size / per_record).unwrap_or(0);
    sink.out.reserve(estimate.min(50_000_000));
    if json {
        sink.stats.format = Format::JsonLines;
        read_json_lines(path, reader, &ctx, &mut sink, progress)?;
    } else {
        read_csv(path, reader, &ctx, &mut sink, progress)?;
    }
    Ok(sink.finish())
}

/// Collects one file's records and counts.
struct Sink<'o> {
    stats: FileStats,
    filter: TimeFilter,
    out: &'o mut Vec<Record>,
    /// The time of the latest timed record so far, in file order.
    last_time: Option<DateTime<Utc>>,
    /// Corrections read before any timed record, with their lines.
    pending: Vec<(Message, u64)>,
    /// Where refused records go, when the caller keeps them.
    refused: Option<&'o mut Vec<RefusedRecord>>,
}

impl Sink<'_> {
    /// Counts a refusal and, when the caller keeps them, keeps the record.
    fn refuse(&mut self, line: u64, topic: &str, payload: &[u8], r: Rejection) {
        if let Some(keep) = self.refused.as_deref_mut() {
            keep.push(RefusedRecord {
                line,
                topic: topic.to_string(),
                payload: payload.to_vec(),
                rejection: r.clone(),
            });
        }
        self.stats.reject(line, r);
    }

    /// Keeps `message` at `at` when the time filter does; true if kept.
    fn push(&mut self, at: DateTime<Utc>, message: Message) -> bool {
        if self.filter.keeps(at) {
            self.out.push(Record { at, message });
            self.stats.kept += 1;
            true
        } else {
            self.stats.outside_window += 1;
            false
        }
    }

    /// A decoded message; true if kept. `received_at` is the archive's own
    /// note of when the message arrived, used for corrections (which carry
    /// no time of their own); without it a correction takes the time of
    /// the record before it in the file.
    fn accept(&mut self, line: u64, message: Message, received_at: Option<DateTime<Utc>>) -> bool {
        let at = match &message {
            Message::Observation(o) => o.event_start,
            Message::Heartbeat(h) => h.timestamp,
            Message::Correction(_) => match received_at.or(self.last_time) {
                Some(t) => return self.push(t, message),
                None => {
                    // Before any timed record: it takes the time of the
                    // first one, and stays before it.
                    self.pending.push((message, line));
                    return false;
                }
            },
        };
        for (m, _) in std::mem::take(&mut self.pending) {
            self.push(at, m);
        }
        self.last_time = Some(self.last_time.map_or(at, |l| l.max(at)));
        self.push(at, message)
    }

    fn finish(mut self) -> FileStats {
        for (_, line) in std::mem::take(&mut self.pending) {
            self.stats.reject(
                line,
                Rejection::new(
                    RejectReason::UnknownObservation,
                    "a correction in a file with no observation or heartbeat to place it in time",
                ),
            );
        }
        self.stats
    }
}

/// One line of a JSON-lines archive. Unknown keys are ignored.
#[derive(Deserialize)]
struct Line<'a> {
    #[serde(borrow)]
    topic: Cow<'a, str>,
    #[serde(borrow, default)]
    payload: Option<&'a RawValue>,
    /// The exact bytes, base64, for payloads that are not a JSON object
    /// (what the daemon keeps of a rejected message).
    #[serde(default)]
    payload_b64: Option<String>,
    #[serde(rename = "receivedAt", borrow, default)]
    received_at: Option<Cow<'a, str>>,
}

fn line_rejection(e: &serde_json::Error) -> Rejection {
    use serde_json::error::Category;
    let reason = match e.classify() {
        Category::Data if e.to_string().starts_with("missing field") => RejectReason::MissingField,
        Category::Data => RejectReason::WrongType,
        Category::Syntax | Category::Eof | Category::Io => RejectReason::InvalidJson,
    };
    Rejection::new(
        reason,
        format!("not an archive line {{\"topic\": ..., \"payload\": {{...}}}}: {e}"),
    )
}

fn read_json_lines(
    path: &Path,
    mut reader: BufReader<std::fs::File>,
    ctx: &DecodeContext<'_>,
    sink: &mut Sink<'_>,
    progress: &mut dyn FnMut(u64),
) -> Result<(), ArchiveError> {
    let mut buf: Vec<u8> = Vec::with_capacity(4096);
    let mut line_no = 0u64;
    let mut bytes = 0u64;
    loop {
        buf.clear();
        let n = reader
            .read_until(b'\n', &mut buf)
            .map_err(|source| ArchiveError::Io {
                path: path.to_path_buf(),
                source,
            })?;
        if n == 0 {
            break;
        }
        line_no += 1;
        bytes += n as u64;
        if line_no % 4096 == 0 {
            progress(bytes);
        }
        let mut line = buf.trim_ascii();
        if line_no == 1 {
            line = line.strip_prefix(b"\xEF\xBB\xBF").unwrap_or(line);
        }
        if line.is_empty() {
            continue;
        }
        sink.stats.records += 1;
        let parsed: Line<'_> = match serde_json::from_slice(line) {
            Ok(l) => l,
            Err(e) => {
                sink.stats.reject(line_no, line_rejection(&e));
                continue;
            }
        };
        let decoded_b64;
        let payload: &[u8] = match (parsed.payload, &parsed.payload_b64) {
            (Some(raw), _) => raw.get().as_bytes(),
            (None, Some(b64)) => match base64::engine::general_purpose::STANDARD.decode(b64) {
                Ok(b) => {
                    decoded_b64 = b;
                    &decoded_b64
                }
                Err(e) => {
                    sink.stats.reject(
                        line_no,
                        Rejection::new(
                            RejectReason::InvalidValue,
                            format!("payload_b64 is not base64: {e}"),
                        ),
                    );
                    continue;
                }
            },
            (None, None) => {
                sink.stats.reject(
                    line_no,
                    Rejection::new(
                        RejectReason::MissingField,
                        "an archive line needs \"payload\" (an object) or \"payload_b64\"",
                    ),
                );
                continue;
            }
        };
        let received_at = match parsed.received_at.as_deref() {
            None | Some("") => None,
            Some(s) => match crate::config::sites::parse_datetime(s) {
                Some(t) => Some(t),
                None => {
                    sink.stats.reject(
                        line_no,
                        Rejection::new(
                            RejectReason::BadTimestamp,
                            format!(
                                "receivedAt `{}` is not RFC 3339 with an offset",
                                crate::ingest::decode::printable(s)
                            ),
                        ),
                    );
                    continue;
                }
            },
        };
        match decode(&parsed.topic, payload, ctx) {
            Ok(m) => {
                sink.accept(line_no, m, received_at);
            }
            Err(r) => sink.refuse(line_no, &parsed.topic, payload, r),
        }
    }
    progress(bytes);
    Ok(())
}

/// Appends `"key":` to a JSON object being built.
fn key(buf: &mut Vec<u8>, first: &mut bool, k: &str) {
    if !*first {
        buf.push(b',');
    }
    *first = false;
    buf.push(b'"');
    buf.extend_from_slice(k.as_bytes());
    buf.extend_from_slice(b"\":");
}

/// Appends `s` as a JSON string.
fn json_string(buf: &mut Vec<u8>, s: &str) {
    // Writing a &str into a Vec cannot fail.
    let _ = serde_json::to_writer(&mut *buf, s);
}

/// Appends a CSV field as the JSON value its column calls for. A field that
/// is not the number its column wants goes on as a string, so the decoder
/// refuses it with its own reason (wrong-type) and message.
fn json_value(buf: &mut Vec<u8>, kind: Kind, text: &str) {
    match kind {
        Kind::Text => json_string(buf, text),
        Kind::Integer => {
            if let Ok(v) = text.parse::<u64>() {
                buf.extend_from_slice(v.to_string().as_bytes());
            } else if let Ok(v) = text.parse::<i64>() {
                buf.extend_from_slice(v.to_string().as_bytes());
            } else {
                number_or_string(buf, text);
            }
        }
        Kind::Number => number_or_string(buf, text),
    }
}

fn number_or_string(buf: &mut Vec<u8>, text: &str) {
    match text.parse::<f64>() {
        Ok(v) if v.is_finite() => {
            // Rust prints the shortest text that reads back as the same
            // f64, always a valid JSON number for finite values.
            buf.extend_from_slice(format!("{v:?}").as_bytes());
        }
        _ => json_string(buf, text),
    }
}

fn read_csv(
    path: &Path,
    reader: BufReader<std::fs::File>,
    ctx: &DecodeContext<'_>,
    sink: &mut Sink<'_>,
    progress: &mut dyn FnMut(u64),
) -> Result<(), ArchiveError> {
    let shape = |message: String| ArchiveError::Shape {
        path: path.to_path_buf(),
        message,
    };
    let mut rdr = csv::ReaderBuilder::new()
        .flexible(true)
        .trim(csv::Trim::All)
        .has_headers(true)
        .from_reader(reader);
    let headers = rdr
        .byte_headers()
        .map_err(|e| shape(format!("cannot read the header row: {e}")))?
        .clone();
    let names: Vec<String> = headers
        .iter()
        .map(|h| String::from_utf8_lossy(h).into_owned())
        .collect();
    let has = |c: &str| names.iter().any(|n| n == c);
    let (format, columns, required, kind_segment): (Format, &[(&str, Kind)], &[&str], &str) =
        if has("eventStart") || has("observationID") {
            (
                Format::ObservationsCsv,
                &OBSERVATION_COLUMNS,
                &OBSERVATION_REQUIRED,
                "observation",
            )
        } else if has("timestamp") {
            (
                Format::HeartbeatsCsv,
                &HEARTBEAT_COLUMNS,
                &HEARTBEAT_REQUIRED,
                "heartbeat",
            )
        } else {
            return Err(shape(format!(
                "is neither JSON lines of messages nor a CSV with Camtrap DP observation columns \
                 (observationID, deploymentID, eventStart, observationType, ...) or heartbeat \
                 columns (deploymentID, timestamp, ...); its header is `{}`",
                crate::ingest::decode::printable(&names.join(","))
            )));
        };
    let absent: Vec<&str> = required.iter().copied().filter(|c| !has(c)).collect();
    if !absent.is_empty() {
        return Err(shape(format!(
            "the {} header lacks column{} {}",
            format.describe(),
            if absent.len() == 1 { "" } else { "s" },
            absent.join(", ")
        )));
    }
    sink.stats.format = format;
    // (column index, JSON key, kind) for every column the message uses.
    let used: Vec<(usize, &str, Kind)> = names
        .iter()
        .enumerate()
        .filter_map(|(i, n)| {
            columns
                .iter()
                .find(|(c, _)| c == n)
                .map(|(c, k)| (i, *c, *k))
        })
        .collect();
    let dep_col = names.iter().position(|n| n == "deploymentID");
    let level_col = names.iter().position(|n| n == "observationLevel");
    let mut media_rows: Vec<usize> = Vec::new();
    let mut saw_event_level = false;
    let mut record = csv::ByteRecord::new();
    let mut payload: Vec<u8> = Vec::with_capacity(1024);
    let mut topic = String::with_capacity(64);
    let mut rows = 0u64;
    'rows: loop {
        match rdr.read_byte_record(&mut record) {
            Ok(true) => {}
            Ok(false) => break,
            Err(e) => {
                let at = e
                    .position()
                    .map(|p| format!(" at line {}", p.line()))
                    .unwrap_or_default();
                return Err(shape(format!("cannot read the CSV{at}: {e}")));
            }
        }
        let line = record.position().map_or(0, |p| p.line());
        rows += 1;
        if rows % 4096 == 0 {
            progress(record.position().map_or(0, |p| p.byte()));
        }
        sink.stats.records += 1;
        let media_level = match level_col.and_then(|i| record.get(i)) {
            Some(b"event") => {
                saw_event_level = true;
                false
            }
            Some(b"media") => true,
            _ => false,
        };
        payload.clear();
        payload.push(b'{');
        let mut first = true;
        for &(i, k, kind) in &used {
            let Some(field) = record.get(i) else { continue };
            if missing(field) {
                continue;
            }
            let Ok(text) = std::str::from_utf8(field) else {
                // What is kept is the row itself, fields joined by commas.
                let raw = record.iter().collect::<Vec<_>>().join(&b","[..]);
                let dep = dep_col
                    .and_then(|i| record.get(i))
                    .map(String::from_utf8_lossy)
                    .unwrap_or_default();
                let topic = format!("{}/{dep}/{kind_segment}", ctx.topic_prefix);
                sink.refuse(
                    line,
                    &topic,
                    &raw,
                    Rejection::new(
                        RejectReason::InvalidUtf8,
                        format!("column {k} is not UTF-8"),
                    ),
                );
                continue 'rows;
            };
            key(&mut payload, &mut first, k);
            json_value(&mut payload, kind, text);
        }
        payload.push(b'}');
        let dep = dep_col
            .and_then(|i| record.get(i))
            .and_then(|d| std::str::from_utf8(d).ok())
            .unwrap_or("");
        topic.clear();
        topic.push_str(ctx.topic_prefix);
        topic.push('/');
        topic.push_str(dep);
        topic.push('/');
        topic.push_str(kind_segment);
        match decode(&topic, &payload, ctx) {
            Ok(m) => {
                let index = sink.out.len();
                if sink.accept(line, m, None) && media_level {
                    media_rows.push(index);
                }
            }
            Err(r) => sink.refuse(line, &topic, &payload, r),
        }
    }
    progress(rdr.position().byte());
    if saw_event_level && !media_rows.is_empty() {
        // Camtrap DP packages may hold each detection twice: once per
        // sequence (event level) and once per image (media level). The
        // message schema is one classified detection, so event-level rows
        // win and media-level rows would count the same animals again.
        sink.stats.media_level_skipped = media_rows.len() as u64;
        sink.stats.kept -= media_rows.len() as u64;
        let mut skip = media_rows.into_iter().peekable();
        let mut index = 0usize;
        sink.out.retain(|_| {
            let i = index;
            index += 1;
            if skip.peek() == Some(&i) {
                skip.next();
                false
            } else {
                true
            }
        });
    }
    Ok(())
}
