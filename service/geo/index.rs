//! Which sites each subscriber area covers, computed once at load.
//!
//! Owns [`SiteIndex`], an R-tree (rstar) over the camera sites in lon/lat,
//! and [`coverage`]. For a circle or polygon the tree is searched with the
//! area's widened lon/lat boxes ([`Area::search_boxes`], conservative), and
//! each candidate then gets the exact [`Area::covers`] test, so the result is
//! the same as testing every site (a property test checks that). Site lists
//! are looked up by id, `all` takes every site.
//!
//! Pure: no I/O. Results are sorted by site index for determinism.

use super::area::Area;
use super::geodesic::LatLon;
use rstar::primitives::GeomWithData;
use rstar::{RTree, AABB};
use std::collections::HashMap;

type Entry = GeomWithData<[f64; 2], usize>;

/// The sites, in an R-tree keyed on [lon, lat].
#[derive(Debug, Clone)]
pub struct SiteIndex {
    tree: RTree<Entry>,
    sites: Vec<(String, LatLon)>,
    /// Site id -> indices (a duplicate id maps to every site that has it;
    /// config validation should refuse duplicates).
    by_id: HashMap<String, Vec<usize>>,
}

impl SiteIndex {
    /// Build the index (bulk load, O(n log n)).
    pub fn new<S: AsRef<str>>(sites: &[(S, LatLon)]) -> Self {
        let entries = sites
            .iter()
            .enumerate()
            .map(|(i, (_, p))| GeomWithData::new([p.lon(), p.lat()], i))
            .collect();
        let mut by_id: HashMap<String, Vec<usize>> = HashMap::new();
        for (i, (id, _)) in sites.iter().enumerate() {
            by_id.entry(id.as_ref().to_string()).or_default().push(i);
        }
        SiteIndex {
            tree: RTree::bulk_load(entries),
            sites: sites
                .iter()
                .map(|(id, p)| (id.as_ref().to_string(), *p))
                .collect(),
            by_id,
        }
    }

    /// Number of sites.
    pub fn len(&self) -> usize {
        self.sites.len()
    }

    /// True when there are no sites.
    pub fn is_empty(&self) -> bool {
        self.sites.is_empty()
    }

    /// `(site index, distance km)` for every site the area covers, by
    /// index: [`SiteIndex::covered_by`] with each site's distance.
    pub fn coverage_of(&self, area: &Area) -> Vec<(usize, f64)> {
        self.covered_by(area)
            .into_iter()
            .map(|i| {
                let (id, p) = &self.sites[i as usize];
                (i as usize, area.covers(*p, id).unwrap_or(0.0))
            })
            .collect()
    }

    /// The sites the area covers, by index (sorted, once each): what the
    /// rule book keeps, decided without exact distances where possible.
    pub fn covered_by(&self, area: &Area) -> Vec<u32> {
        let mut out: Vec<u32> = match area {
            Area::All => (0..self.sites.len() as u32).collect(),
            Area::Sites(ids) => ids
                .iter()
                .filter_map(|id| self.by_id.get(id))
                .flatten()
                .map(|&i| i as u32)
                .collect(),
            Area::Circle(_) | Area::Polygon(_) => {
                let mut found = Vec::new();
                for b in area.search_boxes().unwrap_or_default() {
                    let env = AABB::from_corners([b[0], b[1]], [b[2], b[3]]);
                    for e in self.tree.locate_in_envelope(&env) {
                        let (id, p) = &self.sites[e.data];
                        if area.contains(*p, id) {
                            found.push(e.data as u32);
                        }
                    }
                }
                found
            }
        };
        out.sort_unstable();
        out.dedup();
        out
    }
}

/// For each area (same order), the covered `(site index, distance km)`,
/// sorted by site index.
pub fn coverage<S: AsRef<str>>(sites: &[(S, LatLon)], areas: &[Area]) -> Vec<Vec<(usize, f64)>> {
    let index = SiteIndex::new(sites);
    areas.iter().map(|a| index.coverage_of(a)).collect()
}

#[cfg(test)]
mod tests {
    use super::super::area::{Circle, PolygonArea};
    use super::*;
    use proptest::prelude::*;

    fn brute(sites: &[(String, LatLon)], area: &Area) -> Vec<(usize, f64)> {
        sites
            .iter()
            .enumerate()
            .filter_map(|(i, (id, p))| area.covers(*p, id).map(|d| (i, d)))
            .collect()
    }

    fn site_strategy() -> impl Strategy<Value = Vec<(String, LatLon)>> {
        prop::collection::vec((-32.2f64..-31.0, 147.4f64..148.8), 1..120).prop_map(|v| {
            v.into_iter()
                .enumerate()
                .map(|(i, (lat, lon))| (format!("S{i}"), LatLon::new(lat, lon).expect("in range")))
                .collect()
        })
    }

