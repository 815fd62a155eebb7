//! GeoJSON (RFC 7946) area parsing: a string in, polygons out.
//!
//! Accepts a `Polygon`, `MultiPolygon`, `GeometryCollection` of those, a
//! `Feature` whose geometry is one of those, or a `FeatureCollection` of such
//! features. Everything else (points, lines, null geometry) is refused with a
//! [`GeoJsonError`] that names the fault and where it is ([`Location`]:
//! feature, geometry, polygon, ring and position indices, counted from 0 as in
//! the JSON arrays, plus a JSON path).
//!
//! Checks that the JSON Schemas cannot make (standards/geojson-rfc7946):
//! rings closed (first position == last), at least 4 positions per ring,
//! longitude in [-180, 180] and latitude in [-90, 90] (positions are
//! `[lon, lat]`, an optional third member, altitude, is ignored), finite
//! numbers, non-zero ring area. Winding is normalised, not checked: RFC 7946
//! says parsers SHOULD NOT reject rings with the wrong winding, so exteriors
//! are made counter-clockwise and holes clockwise (in lon/lat).
//!
//! Pure: parses a string; reading the file is the caller's job.

use ::geo::{Coord, LineString, MultiPolygon, Polygon};
use serde_json::Value;
use std::fmt;

/// Where in the document a fault is. Indices count from 0, like the JSON
/// arrays; `path` is the JSON path to the offending value.
#[derive(Debug, Clone, Default, PartialEq, Eq)]
pub struct Location {
    /// Index in `features` of a FeatureCollection.
    pub feature: Option<usize>,
    /// Index in `geometries` of a GeometryCollection.
    pub geometry: Option<usize>,
    /// Index of the polygon in a MultiPolygon.
    pub polygon: Option<usize>,
    /// Ring index: 0 is the exterior, 1.. are holes.
    pub ring: Option<usize>,
    /// Position index within the ring.
    pub position: Option<usize>,
    /// JSON path, e.g. `$.features[2].geometry.coordinates[0][1][5]`.
    pub path: String,
}

impl fmt::Display for Location {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        let mut parts = Vec::new();
        if let Some(i) = self.feature {
            parts.push(format!("feature {i}"));
        }
        if let Some(i) = self.geometry {
            parts.push(format!("geometry {i}"));
        }
        if let Some(i) = self.polygon {
            parts.push(format!("polygon {i}"));
        }
        if let Some(i) = self.ring {
            if i == 0 {
                parts.push("ring 0 (exterior)".to_string());
            } else {
                parts.push(format!("ring {i} (hole)"));
            }
        }
        if let Some(i) = self.position {
            parts.push(format!("position {i}"));
        }
        if parts.is_empty() {
            write!(f, "at {}", self.path)
        } else {
            write!(f, "{} (at {})", parts.join(", "), self.path)
        }
    }
}

/// Why a GeoJSON area was refused. `Display` is the message; [`GeoJsonError::hint`]
/// says what usually fixes it.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum GeoJsonError {
    /// Not JSON at all.
    #[error("invalid JSON at line {line}, column {column}: {message}")]
    InvalidJson {
        line: usize,
        column: usize,
        message: String,
    },
    /// A member every GeoJSON object of this kind needs is absent.
    #[error("missing member \"{member}\" {at}")]
    MissingMember {
        member: &'static str,
        at: Box<Location>,
    },
    /// A GeoJSON type this crate does not take as an area.
    #[error("unsupported GeoJSON type \"{found}\" {at}")]
    UnsupportedType { found: String, at: Box<Location> },
    /// A value of the wrong JSON kind or nesting.
    #[error("expected {expected} {at}, found {found}")]
    BadShape {
        expected: &'static str,
        found: String,
        at: Box<Location>,
    },
    /// A coordinate that is not a (finite) number.
    #[error("coordinate is not a number {at}: found {found}")]
    NotNumeric { found: String, at: Box<Location> },
    /// Longitude or latitude out of range.
    #[error("position [{lon}, {lat}] is out of range {at}")]
    OutOfRange {
        lon: f64,
        lat: f64,
        at: Box<Location>,
    },
    /// A ring with fewer than 4 positions.
    #[error("ring has {count} positions, at least 4 are needed {at}")]
    TooFewPositions { count: usize, at: Box<Location> },
    /// A ring whose first and last positions differ.
    #[error("ring is not closed {at}: first position [{}, {}] differs from last [{}, {}]",
        first[0], first[1], last[0], last[1])]
    RingNotClosed {
        first: [f64; 2],
        last: [f64; 2],
        at: Box<Location>,
    },
    /// A ring that encloses no area (all positions on one line).
    #[error("ring encloses no area {at}")]
    ZeroArea { at: Box<Location> },
    /// A polygon with no rings.
    #[error("polygon has no rings {at}")]
    NoRings { at: Box<Location> },
    /// A Feature whose geometry is null.
    #[error("feature has no geometry (null) {at}")]
    NullGeometry { at: Box<Location> },
    /// The document holds no polygon at all.
    #[error("no polygon found in the document")]
    NoPolygons,
}

