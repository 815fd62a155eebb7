//! Config validation: good files load, bad ones report every problem with
//! file:line:col and a hint.

use super::*;
use std::collections::HashMap;

const SITES: &str = "deploymentID,latitude,longitude,deploymentStart,deploymentEnd\nKB-01,-31.56,148.05,2026-01-01T00:00:00+11:00,\nKB-02,-31.64,148.14,2026-01-01T00:00:00+11:00,\n";

fn parse_with(src: &str, env: &[(&str, &str)]) -> Result<Config, ConfigErrors> {
    let env: HashMap<String, String> = env
        .iter()
        .map(|(k, v)| (k.to_string(), v.to_string()))
        .collect();
    let files = Files {
        read: &|p: &Path| {
            if p.ends_with("sites.csv") {
                Ok(SITES.to_string())
            } else if p.ends_with("open.geojson") {
                Ok(r#"{"type":"Polygon","coordinates":[[[148.0,-31.5],[148.1,-31.5],[148.1,-31.6],[148.0,-31.6]]]}"#.to_string())
            } else if p.ends_with("broken.geojson") {
                Ok(
                    "{\n  \"type\": \"Polygon\",\n  \"coordinates\": [[[148.0, -31.5],]]\n}"
                        .to_string(),
                )
            } else if p.ends_with("paddock.geojson") {
                Ok(r#"{"type":"Polygon","coordinates":[[[148.0,-31.5],[148.1,-31.5],[148.1,-31.6],[148.0,-31.6],[148.0,-31.5]]]}"#.to_string())
            } else if p.ends_with("secret.txt") {
                Ok("s3cret\n".to_string())
            } else {
                Err(std::io::Error::new(
                    std::io::ErrorKind::NotFound,
                    "no such file",
                ))
            }
        },
        env: &move |k: &str| env.get(k).cloned(),
    };
    parse(Path::new("/etc/outrider/outrider.toml"), src, &[], &files)
}

fn errors(src: &str) -> Vec<ConfigError> {
    match parse_with(src, &[]) {
        Ok(_) => panic!("expected errors"),
        Err(e) => e.0,
    }
}

const GOOD: &str = r#"
[service]
state_dir = "state"
timezone = "Australia/Sydney"

[sites]
file = "sites.csv"

[species.groups]
predators = ["Canis familiaris", "Vulpes vulpes"]

[species.aliases]
"Canis lupus dingo" = "Canis familiaris"

[smtp]
host = "127.0.0.1"
security = "none"
from = "outrider <n@kellerby.example>"

[[subscriber]]
id = "stonecroft"
email = "owner@stonecroft.example"
area = { lat = -31.56, lon = 148.05, radius_km = 6.0 }

  [[subscriber.watch]]
  trigger = "presence"
  species = ["@predators", "Canis lupus dingo", "Sus scrofa"]
  hours = "dusk-to-dawn"
  channels = ["email"]
"#;

#[test]
fn a_good_file_loads_with_defaults_filled_in() {
    let cfg = parse_with(GOOD, &[]).expect("valid");
    assert_eq!(cfg.service.state_dir, Path::new("/etc/outrider/state"));
    assert_eq!(cfg.service.timezone, chrono_tz::Australia::Sydney);
    assert_eq!(cfg.sites.sites.len(), 2);
    assert_eq!(cfg.sites.silence_hours, 36.0);
    assert_eq!(cfg.detection.independence_minutes, 30);
    assert_eq!(cfg.mqtt.client_id, "outrider");
    let s = &cfg.subscribers[0];
    assert_eq!(s.name, "stonecroft");
    assert_eq!(
        s.timezone,
        chrono_tz::Australia::Sydney,
        "inherits [service] timezone"
    );
    let w = &s.watches[0];
    let species: Vec<&str> = w.species.iter().map(String::as_str).collect();
    assert_eq!(
        species,
        vec!["Canis familiaris", "Sus scrofa", "Vulpes vulpes"],
        "group expanded, alias resolved, deduplicated"
    );
    assert_eq!(w.min_probability, 0.8, "default from [detection]");
}

#[test]
fn every_problem_is_reported_at_once_with_its_place() {
    let src = r#"[service]
timezone = "Australia/Kellerby"

[sites]
file = "sites.csv"
silence_hour = 36

[detection]
min_probability = 1.3

[[subscriber]]
id = "a"
area = { lat = -31.5, lon = 148.0, radius_km = -1 }

  [[subscriber.watch]]
  trigger = "presence"
  species = ["Vulpes vulpes"]

  [[subscriber.watch]]
  trigger = "presence"
  species = ["Vulpes vulpes"]
  channels = ["email"]
"#;
    let errs = errors(src);
    let got: Vec<(usize, usize, &str)> = errs
        .iter()
        .map(|e| (e.line, e.col, e.key.as_str()))
        .collect();
    assert_eq!(
        got,
        vec![
            (2, 12, "service.timezone"),
            (6, 1, "sites.silence_hour"),
            (9, 19, "detection.min_probability"),
            (13, 48, "subscriber[1].area.radius_km"),
            (15, 3, "subscriber[1].watch[1].channels"),
            (22, 15, "subscriber[1].watch[2].channels"),
        ],
        "{errs:#?}"
    );
    let text: Vec<String> = errs.iter().map(|e| e.to_string()).collect();
    assert!(text[0].starts_with("/etc/outrider/outrider.toml:2:12: service.timezone: `Australia/Kellerby` is not a known time zone (hint:"), "{}", text[0]);
    assert!(
        text[1].contains("did you mean `silence_hours`?"),
        "{}",
        text[1]
    );
    assert!(text[3].contains("-1 is out of range"), "{}", text[3]);
    assert!(text[4].contains("is required but missing"), "{}", text[4]);
    assert!(text[5].contains("no email address"), "{}", text[5]);
}

#[test]
fn wrong_types_name_what_was_expected() {
    let errs = errors("[sites]\nfile = 3\n[detection]\nindependence_minutes = \"30\"\n");
    assert_eq!(errs.len(), 2, "{errs:#?}");
    assert_eq!((errs[0].line, errs[0].key.as_str()), (2, "sites.file"));
    assert!(errs[0]
        .message
        .contains("expected a string, found an integer"));
    assert_eq!(
        (errs[1].line, errs[1].key.as_str()),
        (4, "detection.independence_minutes")
    );
}

#[test]
fn unknown_sections_and_bad_toml_are_caught() {
    let errs = errors("[sites]\nfile = \"sites.csv\"\n[smpt]\nhost = \"x\"\n");
    assert_eq!(errs.len(), 1);
    assert_eq!(errs[0].key, "smpt");
    assert_eq!(errs[0].hint.as_deref(), Some("did you mean `smtp`?"));

    let errs = errors("[sites\nfile = 1\n");
    assert_eq!(errs[0].line, 1);
    assert!(errs[0].message.starts_with("not valid TOML"), "{}", errs[0]);
}

#[test]
fn secrets_come_only_from_the_environment_or_a_file() {
    let base = "[sites]\nfile = \"sites.csv\"\n[mqtt]\nusername = \"outrider\"\n";
    let errs = errors(&format!("{base}password = \"hunter2\"\n"));
    assert_eq!(errs.len(), 1);
    assert!(errs[0]
        .message
        .contains("secrets are not written in the configuration file"));
    assert!(
        !errs[0].to_string().contains("hunter2"),
        "the secret must not be echoed"
    );

    let errs = errors(&format!("{base}password_env = \"OUTRIDER_TEST_UNSET\"\n"));
    assert!(errs[0].message.contains("OUTRIDER_TEST_UNSET is not set"));

    let cfg = parse_with(
        &format!("{base}password_env = \"PW\"\n"),
        &[("PW", "from-env")],
    )
    .expect("valid");
    assert_eq!(
        cfg.mqtt.password.as_ref().map(Secret::expose),
        Some("from-env")
    );
    assert_eq!(format!("{:?}", cfg.mqtt.password), "Some(Secret(***))");

    let cfg = parse_with(&format!("{base}password_file = \"secret.txt\"\n"), &[]).expect("valid");
    assert_eq!(
        cfg.mqtt.password.as_ref().map(Secret::expose),
        Some("s3cret")
    );
    // A relative path is read beside the config file (DESIGN.md: relative
    // paths are relative to the config file), not from the working directory.
    assert_eq!(
        cfg.secret_files,
        vec![(
            "mqtt.password_file".to_string(),
            Path::new("/etc/outrider/secret.txt").to_path_buf()
        )]
    );
}

#[test]
fn channel_and_area_rules() {
    let sub = |area: &str, watch: &str| {
        format!("[sites]\nfile = \"sites.csv\"\n[[subscriber]]\nid = \"x\"\nemail = \"x@y.example\"\narea = {area}\n[[subscriber.watch]]\n{watch}\n")
    };
    // An email channel without [smtp] or [email_folder].
    let errs = errors(&sub(
        "\"all\"",
        "trigger = \"silence\"\nchannels = [\"email\"]",
    ));
    assert!(errs[0].message.contains("no [smtp]"), "{}", errs[0]);
    // A webhook channel without a webhook.
    let errs = errors(&sub(
        "\"all\"",
        "trigger = \"silence\"\nchannels = [\"webhook\"]",
    ));
    assert!(errs[0].message.contains("no webhook"), "{}", errs[0]);
    // An undefined group and a ratio on a presence watch.
    let errs = errors(&sub(
        "\"all\"",
        "trigger = \"presence\"\nspecies = [\"@dogs\"]\nratio = 2.0\nchannels = [\"mqtt\"]",
    ));
    let msgs: Vec<&str> = errs.iter().map(|e| e.message.as_str()).collect();
    assert_eq!(
        msgs,
        vec![
            "group `@dogs` is not defined",
            "applies only to spike and build-up watches, not presence"
        ]
    );
    // A site list naming a deployment the sites file does not have.
    let errs = errors(&sub(
        "{ sites = [\"KB-01\", \"KB-99\"] }",
        "trigger = \"silence\"\nchannels = [\"mqtt\"]",
    ));
    assert_eq!(errs.len(), 1, "{errs:?}");
    assert!(
        errs[0].message.contains("`KB-99` is not a deploymentID"),
        "{errs:?}"
    );
    // Latitude out of range in a circle.
    let errs = errors(&sub(
        "{ lat = 148.0, lon = -31.5, radius_km = 5 }",
        "trigger = \"silence\"\nchannels = [\"mqtt\"]",
    ));
    assert!(
        errs[0]
            .hint
            .as_deref()
            .is_some_and(|h| h.contains("swapped")),
        "{errs:?}"
    );
}

#[test]
fn embedded_broker_beyond_loopback_needs_a_password() {
    let errs = errors(
        "[sites]\nfile = \"sites.csv\"\n[broker]\nembedded = true\nlisten = \"0.0.0.0:1883\"\n",
    );
    assert!(errs[0].message.contains("without a password"), "{errs:?}");
    let ok = parse_with("[sites]\nfile = \"sites.csv\"\n[broker]\nembedded = true\nlisten = \"0.0.0.0:1883\"\nusername = \"u\"\npassword_env = \"BP\"\n", &[("BP", "x")]);
    assert!(ok.is_ok());
}

#[test]
fn scientific_names() {
    for good in [
        "Canis familiaris",
        "Sus scrofa",
        "Canis lupus dingo",
        "Macropus",
    ] {
        assert!(looks_like_scientific_name(good), "{good}");
    }
    for bad in [
        "canis familiaris",
        "wild dog",
        "Canis Familiaris",
        "Canis  familiaris",
        "",
        "C",
        "Sus scrofa\n",
    ] {
        assert!(!looks_like_scientific_name(bad), "{bad:?}");
    }
}

mod properties {
    use super::*;
    use proptest::prelude::*;

    proptest! {
        /// Arbitrary text never panics the loader: it either loads or
        /// reports errors that each point inside the file.
        #[test]
        fn arbitrary_text_never_panics(src in "(?s).{0,400}") {
            if let Err(e) = parse_with(&src, &[]) {
                let lines = src.lines().count().max(1) + 1;
                for err in e.0 {
                    prop_assert!(err.line <= lines);
                }
            }
        }

        /// Mutations of a good file never panic either.
        #[test]
        fn mutated_good_file_never_panics(pos in 0usize..GOOD.len(), insert in "[\\[\\]=\"a-z0-9 .\n-]{0,6}") {
            let mut s = GOOD.to_string();
            let p = (0..=pos).rev().find(|p| s.is_char_boundary(*p)).unwrap_or(0);
            s.insert_str(p, &insert);
            let _ = parse_with(&s, &[]);
        }
    }
}

#[test]
fn geojson_areas_are_read_and_their_faults_name_the_file() {
    let sub = |area: &str| {
        format!("[sites]\nfile = \"sites.csv\"\n[[subscriber]]\nid = \"x\"\narea = {area}\n")
    };
    let cfg = parse_with(
        &sub("{ geojson = \"areas/paddock.geojson\", buffer_km = 1.0 }"),
        &[],
    )
    .expect("valid");
    assert!(matches!(cfg.subscribers[0].area, Area::Polygon(_)));

    let errs = errors(&sub("{ geojson = \"areas/open.geojson\" }"));
    assert_eq!(errs.len(), 1, "{errs:?}");
    assert!(errs[0].file.ends_with("areas/open.geojson"), "{errs:?}");
    assert!(errs[0].message.contains("not closed"), "{}", errs[0]);
    assert!(
        errs[0]
            .hint
            .as_deref()
            .is_some_and(|h| h.contains("outrider.toml:5:8")),
        "{:?}",
        errs[0].hint
    );

    // Invalid JSON: the line and column inside the GeoJSON file.
    let errs = errors(&sub("{ geojson = \"areas/broken.geojson\" }"));
    assert_eq!((errs[0].line, errs[0].col > 0), (3, true), "{errs:?}");

    let errs = errors(&sub("{ geojson = \"areas/missing.geojson\" }"));
    assert!(errs[0].message.contains("cannot read"), "{errs:?}");
}

#[test]
fn hours_seasons_and_quiet_hours_use_the_calendar_parsers() {
    let sub = |sub_extra: &str, watch: &str| {
        format!("[sites]\nfile = \"sites.csv\"\n[[subscriber]]\nid = \"x\"\narea = \"all\"\n{sub_extra}\n[[subscriber.watch]]\ntrigger = \"silence\"\nchannels = [\"mqtt\"]\n{watch}\n")
    };
    let cfg = parse_with(
        &sub(
            "quiet_hours = \"21:30-05:00\"",
            "hours = \"dusk-to-dawn\"\nseason = \"12-01..02-28\"",
        ),
        &[],
    )
    .expect("valid");
    let s = &cfg.subscribers[0];
    assert!(s.quiet_hours.is_some());
    assert_eq!(s.watches[0].hours, crate::calendar::Hours::DuskToDawn);
    assert!(s.watches[0].season.is_some());
    for (extra, watch, key) in [
        (
            "quiet_hours = \"dusk-to-dawn\"",
            "",
            "subscriber[1].quiet_hours",
        ),
        (
            "quiet_hours = \"25:00-05:00\"",
            "",
            "subscriber[1].quiet_hours",
        ),
        ("", "hours = \"night\"", "subscriber[1].watch[1].hours"),
        (
            "",
            "hours = \"06:00-06:00\"",
            "subscriber[1].watch[1].hours",
        ),
        (
            "",
            "season = \"13-01..02-01\"",
            "subscriber[1].watch[1].season",
        ),
    ] {
        let errs = errors(&sub(extra, watch));
        assert_eq!(errs.len(), 1, "{extra} {watch}: {errs:?}");
        assert_eq!(errs[0].key, key);
        assert!(errs[0].hint.is_some());
    }
}

#[test]
fn webhook_and_mqtt_formats() {
    // The CAP format option (docs/interchange.md): json by default, cap on
    // request, anything else an error at its file:line.
    let sub = |keys: &str| {
        format!("[sites]\nfile = \"sites.csv\"\n[[subscriber]]\nid = \"x\"\narea = \"all\"\n{keys}\n[[subscriber.watch]]\ntrigger = \"silence\"\nchannels = [\"webhook\", \"mqtt\"]\n")
    };
    let cfg = parse_with(
        &sub("webhook = { url = \"https://hooks.stonecroft.example/in\", format = \"cap\" }\nmqtt = { format = \"cap\" }"),
        &[],
    )
    .unwrap();
    assert_eq!(cfg.subscribers[0].webhook_format, NoticeFormat::Cap);
    assert_eq!(cfg.subscribers[0].mqtt_format, NoticeFormat::Cap);
    let cfg = parse_with(
        &sub("webhook = { url = \"https://hooks.stonecroft.example/in\" }"),
        &[],
    )
    .unwrap();
    assert_eq!(cfg.subscribers[0].webhook_format, NoticeFormat::Json);
    assert_eq!(cfg.subscribers[0].mqtt_format, NoticeFormat::Json);
    let errs = errors(&sub(
        "webhook = { url = \"https://hooks.stonecroft.example/in\", format = \"xml\" }\nmqtt = { format = \"cap\", topic = \"x\" }",
    ));
    assert_eq!(errs.len(), 2, "{errs:?}");
    assert_eq!(
        (errs[0].line, errs[0].key.as_str()),
        (6, "subscriber[1].webhook.format"),
        "{}",
        errs[0]
    );
    assert!(
        errs[0].message.contains("`xml` is not a notice format"),
        "{}",
        errs[0]
    );
    assert!(errs[0].hint.as_deref().unwrap_or("").contains("cap"));
    assert_eq!(errs[1].line, 7, "{}", errs[1]);
    assert!(
        errs[1].key.ends_with("mqtt.topic") && errs[1].message.contains("unknown key"),
        "{}",
        errs[1]
    );
}

#[test]
fn delivery_retry_settings_default_to_the_design_and_can_be_set() {
    // DESIGN.md "Delivery": 1 min doubling to 1 h, give up after 24 h.
    let cfg = parse_with(GOOD, &[]).unwrap();
    assert_eq!(cfg.delivery, Delivery::default());
    assert_eq!(
        (
            cfg.delivery.retry_first_seconds,
            cfg.delivery.retry_max_seconds,
            cfg.delivery.give_up_hours
        ),
        (60, 3600, 24)
    );
    let src = format!("{GOOD}\n[delivery]\nretry_first_seconds = 5\nretry_max_seconds = 300\ngive_up_hours = 48\n");
    let cfg = parse_with(&src, &[]).unwrap();
    assert_eq!(
        cfg.delivery,
        Delivery {
            retry_first_seconds: 5,
            retry_max_seconds: 300,
            give_up_hours: 48
        }
    );
}

#[test]
fn delivery_errors_name_the_line_and_unknown_keys_are_refused() {
    // [delivery] starts on the line after GOOD's last one.
    let base = GOOD.lines().count() + 1;
    let src = format!("{GOOD}[delivery]\nretry_first_seconds = 0\nretry_max_seconds = \"an hour\"\ngive_up_after = 24\n");
    let e = errors(&src);
    let keys: Vec<(&str, usize)> = e.iter().map(|e| (e.key.as_str(), e.line)).collect();
    assert!(
        keys.contains(&("delivery.retry_first_seconds", base + 1)),
        "{e:?}"
    );
    assert!(
        keys.contains(&("delivery.retry_max_seconds", base + 2)),
        "{e:?}"
    );
    assert!(
        keys.contains(&("delivery.give_up_after", base + 3)),
        "{e:?}"
    );
    assert!(e
        .iter()
        .all(|e| e.file == Path::new("/etc/outrider/outrider.toml")));

    let src = format!("{GOOD}[delivery]\nretry_first_seconds = 600\nretry_max_seconds = 60\n");
    let e = errors(&src);
    assert_eq!(e.len(), 1, "{e:?}");
    assert_eq!(
        (e[0].key.as_str(), e[0].line),
        ("delivery.retry_max_seconds", base + 2)
    );
    assert!(e[0]
        .hint
        .as_deref()
        .unwrap_or("")
        .contains("at least the first wait"));
}

#[test]
fn urls_that_carry_a_secret_of_their_own() {
    assert!(url_holds_secret("https://hooks.example.org/in?token=abc"));
    assert!(url_holds_secret("https://user:pw@hooks.example.org/in"));
    assert!(!url_holds_secret("https://hooks.example.org/outrider"));
    // An @ in the path is not a user part.
    assert!(!url_holds_secret("https://hooks.example.org/to/a@b"));
}

#[test]
fn world_readable_secrets_are_warned_about_and_private_ones_are_not() {
    let src = GOOD
        .replace(
            "from = \"outrider <n@kellerby.example>\"",
            "from = \"outrider <n@kellerby.example>\"\nusername = \"n\"\npassword_file = \"/etc/outrider/secret.txt\"",
        )
        .replace(
            "area = { lat = -31.56, lon = 148.05, radius_km = 6.0 }",
            "area = { lat = -31.56, lon = 148.05, radius_km = 6.0 }\nwebhook = { url = \"https://hooks.kellerby.example/in?token=t0ken\" }",
        );
    let cfg = parse_with(&src, &[]).unwrap();
    assert_eq!(
        cfg.secret_files,
        [(
            "smtp.password_file".to_string(),
            PathBuf::from("/etc/outrider/secret.txt")
        )]
    );
    assert_eq!(cfg.secrets_in_text.len(), 1);
    let modes = |open: u32| move |_p: &Path| Some(open);
    let w = permission_warnings(&cfg, &modes(0o644));
    assert_eq!(w.len(), 2, "{w:?}");
    assert!(w[0].starts_with("smtp.password_file: the secret file /etc/outrider/secret.txt is readable by every user on this machine (mode 0644)"), "{}", w[0]);
    assert!(w[1].starts_with("/etc/outrider/outrider.toml is readable by every user on this machine (mode 0644) and holds a secret (subscriber `stonecroft` webhook.url"), "{}", w[1]);
    assert!(
        !w.iter()
            .any(|w| w.contains("t0ken") || w.contains("s3cret")),
        "no secret in a warning"
    );
    assert!(permission_warnings(&cfg, &modes(0o640)).is_empty());
    assert!(permission_warnings(&cfg, &modes(0o600)).is_empty());
    // Without a secret in the text, a readable config is nothing to warn about.
    let plain = parse_with(GOOD, &[]).unwrap();
    assert!(permission_warnings(&plain, &modes(0o644)).is_empty());
}

#[test]
fn web_serves_only_when_listen_is_set_and_takes_an_admin_token_from_the_environment() {
    let cfg = parse_with(GOOD, &[]).unwrap();
    assert_eq!(cfg.web.listen, None, "no [web] listen: nothing served");
    let token = "0123456789abcdef0123456789abcdef";
    let src = format!(
        "{GOOD}\n[web]\nlisten = \"0.0.0.0:8080\"\nadmin_token_env = \"OUTRIDER_ADMIN_TOKEN\"\n"
    );
    let cfg = parse_with(&src, &[("OUTRIDER_ADMIN_TOKEN", token)]).unwrap();
    assert_eq!(cfg.web.listen, Some("0.0.0.0:8080".parse().unwrap()));
    assert_eq!(
        cfg.web.admin_token.as_ref().map(Secret::expose),
        Some(token)
    );
    assert!(!format!("{:?}", cfg.web).contains(token), "never printed");
}

#[test]
fn a_short_or_missing_admin_token_is_reported_at_its_line() {
    // Appended after GOOD, whose last line is line 29 of the text.
    let lines = GOOD.lines().count();
    let src = format!(
        "{GOOD}[web]\nlisten = \"0.0.0.0:8080\"\nadmin_token_env = \"OUTRIDER_ADMIN_TOKEN\"\n"
    );
    let errs = match parse_with(&src, &[("OUTRIDER_ADMIN_TOKEN", "short")]) {
        Ok(_) => panic!("a 5-byte token must be refused"),
        Err(e) => e.0,
    };
    assert_eq!(errs.len(), 1, "{errs:?}");
    assert_eq!(errs[0].key, "web.admin_token_env");
    assert_eq!(errs[0].line, lines + 3, "{}", errs[0]);
    assert!(errs[0].message.contains("at least 32"), "{}", errs[0]);
    assert!(errs[0].hint.is_some());
    // Unset variable: the general secret rule, also with its line.
    let errs = match parse_with(&src, &[]) {
        Ok(_) => panic!("an unset variable must be refused"),
        Err(e) => e.0,
    };
    assert!(errs[0].message.contains("is not set"), "{}", errs[0]);
    assert_eq!(errs[0].line, lines + 3);
    // A bad address.
    let errs = errors(&format!("{GOOD}[web]\nlisten = \"localhost\"\n"));
    assert_eq!(errs[0].key, "web.listen");
    assert_eq!(errs[0].line, lines + 2);
}