    fn area_strategy() -> impl Strategy<Value = Area> {
        let circle = (-32.2f64..-31.0, 147.4f64..148.8, 0.1f64..40.0).prop_map(|(lat, lon, r)| {
            Area::Circle(Circle::new(LatLon::new(lat, lon).expect("in range"), r).expect("radius"))
        });
        let polygon = (
            -32.0f64..-31.2,
            147.6f64..148.6,
            0.01f64..0.3,
            0.01f64..0.3,
            0.0f64..15.0,
        )
            .prop_map(|(lat, lon, w, h, buf)| {
                let text = format!(
                    "{{\"type\":\"Polygon\",\"coordinates\":[[[{a},{b}],[{c},{b}],[{c2},{d}],[{a},{d}],[{a},{b}]]]}}",
                    a = lon,
                    b = lat,
                    c = lon + w,
                    c2 = lon + w * 0.6,
                    d = lat + h
                );
                Area::Polygon(PolygonArea::from_geojson(&text, buf).expect("valid polygon"))
            });
        prop_oneof![circle, polygon, Just(Area::All)]
    }

    proptest! {
        #![proptest_config(ProptestConfig::with_cases(64))]
        #[test]
        fn index_equals_brute_force(sites in site_strategy(), areas in prop::collection::vec(area_strategy(), 1..6)) {
            let got = coverage(&sites, &areas);
            let index = SiteIndex::new(&sites);
            for (a, g) in areas.iter().zip(&got) {
                prop_assert_eq!(g, &brute(&sites, a));
                // Membership alone (the rule book's fast path) is the
                // brute-force set of `covers`.
                let ids: Vec<u32> = brute(&sites, a).iter().map(|&(i, _)| i as u32).collect();
                prop_assert_eq!(index.covered_by(a), ids);
            }
        }
    }

    #[test]
    fn circle_across_the_antimeridian() {
        // Suva-ish longitude; a site just across 180 degrees is 2.2 km away.
        let sites = vec![
            ("E".to_string(), LatLon::new(-16.0, 179.99).unwrap()),
            ("W".to_string(), LatLon::new(-16.0, -179.99).unwrap()),
        ];
        let c = Area::Circle(Circle::new(LatLon::new(-16.0, 179.995).unwrap(), 5.0).unwrap());
        let got = coverage(&sites, std::slice::from_ref(&c));
        assert_eq!(got[0].len(), 2);
        assert_eq!(got[0], brute(&sites, &c));
    }

    #[test]
    fn site_lists_by_id() {
        let p = LatLon::new(-31.6, 148.1).unwrap();
        let sites = vec![("KB-01", p), ("KB-02", p), ("KB-03", p)];
        let got = coverage(
            &sites,
            &[Area::Sites(vec![
                "KB-03".into(),
                "KB-01".into(),
                "KB-99".into(),
            ])],
        );
        assert_eq!(got[0], vec![(0, 0.0), (2, 0.0)]);
    }

    /// Timing: 100,000 areas over 10,000 sites. Run with
    /// `cargo test --release -- --ignored --nocapture index_timing`.
    #[test]
    #[ignore]
    fn index_timing() {
        // Deterministic pseudo-random numbers (64-bit LCG, Knuth's MMIX
        // constants, from memory) so the run needs no rand crate.
        let mut state: u64 = 0x5eed;
        let mut next = move || {
            state = state
                .wrapping_mul(6364136223846793005)
                .wrapping_add(1442695040888963407);
            (state >> 11) as f64 / (1u64 << 53) as f64
        };
        // Sites: uniform in an 8 x 8 degree box around Kellerby Basin.
        let sites: Vec<(String, LatLon)> = (0..10_000)
            .map(|i| {
                let lat = -35.6 + 8.0 * next();
                let lon = 144.1 + 8.0 * next();
                (format!("S{i}"), LatLon::new(lat, lon).unwrap())
            })
            .collect();
        let mut areas = Vec::with_capacity(100_000);
        for _ in 0..100_000 {
            let lat = -35.6 + 8.0 * next();
            let lon = 144.1 + 8.0 * next();
            if next() < 0.7 {
                let r = 1.0 + 19.0 * next();
                areas.push(Area::Circle(
                    Circle::new(LatLon::new(lat, lon).unwrap(), r).unwrap(),
                ));
            } else {
                // An irregular 8-gon about 2-15 km across, buffer 0-2 km.
                let size = 0.01 + 0.06 * next();
                let mut ring: Vec<String> = (0..8)
                    .map(|k| {
                        let ang = k as f64 * std::f64::consts::TAU / 8.0;
                        let rr = size * (0.6 + 0.4 * next());
                        format!("[{},{}]", lon + rr * ang.cos(), lat + rr * ang.sin())
                    })
                    .collect();
                ring.push(ring[0].clone());
                let text = format!(
                    "{{\"type\":\"Polygon\",\"coordinates\":[[{}]]}}",
                    ring.join(",")
                );
                areas.push(Area::Polygon(
                    PolygonArea::from_geojson(&text, 2.0 * next()).unwrap(),
                ));
            }
        }
        let start = std::time::Instant::now();
        let got = coverage(&sites, &areas);
        let elapsed = start.elapsed();
        let pairs: usize = got.iter().map(|v| v.len()).sum();
        println!(
            "coverage: {} areas x {} sites -> {} pairs in {:.3} s",
            areas.len(),
            sites.len(),
            pairs,
            elapsed.as_secs_f64()
        );
    }
}