impl GeoJsonError {
    /// What usually fixes this fault.
    pub fn hint(&self) -> &'static str {
        match self {
            GeoJsonError::InvalidJson { .. } => {
                "check for a missing comma or bracket near that point; the file must be plain JSON"
            }
            GeoJsonError::MissingMember { .. } => {
                "every GeoJSON object needs \"type\"; geometries need \"coordinates\", \
                 features \"geometry\", collections \"features\" or \"geometries\""
            }
            GeoJsonError::UnsupportedType { .. } => {
                "an area must be a Polygon or MultiPolygon, alone or inside a Feature, \
                 FeatureCollection or GeometryCollection; points and lines have no inside"
            }
            GeoJsonError::BadShape { .. } => {
                "Polygon coordinates are an array of rings, each ring an array of \
                 [lon, lat] positions; MultiPolygon adds one more level of arrays"
            }
            GeoJsonError::NotNumeric { .. } => {
                "write coordinates as bare numbers, e.g. [148.1, -31.6], not strings"
            }
            GeoJsonError::OutOfRange { lat, .. } if lat.abs() > 90.0 => {
                "a latitude beyond 90 usually means lat/lon were swapped: GeoJSON \
                 positions are [lon, lat]"
            }
            GeoJsonError::OutOfRange { .. } => {
                "longitude must be within -180..180 and latitude within -90..90; \
                 this usually means lat/lon were swapped (GeoJSON is [lon, lat]) or \
                 the file uses projected coordinates (metres) instead of WGS84 degrees"
            }
            GeoJsonError::TooFewPositions { .. } => {
                "a ring needs at least 3 distinct corners plus the first corner repeated at the end"
            }
            GeoJsonError::RingNotClosed { .. } => {
                "repeat the ring's first position as its last position (RFC 7946 section 3.1.6)"
            }
            GeoJsonError::ZeroArea { .. } => {
                "the ring's corners lie on one line or repeat; draw the area again"
            }
            GeoJsonError::NoRings { .. } => "a Polygon needs at least its exterior ring",
            GeoJsonError::NullGeometry { .. } => {
                "give the feature a Polygon or MultiPolygon geometry, or remove it"
            }
            GeoJsonError::NoPolygons => {
                "the file has no Polygon or MultiPolygon; an empty FeatureCollection is not an area"
            }
        }
    }
}

/// Parse a GeoJSON document into polygons, exteriors counter-clockwise and
/// holes clockwise. See the module docs for what is accepted.
pub fn parse_area_geojson(text: &str) -> Result<MultiPolygon<f64>, GeoJsonError> {
    let root: Value = serde_json::from_str(text).map_err(|e| GeoJsonError::InvalidJson {
        line: e.line(),
        column: e.column(),
        message: e.to_string(),
    })?;
    let mut out = Vec::new();
    let at = Location {
        path: "$".to_string(),
        ..Location::default()
    };
    walk_root(&root, &at, &mut out)?;
    if out.is_empty() {
        return Err(GeoJsonError::NoPolygons);
    }
    Ok(MultiPolygon(out))
}

