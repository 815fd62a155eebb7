//! The sites file: a CSV in the Camtrap DP `deployments` shape.
//!
//! Required columns: `deploymentID`, `latitude`, `longitude`,
//! `deploymentStart`. `deploymentEnd` may be empty for a camera that is still
//! out (Camtrap DP requires it in a finished package; a live network has open
//! deployments). Unknown columns are ignored. Every bad row is reported with
//! file:line and loading fails. Pure: parses text the caller read.

use super::error::{ConfigError, Reporter};
use chrono::{DateTime, FixedOffset, Utc};
use std::collections::HashMap;
use std::path::Path;

/// One camera deployment at a place.
#[derive(Debug, Clone, PartialEq)]
pub struct Site {
    pub deployment_id: String,
    pub location_id: Option<String>,
    pub location_name: Option<String>,
    pub latitude: f64,
    pub longitude: f64,
    pub deployment_start: DateTime<Utc>,
    pub deployment_end: Option<DateTime<Utc>>,
    pub camera_id: Option<String>,
    /// Seconds the camera waits between triggers (Camtrap DP `cameraDelay`).
    pub camera_delay: Option<u32>,
}

impl Site {
    /// A label for people: the location name when there is one.
    pub fn label(&self) -> &str {
        self.location_name.as_deref().unwrap_or(&self.deployment_id)
    }
}

/// Camtrap DP's missing-value markers (deployments table schema).
fn missing(s: &str) -> bool {
    matches!(s.trim(), "" | "NA" | "NaN" | "nan")
}

/// Parses a Camtrap DP datetime (`%Y-%m-%dT%H:%M:%S%z`, offset required;
/// RFC 3339 forms such as `Z` and fractional seconds are accepted too).
pub fn parse_datetime(s: &str) -> Option<DateTime<Utc>> {
    let s = s.trim();
    DateTime::parse_from_rfc3339(s)
        .or_else(|_| DateTime::<FixedOffset>::parse_from_str(s, "%Y-%m-%dT%H:%M:%S%z"))
        .ok()
        .map(|d| d.with_timezone(&Utc))
}

const REQUIRED: [&str; 4] = ["deploymentID", "latitude", "longitude", "deploymentStart"];

/// Parses the sites CSV text. Errors point at `file:line` (line 1 is the header).
pub fn parse_sites(file: &Path, text: &str) -> Result<Vec<Site>, Vec<ConfigError>> {
    let mut rep = Reporter::new(file, text);
    let mut reader = csv::ReaderBuilder::new()
        .trim(csv::Trim::All)
        .flexible(false)
        .from_reader(text.as_bytes());
    let headers = match reader.headers() {
        Ok(h) => h.clone(),
        Err(e) => {
            rep.at_line(1, 1, "", format!("cannot read the header row: {e}"), None);
            return Err(rep.errors);
        }
    };
    let col: HashMap<&str, usize> = headers.iter().enumerate().map(|(i, h)| (h, i)).collect();
    let absent: Vec<&str> = REQUIRED
        .iter()
        .copied()
        .filter(|c| !col.contains_key(c))
        .collect();
    if !absent.is_empty() {
        rep.at_line(
            1,
            1,
            "",
            format!("missing required column(s): {}", absent.join(", ")),
            Some("the sites file uses Camtrap DP deployments column names, e.g. deploymentID,latitude,longitude,deploymentStart,deploymentEnd".into()),
        );
        return Err(rep.errors);
    }
    let mut sites: Vec<Site> = Vec::new();
    let mut first_line: HashMap<String, usize> = HashMap::new();
    for record in reader.records() {
        let record = match record {
            Ok(r) => r,
            Err(e) => {
                let line = e.position().map(|p| p.line() as usize).unwrap_or(0);
                rep.at_line(
                    line,
                    1,
                    "",
                    format!("unreadable row: {e}"),
                    Some("every row needs as many fields as the header".into()),
                );
                continue;
            }
        };
        let line = record.position().map(|p| p.line() as usize).unwrap_or(0);
        let get = |name: &str| -> Option<&str> {
            col.get(name)
                .and_then(|&i| record.get(i))
                .filter(|s| !missing(s))
        };
        let mut ok = true;
        let mut err = |key: &str, msg: String, hint: Option<&str>| {
            rep.at_line(line, 1, key, msg, hint.map(str::to_string));
        };
        let id = get("deploymentID").unwrap_or("");
        if id.is_empty() {
            err(
                "deploymentID",
                "is empty".into(),
                Some("each row needs a unique deploymentID"),
            );
            ok = false;
        } else if !valid_id(id) {
            err(
                "deploymentID",
                format!("`{id}` cannot be used in an MQTT topic"),
                Some("use letters, digits, '-', '_' and '.' only (no '/', '+', '#' or spaces)"),
            );
            ok = false;
        } else if let Some(prev) = first_line.get(id) {
            err(
                "deploymentID",
                format!("`{id}` is a duplicate of line {prev}"),
                Some("each deployment appears once"),
            );
            ok = false;
        }
        let mut number = |name: &str, lo: f64, hi: f64| -> Option<f64> {
            let raw = get(name).unwrap_or("");
            match raw.parse::<f64>() {
                Ok(v) if v.is_finite() && (lo..=hi).contains(&v) => Some(v),
                Ok(v) => {
                    err(name, format!("{v} is out of range {lo} to {hi}"), Some("latitude is north-south (-90..90), longitude east-west (-180..180); swapped columns are a common cause"));
                    None
                }
                Err(_) => {
                    err(
                        name,
                        format!("`{raw}` is not a number"),
                        Some("decimal degrees, WGS84, e.g. -31.62"),
                    );
                    None
                }
            }
        };
        let lat = number("latitude", -90.0, 90.0);
        let lon = number("longitude", -180.0, 180.0);
        let when = |name: &str,
                    required: bool,
                    err: &mut dyn FnMut(&str, String, Option<&str>)|
         -> Option<Option<DateTime<Utc>>> {
            match get(name) {
                None if required => {
                    err(
                        name,
                        "is empty".into(),
                        Some("a date-time with offset, e.g. 2026-03-01T00:00:00+11:00"),
                    );
                    None
                }
                None => Some(None),
                Some(raw) => match parse_datetime(raw) {
                    Some(t) => Some(Some(t)),
                    None => {
                        err(name, format!("`{raw}` is not a date-time with an offset"), Some("Camtrap DP form YYYY-MM-DDThh:mm:ss+hh:mm, e.g. 2026-03-01T00:00:00+11:00"));
                        None
                    }
                },
            }
        };
        let start = when("deploymentStart", true, &mut err).flatten();
        let end = when("deploymentEnd", false, &mut err);
        if let (Some(s), Some(Some(e))) = (start, end) {
            if e <= s {
                err(
                    "deploymentEnd",
                    "is not after deploymentStart".into(),
                    Some("leave deploymentEnd empty while the camera is still out"),
                );
                ok = false;
            }
        }
        let camera_delay = match get("cameraDelay") {
            None => Some(None),
            Some(raw) => match raw.parse::<u32>() {
                Ok(v) => Some(Some(v)),
                Err(_) => {
                    err(
                        "cameraDelay",
                        format!("`{raw}` is not a whole number of seconds"),
                        None,
                    );
                    None
                }
            },
        };
        if let (
            true,
            Some(latitude),
            Some(longitude),
            Some(deployment_start),
            Some(deployment_end),
            Some(camera_delay),
        ) = (ok, lat, lon, start, end, camera_delay)
        {
            first_line.insert(id.to_string(), line);
            sites.push(Site {
                deployment_id: id.to_string(),
                location_id: get("locationID").map(str::to_string),
                location_name: get("locationName").map(str::to_string),
                latitude,
                longitude,
                deployment_start,
                deployment_end,
                camera_id: get("cameraID").map(str::to_string),
                camera_delay,
            });
        }
    }
    if sites.is_empty() && rep.errors.is_empty() {
        rep.at_line(
            1,
            1,
            "",
            "has no sites",
            Some("add one row per camera deployment".into()),
        );
    }
    if rep.errors.is_empty() {
        Ok(sites)
    } else {
        Err(rep.errors)
    }
}

