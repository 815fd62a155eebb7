//! A fuzz runner for the stable toolchain: the same targets as the
//! libFuzzer entries, driven by random mutation of a seed corpus, without
//! coverage instrumentation (that needs nightly compiler flags).
//!
//! It keeps a pool of inputs, starting from the seeds; each round it takes
//! one, applies 1 to 8 random mutations (bit flips, interesting bytes,
//! dictionary tokens, insertions, deletions, repeats, splices with another
//! input, truncation), runs the target and catches a panic. An input that
//! gives an outcome not seen before (the target's summary of what the
//! parser answered: which rejection reason, which config error) joins the
//! pool: a crude stand-in for coverage feedback. A panic is a crash: the
//! input goes to `fuzz/artifacts/<target>/crash-<hash>` and is counted.
//!
//!     stable-fuzz TARGET SECONDS [SEED]
//!
//! Prints one JSON line: target, seconds, execs, execs_per_second, pool,
//! outcomes, crashes (distinct panic messages), seed.

use std::collections::{BTreeMap, BTreeSet};
use std::hash::{Hash, Hasher};
use std::panic::{catch_unwind, AssertUnwindSafe};
use std::path::{Path, PathBuf};
use std::time::{Duration, Instant};

/// xorshift64* (Vigna, 2016; constants from memory).
struct Rng(u64);

impl Rng {
    fn next(&mut self) -> u64 {
        let mut x = self.0;
        x ^= x >> 12;
        x ^= x << 25;
        x ^= x >> 27;
        self.0 = x;
        x.wrapping_mul(0x2545_F491_4F6C_DD1D)
    }
    fn below(&mut self, n: usize) -> usize {
        if n == 0 {
            0
        } else {
            (self.next() % n as u64) as usize
        }
    }
}

/// Tokens that matter to JSON, TOML and CSV parsers and to outrider's checks.
const DICTIONARY: &[&str] = &[
    "{",
    "}",
    "[",
    "]",
    ",",
    ":",
    "\"",
    "\\",
    "\\u0000",
    "\\ud800",
    "\\u202e",
    "\u{202e}",
    "null",
    "true",
    "false",
    "NaN",
    "Infinity",
    "-1",
    "0",
    "1e400",
    "1e23",
    "2.5",
    "10001",
    "99999999999999999999999",
    "\"observationID\"",
    "\"deploymentID\"",
    "\"eventStart\"",
    "\"observationType\"",
    "\"animal\"",
    "\"human\"",
    "\"blank\"",
    "\"scientificName\"",
    "\"Canis familiaris\"",
    "\"count\"",
    "\"classificationProbability\"",
    "\"KB-01\"",
    "\"2026-07-14T02:13:00+10:00\"",
    "\"2999-01-01T00:00:00Z\"",
    "\"timestamp\"",
    "=",
    "[[",
    "]]",
    "[service]",
    "[mqtt]",
    "[sites]",
    "[delivery]",
    "[[subscriber]]",
    "[[subscriber.watch]]",
    "retry_first_seconds",
    "give_up_hours",
    "_env",
    "_file",
    "area",
    "radius_km",
    "geojson",
    "\"Polygon\"",
    "\"MultiPolygon\"",
    "\"FeatureCollection\"",
    "\"coordinates\"",
    "180.0",
    "-90.0",
    "1e308",
    "\n",
    "\r\n",
    ",,",
    "NA",
    "deploymentStart",
    "latitude",
    "longitude",
    "2026-02-30T00:00:00+10:00",
    "\u{feff}",
    "\u{0}",
    "\u{1b}",
];

/// Bytes parsers tend to branch on.
const INTERESTING: &[u8] = b"\0\xff\x7f\x80\xc0\xed\"'{}[],:\\\n\r\t 0-+.eE#=@/";

