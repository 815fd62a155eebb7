//! The invented district used by the demo, tests and benchmarks: "Kellerby
//! Basin", mixed sheep and cattle country in the Australia/Sydney time zone.
//! Every name and number here is made up and stays in demo data.

/// One camera site of the invented district.
#[derive(Debug, Clone, PartialEq)]
pub struct DemoSite {
    pub id: String,
    pub name: String,
    pub lat: f64,
    pub lon: f64,
}

/// Centre of the 4 x 4 grid.
pub const CENTRE: (f64, f64) = (-31.6, 148.1);
/// Grid spacing, km.
pub const SPACING_KM: f64 = 8.0;

const NAMES: [&str; 16] = [
    "Ridge Gate",
    "Dry Creek Crossing",
    "Bullock Flat",
    "Tank Paddock",
    "Old Yards",
    "Pine Hill",
    "Swamp Corner",
    "Boundary Track",
    "Quarry Road",
    "Red Gully",
    "Top Dam",
    "Lambing Paddock",
    "Mill Lane",
    "Shearers Flat",
    "Long Ridge",
    "River Bend",
];

const IDS: [&str; 16] = [
    "KB-01", "KB-02", "KB-03", "KB-04", "KB-05", "KB-06", "KB-07", "KB-08", "KB-09", "KB-10",
    "KB-11", "KB-12", "KB-13", "KB-14", "KB-15", "KB-16",
];

/// The 16 sites on an 8 km grid, north-west first, row by row.
pub fn sites() -> Vec<DemoSite> {
    let dlat = SPACING_KM / 110.9; // km per degree of latitude near 31.6 S
    let dlon = SPACING_KM / (111.32 * CENTRE.0.to_radians().cos());
    (0..16)
        .map(|i| {
            let (row, col) = ((i / 4) as f64, (i % 4) as f64);
            DemoSite {
                id: IDS[i].to_string(),
                name: NAMES[i].to_string(),
                lat: round5(CENTRE.0 + (1.5 - row) * dlat),
                lon: round5(CENTRE.1 + (col - 1.5) * dlon),
            }
        })
        .collect()
}

/// A larger synthetic network for load tests: `n` sites on a square grid
/// `spacing_km` apart, centred on the district (row by row, north-west
/// first, the last row possibly short), with ids `KB-00000`, `KB-00001`, ...
/// (five digits up to 100,000 sites). The demo's scripted happenings name
/// the 16 district ids, so they do not occur on a grid.
pub fn grid(n: usize, spacing_km: f64) -> Vec<DemoSite> {
    let side = (1..).find(|s| s * s >= n).unwrap_or(1);
    let dlat = spacing_km / 110.9;
    let dlon = spacing_km / (111.32 * CENTRE.0.to_radians().cos());
    let mid = (side as f64 - 1.0) / 2.0;
    (0..n)
        .map(|i| {
            let (row, col) = ((i / side) as f64, (i % side) as f64);
            DemoSite {
                id: format!("KB-{i:05}"),
                name: format!("Grid {}-{}", i / side + 1, i % side + 1),
                lat: round5(CENTRE.0 + (mid - row) * dlat),
                lon: round5(CENTRE.1 + (col - mid) * dlon),
            }
        })
        .collect()
}

fn round5(v: f64) -> f64 {
    (v * 1e5).round() / 1e5
}

/// Daily activity pattern.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Rhythm {
    Nocturnal,
    Crepuscular,
    Diurnal,
}

/// A species of the synthetic feed with its usual independent events per
/// camera-night (invented, plausible in magnitude only).
pub struct DemoSpecies {
    pub scientific_name: &'static str,
    pub vernacular_name: &'static str,
    pub rate_per_night: f64,
    pub rhythm: Rhythm,
    pub max_group: u32,
}

