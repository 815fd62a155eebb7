//! Subscriber areas and whether they cover a camera site.
//!
//! Owns [`Area`] (circle, polygon with optional buffer, list of sites, all)
//! and [`Area::covers`], which answers "is this site in the area, and how far
//! is it (km, as printed on a notice)". Also gives the lon/lat boxes the
//! R-tree in [`super::index`] searches, widened conservatively so that the
//! index never misses a site that `covers` would accept.
//!
//! Conventions (METHODS.md section 5): circles are closed (distance <=
//! radius) and measured geodesically from the centre; polygon edges are
//! straight in lon/lat (RFC 7946), holes are excluded, the polygon is closed
//! (a site on an edge or vertex is in, including hole edges); `buffer_km`
//! adds every site whose geodesic distance to the boundary (exterior and hole
//! rings) is <= buffer_km. A covered site reports 0 km.
//!
//! Known limit: polygon areas are planar in lon/lat and are not wrapped across
//! the antimeridian (180 degrees); circles are geodesic and work anywhere.
//!
//! Pure: no I/O.

use super::geodesic::{approx_edge, distance_m, distance_to_edge_coords_m, LatLon};
use super::geojson::{oriented, parse_area_geojson, GeoJsonError};
use ::geo::coordinate_position::CoordPos;
use ::geo::{BoundingRect, Coord, CoordinatePosition, MultiPolygon};

/// Largest `buffer_km` accepted: the candidate filter's error bounds are
/// checked up to this distance.
pub const MAX_BUFFER_KM: f64 = 100.0;
/// Largest circle radius accepted (use `all` for more).
pub const MAX_RADIUS_KM: f64 = 2_000.0;

/// Smallest length of one degree of latitude on WGS84 (at the equator), metres.
const MIN_M_PER_DEG_LAT: f64 = 110_574.0;
/// Smallest radius of curvature on WGS84 (meridional, at the equator), metres.
const MIN_RADIUS_M: f64 = 6_335_439.0;
/// Mean Earth radius for the haversine pre-filter, metres (IUGG R1).
const MEAN_RADIUS_M: f64 = 6_371_008.8;
/// Relative slack for every approximate filter. The sphere differs from the
/// ellipsoid by under 0.6 % in distance (common practice figure, from
/// memory); 2 % leaves room and costs only a few extra exact tests.
const SLACK: f64 = 0.02;

/// Why an area could not be built.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum AreaError {
    #[error("radius_km {0} must be a number above 0 and at most {MAX_RADIUS_KM}")]
    Radius(f64),
    #[error("buffer_km {0} must be a number from 0 to {MAX_BUFFER_KM}")]
    Buffer(f64),
    #[error("polygon area has no polygons")]
    Empty,
    #[error("polygon position [{lon}, {lat}] is out of range")]
    OutOfRange { lon: f64, lat: f64 },
    #[error(transparent)]
    GeoJson(#[from] GeoJsonError),
}

/// A closed geodesic circle.
#[derive(Debug, Clone, PartialEq)]
pub struct Circle {
    center: LatLon,
    radius_km: f64,
}

impl Circle {
    /// A circle; `radius_km` in (0, MAX_RADIUS_KM].
    pub fn new(center: LatLon, radius_km: f64) -> Result<Self, AreaError> {
        if !(radius_km.is_finite() && radius_km > 0.0 && radius_km <= MAX_RADIUS_KM) {
            return Err(AreaError::Radius(radius_km));
        }
        Ok(Circle { center, radius_km })
    }
    pub fn center(&self) -> LatLon {
        self.center
    }
    pub fn radius_km(&self) -> f64 {
        self.radius_km
    }

    /// Geodesic distance from the centre in km when within the radius.
    pub fn covers(&self, site: LatLon) -> Option<f64> {
        let r_m = self.radius_km * 1000.0;
        // Cheap rejection on the sphere, with slack for the ellipsoid.
        if haversine_m(self.center, site) > r_m * (1.0 + SLACK) + 1.0 {
            return None;
        }
        let d = distance_m(self.center, site);
        (d <= r_m).then_some(d / 1000.0)
    }

    /// Whether the circle covers the site: the same answer as
    /// [`Circle::covers`], with the exact geodesic only where the sphere
    /// cannot decide (within the slack of the edge). For building the rule
    /// book, where the distance is not needed yet.
    pub fn contains(&self, site: LatLon) -> bool {
        let r_m = self.radius_km * 1000.0;
        let h = haversine_m(self.center, site);
        if h > r_m * (1.0 + SLACK) + 1.0 {
            return false;
        }
        if h < r_m * (1.0 - SLACK) - 1.0 {
            return true;
        }
        distance_m(self.center, site) <= r_m
    }
}

