//! Camtrap DP 1.0.2 data packages: writing one from a stored history, and
//! reading the parts an import or a replay needs.
//!
//! Role: pure. [`write_package`] turns a [`History`] and a time window into
//! the files of a package (names and bytes); [`PackageLayout::parse`] reads
//! a `datapackage.json`; [`read_deployments`] reads a deployments table.
//! The shells write and read the files.
//!
//! # What a package holds (docs/interchange.md)
//! - `deployments.csv`: every configured deployment operating in the
//!   window, cut to it. A deployment still out ends at the window's end
//!   (Camtrap DP requires `deploymentEnd`). Human and vehicle observations
//!   appear only as counts, in `deploymentTags`
//!   (`humanObservations:N|vehicleObservations:N`): the privacy rule of
//!   DESIGN.md "Messages".
//! - `observations.csv`: one event-level row (`observationLevel` = `event`)
//!   per independent event starting in the window, corrections applied:
//!   `eventStart`/`eventEnd` are its first and last trigger, `count` the
//!   most animals seen at once, `classificationProbability` the best of its
//!   triggers, `classificationMethod` `human` when a person corrected any of
//!   them. `observationTags` holds `triggers:N`. Blank, unknown and
//!   unclassified observations are not events and are left out.
//! - `media.csv`: one row per trigger of an exported event whose message
//!   carried a `filePath` (Camtrap DP links media to events by deployment
//!   and time). `filePublic` is `false`: outrider cannot vouch that the
//!   link is public.
//! - `heartbeats.csv`: an extra resource of our own (the profile allows
//!   resources besides its three), the cameras' heartbeats in the window,
//!   so that effort (camera-nights) survives an export and import.
//! - `datapackage.json`: the Camtrap DP profile and schema URLs, the
//!   taxonomic list, spatial (GeoJSON) and temporal coverage.
//!
//! Date-times are written in the service's time zone with their offset and
//! whole seconds (Camtrap DP's `%Y-%m-%dT%H:%M:%S%z` has no fractions).

use super::history::History;
use super::text::local_datetime;
use crate::activity::IndependentEvent;
use crate::model::{ClassificationMethod, ObservationType};
use chrono::{DateTime, Utc};
use chrono_tz::Tz;
use serde_json::{json, Value};
use std::collections::{BTreeMap, HashMap, HashSet};

/// The Camtrap DP version written.
pub const VERSION: &str = "1.0.2";
/// The profile URL a package names (Camtrap DP requires it).
pub const PROFILE: &str =
    "https://raw.githubusercontent.com/tdwg/camtrap-dp/1.0.2/camtrap-dp-profile.json";

/// The table schema URL of a Camtrap DP resource.
pub fn schema_url(resource: &str) -> String {
    format!(
        "https://raw.githubusercontent.com/tdwg/camtrap-dp/{VERSION}/{resource}-table-schema.json"
    )
}

/// Fields of the Camtrap DP 1.0.2 deployments table, in schema order (a
/// unit test checks them against the schema).
pub const DEPLOYMENT_FIELDS: [&str; 24] = [
    "deploymentID",
    "locationID",
    "locationName",
    "latitude",
    "longitude",
    "coordinateUncertainty",
    "deploymentStart",
    "deploymentEnd",
    "setupBy",
    "cameraID",
    "cameraModel",
    "cameraDelay",
    "cameraHeight",
    "cameraDepth",
    "cameraTilt",
    "cameraHeading",
    "detectionDistance",
    "timestampIssues",
    "baitUse",
    "featureType",
    "habitat",
    "deploymentGroups",
    "deploymentTags",
    "deploymentComments",
];

/// Fields of the media table, in schema order.
pub const MEDIA_FIELDS: [&str; 11] = [
    "mediaID",
    "deploymentID",
    "captureMethod",
    "timestamp",
    "filePath",
    "filePublic",
    "fileName",
    "fileMediatype",
    "exifData",
    "favorite",
    "mediaComments",
];

/// Fields of the observations table, in schema order.
pub const OBSERVATION_FIELDS: [&str; 28] = [
    "observationID",
    "deploymentID",
    "mediaID",
    "eventID",
    "eventStart",
    "eventEnd",
    "observationLevel",
    "observationType",
    "cameraSetupType",
    "scientificName",
    "count",
    "lifeStage",
    "sex",
    "behavior",
    "individualID",
    "individualPositionRadius",
    "individualPositionAngle",
    "individualSpeed",
    "bboxX",
    "bboxY",
    "bboxWidth",
    "bboxHeight",
    "classificationMethod",
    "classifiedBy",
    "classificationTimestamp",
    "classificationProbability",
    "observationTags",
    "observationComments",
];

