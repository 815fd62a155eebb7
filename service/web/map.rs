//! The site map: camera sites drawn from their coordinates as inline SVG,
//! with no tiles, fonts or scripts, so it works offline. Pure: sites and an
//! optional subscriber area in, an SVG string out ([`map_svg`]).
//!
//! Projection: equirectangular around the middle latitude (x = longitude x
//! cos(mid latitude), y = -latitude). Over a district of tens of kilometres
//! that distorts distances by well under 1 %, enough for a picture; every
//! distance a notice states comes from the geodesic code, not from here.
//! A circle area is outlined with geodesic destination points (the `geo`
//! crate's Karney geodesic), so it matches the coverage rule.
//!
//! Each marker has a shape as well as a colour (colour alone does not
//! reach everyone): hollow circle quiet, filled circle usual, circle with a
//! ring above usual, triangle well above usual, crossed square silent,
//! hollow square not operating. Each is a link with an `aria-label` saying
//! the site and its state, and carries `data-marker="site"`.

use crate::notify::html_escape;
use crate::web::assess::Level;
use std::fmt::Write;

/// One site on the map.
#[derive(Debug, Clone, PartialEq)]
pub struct MapSite {
    pub deployment_id: String,
    /// The place name (locationName), or the id again.
    pub label: String,
    pub lat: f64,
    pub lon: f64,
    /// `None` draws a plain marker (a subscriber's map without activity).
    pub level: Option<Level>,
    /// Link target, if the marker is to be a link.
    pub href: Option<String>,
    /// On a subscriber's map: whether their area covers the site (sites
    /// outside are drawn faint).
    pub covered: Option<bool>,
}

/// A subscriber's area, in the terms the map can draw.
#[derive(Debug, Clone, PartialEq)]
pub enum MapArea {
    None,
    Circle {
        lat: f64,
        lon: f64,
        radius_km: f64,
    },
    /// Polygons as rings of (lon, lat), exterior first (GeoJSON order).
    Polygons(Vec<Vec<Vec<(f64, f64)>>>),
}

// A small canvas keeps markers and labels readable when a phone scales
// the picture down to its width.
const WIDTH: f64 = 420.0;
const PAD: f64 = 22.0;
/// Room on the right for the last column's labels.
const LABEL_ROOM: f64 = 44.0;
const INK: &str = "#23262b";
const GROUND: &str = "#f6f4ee";
const AREA_FILL: &str = "#dfe9e4";
const AREA_EDGE: &str = "#2f5d50";

/// Fill colour of a level.
pub fn colour(level: Option<Level>) -> &'static str {
    match level {
        None => "#3d5a80",
        Some(Level::Quiet) => "#ffffff",
        Some(Level::Usual) => "#2f5d50",
        Some(Level::Raised) => "#c98a1b",
        Some(Level::High) => "#a2461b",
        Some(Level::Silent) => "#23262b",
        Some(Level::NoEffort) => "#ffffff",
    }
}

struct Projection {
    lon0: f64,
    lat_max: f64,
    k: f64,
    scale: f64,
}

impl Projection {
    fn x(&self, lon: f64) -> f64 {
        PAD + (lon - self.lon0) * self.k * self.scale
    }
    fn y(&self, lat: f64) -> f64 {
        PAD + (self.lat_max - lat) * self.scale
    }
}