/// Polygons (straight lon/lat edges, holes, closed) plus a geodesic buffer.
#[derive(Debug, Clone, PartialEq)]
pub struct PolygonArea {
    shape: MultiPolygon<f64>,
    buffer_km: f64,
    /// [min lon, min lat, max lon, max lat] of every vertex.
    bbox: [f64; 4],
}

impl PolygonArea {
    /// From polygons already in memory: every coordinate is checked and the
    /// winding normalised (exterior counter-clockwise, holes clockwise).
    pub fn new(shape: MultiPolygon<f64>, buffer_km: f64) -> Result<Self, AreaError> {
        if !(buffer_km.is_finite() && (0.0..=MAX_BUFFER_KM).contains(&buffer_km)) {
            return Err(AreaError::Buffer(buffer_km));
        }
        for c in shape.0.iter().flat_map(|p| {
            std::iter::once(p.exterior())
                .chain(p.interiors())
                .flat_map(|r| r.0.iter())
        }) {
            if LatLon::new(c.y, c.x).is_err() {
                return Err(AreaError::OutOfRange { lon: c.x, lat: c.y });
            }
        }
        let shape = MultiPolygon(
            shape
                .0
                .into_iter()
                .map(|p| {
                    let (ext, holes) = p.into_inner();
                    oriented(ext, holes)
                })
                .collect(),
        );
        let rect = shape.bounding_rect().ok_or(AreaError::Empty)?;
        let bbox = [rect.min().x, rect.min().y, rect.max().x, rect.max().y];
        Ok(PolygonArea {
            shape,
            buffer_km,
            bbox,
        })
    }

    /// From a GeoJSON string (see [`super::geojson`]).
    pub fn from_geojson(text: &str, buffer_km: f64) -> Result<Self, AreaError> {
        PolygonArea::new(parse_area_geojson(text)?, buffer_km)
    }

    pub fn shape(&self) -> &MultiPolygon<f64> {
        &self.shape
    }
    pub fn buffer_km(&self) -> f64 {
        self.buffer_km
    }
    /// [min lon, min lat, max lon, max lat] of the vertices.
    pub fn bbox(&self) -> [f64; 4] {
        self.bbox
    }

    /// True when the site is inside or on the boundary of any polygon
    /// (planar lon/lat, robust predicates from the `geo` crate).
    pub fn contains_closed(&self, site: LatLon) -> bool {
        let c = Coord {
            x: site.lon(),
            y: site.lat(),
        };
        // Per polygon: the multipolygon's own answer applies the OGC mod-2
        // boundary rule, which would put a point on an edge shared by two
        // touching polygons outside.
        self.shape
            .0
            .iter()
            .any(|p| p.coordinate_position(&c) != CoordPos::Outside)
    }

    /// Geodesic distance in metres from the site to the nearest boundary
    /// point (any ring), if it is at most `limit_m`.
    pub fn boundary_distance_within_m(&self, site: LatLon, limit_m: f64) -> Option<f64> {
        let p = Coord {
            x: site.lon(),
            y: site.lat(),
        };
        let edges = || {
            self.shape.0.iter().flat_map(|poly| {
                std::iter::once(poly.exterior())
                    .chain(poly.interiors())
                    .flat_map(|r| r.lines())
            })
        };
        let mut min_approx = f64::INFINITY;
        for e in edges() {
            min_approx = min_approx.min(approx_edge(p, e.start, e.end).0);
        }
        if min_approx > limit_m * (1.0 + SLACK) + 10.0 {
            return None;
        }
        let cut = min_approx * (1.0 + SLACK) + 10.0;
        let mut best = f64::INFINITY;
        for e in edges() {
            if approx_edge(p, e.start, e.end).0 <= cut {
                best = best.min(distance_to_edge_coords_m(p, e.start, e.end));
            }
        }
        (best <= limit_m).then_some(best)
    }

    /// 0 km when covered, else the boundary distance in km within the buffer.
    pub fn covers(&self, site: LatLon) -> Option<f64> {
        if self.contains_closed(site) {
            return Some(0.0);
        }
        if self.buffer_km <= 0.0 {
            return None;
        }
        self.boundary_distance_within_m(site, self.buffer_km * 1000.0)
            .map(|m| m / 1000.0)
    }
}