pub const SPECIES: [DemoSpecies; 9] = [
    DemoSpecies {
        scientific_name: "Canis familiaris",
        vernacular_name: "wild dog",
        rate_per_night: 0.06,
        rhythm: Rhythm::Nocturnal,
        max_group: 3,
    },
    DemoSpecies {
        scientific_name: "Vulpes vulpes",
        vernacular_name: "red fox",
        rate_per_night: 0.12,
        rhythm: Rhythm::Nocturnal,
        max_group: 1,
    },
    DemoSpecies {
        scientific_name: "Sus scrofa",
        vernacular_name: "feral pig",
        rate_per_night: 0.04,
        rhythm: Rhythm::Nocturnal,
        max_group: 6,
    },
    DemoSpecies {
        scientific_name: "Felis catus",
        vernacular_name: "feral cat",
        rate_per_night: 0.05,
        rhythm: Rhythm::Nocturnal,
        max_group: 1,
    },
    DemoSpecies {
        scientific_name: "Dama dama",
        vernacular_name: "fallow deer",
        rate_per_night: 0.0,
        rhythm: Rhythm::Crepuscular,
        max_group: 4,
    },
    DemoSpecies {
        scientific_name: "Oryctolagus cuniculus",
        vernacular_name: "European rabbit",
        rate_per_night: 0.35,
        rhythm: Rhythm::Crepuscular,
        max_group: 3,
    },
    DemoSpecies {
        scientific_name: "Macropus giganteus",
        vernacular_name: "eastern grey kangaroo",
        rate_per_night: 0.5,
        rhythm: Rhythm::Crepuscular,
        max_group: 5,
    },
    DemoSpecies {
        scientific_name: "Trichosurus vulpecula",
        vernacular_name: "common brushtail possum",
        rate_per_night: 0.25,
        rhythm: Rhythm::Nocturnal,
        max_group: 1,
    },
    DemoSpecies {
        scientific_name: "Dromaius novaehollandiae",
        vernacular_name: "emu",
        rate_per_night: 0.05,
        rhythm: Rhythm::Diurnal,
        max_group: 3,
    },
];

/// Relative weight of local hour `h` (0..24) for a rhythm; the 24 weights of
/// a rhythm sum to 1.
pub fn hour_weight(rhythm: Rhythm, h: u32) -> f64 {
    let raw = |h: u32| -> f64 {
        match rhythm {
            Rhythm::Nocturnal => {
                if !(5..20).contains(&h) {
                    1.0
                } else if h == 5 || h == 19 {
                    0.4
                } else {
                    0.03
                }
            }
            Rhythm::Crepuscular => {
                if matches!(h, 5..=8 | 17..=20) {
                    1.0
                } else if !(6..20).contains(&h) {
                    0.3
                } else {
                    0.1
                }
            }
            Rhythm::Diurnal => {
                if (7..18).contains(&h) {
                    1.0
                } else {
                    0.02
                }
            }
        }
    };
    let total: f64 = (0..24).map(raw).sum();
    raw(h % 24) / total
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn grid_is_centred_and_spaced() {
        let g = grid(10_000, 3.0);
        assert_eq!(g.len(), 10_000);
        assert_eq!(g[0].id, "KB-00000");
        assert_eq!(g[9_999].id, "KB-09999");
        let mean_lat = g.iter().map(|s| s.lat).sum::<f64>() / g.len() as f64;
        let mean_lon = g.iter().map(|s| s.lon).sum::<f64>() / g.len() as f64;
        assert!((mean_lat - CENTRE.0).abs() < 1e-4, "{mean_lat}");
        assert!((mean_lon - CENTRE.1).abs() < 1e-4, "{mean_lon}");
        // Neighbours in the middle row are 3 km apart (geodesic, to 1 %;
        // the longitude step is set at the centre's latitude, so rows far
        // north or south are a little wider or narrower).
        let a = crate::geo::LatLon::new(g[5_050].lat, g[5_050].lon).unwrap();
        let b = crate::geo::LatLon::new(g[5_051].lat, g[5_051].lon).unwrap();
        let d = crate::geo::distance_m(a, b);
        assert!((d - 3000.0).abs() < 30.0, "{d}");
        // A count that is not a square leaves the last row short.
        assert_eq!(grid(10, 3.0).len(), 10);
        let ids: std::collections::BTreeSet<_> = g.iter().map(|s| s.id.clone()).collect();
        assert_eq!(ids.len(), g.len());
    }
}
