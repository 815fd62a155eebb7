//! The invented district used by the demo, tests and benchmarks: "Kellerby
//! Basin", mixed sheep and cattle country in the Australia/Sydney time zone.
//! Every name and number here is made up and stays in demo data.

/// One camera site of the invented district.
pub struct DemoSite {
    pub id: &'static str,
    pub name: &'static str,
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
                id: IDS[i],
                name: NAMES[i],
                lat: round5(CENTRE.0 + (1.5 - row) * dlat),
                lon: round5(CENTRE.1 + (col - 1.5) * dlon),
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