fn mutate(rng: &mut Rng, input: &mut Vec<u8>, pool: &[Vec<u8>], max_len: usize) {
    for _ in 0..1 + rng.below(8) {
        let len = input.len();
        match rng.below(9) {
            0 if len > 0 => {
                let i = rng.below(len);
                input[i] ^= 1 << rng.below(8);
            }
            1 if len > 0 => {
                let i = rng.below(len);
                input[i] = INTERESTING[rng.below(INTERESTING.len())];
            }
            2 => {
                let tok = DICTIONARY[rng.below(DICTIONARY.len())].as_bytes();
                let at = rng.below(len + 1);
                input.splice(at..at, tok.iter().copied());
            }
            3 => {
                let at = rng.below(len + 1);
                let n = 1 + rng.below(8);
                let bytes: Vec<u8> = (0..n).map(|_| rng.next() as u8).collect();
                input.splice(at..at, bytes);
            }
            4 if len > 0 => {
                let a = rng.below(len);
                let b = (a + 1 + rng.below(32)).min(len);
                input.drain(a..b);
            }
            5 if len > 0 => {
                // Repeat a slice (deep nesting, long strings).
                let a = rng.below(len);
                let b = (a + 1 + rng.below(16)).min(len);
                let piece = input[a..b].to_vec();
                let times = 1 + rng.below(64);
                let at = rng.below(input.len() + 1);
                let rep: Vec<u8> = piece
                    .iter()
                    .copied()
                    .cycle()
                    .take(piece.len() * times)
                    .collect();
                input.splice(at..at, rep);
            }
            6 if !pool.is_empty() => {
                let other = &pool[rng.below(pool.len())];
                if !other.is_empty() {
                    let a = rng.below(other.len());
                    let b = (a + 1 + rng.below(64)).min(other.len());
                    let at = rng.below(len + 1);
                    input.splice(at..at, other[a..b].iter().copied());
                }
            }
            7 if len > 0 => input.truncate(rng.below(len)),
            _ if len > 1 => {
                let (a, b) = (rng.below(len), rng.below(len));
                input.swap(a, b);
            }
            _ => input.push(rng.next() as u8),
        }
    }
    input.truncate(max_len);
}

fn files_in(dir: &Path, ext: &[&str], out: &mut Vec<Vec<u8>>) {
    let Ok(rd) = std::fs::read_dir(dir) else {
        return;
    };
    let mut paths: Vec<PathBuf> = rd.filter_map(|e| e.ok().map(|e| e.path())).collect();
    paths.sort();
    for p in paths {
        if p.is_dir() {
            files_in(&p, ext, out);
        } else if ext.is_empty() || p.extension().is_some_and(|x| ext.iter().any(|e| x == *e)) {
            if let Ok(b) = std::fs::read(&p) {
                if b.len() <= 256 * 1024 {
                    out.push(b);
                }
            }
        }
    }
}

/// The seeds of a target: fuzz/seeds/<target>/ (committed), fuzz/corpus/
/// <target>/ (what libFuzzer kept, not committed) and the project's own
/// examples and test data.
fn seeds(target: &str, fuzz_dir: &Path) -> Vec<Vec<u8>> {
    let repo = fuzz_dir.parent().unwrap_or(fuzz_dir);
    let mut out = Vec::new();
    files_in(&fuzz_dir.join("seeds").join(target), &[], &mut out);
    files_in(&fuzz_dir.join("corpus").join(target), &[], &mut out);
    match target {
        "decode" => {
            let mut payloads = Vec::new();
            files_in(&repo.join("tests/data/hostile"), &["json"], &mut payloads);
            // The first byte picks the topic (lib.rs `decode`).
            for (i, p) in payloads.into_iter().enumerate() {
                let mut v = vec![(i % 3) as u8];
                v.extend(p);
                out.push(v);
            }
        }
        "config" => files_in(&repo.join("config_examples"), &["toml"], &mut out),
        "geojson" => files_in(&repo.join("config_examples/areas"), &["geojson"], &mut out),
        "sites" => files_in(&repo.join("config_examples"), &["csv"], &mut out),
        _ => {}
    }
    if out.is_empty() {
        out.push(Vec::new());
    }
    out
}

