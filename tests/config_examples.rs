//! Every file in config_examples/ passes `outrider check`, and a broken
//! configuration reports each of its problems with file:line.

use crate::util::{repo, BIN};
use std::process::Command;

#[test]
fn every_example_passes_check() {
    let dir = repo().join("config_examples");
    let mut checked = 0;
    for entry in std::fs::read_dir(&dir).unwrap() {
        let path = entry.unwrap().path();
        if path.extension().is_some_and(|e| e == "toml") {
            let out = Command::new(BIN)
                .args(["check", "-c"])
                .arg(&path)
                // The examples name these variables for their secrets.
                .env("OUTRIDER_SMTP_PASSWORD", "example")
                .env("OUTRIDER_HOOK_SECRET", "example")
                .env("OUTRIDER_MQTT_PASSWORD", "example")
                .env(
                    "OUTRIDER_ADMIN_TOKEN",
                    "example-admin-token-0123456789abcdef",
                )
                .output()
                .unwrap();
            let stdout = String::from_utf8_lossy(&out.stdout);
            assert!(
                out.status.success(),
                "{} failed check:\n{}",
                path.display(),
                String::from_utf8_lossy(&out.stderr)
            );
            assert!(stdout.contains("is valid"), "{stdout}");
            assert!(stdout.contains("sites         16"), "{stdout}");
            checked += 1;
        }
    }
    assert!(
        checked >= 4,
        "expected at least four examples, found {checked}"
    );
}

#[test]
fn check_prints_covered_sites_with_distances() {
    let out = Command::new(BIN)
        .args(["check", "-c"])
        .arg(repo().join("config_examples/kellerby-basin.toml"))
        .output()
        .unwrap();
    let stdout = String::from_utf8_lossy(&out.stdout);
    // Stonecroft's 6 km circle covers KB-06 only; its distance is geodesic
    // (the value is checked against geographiclib in the geography tests).
    assert!(
        stdout.contains("covers 1 site: KB-06 (0.24 km)"),
        "{stdout}"
    );
    assert!(
        stdout.contains("covers 4 sites: KB-07, KB-08, KB-11, KB-12"),
        "{stdout}"
    );
    assert!(stdout.contains("covers 16 sites"), "{stdout}");
}

#[test]
fn a_broken_config_reports_every_problem_with_file_and_line() {
    let dir = tempfile::tempdir().unwrap();
    std::fs::write(dir.path().join("sites.csv"), "deploymentID,latitude,longitude,deploymentStart\nKB-01,-31.5,148.0,2026-01-01T00:00:00+11:00\nKB-02,-95,148.0,2026-01-01T00:00:00+11:00\n").unwrap();
    let cfg = dir.path().join("bad.toml");
    std::fs::write(
        &cfg,
        "[service]\ntimezone = \"Mars/Olympus\"\n[sites]\nfile = \"sites.csv\"\n[[subscriber]]\nid = \"x\"\narea = { lat = -31.5, lon = 148.0, radius_km = -1 }\n[[subscriber.watch]]\ntrigger = \"presence\"\nspecies = [\"Vulpes vulpes\"]\nmin_probability = 1.3\nchannels = [\"email\"]\n",
    )
    .unwrap();
    for cmd in ["check", "run"] {
        let out = Command::new(BIN)
            .args([cmd, "-c"])
            .arg(&cfg)
            .output()
            .unwrap();
        assert!(!out.status.success(), "{cmd} must refuse a broken config");
        let err = String::from_utf8_lossy(&out.stderr);
        let f = cfg.display().to_string();
        for want in [
            format!("{f}:2:12: service.timezone: `Mars/Olympus` is not a known time zone"),
            format!("{f}:7:48: subscriber[1].area.radius_km: -1 is out of range"),
            format!("{f}:11:19: subscriber[1].watch[1].min_probability: 1.3 is out of range"),
            format!("{f}:12:13: subscriber[1].watch[1].channels: `email`: the subscriber has no email address"),
        ] {
            assert!(err.contains(&want), "{cmd}: missing\n  {want}\nin\n{err}");
        }
        // The sites file's bad row is named by its own file and line.
        assert!(
            err.contains(&format!(
                "{}:3:1: latitude: -95 is out of range",
                dir.path().join("sites.csv").display()
            )),
            "{err}"
        );
    }
}