/// Fields of our heartbeats resource (the message's field names).
pub const HEARTBEAT_FIELDS: [&str; 5] = [
    "deploymentID",
    "timestamp",
    "batteryPercent",
    "signalDbm",
    "imagesSinceLast",
];

/// What to write.
#[derive(Debug, Clone)]
pub struct PackageOptions<'a> {
    /// Window start; `None`: from the first deployment.
    pub from: Option<DateTime<Utc>>,
    /// Window end (exclusive); `None` or later than `now`: `now`.
    pub to: Option<DateTime<Utc>>,
    /// The time of the export (`created`, and the end of open deployments).
    pub now: DateTime<Utc>,
    /// The service's time zone: local date-times and the temporal coverage.
    pub timezone: Tz,
    /// `service.public_url`, named as the publisher's address.
    pub public_url: &'a str,
}

/// The files of a package, and what was left out.
#[derive(Debug, Clone, Default)]
pub struct Package {
    /// (file name, contents), `datapackage.json` first.
    pub files: Vec<(String, Vec<u8>)>,
    pub deployments: usize,
    pub observations: usize,
    pub media: usize,
    pub heartbeats: usize,
    /// Human and vehicle observations, counted in `deploymentTags` only.
    pub private_counted: usize,
    /// Media links left out because Camtrap DP's `filePath` pattern refuses
    /// them (a path starting with `.`, `/` or `~`, or holding `..`).
    pub media_refused: usize,
    /// Media rows left out because another trigger already used the mediaID.
    pub media_repeated: usize,
}

/// Why a package could not be written.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
pub enum PackageError {
    #[error("no deployment operates between {from} and {to}: nothing to export")]
    NoDeployments {
        from: DateTime<Utc>,
        to: DateTime<Utc>,
    },
}

/// Camtrap DP's `filePath` pattern `^(?=^[^./~])(^((?!\.{2}).)*$).*$`: not
/// starting with `.`, `/` or `~`, no `..`; and no line breaks (the pattern's
/// `.` does not match one).
pub fn file_path_allowed(p: &str) -> bool {
    !p.is_empty()
        && !p.starts_with(['.', '/', '~'])
        && !p.contains("..")
        && !p.contains(['\n', '\r'])
}

/// The media type of an image or video link, from its extension. Unknown
/// extensions are taken as JPEG stills (messages carry "the URL of the
/// image", DESIGN.md "Messages"; JPEG is what trail cameras write, common
/// practice).
pub fn media_type(path: &str) -> &'static str {
    let name = file_name(path).to_ascii_lowercase();
    let ext = name.rsplit_once('.').map(|(_, e)| e).unwrap_or("");
    match ext {
        "png" => "image/png",
        "gif" => "image/gif",
        "webp" => "image/webp",
        "tif" | "tiff" => "image/tiff",
        "heic" => "image/heic",
        "mp4" | "m4v" => "video/mp4",
        "avi" => "video/x-msvideo",
        "mov" => "video/quicktime",
        "wav" => "audio/wav",
        _ => "image/jpeg",
    }
}

/// The last segment of a path or URL, without query or fragment.
fn file_name(path: &str) -> &str {
    let path = path.split(['?', '#']).next().unwrap_or(path);
    path.rsplit('/').next().unwrap_or(path)
}

/// The id of an exported event: deployment, species and first trigger,
/// as the engine names events ([`crate::engine::event_key`]).
pub fn event_id(e: &IndependentEvent) -> String {
    crate::engine::event_key(&e.id())
}

fn csv_bytes(header: &[&str], rows: &[Vec<String>]) -> Vec<u8> {
    let mut w = csv::WriterBuilder::new()
        .terminator(csv::Terminator::Any(b'\n'))
        .from_writer(Vec::new());
    // Writing into a Vec cannot fail.
    let _ = w.write_record(header);
    for r in rows {
        let _ = w.write_record(r);
    }
    w.into_inner().unwrap_or_default()
}

/// A row of `n` empty fields with the named ones filled.
fn row(fields: &[&str], values: &[(&str, String)]) -> Vec<String> {
    fields
        .iter()
        .map(|f| {
            values
                .iter()
                .find(|(k, _)| k == f)
                .map(|(_, v)| v.clone())
                .unwrap_or_default()
        })
        .collect()
}

/// The value every trigger agrees on, if they all give one.
fn agreed<'a>(values: impl Iterator<Item = Option<&'a str>>) -> Option<&'a str> {
    let mut out: Option<&str> = None;
    for v in values {
        let v = v?;
        match out {
            None => out = Some(v),
            Some(o) if o == v => {}
            Some(_) => return None,
        }
    }
    out
}