fn main() {
    let args: Vec<String> = std::env::args().collect();
    let (Some(target), Some(seconds)) =
        (args.get(1), args.get(2).and_then(|s| s.parse::<f64>().ok()))
    else {
        eprintln!("usage: stable-fuzz TARGET SECONDS [SEED]; targets: decode config geojson sites");
        std::process::exit(2);
    };
    let Some(&(_, run)) = outrider_fuzz::TARGETS.iter().find(|(n, _)| n == target) else {
        eprintln!("unknown target {target}");
        std::process::exit(2);
    };
    let seed = args.get(3).and_then(|s| s.parse().ok()).unwrap_or_else(|| {
        use outrider::clock::Clock;
        outrider::clock::SystemClock
            .now()
            .timestamp_nanos_opt()
            .unwrap_or(1) as u64
    }) | 1;
    let fuzz_dir = PathBuf::from(env!("CARGO_MANIFEST_DIR"));
    let artifacts = fuzz_dir.join("artifacts").join(target);
    let max_len = if target == "decode" {
        70 * 1024
    } else {
        64 * 1024
    };

    // A panic is what we look for: record its message instead of printing it.
    let last_panic = std::sync::Arc::new(std::sync::Mutex::new(String::new()));
    {
        let last = last_panic.clone();
        std::panic::set_hook(Box::new(move |info| {
            let at = info
                .location()
                .map(|l| format!(" at {}:{}", l.file(), l.line()))
                .unwrap_or_default();
            let msg = info
                .payload()
                .downcast_ref::<&str>()
                .map(|s| s.to_string())
                .or_else(|| info.payload().downcast_ref::<String>().cloned())
                .unwrap_or_default();
            if let Ok(mut l) = last.lock() {
                *l = format!("{msg}{at}");
            }
        }));
    }

    let mut rng = Rng(seed);
    let mut pool = seeds(target, &fuzz_dir);
    let mut outcomes: BTreeSet<String> = BTreeSet::new();
    let mut crashes: BTreeMap<String, PathBuf> = BTreeMap::new();
    let mut execs: u64 = 0;
    let started = Instant::now();
    let limit = Duration::from_secs_f64(seconds);
    // The seeds themselves first.
    let mut queue: Vec<Vec<u8>> = pool.clone();
    while started.elapsed() < limit {
        let input = match queue.pop() {
            Some(i) => i,
            None => {
                let mut i = pool[rng.below(pool.len())].clone();
                mutate(&mut rng, &mut i, &pool, max_len);
                i
            }
        };
        execs += 1;
        match catch_unwind(AssertUnwindSafe(|| run(&input))) {
            Ok(outcome) => {
                if outcomes.insert(outcome) && pool.len() < 4096 {
                    pool.push(input);
                }
            }
            Err(_) => {
                let msg = last_panic.lock().map(|m| m.clone()).unwrap_or_default();
                if let std::collections::btree_map::Entry::Vacant(slot) = crashes.entry(msg) {
                    let mut h = std::collections::hash_map::DefaultHasher::new();
                    input.hash(&mut h);
                    let _ = std::fs::create_dir_all(&artifacts);
                    let path = artifacts.join(format!("crash-{:016x}", h.finish()));
                    let _ = std::fs::write(&path, &input);
                    eprintln!("crash: {}\n  input: {}", slot.key(), path.display());
                    slot.insert(path);
                }
            }
        }
    }
    let secs = started.elapsed().as_secs_f64();
    println!(
        "{}",
        serde_json::json!({
            "target": target,
            "runner": "stable (random mutation, no coverage)",
            "seconds": (secs * 10.0).round() / 10.0,
            "execs": execs,
            "execs_per_second": (execs as f64 / secs).round(),
            "pool": pool.len(),
            "outcomes": outcomes.len(),
            "crashes": crashes.len(),
            "seed": seed,
        })
    );
    if !crashes.is_empty() {
        std::process::exit(1);
    }
}