fn kind(v: &Value) -> String {
    match v {
        Value::Null => "null".to_string(),
        Value::Bool(b) => format!("boolean {b}"),
        Value::Number(n) => format!("number {n}"),
        Value::String(s) => format!("string {s:?}"),
        Value::Array(a) => format!("array of {}", a.len()),
        Value::Object(_) => "object".to_string(),
    }
}

fn type_of<'a>(v: &'a Value, at: &Location) -> Result<&'a str, GeoJsonError> {
    let obj = v.as_object().ok_or_else(|| GeoJsonError::BadShape {
        expected: "a GeoJSON object",
        found: kind(v),
        at: Box::new(at.clone()),
    })?;
    match obj.get("type") {
        None => Err(GeoJsonError::MissingMember {
            member: "type",
            at: Box::new(at.clone()),
        }),
        Some(Value::String(s)) => Ok(s.as_str()),
        Some(other) => Err(GeoJsonError::BadShape {
            expected: "\"type\" to be a string",
            found: kind(other),
            at: Box::new(at.clone()),
        }),
    }
}

fn member<'a>(v: &'a Value, name: &'static str, at: &Location) -> Result<&'a Value, GeoJsonError> {
    v.get(name).ok_or_else(|| GeoJsonError::MissingMember {
        member: name,
        at: Box::new(at.clone()),
    })
}

fn array<'a>(
    v: &'a Value,
    expected: &'static str,
    at: &Location,
) -> Result<&'a Vec<Value>, GeoJsonError> {
    v.as_array().ok_or_else(|| GeoJsonError::BadShape {
        expected,
        found: kind(v),
        at: Box::new(at.clone()),
    })
}

fn walk_root(v: &Value, at: &Location, out: &mut Vec<Polygon<f64>>) -> Result<(), GeoJsonError> {
    match type_of(v, at)? {
        "FeatureCollection" => {
            let path = format!("{}.features", at.path);
            let here = Location {
                path: path.clone(),
                ..at.clone()
            };
            let features = array(
                member(v, "features", at)?,
                "\"features\" to be an array",
                &here,
            )?;
            for (i, f) in features.iter().enumerate() {
                let fat = Location {
                    feature: Some(i),
                    path: format!("{path}[{i}]"),
                    ..at.clone()
                };
                match type_of(f, &fat)? {
                    "Feature" => walk_feature(f, &fat, out)?,
                    other => {
                        return Err(GeoJsonError::UnsupportedType {
                            found: other.to_string(),
                            at: Box::new(fat),
                        })
                    }
                }
            }
            Ok(())
        }
        "Feature" => walk_feature(v, at, out),
        _ => walk_geometry(v, at, out, true),
    }
}

fn walk_feature(v: &Value, at: &Location, out: &mut Vec<Polygon<f64>>) -> Result<(), GeoJsonError> {
    let g = member(v, "geometry", at)?;
    let gat = Location {
        path: format!("{}.geometry", at.path),
        ..at.clone()
    };
    if g.is_null() {
        return Err(GeoJsonError::NullGeometry { at: Box::new(gat) });
    }
    walk_geometry(g, &gat, out, true)
}