fn number(v: f64) -> String {
    // Shortest text that reads back as the same f64.
    format!("{v:?}")
}

/// Writes the package for `h` over the options' window.
pub fn write_package(h: &History, o: &PackageOptions<'_>) -> Result<Package, PackageError> {
    let tz = o.timezone;
    let to = o.to.map_or(o.now, |t| t.min(o.now));
    let from = o.from.unwrap_or(DateTime::<Utc>::MIN_UTC);
    let mut pkg = Package::default();

    // Deployments, cut to the window.
    struct Dep {
        site: usize,
        start: DateTime<Utc>,
        end: DateTime<Utc>,
    }
    let mut deps: Vec<Dep> = Vec::new();
    for (i, s) in h.sites.iter().enumerate() {
        let start = s.deployment_start.max(from);
        let end = s.deployment_end.map_or(to, |e| e.min(to));
        // Whole seconds on both ends must still leave a span.
        if end.timestamp() > start.timestamp() {
            deps.push(Dep {
                site: i,
                start,
                end,
            });
        }
    }
    if deps.is_empty() {
        return Err(PackageError::NoDeployments { from, to });
    }
    let included: HashMap<&str, &Dep> = deps
        .iter()
        .map(|d| (h.sites[d.site].deployment_id.as_str(), d))
        .collect();

    let mut deployment_rows = Vec::new();
    for d in &deps {
        let s = &h.sites[d.site];
        let (mut humans, mut vehicles) = (0usize, 0usize);
        for p in h
            .private
            .iter()
            .filter(|p| p.site == d.site && p.at >= d.start && p.at < d.end)
        {
            match p.kind {
                ObservationType::Human => humans += 1,
                _ => vehicles += 1,
            }
        }
        pkg.private_counted += humans + vehicles;
        let tags = if humans + vehicles > 0 {
            format!("humanObservations:{humans}|vehicleObservations:{vehicles}")
        } else {
            String::new()
        };
        deployment_rows.push(row(
            &DEPLOYMENT_FIELDS,
            &[
                ("deploymentID", s.deployment_id.clone()),
                ("locationID", s.location_id.clone().unwrap_or_default()),
                ("locationName", s.location_name.clone().unwrap_or_default()),
                ("latitude", number(s.latitude)),
                ("longitude", number(s.longitude)),
                ("deploymentStart", local_datetime(d.start, tz)),
                ("deploymentEnd", local_datetime(d.end, tz)),
                ("cameraID", s.camera_id.clone().unwrap_or_default()),
                (
                    "cameraDelay",
                    s.camera_delay.map(|v| v.to_string()).unwrap_or_default(),
                ),
                ("deploymentTags", tags),
            ],
        ));
    }
    pkg.deployments = deployment_rows.len();

    // Events and their media.
    let mut observation_rows = Vec::new();
    let mut media_rows = Vec::new();
    let mut media_ids: HashSet<String> = HashSet::new();
    let mut taxa: BTreeMap<&str, Option<&str>> = BTreeMap::new();
    for e in &h.events {
        let Some(d) = included.get(e.deployment_id.as_str()) else {
            continue;
        };
        if e.start < from || e.start >= to || e.start >= d.end {
            continue;
        }
        let facts: Vec<_> = e
            .observation_ids
            .iter()
            .filter_map(|id| h.observations.get(id).map(|f| (id, f)))
            .collect();
        let corrected = e.observation_ids.iter().any(|id| h.corrected.contains(id));
        let method = if corrected
            || facts
                .iter()
                .any(|(_, f)| f.classification_method == Some(ClassificationMethod::Human))
        {
            Some("human")
        } else if facts
            .iter()
            .any(|(_, f)| f.classification_method == Some(ClassificationMethod::Machine))
        {
            Some("machine")
        } else {
            None
        };
        let probability = facts
            .iter()
            .filter_map(|(_, f)| f.classification_probability)
            .fold(None, |m: Option<f64>, p| Some(m.map_or(p, |m| m.max(p))));
        let life_stage = agreed(facts.iter().map(|(_, f)| f.life_stage.as_deref()))
            .filter(|v| matches!(*v, "adult" | "subadult" | "juvenile"));
        let sex = agreed(facts.iter().map(|(_, f)| f.sex.as_deref()))
            .filter(|v| matches!(*v, "female" | "male"));
        let behavior = agreed(facts.iter().map(|(_, f)| f.behavior.as_deref()));
        let vernacular = facts.iter().find_map(|(_, f)| f.vernacular_name.as_deref());
        let entry = taxa.entry(e.scientific_name.as_str()).or_insert(None);
        if entry.is_none() {
            *entry = vernacular.filter(|v| !v.trim().is_empty());
        }
        let id = event_id(e);
        observation_rows.push(row(
            &OBSERVATION_FIELDS,
            &[
                ("observationID", id.clone()),
                ("deploymentID", e.deployment_id.clone()),
                ("eventID", id),
                ("eventStart", local_datetime(e.start, tz)),
                ("eventEnd", local_datetime(e.end, tz)),
                ("observationLevel", "event".into()),
                ("observationType", "animal".into()),
                ("scientificName", e.scientific_name.clone()),
                ("count", e.count.to_string()),
                ("lifeStage", life_stage.unwrap_or_default().into()),
                ("sex", sex.unwrap_or_default().into()),
                ("behavior", behavior.unwrap_or_default().into()),
                ("classificationMethod", method.unwrap_or_default().into()),
                (
                    "classificationProbability",
                    probability.map(number).unwrap_or_default(),
                ),
                ("observationTags", format!("triggers:{}", e.triggers)),
            ],
        ));
        for (oid, f) in &facts {
            let Some(path) = f.file_path.as_deref() else {
                continue;
            };
            if !file_path_allowed(path) {
                pkg.media_refused += 1;
                continue;
            }
            let media_id = f.media_id.clone().unwrap_or_else(|| format!("m:{oid}"));
            if !media_ids.insert(media_id.clone()) {
                pkg.media_repeated += 1;
                continue;
            }
            media_rows.push(row(
                &MEDIA_FIELDS,
                &[
                    ("mediaID", media_id),
                    ("deploymentID", e.deployment_id.clone()),
                    ("captureMethod", "activityDetection".into()),
                    ("timestamp", local_datetime(f.at, tz)),
                    ("filePath", path.to_string()),
                    ("filePublic", "false".into()),
                    ("fileName", file_name(path).to_string()),
                    ("fileMediatype", media_type(path).into()),
                ],
            ));
        }
    }
    pkg.observations = observation_rows.len();
    pkg.media = media_rows.len();

    // Heartbeats: one per deployment and whole second.
    let mut heartbeat_rows = Vec::new();
    let mut seen: HashSet<(&str, i64)> = HashSet::new();
    for hb in &h.heartbeats {
        let Some(d) = included.get(hb.deployment_id.as_str()) else {
            continue;
        };
        if hb.timestamp < d.start || hb.timestamp >= d.end {
            continue;
        }
        if !seen.insert((hb.deployment_id.as_str(), hb.timestamp.timestamp())) {
            continue;
        }
        heartbeat_rows.push(vec![
            hb.deployment_id.clone(),
            local_datetime(hb.timestamp, tz),
            hb.battery_percent.map(number).unwrap_or_default(),
            hb.signal_dbm.map(number).unwrap_or_default(),
            hb.images_since_last
                .map(|v| v.to_string())
                .unwrap_or_default(),
        ]);
    }
    pkg.heartbeats = heartbeat_rows.len();

    let first = deps.iter().map(|d| d.start).min().unwrap_or(from);
    let last = deps.iter().map(|d| d.end).max().unwrap_or(to);
    let descriptor = descriptor(
        h,
        &deps.iter().map(|d| d.site).collect::<Vec<_>>(),
        &taxa,
        first,
        last,
        o,
    );
    let mut json = serde_json::to_vec_pretty(&descriptor).unwrap_or_default();
    json.push(b'\n');
    pkg.files = vec![
        ("datapackage.json".into(), json),
        (
            "deployments.csv".into(),
            csv_bytes(&DEPLOYMENT_FIELDS, &deployment_rows),
        ),
        ("media.csv".into(), csv_bytes(&MEDIA_FIELDS, &media_rows)),
        (
            "observations.csv".into(),
            csv_bytes(&OBSERVATION_FIELDS, &observation_rows),
        ),
        (
            "heartbeats.csv".into(),
            csv_bytes(&HEARTBEAT_FIELDS, &heartbeat_rows),
        ),
    ];
    Ok(pkg)
}