/// Draws the map. `title` is said by `<title>`; `id` keeps ids unique on
/// the page.
pub fn map_svg(sites: &[MapSite], area: &MapArea, title: &str, id: &str) -> String {
    // Every point to fit: sites and the area's outline.
    let outline: Vec<Vec<(f64, f64)>> = match area {
        MapArea::None => vec![],
        MapArea::Circle {
            lat,
            lon,
            radius_km,
        } => vec![circle(*lat, *lon, *radius_km)],
        MapArea::Polygons(p) => p.iter().flatten().cloned().collect(),
    };
    let pts: Vec<(f64, f64)> = sites
        .iter()
        .map(|s| (s.lon, s.lat))
        .chain(outline.iter().flatten().copied())
        .filter(|(x, y)| x.is_finite() && y.is_finite())
        .collect();
    let (mut lon_min, mut lon_max, mut lat_min, mut lat_max) =
        (180.0_f64, -180.0_f64, 90.0_f64, -90.0_f64);
    for (lon, lat) in &pts {
        lon_min = lon_min.min(*lon);
        lon_max = lon_max.max(*lon);
        lat_min = lat_min.min(*lat);
        lat_max = lat_max.max(*lat);
    }
    if pts.is_empty() {
        (lon_min, lon_max, lat_min, lat_max) = (0.0, 0.0, 0.0, 0.0);
    }
    // At least ~2 km across, so one site is not a division by zero.
    let span_min = 0.02;
    if lat_max - lat_min < span_min {
        let m = (lat_max + lat_min) / 2.0;
        (lat_min, lat_max) = (m - span_min / 2.0, m + span_min / 2.0);
    }
    let k = ((lat_max + lat_min) / 2.0).to_radians().cos().max(0.05);
    if (lon_max - lon_min) * k < span_min {
        let m = (lon_max + lon_min) / 2.0;
        (lon_min, lon_max) = (m - span_min / k / 2.0, m + span_min / k / 2.0);
    }
    let w_deg = (lon_max - lon_min) * k;
    let h_deg = lat_max - lat_min;
    // Fit the width; cap the height at the width (a tall district scales down).
    let inner = WIDTH - 2.0 * PAD - LABEL_ROOM;
    let mut scale = inner / w_deg;
    if h_deg * scale > inner {
        scale = inner / h_deg;
    }
    let height = (h_deg * scale + 2.0 * PAD + 24.0).max(160.0);
    let p = Projection {
        lon0: lon_min,
        lat_max,
        k,
        scale,
    };
    let id = id
        .chars()
        .map(|c| if c.is_ascii_alphanumeric() { c } else { '_' })
        .collect::<String>();
    let mut o = String::with_capacity(2048 + sites.len() * 400);
    let _ = write!(
        o,
        "<svg xmlns=\"http://www.w3.org/2000/svg\" viewBox=\"0 0 {WIDTH} {height:.0}\" width=\"100%\" style=\"max-width:40rem;display:block\" role=\"img\" aria-labelledby=\"m{id}-t\" font-family=\"sans-serif\" font-size=\"12\" data-map=\"sites\"><title id=\"m{id}-t\">{}</title><rect width=\"{WIDTH}\" height=\"{height:.0}\" fill=\"{GROUND}\"/>",
        html_escape(title)
    );
    for ring in &outline {
        if ring.len() < 2 {
            continue;
        }
        let d: Vec<String> = ring
            .iter()
            .map(|(lon, lat)| format!("{:.1},{:.1}", p.x(*lon), p.y(*lat)))
            .collect();
        let _ = write!(
            o,
            "<polygon points=\"{}\" fill=\"{AREA_FILL}\" fill-opacity=\"0.8\" stroke=\"{AREA_EDGE}\" stroke-width=\"2\" stroke-dasharray=\"6 3\" data-area=\"outline\"/>",
            d.join(" ")
        );
    }
    for s in sites {
        if !(s.lat.is_finite() && s.lon.is_finite()) {
            continue;
        }
        let (x, y) = (p.x(s.lon), p.y(s.lat));
        let faint = s.covered == Some(false);
        let state = match (s.level, s.covered) {
            (Some(l), _) => l.words().to_string(),
            (None, Some(true)) => "in the area".into(),
            (None, Some(false)) => "outside the area".into(),
            (None, None) => "camera site".into(),
        };
        let label = if s.label != s.deployment_id && !s.label.is_empty() {
            format!("{} {}", s.deployment_id, s.label)
        } else {
            s.deployment_id.clone()
        };
        let aria = format!("{label}: {state}");
        if let Some(h) = &s.href {
            let _ = write!(
                o,
                "<a href=\"{}\" aria-label=\"{}\">",
                html_escape(h),
                html_escape(&aria)
            );
        }
        let _ = write!(
            o,
            "<g data-marker=\"site\" data-site=\"{}\" data-level=\"{}\"{}><title>{}</title>",
            html_escape(&s.deployment_id),
            s.level.map(Level::as_str).unwrap_or("none"),
            if faint { " opacity=\"0.45\"" } else { "" },
            html_escape(&aria)
        );
        marker(&mut o, x, y, s.level);
        let _ = write!(
            o,
            "<text x=\"{:.1}\" y=\"{:.1}\" fill=\"{INK}\" font-size=\"11\">{}</text></g>",
            x + 10.0,
            y + 4.0,
            html_escape(&s.deployment_id)
        );
        if s.href.is_some() {
            o.push_str("</a>");
        }
    }
    scale_bar(&mut o, &p, height);
    o.push_str("</svg>");
    o
}