fn walk_geometry(
    v: &Value,
    at: &Location,
    out: &mut Vec<Polygon<f64>>,
    allow_collection: bool,
) -> Result<(), GeoJsonError> {
    let ty = type_of(v, at)?;
    match ty {
        "Polygon" => {
            let cat = Location {
                path: format!("{}.coordinates", at.path),
                ..at.clone()
            };
            out.push(polygon(member(v, "coordinates", at)?, &cat)?);
            Ok(())
        }
        "MultiPolygon" => {
            let cat = Location {
                path: format!("{}.coordinates", at.path),
                ..at.clone()
            };
            let polys = array(
                member(v, "coordinates", at)?,
                "MultiPolygon coordinates to be an array of polygons",
                &cat,
            )?;
            for (j, p) in polys.iter().enumerate() {
                let pat = Location {
                    polygon: Some(j),
                    path: format!("{}[{j}]", cat.path),
                    ..cat.clone()
                };
                out.push(polygon(p, &pat)?);
            }
            Ok(())
        }
        "GeometryCollection" if allow_collection => {
            let here = Location {
                path: format!("{}.geometries", at.path),
                ..at.clone()
            };
            let geoms = array(
                member(v, "geometries", at)?,
                "\"geometries\" to be an array",
                &here,
            )?;
            for (k, g) in geoms.iter().enumerate() {
                let gat = Location {
                    geometry: Some(k),
                    path: format!("{}[{k}]", here.path),
                    ..at.clone()
                };
                // RFC 7946 section 3.1.8: nested collections SHOULD be avoided.
                walk_geometry(g, &gat, out, false)?;
            }
            Ok(())
        }
        other => Err(GeoJsonError::UnsupportedType {
            found: other.to_string(),
            at: Box::new(at.clone()),
        }),
    }
}

fn polygon(v: &Value, at: &Location) -> Result<Polygon<f64>, GeoJsonError> {
    let rings = array(v, "Polygon coordinates to be an array of rings", at)?;
    if rings.is_empty() {
        return Err(GeoJsonError::NoRings {
            at: Box::new(at.clone()),
        });
    }
    let mut parsed = Vec::with_capacity(rings.len());
    for (k, r) in rings.iter().enumerate() {
        let rat = Location {
            ring: Some(k),
            path: format!("{}[{k}]", at.path),
            ..at.clone()
        };
        parsed.push(ring(r, &rat)?);
    }
    let mut iter = parsed.into_iter();
    let exterior = iter.next().ok_or_else(|| GeoJsonError::NoRings {
        at: Box::new(at.clone()),
    })?;
    Ok(oriented(exterior, iter.collect()))
}

fn ring(v: &Value, at: &Location) -> Result<LineString<f64>, GeoJsonError> {
    let positions = array(v, "a ring to be an array of [lon, lat] positions", at)?;
    let mut coords = Vec::with_capacity(positions.len());
    for (n, p) in positions.iter().enumerate() {
        let pat = Location {
            position: Some(n),
            path: format!("{}[{n}]", at.path),
            ..at.clone()
        };
        coords.push(position(p, &pat)?);
    }
    if coords.len() < 4 {
        return Err(GeoJsonError::TooFewPositions {
            count: coords.len(),
            at: Box::new(at.clone()),
        });
    }
    let (first, last) = (coords[0], coords[coords.len() - 1]);
    if first != last {
        return Err(GeoJsonError::RingNotClosed {
            first: [first.x, first.y],
            last: [last.x, last.y],
            at: Box::new(at.clone()),
        });
    }
    if signed_area(&coords) == 0.0 {
        return Err(GeoJsonError::ZeroArea {
            at: Box::new(at.clone()),
        });
    }
    Ok(LineString(coords))
}

fn position(v: &Value, at: &Location) -> Result<Coord<f64>, GeoJsonError> {
    let items = array(v, "a position [lon, lat]", at)?;
    if items.len() < 2 {
        return Err(GeoJsonError::BadShape {
            expected: "a position with at least 2 numbers [lon, lat]",
            found: kind(v),
            at: Box::new(at.clone()),
        });
    }
    let num = |x: &Value| -> Result<f64, GeoJsonError> {
        match x.as_f64() {
            Some(f) if f.is_finite() => Ok(f),
            _ => Err(GeoJsonError::NotNumeric {
                found: kind(x),
                at: Box::new(at.clone()),
            }),
        }
    };
    let lon = num(&items[0])?;
    let lat = num(&items[1])?;
    if !(-180.0..=180.0).contains(&lon) || !(-90.0..=90.0).contains(&lat) {
        return Err(GeoJsonError::OutOfRange {
            lon,
            lat,
            at: Box::new(at.clone()),
        });
    }
    Ok(Coord { x: lon, y: lat })
}