/// The Table Schema of our heartbeats resource (Frictionless Table Schema,
/// inline in the descriptor).
pub fn heartbeat_schema() -> Value {
    json!({
        "fields": [
            {"name": "deploymentID", "type": "string", "constraints": {"required": true},
             "description": "The deployment (deployments.deploymentID) the camera belongs to."},
            {"name": "timestamp", "type": "datetime", "format": "%Y-%m-%dT%H:%M:%S%z", "constraints": {"required": true},
             "description": "When the camera reported that it was alive."},
            {"name": "batteryPercent", "type": "number", "constraints": {"minimum": 0, "maximum": 100}},
            {"name": "signalDbm", "type": "number"},
            {"name": "imagesSinceLast", "type": "integer", "constraints": {"minimum": 0}}
        ],
        "missingValues": ["", "NA", "NaN", "nan"],
        "primaryKey": ["deploymentID", "timestamp"],
        "foreignKeys": [
            {"fields": "deploymentID", "reference": {"resource": "deployments", "fields": "deploymentID"}}
        ]
    })
}

fn descriptor(
    h: &History,
    sites: &[usize],
    taxa: &BTreeMap<&str, Option<&str>>,
    first: DateTime<Utc>,
    last: DateTime<Utc>,
    o: &PackageOptions<'_>,
) -> Value {
    let tz = o.timezone;
    let date = |t: DateTime<Utc>| t.with_timezone(&tz).format("%Y-%m-%d").to_string();
    let resource = |name: &str| {
        json!({
            "name": name,
            "path": format!("{name}.csv"),
            "profile": "tabular-data-resource",
            "format": "csv",
            "mediatype": "text/csv",
            "encoding": "utf-8",
            "schema": schema_url(name),
        })
    };
    let taxonomic: Vec<Value> = taxa
        .iter()
        .map(|(name, vernacular)| {
            let mut t = json!({ "scientificName": name });
            // "Genus species": a species; other forms are left unranked.
            let words = name.split_whitespace().count();
            if words == 2 {
                t["taxonRank"] = json!("species");
            }
            if let Some(v) = vernacular {
                t["vernacularNames"] = json!({ "eng": v });
            }
            t
        })
        .collect();
    let mut contributor = json!({
        "title": format!("outrider at {}", crate::notify::header_safe(o.public_url)),
        "role": "publisher",
    });
    if let Some(u) = crate::notify::render::safe_url(o.public_url) {
        contributor["path"] = json!(u);
    }
    json!({
        "profile": PROFILE,
        "name": format!("outrider-{}-{}", date(first), date(last)),
        "title": "Camera-trap detections exported by outrider",
        "description": "Independent events (event-level observations) of a camera network, with the heartbeats the cameras sent. Human and vehicle observations are counted per deployment in deploymentTags and otherwise left out.",
        "created": crate::notify::notice::rfc3339(o.now),
        "contributors": [contributor],
        "project": {
            "title": "Camera-trap detections exported by outrider",
            "samplingDesign": "targeted",
            "captureMethod": ["activityDetection"],
            "individualAnimals": false,
            "observationLevel": ["event"],
        },
        "spatial": spatial(h, sites),
        "temporal": { "start": date(first), "end": date(last) },
        "taxonomic": taxonomic,
        "resources": [
            resource("deployments"),
            resource("media"),
            resource("observations"),
            {
                "name": "heartbeats",
                "path": "heartbeats.csv",
                "profile": "tabular-data-resource",
                "format": "csv",
                "mediatype": "text/csv",
                "encoding": "utf-8",
                "description": "outrider's own resource (not part of Camtrap DP): the heartbeats each camera sent, for effort in camera-nights.",
                "schema": heartbeat_schema(),
            },
        ],
    })
}