/// A subscriber's area.
#[derive(Debug, Clone, PartialEq)]
pub enum Area {
    /// Sites within a geodesic radius of a point.
    Circle(Circle),
    /// Sites inside polygons, or within `buffer_km` of their boundary.
    Polygon(PolygonArea),
    /// Exactly the listed site ids.
    Sites(Vec<String>),
    /// Every site.
    All,
}

impl Area {
    /// Whether the area covers the site, and the distance in km to report:
    /// circle: from the centre; polygon: 0 inside, else to the boundary
    /// (within the buffer); sites: 0 when listed; all: 0.
    pub fn covers(&self, site: LatLon, site_id: &str) -> Option<f64> {
        match self {
            Area::Circle(c) => c.covers(site),
            Area::Polygon(p) => p.covers(site),
            Area::Sites(ids) => ids.iter().any(|i| i == site_id).then_some(0.0),
            Area::All => Some(0.0),
        }
    }

    /// Whether the area covers the site: `covers(..).is_some()`, cheaper for
    /// circles (no exact distance for a site clearly inside).
    pub fn contains(&self, site: LatLon, site_id: &str) -> bool {
        match self {
            Area::Circle(c) => c.contains(site),
            other => other.covers(site, site_id).is_some(),
        }
    }

    /// Lon/lat boxes `[min lon, min lat, max lon, max lat]` that hold every
    /// site `covers` can accept (split at the antimeridian), or `None` for
    /// areas not defined by position.
    pub fn search_boxes(&self) -> Option<Vec<[f64; 4]>> {
        let (bbox, reach_m) = match self {
            Area::Circle(c) => {
                let (lat, lon) = (c.center.lat(), c.center.lon());
                ([lon, lat, lon, lat], c.radius_km * 1000.0)
            }
            Area::Polygon(p) => (p.bbox, p.buffer_km * 1000.0),
            Area::Sites(_) | Area::All => return None,
        };
        Some(widen(bbox, reach_m))
    }
}

/// Widen a lon/lat box by a geodesic distance, conservatively.
///
/// Latitude: divide by the shortest degree of latitude on WGS84. Longitude:
/// the widest longitude span of a spherical cap of angular radius `delta`
/// centred at latitude `phi` is asin(sin delta / cos phi) (spherical
/// trigonometry, from memory); use the smallest WGS84 radius of curvature
/// and the box's largest |lat|, plus slack.
fn widen(bbox: [f64; 4], reach_m: f64) -> Vec<[f64; 4]> {
    let reach = reach_m * (1.0 + SLACK) + 1.0;
    let dlat = reach / MIN_M_PER_DEG_LAT;
    let min_lat = (bbox[1] - dlat).max(-90.0);
    let max_lat = (bbox[3] + dlat).min(90.0);
    let far = bbox[1].abs().max(bbox[3].abs());
    let delta = reach / MIN_RADIUS_M;
    let ratio = delta.sin() / far.to_radians().cos();
    let full = far + delta.to_degrees() >= 90.0 || ratio.is_nan() || ratio >= 1.0;
    if full {
        return vec![[-180.0, min_lat, 180.0, max_lat]];
    }
    let dlon = ratio.asin().to_degrees() * (1.0 + SLACK);
    let (lo, hi) = (bbox[0] - dlon, bbox[2] + dlon);
    if hi - lo >= 360.0 {
        return vec![[-180.0, min_lat, 180.0, max_lat]];
    }
    let mut out = vec![[lo.max(-180.0), min_lat, hi.min(180.0), max_lat]];
    if lo < -180.0 {
        out.push([lo + 360.0, min_lat, 180.0, max_lat]);
    }
    if hi > 180.0 {
        out.push([-180.0, min_lat, hi - 360.0, max_lat]);
    }
    out
}

/// Great-circle distance on a sphere of the mean Earth radius (haversine);
/// used only as a pre-filter.
fn haversine_m(a: LatLon, b: LatLon) -> f64 {
    let (p1, p2) = (a.lat().to_radians(), b.lat().to_radians());
    let dphi = p2 - p1;
    let dl = (b.lon() - a.lon()).to_radians();
    let h = (dphi / 2.0).sin().powi(2) + p1.cos() * p2.cos() * (dl / 2.0).sin().powi(2);
    2.0 * MEAN_RADIUS_M * h.sqrt().min(1.0).asin()
}