/// Twice the signed area of a closed ring in lon/lat (shoelace);
/// positive when counter-clockwise.
pub(crate) fn signed_area(coords: &[Coord<f64>]) -> f64 {
    coords
        .windows(2)
        .map(|w| w[0].x * w[1].y - w[1].x * w[0].y)
        .sum()
}

/// Build a polygon with the exterior counter-clockwise and holes clockwise.
pub(crate) fn oriented(exterior: LineString<f64>, holes: Vec<LineString<f64>>) -> Polygon<f64> {
    let fix = |mut r: LineString<f64>, ccw: bool| {
        if (signed_area(&r.0) > 0.0) != ccw {
            r.0.reverse();
        }
        r
    };
    Polygon::new(
        fix(exterior, true),
        holes.into_iter().map(|h| fix(h, false)).collect(),
    )
}

#[cfg(test)]
mod tests {
    use super::*;

    const SQUARE: &str = "[[148.0,-31.7],[148.2,-31.7],[148.2,-31.5],[148.0,-31.5],[148.0,-31.7]]";

    fn poly(rings: &str) -> String {
        format!(r#"{{"type":"Polygon","coordinates":[{rings}]}}"#)
    }

    #[test]
    fn accepts_every_container() {
        let p = poly(SQUARE);
        let feature = format!(r#"{{"type":"Feature","properties":null,"geometry":{p}}}"#);
        let fc = format!(r#"{{"type":"FeatureCollection","features":[{feature},{feature}]}}"#);
        let gc = format!(r#"{{"type":"GeometryCollection","geometries":[{p}]}}"#);
        let mp = format!(r#"{{"type":"MultiPolygon","coordinates":[[{SQUARE}],[{SQUARE}]]}}"#);
        assert_eq!(parse_area_geojson(&p).unwrap().0.len(), 1);
        assert_eq!(parse_area_geojson(&feature).unwrap().0.len(), 1);
        assert_eq!(parse_area_geojson(&fc).unwrap().0.len(), 2);
        assert_eq!(parse_area_geojson(&gc).unwrap().0.len(), 1);
        assert_eq!(parse_area_geojson(&mp).unwrap().0.len(), 2);
    }

    #[test]
    fn normalises_winding_and_keeps_altitude_out() {
        // Clockwise exterior with a third (altitude) member: accepted (RFC 7946
        // section 3.1.6 says parsers SHOULD NOT reject wrong winding).
        let cw = "[[148.0,-31.7,300],[148.0,-31.5,300],[148.2,-31.5,300],[148.2,-31.7,300],[148.0,-31.7,300]]";
        let ccw_hole =
            "[[148.05,-31.65],[148.15,-31.65],[148.15,-31.55],[148.05,-31.55],[148.05,-31.65]]";
        let mp = parse_area_geojson(&poly(&format!("{cw},{ccw_hole}"))).unwrap();
        let p = &mp.0[0];
        assert!(signed_area(&p.exterior().0) > 0.0);
        assert!(signed_area(&p.interiors()[0].0) < 0.0);
    }

    #[test]
    fn invalid_json_reports_line_and_column() {
        let text = "{\"type\": \"Polygon\",\n \"coordinates\": [[[148.0, -31.7] [148.2, -31.7]]]}";
        match parse_area_geojson(text) {
            Err(GeoJsonError::InvalidJson { line, column, .. }) => {
                assert_eq!(line, 2);
                assert!(column > 10, "{column}");
            }
            other => panic!("{other:?}"),
        }
    }

    #[test]
    fn unsupported_types_are_named() {
        let e = parse_area_geojson(r#"{"type":"Point","coordinates":[148.1,-31.6]}"#).unwrap_err();
        assert!(matches!(&e, GeoJsonError::UnsupportedType { found, .. } if found == "Point"));
        assert!(e.hint().contains("Polygon"));
        let fc = format!(
            r#"{{"type":"FeatureCollection","features":[{{"type":"Feature","geometry":{}}},{{"type":"Feature","geometry":{{"type":"LineString","coordinates":[[0,0],[1,1]]}}}}]}}"#,
            poly(SQUARE)
        );
        match parse_area_geojson(&fc) {
            Err(GeoJsonError::UnsupportedType { found, at }) => {
                assert_eq!(found, "LineString");
                assert_eq!(at.feature, Some(1));
                assert_eq!(at.path, "$.features[1].geometry");
            }
            other => panic!("{other:?}"),
        }
    }

    #[test]
    fn ring_not_closed_names_the_ring() {
        let hole_open = "[[148.05,-31.65],[148.15,-31.65],[148.15,-31.55],[148.05,-31.55]]";
        let mp = format!(
            r#"{{"type":"MultiPolygon","coordinates":[[{SQUARE}],[{SQUARE},{hole_open}]]}}"#
        );
        match parse_area_geojson(&mp) {
            Err(e @ GeoJsonError::RingNotClosed { .. }) => {
                let msg = e.to_string();
                assert!(msg.contains("polygon 1"), "{msg}");
                assert!(msg.contains("ring 1 (hole)"), "{msg}");
                assert!(msg.contains("$.coordinates[1][1]"), "{msg}");
            }
            other => panic!("{other:?}"),
        }
    }

    #[test]
    fn too_few_positions() {
        let tri = "[[148.0,-31.7],[148.2,-31.7],[148.0,-31.7]]";
        assert!(matches!(
            parse_area_geojson(&poly(tri)),
            Err(GeoJsonError::TooFewPositions { count: 3, .. })
        ));
    }

    #[test]
    fn swapped_lat_lon_is_diagnosed() {
        let swapped = "[[-31.7,148.0],[-31.7,148.2],[-31.5,148.2],[-31.5,148.0],[-31.7,148.0]]";
        let e = parse_area_geojson(&poly(swapped)).unwrap_err();
        match &e {
            GeoJsonError::OutOfRange { at, .. } => {
                assert_eq!(at.ring, Some(0));
                assert_eq!(at.position, Some(0));
            }
            other => panic!("{other:?}"),
        }
        assert!(e.hint().contains("swapped"), "{}", e.hint());
    }

    #[test]
    fn non_numeric_and_bad_nesting() {
        let strings =
            r#"[["148.0","-31.7"],[148.2,-31.7],[148.2,-31.5],[148.0,-31.5],[148.0,-31.7]]"#;
        match parse_area_geojson(&poly(strings)) {
            Err(GeoJsonError::NotNumeric { at, .. }) => assert_eq!(at.position, Some(0)),
            other => panic!("{other:?}"),
        }
        // A Polygon written with one level of arrays too few.
        let flat = r#"{"type":"Polygon","coordinates":[[148.0,-31.7],[148.2,-31.7]]}"#;
        assert!(matches!(
            parse_area_geojson(flat),
            Err(GeoJsonError::BadShape { .. })
        ));
    }

    #[test]
    fn empty_and_null_documents() {
        assert_eq!(
            parse_area_geojson(r#"{"type":"FeatureCollection","features":[]}"#),
            Err(GeoJsonError::NoPolygons)
        );
        assert!(matches!(
            parse_area_geojson(r#"{"type":"Feature","properties":{},"geometry":null}"#),
            Err(GeoJsonError::NullGeometry { .. })
        ));
        assert!(matches!(
            parse_area_geojson(r#"{"coordinates":[]}"#),
            Err(GeoJsonError::MissingMember { member: "type", .. })
        ));
        assert!(matches!(
            parse_area_geojson(r#"{"type":"Polygon","coordinates":[]}"#),
            Err(GeoJsonError::NoRings { .. })
        ));
        let line = "[[148.0,-31.7],[148.1,-31.7],[148.2,-31.7],[148.0,-31.7]]";
        assert!(matches!(
            parse_area_geojson(&poly(line)),
            Err(GeoJsonError::ZeroArea { .. })
        ));
    }
}