/// A small stand-alone SVG of one level's marker, for legends.
pub fn legend_svg(level: Level) -> String {
    let mut o = String::from(
        "<svg xmlns=\"http://www.w3.org/2000/svg\" viewBox=\"0 0 26 26\" width=\"22\" height=\"22\" aria-hidden=\"true\">",
    );
    marker(&mut o, 13.0, 14.0, Some(level));
    o.push_str("</svg>");
    o
}

fn marker(o: &mut String, x: f64, y: f64, level: Option<Level>) {
    let fill = colour(level);
    let _ = match level {
        None | Some(Level::Usual) => write!(
            o,
            "<circle cx=\"{x:.1}\" cy=\"{y:.1}\" r=\"7\" fill=\"{fill}\" stroke=\"{INK}\" stroke-width=\"1.5\"/>"
        ),
        Some(Level::Quiet) => write!(
            o,
            "<circle cx=\"{x:.1}\" cy=\"{y:.1}\" r=\"6\" fill=\"{fill}\" stroke=\"#2f5d50\" stroke-width=\"2.5\"/>"
        ),
        Some(Level::Raised) => write!(
            o,
            "<circle cx=\"{x:.1}\" cy=\"{y:.1}\" r=\"11\" fill=\"none\" stroke=\"{fill}\" stroke-width=\"2.5\"/><circle cx=\"{x:.1}\" cy=\"{y:.1}\" r=\"7\" fill=\"{fill}\" stroke=\"{INK}\" stroke-width=\"1.5\"/>"
        ),
        Some(Level::High) => write!(
            o,
            "<polygon points=\"{:.1},{:.1} {:.1},{:.1} {:.1},{:.1}\" fill=\"{fill}\" stroke=\"{INK}\" stroke-width=\"1.5\"/>",
            x,
            y - 11.0,
            x + 10.0,
            y + 7.0,
            x - 10.0,
            y + 7.0
        ),
        Some(Level::Silent) => write!(
            o,
            "<rect x=\"{:.1}\" y=\"{:.1}\" width=\"14\" height=\"14\" fill=\"{fill}\"/><path d=\"M{:.1} {:.1}l8 8m0 -8l-8 8\" stroke=\"#ffffff\" stroke-width=\"2\"/>",
            x - 7.0,
            y - 7.0,
            x - 4.0,
            y - 4.0
        ),
        Some(Level::NoEffort) => write!(
            o,
            "<rect x=\"{:.1}\" y=\"{:.1}\" width=\"12\" height=\"12\" fill=\"{fill}\" stroke=\"#5b6068\" stroke-width=\"2\"/>",
            x - 6.0,
            y - 6.0
        ),
    };
}

/// A bar of a round number of kilometres, about a fifth of the width.
fn scale_bar(o: &mut String, p: &Projection, height: f64) {
    let km_per_px = 111.32 / p.scale; // one degree of latitude, ~111.32 km (from memory)
    let want = km_per_px * WIDTH / 5.0;
    let nice = [0.5, 1.0, 2.0, 5.0, 10.0, 20.0, 50.0, 100.0, 200.0, 500.0]
        .into_iter()
        .rev()
        .find(|k| *k <= want)
        .unwrap_or(0.5);
    let len = nice / km_per_px;
    let y = height - 14.0;
    let _ = write!(
        o,
        "<g aria-hidden=\"true\"><path d=\"M{PAD} {y:.1}h{len:.1}\" stroke=\"{INK}\" stroke-width=\"3\"/><text x=\"{:.1}\" y=\"{:.1}\" fill=\"{INK}\" font-size=\"11\">{} km</text></g>",
        PAD + len + 6.0,
        y + 4.0,
        if nice < 1.0 { format!("{nice}") } else { format!("{nice:.0}") }
    );
}