/// Exact geodesic distance to the boundary over every edge, no filter.
/// For tests that check the filtered version.
#[cfg(test)]
pub(crate) fn boundary_distance_brute_m(p: &PolygonArea, site: LatLon) -> f64 {
    let c = Coord {
        x: site.lon(),
        y: site.lat(),
    };
    p.shape
        .0
        .iter()
        .flat_map(|poly| {
            std::iter::once(poly.exterior())
                .chain(poly.interiors())
                .flat_map(|r| r.lines())
        })
        .map(|e| distance_to_edge_coords_m(c, e.start, e.end))
        .fold(f64::INFINITY, f64::min)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn ll(lat: f64, lon: f64) -> LatLon {
        LatLon::new(lat, lon).unwrap()
    }

    #[test]
    fn bad_radius_and_buffer() {
        let c = ll(-31.6, 148.1);
        assert!(Circle::new(c, 0.0).is_err());
        assert!(Circle::new(c, -1.0).is_err());
        assert!(Circle::new(c, f64::NAN).is_err());
        assert!(Circle::new(c, 6.0).is_ok());
        let sq = "{\"type\":\"Polygon\",\"coordinates\":[[[148.0,-31.7],[148.2,-31.7],[148.2,-31.5],[148.0,-31.5],[148.0,-31.7]]]}";
        assert!(PolygonArea::from_geojson(sq, -0.1).is_err());
        assert!(PolygonArea::from_geojson(sq, 100.5).is_err());
        assert!(PolygonArea::from_geojson(sq, 0.0).is_ok());
    }

    #[test]
    fn sites_and_all() {
        let s = ll(-31.6, 148.1);
        let a = Area::Sites(vec!["KB-03".into(), "KB-04".into()]);
        assert_eq!(a.covers(s, "KB-03"), Some(0.0));
        assert_eq!(a.covers(s, "KB-05"), None);
        assert_eq!(Area::All.covers(s, "KB-05"), Some(0.0));
    }

    #[test]
    fn widen_splits_at_the_antimeridian() {
        let b = widen([179.99, -16.0, 179.99, -16.0], 10_000.0);
        assert_eq!(b.len(), 2);
        assert!(b[1][0] > 179.0 || b[1][2] < -179.0);
        let polar = widen([0.0, 89.95, 0.0, 89.95], 10_000.0);
        assert_eq!(polar, vec![[-180.0, polar[0][1], 180.0, 90.0]]);
    }
    #[test]
    fn polygons_match_shapely_and_geographiclib() {
        // Sources: shapely 2.2.0 `covers` (closed, planar lon/lat; union over
        // the polygons of a multipolygon) and the geographiclib edge
        // minimiser for boundary distances (tests/reference/gen_geo.py).
        // Points include every vertex, edge midpoints and quarter points, and
        // random points around each area. Distance tolerance 1 cm; buffer
        // decisions within 5 cm of the buffer edge are skipped.
        let data: serde_json::Value = serde_json::from_str(include_str!(concat!(
            env!("CARGO_MANIFEST_DIR"),
            "/tests/reference/data/geo.json"
        )))
        .unwrap();
        let mut worst: f64 = 0.0;
        let mut checked = 0;
        let mut ambiguous = 0;
        for case in data["polygons"].as_array().unwrap() {
            let text = case["geojson"].as_str().unwrap();
            for buffer_km in [0.0, 0.5, 2.0, 5.0] {
                let area = Area::Polygon(PolygonArea::from_geojson(text, buffer_km).unwrap());
                for pt in case["points"].as_array().unwrap() {
                    let site = ll(pt["lat"].as_f64().unwrap(), pt["lon"].as_f64().unwrap());
                    let covers = pt["covers"].as_bool().unwrap();
                    let boundary = pt["boundary_m"].as_f64().unwrap();
                    let limit = buffer_km * 1000.0;
                    if !covers && (boundary - limit).abs() < 0.05 {
                        continue;
                    }
                    let want = if covers {
                        Some(0.0)
                    } else if boundary <= limit {
                        Some(boundary / 1000.0)
                    } else {
                        None
                    };
                    let got = area.covers(site, "KB-XX");
                    // Points within 1e-9 degree of an edge but not exactly on
                    // it (edge midpoints of sloping edges): the answer hangs
                    // on the last bit of the parsed coordinates (serde_json
                    // without `float_roundtrip` may differ by 1 ulp from
                    // Python), so accept either side, with distance ~0.
                    let planar = pt["planar_boundary_deg"].as_f64().unwrap();
                    if planar > 0.0 && planar < 1e-9 {
                        assert!(got.is_none_or(|d| d < 1e-5), "{pt}: {got:?}");
                        ambiguous += 1;
                        continue;
                    }
                    match (got, want) {
                        (Some(g), Some(w)) => {
                            let err = (g - w).abs() * 1000.0;
                            worst = worst.max(err);
                            assert!(err <= 0.01, "{} {pt}: {g} vs {w}", case["name"]);
                        }
                        (None, None) => {}
                        _ => panic!(
                            "{} buffer {buffer_km} {pt}: got {got:?}, want {want:?}",
                            case["name"]
                        ),
                    }
                    checked += 1;
                }
            }
        }
        assert!(checked > 1000);
        println!(
            "polygon coverage: {checked} decisions agree ({ambiguous} sub-1e-9-degree edge points skipped); \
             worst distance error {worst:.3e} m"
        );
    }

    #[test]
    fn circle_is_closed_and_geodesic() {
        // The reported distance is the geodesic distance from the centre
        // (geographiclib values in geo.json are checked in geodesic.rs); the
        // circle is closed: a radius equal to the distance covers the site.
        let centre = ll(-31.6, 148.1);
        let site = ll(-31.62, 148.05);
        let d_km = distance_m(centre, site) / 1000.0;
        let c = Circle::new(centre, d_km).unwrap();
        assert_eq!(c.covers(site), Some(d_km));
        assert!(c.contains(site));
        let c = Circle::new(centre, d_km * (1.0 - 1e-9)).unwrap();
        assert_eq!(c.covers(site), None);
        assert!(!c.contains(site));
        // Haversine would be off by about 0.3 % here: a site 20 m inside a
        // 6 km circle on the ellipsoid must still be in.
        let r_km = 6.0;
        let mut lo = 0.0;
        let mut hi = 0.2;
        for _ in 0..60 {
            let mid = (lo + hi) / 2.0;
            if distance_m(centre, ll(-31.6 - mid, 148.1)) < (r_km * 1000.0 - 20.0) {
                lo = mid;
            } else {
                hi = mid;
            }
        }
        let c = Circle::new(centre, r_km).unwrap();
        assert!(c.covers(ll(-31.6 - lo, 148.1)).is_some());
        assert!(c.contains(ll(-31.6 - lo, 148.1)));
    }

    proptest::proptest! {
        #![proptest_config(proptest::prelude::ProptestConfig::with_cases(512))]
        /// The rule book's membership test agrees with `covers` everywhere,
        /// including within a metre of the edge (the radius is set to the
        /// exact distance times 1 +- a few parts per million).
        #[test]
        fn circle_contains_agrees_with_covers(
            lat in -40.0f64..-10.0, lon in 140.0f64..155.0,
            dlat in -0.3f64..0.3, dlon in -0.3f64..0.3,
            r_km in 0.5f64..60.0, near_edge: bool, rel in -5e-6f64..5e-6,
        ) {
            let centre = ll(lat, lon);
            let site = ll(lat + dlat, lon + dlon);
            let r = if near_edge {
                (distance_m(centre, site) / 1000.0 * (1.0 + rel)).max(0.001)
            } else {
                r_km
            };
            let c = Circle::new(centre, r).unwrap();
            proptest::prop_assert_eq!(c.contains(site), c.covers(site).is_some());
        }
    }

    proptest::proptest! {
        #![proptest_config(proptest::prelude::ProptestConfig::with_cases(128))]
        #[test]
        fn filtered_boundary_distance_equals_brute_force(
            lat in -31.9f64..-31.3, lon in 147.8f64..148.4, buffer_km in 0.1f64..20.0,
        ) {
            let text = "{\"type\":\"Polygon\",\"coordinates\":[[[148.02,-31.66],[148.09,-31.67],[148.11,-31.60],[148.04,-31.57],[148.02,-31.66]],[[148.05,-31.63],[148.07,-31.63],[148.07,-31.61],[148.05,-31.61],[148.05,-31.63]]]}";
            let p = PolygonArea::from_geojson(text, buffer_km).unwrap();
            let site = ll(lat, lon);
            let brute = boundary_distance_brute_m(&p, site);
            let got = p.boundary_distance_within_m(site, buffer_km * 1000.0);
            if (brute - buffer_km * 1000.0).abs() > 1e-6 {
                proptest::prop_assert_eq!(got, (brute <= buffer_km * 1000.0).then_some(brute));
            }
        }
    }
}
