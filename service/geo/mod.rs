//! Geography for outrider: pure functions over WGS84 coordinates.
//!
//! Owns the coordinate type ([`LatLon`]), geodesic distances on the WGS84
//! ellipsoid (Karney 2013, through the `geo` crate), GeoJSON area parsing
//! (RFC 7946), subscriber areas and their coverage of camera sites, the
//! R-tree that computes every subscriber's sites once at load, and the NOAA
//! solar equations behind "dusk-to-dawn".
//!
//! Pure: no file, network or clock access. Parsing a GeoJSON *string* is here;
//! reading the file is the caller's job. Instants are passed in. Conventions
//! (METHODS.md sections 5 and 6) are explained in `docs/geography-and-time.md`.
//!
//! # Layout
//! - [`geodesic`]: [`LatLon`], [`distance_m`], point-to-edge distance.
//! - [`geojson`]: GeoJSON string -> polygons, with located errors.
//! - [`area`]: [`Area`] and its `covers` test (distance reported on notices).
//! - [`index`]: [`coverage`] of many areas over many sites with an R-tree.
//! - [`solar`]: civil twilight and [`is_night`].
//!
//! Inside this module the external crate is always written `::geo::...`,
//! because the outrider crate also has this module called `geo`.

pub mod area;
pub mod geodesic;
pub mod geojson;
pub mod index;
pub mod solar;

pub use area::{Area, AreaError, Circle, PolygonArea, MAX_BUFFER_KM};
pub use geodesic::{distance_m, CoordError, LatLon};
pub use geojson::{parse_area_geojson, GeoJsonError, Location};
pub use index::{coverage, SiteIndex};
pub use solar::{civil_twilight, is_night, CivilTwilight, Polar};