/// Outline of a geodesic circle as (lon, lat) points every 6 degrees.
fn circle(lat: f64, lon: f64, radius_km: f64) -> Vec<(f64, f64)> {
    use ::geo::Destination;
    let c = ::geo::Point::new(lon, lat);
    (0..60)
        .map(|i| {
            let q = ::geo::Geodesic.destination(c, f64::from(i) * 6.0, radius_km * 1000.0);
            (q.x(), q.y())
        })
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    fn sites() -> Vec<MapSite> {
        vec![
            MapSite {
                deployment_id: "KB-01".into(),
                label: "Ridge <Gate>".into(),
                lat: -31.49,
                lon: 147.97,
                level: Some(Level::High),
                href: Some("/sites/KB-01".into()),
                covered: None,
            },
            MapSite {
                deployment_id: "KB-02".into(),
                label: "KB-02".into(),
                lat: -31.57,
                lon: 148.06,
                level: Some(Level::Silent),
                href: Some("/sites/KB-02?x=1&y=\"2\"".into()),
                covered: None,
            },
        ]
    }

    #[test]
    fn one_marker_per_site_with_its_state_in_words_and_text_escaped() {
        let svg = map_svg(&sites(), &MapArea::None, "Sites & <state>", "o");
        assert_eq!(svg.matches("data-marker=\"site\"").count(), 2);
        assert!(svg.contains("aria-label=\"KB-01 Ridge &lt;Gate&gt;: well above usual\""));
        assert!(svg.contains("aria-label=\"KB-02: camera silent\""));
        assert!(svg.contains("href=\"/sites/KB-02?x=1&amp;y=&quot;2&quot;\""));
        assert!(svg.contains("<title id=\"mo-t\">Sites &amp; &lt;state&gt;</title>"));
        assert!(!svg.contains("<Gate>"));
    }

    #[test]
    fn the_west_site_is_left_and_the_north_site_is_up() {
        let svg = map_svg(&sites(), &MapArea::None, "t", "o");
        // KB-01 is west (147.97) and north (-31.49) of KB-02: smaller x and y.
        let xy = |id: &str| -> (f64, f64) {
            let g = &svg[svg.find(&format!("data-site=\"{id}\"")).unwrap_or(0)..];
            let t = &g[g.find("<text x=\"").unwrap_or(0) + 9..];
            let x: f64 = t[..t.find('"').unwrap_or(0)].parse().unwrap_or(f64::NAN);
            let t = &t[t.find("y=\"").unwrap_or(0) + 3..];
            let y: f64 = t[..t.find('"').unwrap_or(0)].parse().unwrap_or(f64::NAN);
            (x, y)
        };
        let (a, b) = (xy("KB-01"), xy("KB-02"));
        assert!(a.0 < b.0 && a.1 < b.1, "{a:?} {b:?}");
    }

    #[test]
    fn a_circle_area_is_outlined_at_its_geodesic_radius() {
        let area = MapArea::Circle {
            lat: -31.53,
            lon: 148.0,
            radius_km: 5.0,
        };
        let pts = circle(-31.53, 148.0, 5.0);
        assert_eq!(pts.len(), 60);
        for (lon, lat) in &pts {
            // Back through the crate's own geodesic distance (Karney).
            let d = crate::geo::distance_m(
                crate::geo::LatLon::new(-31.53, 148.0).unwrap_or_else(|_| unreachable!()),
                crate::geo::LatLon::new(*lat, *lon).unwrap_or_else(|_| unreachable!()),
            );
            assert!((d - 5000.0).abs() < 0.01, "{d}");
        }
        let svg = map_svg(&sites(), &area, "t", "o");
        assert_eq!(svg.matches("data-area=\"outline\"").count(), 1);
    }
}