/// Identifiers used as MQTT topic levels and in URLs.
pub fn valid_id(id: &str) -> bool {
    !id.is_empty()
        && id.len() <= 64
        && id
            .chars()
            .all(|c| c.is_ascii_alphanumeric() || matches!(c, '-' | '_' | '.'))
}

#[cfg(test)]
mod tests {
    use super::*;

    const HEADER: &str = "deploymentID,locationID,locationName,latitude,longitude,deploymentStart,deploymentEnd,cameraID,cameraDelay,habitat\n";

    #[test]
    fn reads_good_rows_and_ignores_unknown_columns() {
        let text = format!("{HEADER}KB-01,L1,Ridge gate,-31.62,148.05,2026-03-01T00:00:00+11:00,,C1,60,scrub\nKB-02,,,-31.7,148.1,2026-03-01T00:00:00Z,2026-09-01T00:00:00Z,,,\n");
        let sites = parse_sites(Path::new("sites.csv"), &text).expect("valid");
        assert_eq!(sites.len(), 2);
        assert_eq!(sites[0].label(), "Ridge gate");
        assert_eq!(
            sites[0].deployment_start.to_rfc3339(),
            "2026-02-28T13:00:00+00:00"
        );
        assert_eq!(sites[0].camera_delay, Some(60));
        assert_eq!(sites[1].label(), "KB-02");
        assert!(sites[1].deployment_end.is_some());
    }

    #[test]
    fn reports_every_bad_row_with_its_line() {
        let text = format!(
            "{HEADER}KB-01,,,-31.62,148.05,2026-03-01T00:00:00+11:00,,,,\n\
             KB-01,,,-31.62,148.05,2026-03-01T00:00:00+11:00,,,,\n\
             KB-03,,,148.05,-31.62,2026-03-01T00:00:00+11:00,,,,\n\
             KB-04,,,-31.62,148.05,2026-03-01 00:00,,,,\n\
             KB-05,,,-31.62,148.05,2026-03-01T00:00:00+11:00,2026-02-01T00:00:00+11:00,,,\n\
             KB/06,,,-31.62,abc,2026-03-01T00:00:00+11:00,,,,\n"
        );
        let errs = parse_sites(Path::new("s.csv"), &text).expect_err("invalid");
        let lines: Vec<(usize, &str)> = errs.iter().map(|e| (e.line, e.key.as_str())).collect();
        assert_eq!(
            lines,
            vec![
                (3, "deploymentID"),
                (4, "latitude"),
                (5, "deploymentStart"),
                (6, "deploymentEnd"),
                (7, "deploymentID"),
                (7, "longitude"),
            ]
        );
        assert!(errs[1]
            .to_string()
            .starts_with("s.csv:4:1: latitude: 148.05 is out of range"));
    }

    #[test]
    fn missing_columns_are_named() {
        let errs =
            parse_sites(Path::new("s.csv"), "deploymentID,lat,lon\nA,1,2\n").expect_err("invalid");
        assert_eq!(errs.len(), 1);
        assert!(
            errs[0]
                .message
                .contains("latitude, longitude, deploymentStart"),
            "{}",
            errs[0]
        );
    }
}