/// GeoJSON (RFC 7946: positions are [lon, lat]) of the deployments: the
/// bounding box as a polygon (counter-clockwise exterior ring), or a point
/// or multipoint when the sites do not span an area.
fn spatial(h: &History, sites: &[usize]) -> Value {
    let pts: Vec<(f64, f64)> = sites
        .iter()
        .map(|&i| (h.sites[i].longitude, h.sites[i].latitude))
        .collect();
    let (mut w, mut s, mut e, mut n) = (180.0f64, 90.0f64, -180.0f64, -90.0f64);
    for (lon, lat) in &pts {
        w = w.min(*lon);
        e = e.max(*lon);
        s = s.min(*lat);
        n = n.max(*lat);
    }
    if pts.len() == 1 {
        json!({"type": "Point", "coordinates": [pts[0].0, pts[0].1]})
    } else if e > w && n > s {
        json!({
            "type": "Polygon",
            "bbox": [w, s, e, n],
            "coordinates": [[[w, s], [e, s], [e, n], [w, n], [w, s]]],
        })
    } else {
        json!({"type": "MultiPoint", "coordinates": pts.iter().map(|(x, y)| json!([x, y])).collect::<Vec<_>>()})
    }
}

/// Where a package's tables are, from its `datapackage.json`.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct PackageLayout {
    pub deployments: String,
    pub observations: String,
    pub media: Option<String>,
    /// Our heartbeats resource, when the package has it.
    pub heartbeats: Option<String>,
    /// Things worth saying (an unexpected profile or version).
    pub warnings: Vec<String>,
}

/// Why a `datapackage.json` cannot be used.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
pub enum LayoutError {
    #[error("datapackage.json is not JSON: {0}")]
    Json(String),
    #[error("datapackage.json has no `resources` list")]
    NoResources,
    #[error("datapackage.json has no `{0}` resource (a Camtrap DP package has deployments, media and observations)")]
    Missing(&'static str),
    #[error("resource `{name}`: {message}")]
    Path { name: String, message: String },
}

impl PackageLayout {
    /// Reads `datapackage.json` text. Paths must be relative file paths
    /// inside the package (no URL, no absolute path, no `..`).
    pub fn parse(text: &str) -> Result<Self, LayoutError> {
        let v: Value = serde_json::from_str(text).map_err(|e| LayoutError::Json(e.to_string()))?;
        let resources = v["resources"].as_array().ok_or(LayoutError::NoResources)?;
        let mut warnings = Vec::new();
        match v["profile"].as_str() {
            Some(p) if p.contains("camtrap-dp") => {
                if !p.contains("/1.0") {
                    warnings.push(format!(
                        "the package names profile {}; outrider reads Camtrap DP 1.0",
                        crate::notify::header_safe(p)
                    ));
                }
            }
            other => warnings.push(format!(
                "the package does not name the Camtrap DP profile (profile: {}); reading it as one anyway",
                other.map(crate::notify::header_safe).unwrap_or_else(|| "none".into())
            )),
        }
        let path_of = |name: &str| -> Result<Option<String>, LayoutError> {
            let Some(r) = resources.iter().find(|r| r["name"] == name) else {
                return Ok(None);
            };
            let bad = |message: &str| LayoutError::Path {
                name: name.to_string(),
                message: message.to_string(),
            };
            let path = match &r["path"] {
                Value::String(s) => s.clone(),
                Value::Array(_) => {
                    return Err(bad(
                        "`path` lists several files; outrider reads one file per table",
                    ))
                }
                _ => return Err(bad("has no `path` (inline data is not read)")),
            };
            if path.contains("://") {
                return Err(bad(
                    "`path` is a URL; outrider reads local packages only (download it first)",
                ));
            }
            if path.starts_with('/') || path.split(['/', '\\']).any(|s| s == "..") {
                return Err(bad(
                    "`path` must be a relative path inside the package folder",
                ));
            }
            Ok(Some(path))
        };
        Ok(PackageLayout {
            deployments: path_of("deployments")?.ok_or(LayoutError::Missing("deployments"))?,
            observations: path_of("observations")?.ok_or(LayoutError::Missing("observations"))?,
            media: path_of("media")?,
            heartbeats: path_of("heartbeats")?,
            warnings,
        })
    }
}

/// One row of a deployments table, as far as an import checks it.
#[derive(Debug, Clone, PartialEq)]
pub struct PackageDeployment {
    /// Line in the file (the header is line 1).
    pub line: u64,
    pub deployment_id: String,
    pub deployment_start: Option<DateTime<Utc>>,
    pub deployment_end: Option<DateTime<Utc>>,
}

/// Reads a deployments table's ids and times.
pub fn read_deployments(text: &str) -> Result<Vec<PackageDeployment>, String> {
    let mut rdr = csv::ReaderBuilder::new()
        .trim(csv::Trim::All)
        .flexible(true)
        .from_reader(text.as_bytes());
    let headers = rdr
        .headers()
        .map_err(|e| format!("cannot read the header row: {e}"))?
        .clone();
    let col = |name: &str| headers.iter().position(|h| h == name);
    let id = col("deploymentID").ok_or("the header has no deploymentID column")?;
    let (start, end) = (col("deploymentStart"), col("deploymentEnd"));
    let mut out = Vec::new();
    for r in rdr.records() {
        let r = r.map_err(|e| format!("unreadable row: {e}"))?;
        let line = r.position().map_or(0, |p| p.line());
        let when = |c: Option<usize>| {
            c.and_then(|c| r.get(c))
                .and_then(crate::config::sites::parse_datetime)
        };
        out.push(PackageDeployment {
            line,
            deployment_id: r.get(id).unwrap_or("").to_string(),
            deployment_start: when(start),
            deployment_end: when(end),
        });
    }
    Ok(out)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::config::Site;
    use crate::interchange::test_config;
    use crate::model::{Correction, Heartbeat, Message, Observation};
    use chrono::{Duration, TimeZone};

    fn schema_fields(file: &str) -> Vec<String> {
        // The test copies of the Camtrap DP 1.0.2 schemas (SOURCE.md there).
        let path = format!(
            "{}/tests/reference/camtrap-dp/{file}",
            env!("CARGO_MANIFEST_DIR")
        );
        let v: Value = serde_json::from_str(&std::fs::read_to_string(path).unwrap()).unwrap();
        v["fields"]
            .as_array()
            .unwrap()
            .iter()
            .map(|f| f["name"].as_str().unwrap().to_string())
            .collect()
    }

    #[test]
    fn columns_are_the_schemas_fields_in_order() {
        // Camtrap DP 1.0.2 table schemas (tests/reference/camtrap-dp/).
        assert_eq!(
            schema_fields("deployments-table-schema.json"),
            DEPLOYMENT_FIELDS
        );
        assert_eq!(schema_fields("media-table-schema.json"), MEDIA_FIELDS);
        assert_eq!(
            schema_fields("observations-table-schema.json"),
            OBSERVATION_FIELDS
        );
    }

    #[test]
    fn file_paths_follow_the_media_pattern() {
        // media-table-schema.json filePath pattern ^(?=^[^./~])(^((?!\.{2}).)*$).*$
        assert!(file_path_allowed(
            "https://images.kellerby.example/kb07/0001.jpg"
        ));
        assert!(file_path_allowed("kb07/0001.jpg"));
        for bad in [
            "/data/x.jpg",
            "./x.jpg",
            "~/x.jpg",
            "https://a.example/../x.jpg",
            "",
            "a\nb",
        ] {
            assert!(!file_path_allowed(bad), "{bad:?}");
        }
        assert_eq!(media_type("https://x.example/a/B.PNG?sig=1"), "image/png");
        assert_eq!(media_type("https://x.example/a/clip.mp4"), "video/mp4");
        assert_eq!(media_type("https://x.example/a/frame"), "image/jpeg");
    }

    fn site(id: &str) -> Site {
        Site {
            deployment_id: id.into(),
            location_id: Some(format!("L-{id}")),
            location_name: Some("Swamp Corner, \"east\"".into()),
            latitude: -31.56393,
            longitude: 148.14219,
            deployment_start: Utc.with_ymd_and_hms(2026, 6, 30, 14, 0, 0).unwrap(),
            deployment_end: None,
            camera_id: Some("CAM-107".into()),
            camera_delay: Some(60),
        }
    }

    fn animal(id: &str, at: DateTime<Utc>, count: u32, path: Option<&str>) -> Message {
        Message::Observation(Observation {
            observation_id: id.into(),
            deployment_id: "KB-07".into(),
            event_start: at,
            event_end: None,
            observation_type: ObservationType::Animal,
            scientific_name: Some("Canis familiaris".into()),
            count,
            classification_probability: Some(match count {
                1 => 0.81,
                3 => 0.83,
                _ => 0.82,
            }),
            classification_method: Some(ClassificationMethod::Machine),
            media_id: None,
            file_path: path.map(str::to_string),
            vernacular_name: Some("wild dog".into()),
            life_stage: Some("adult".into()),
            sex: None,
            behavior: None,
        })
    }

    fn private(id: &str, at: DateTime<Utc>, kind: ObservationType) -> Message {
        Message::Observation(
            Observation {
                observation_id: id.into(),
                deployment_id: "KB-07".into(),
                event_start: at,
                event_end: None,
                observation_type: kind,
                scientific_name: None,
                count: 1,
                classification_probability: None,
                classification_method: None,
                media_id: None,
                file_path: Some("https://images.kellerby.example/person.jpg".into()),
                vernacular_name: None,
                life_stage: None,
                sex: None,
                behavior: None,
            }
            .redacted(),
        )
    }

    #[test]
    fn one_event_row_its_media_and_people_only_as_counts() {
        let t = Utc.with_ymd_and_hms(2026, 7, 13, 16, 10, 0).unwrap();
        let mut msgs = vec![
            animal("d1", t, 1, Some("https://images.kellerby.example/d1.jpg")),
            animal(
                "d2",
                t + Duration::minutes(4),
                3,
                Some("https://images.kellerby.example/d2.jpg"),
            ),
            animal("d3", t + Duration::minutes(8), 2, Some("/local/d3.jpg")),
            private("p1", t + Duration::minutes(30), ObservationType::Human),
            private("v1", t + Duration::minutes(31), ObservationType::Vehicle),
            private("v2", t + Duration::minutes(32), ObservationType::Vehicle),
            Message::Heartbeat(Heartbeat {
                deployment_id: "KB-07".into(),
                timestamp: t,
                battery_percent: Some(88.0),
                signal_dbm: None,
                images_since_last: Some(3),
            }),
        ];
        msgs.push(Message::Correction(Correction {
            observation_id: "d2".into(),
            deployment_id: "KB-07".into(),
            scientific_name: None,
            count: Some(4),
            observation_type: None,
        }));
        let cfg = test_config(vec![site("KB-07")], "");
        let h = History::read(&cfg, &msgs);
        let now = t + Duration::days(1);
        let pkg = write_package(
            &h,
            &PackageOptions {
                from: None,
                to: None,
                now,
                timezone: chrono_tz::Australia::Sydney,
                public_url: "https://outrider.kellerby.example",
            },
        )
        .unwrap();
        let file = |n: &str| {
            String::from_utf8(pkg.files.iter().find(|(f, _)| f == n).unwrap().1.clone()).unwrap()
        };
        let obs = file("observations.csv");
        let lines: Vec<&str> = obs.lines().collect();
        assert_eq!(lines.len(), 2, "one event: {obs}");
        // Worked by hand: three triggers 4 min apart, one event starting at
        // 02:10 local (AEST), ending 02:18; count max(1, 4 after the
        // correction, 2) = 4; a person corrected one: method human; best
        // probability 0.83; all adults.
        assert!(lines[1].starts_with("KB-07:Canis_familiaris:2026-07-13T16:10:00Z,KB-07,,KB-07:Canis_familiaris:2026-07-13T16:10:00Z,2026-07-14T02:10:00+10:00,2026-07-14T02:18:00+10:00,event,animal,,Canis familiaris,4,adult,"), "{}", lines[1]);
        assert!(
            lines[1].ends_with(",human,,,0.83,triggers:3,"),
            "{}",
            lines[1]
        );
        assert!(!obs.contains("human,vehicle") && !obs.contains("person"));
        let media = file("media.csv");
        assert_eq!(
            media.lines().count(),
            3,
            "two links; /local/d3.jpg refused: {media}"
        );
        assert_eq!(pkg.media_refused, 1);
        assert!(media.contains("m:d1,KB-07,activityDetection,2026-07-14T02:10:00+10:00,https://images.kellerby.example/d1.jpg,false,d1.jpg,image/jpeg,,,"));
        assert!(!media.contains("person"), "no media of people");
        let deps = file("deployments.csv");
        assert!(
            deps.contains("humanObservations:1|vehicleObservations:2"),
            "{deps}"
        );
        // Quoted as RFC 4180 asks.
        assert!(deps.contains("\"Swamp Corner, \"\"east\"\"\""), "{deps}");
        // An open deployment ends at the export's time.
        assert!(
            deps.contains(",2026-07-01T00:00:00+10:00,2026-07-15T02:10:00+10:00,"),
            "{deps}"
        );
        assert_eq!(pkg.private_counted, 3);
        let hb = file("heartbeats.csv");
        assert_eq!(
            hb.lines().nth(1),
            Some("KB-07,2026-07-14T02:10:00+10:00,88.0,,3")
        );
        let d: Value = serde_json::from_str(&file("datapackage.json")).unwrap();
        assert_eq!(d["profile"], PROFILE);
        assert_eq!(
            d["taxonomic"][0],
            json!({"scientificName": "Canis familiaris", "taxonRank": "species", "vernacularNames": {"eng": "wild dog"}})
        );
        assert_eq!(
            d["temporal"],
            json!({"start": "2026-07-01", "end": "2026-07-15"})
        );
        assert_eq!(d["spatial"]["type"], "Point");
        let layout = PackageLayout::parse(&file("datapackage.json")).unwrap();
        assert_eq!(layout.heartbeats.as_deref(), Some("heartbeats.csv"));
        assert!(layout.warnings.is_empty(), "{:?}", layout.warnings);
        let back = read_deployments(&deps).unwrap();
        assert_eq!(back[0].deployment_id, "KB-07");
        assert_eq!(back[0].line, 2);
        assert_eq!(
            back[0].deployment_start,
            Some(site("KB-07").deployment_start)
        );
    }

    #[test]
    fn layouts_refuse_what_cannot_be_read_locally() {
        let with = |path: &str| {
            format!(
                r#"{{"profile": "{PROFILE}", "resources": [{{"name": "deployments", "path": "deployments.csv"}}, {{"name": "observations", "path": {path}}}]}}"#
            )
        };
        assert!(PackageLayout::parse(&with("\"observations.csv\"")).is_ok());
        for bad in [
            "\"https://data.example/o.csv\"",
            "\"../o.csv\"",
            "\"/tmp/o.csv\"",
            "[\"a.csv\", \"b.csv\"]",
        ] {
            assert!(
                matches!(
                    PackageLayout::parse(&with(bad)),
                    Err(LayoutError::Path { .. })
                ),
                "{bad}"
            );
        }
        assert_eq!(
            PackageLayout::parse(r#"{"resources": [{"name": "deployments", "path": "d.csv"}]}"#),
            Err(LayoutError::Missing("observations"))
        );
        assert!(PackageLayout::parse("{").is_err());
    }
}
