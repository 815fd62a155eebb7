//! `outrider check`: a summary of a valid configuration for people: the
//! sites, the subscribers, and which sites each subscriber's area covers,
//! with the distance a notice would show.

use crate::config::{AreaSpec, Config};
use std::fmt::Write;

pub fn summary(cfg: &Config) -> String {
    // The same coverage the engine matches events with.
    let rules = crate::engine::rules::RuleBook::compile(cfg);
    let mut o = String::new();
    let _ = writeln!(o, "configuration {} is valid", cfg.path.display());
    let _ = writeln!(
        o,
        "broker        {}{}",
        cfg.mqtt.url,
        if cfg.broker.is_some() {
            " (embedded)"
        } else {
            ""
        }
    );
    let _ = writeln!(o, "state         {}", cfg.service.state_dir.display());
    let _ = writeln!(
        o,
        "sites         {} from {}",
        cfg.sites.sites.len(),
        cfg.sites.file.display()
    );
    let _ = writeln!(o, "subscribers   {}", cfg.subscribers.len());
    for w in &cfg.warnings {
        let _ = writeln!(o, "warning       {w}");
    }
    for (si, s) in cfg.subscribers.iter().enumerate() {
        let _ = writeln!(o);
        let _ = writeln!(
            o,
            "{} ({}), {} watch{}, digest at {} {}",
            s.id,
            s.name,
            s.watches.len(),
            if s.watches.len() == 1 { "" } else { "es" },
            s.digest_at.format("%H:%M"),
            s.timezone
        );
        let area = match &s.area_spec {
            AreaSpec::All => "all sites".to_string(),
            AreaSpec::Sites(l) => format!("sites {}", l.join(", ")),
            AreaSpec::Circle {
                lat,
                lon,
                radius_km,
            } => format!("{radius_km} km around {lat}, {lon}"),
            AreaSpec::GeoJson { file, buffer_km } => {
                format!("polygon {} + {buffer_km} km", file.display())
            }
        };
        let _ = writeln!(o, "  area: {area}");
        // Index order is the sites file's order.
        let cov = rules.sites_of(si);
        if cov.is_empty() {
            let _ = writeln!(
                o,
                "  covers: no site (this subscriber would receive no detection notices)"
            );
        } else {
            let list: Vec<String> = cov
                .iter()
                .map(|&i| {
                    let i = i as usize;
                    let id = &cfg.sites.sites[i].deployment_id;
                    let d = rules.distance_km(&s.area, i);
                    if matches!(
                        s.area_spec,
                        AreaSpec::Circle { .. } | AreaSpec::GeoJson { .. }
                    ) {
                        format!("{id} ({d:.2} km)")
                    } else {
                        id.clone()
                    }
                })
                .collect();
            let _ = writeln!(
                o,
                "  covers {} site{}: {}",
                cov.len(),
                if cov.len() == 1 { "" } else { "s" },
                list.join(", ")
            );
        }
        for w in &s.watches {
            let species: Vec<&str> = w.species.iter().map(String::as_str).collect();
            let ch: Vec<&str> = w.channels.iter().map(|c| c.as_str()).collect();
            let _ = writeln!(
                o,
                "  watch \"{}\": {} {} hours {}{} -> {}",
                w.name,
                w.trigger.as_str(),
                if species.is_empty() {
                    "(any camera)".to_string()
                } else {
                    species.join(", ")
                },
                w.hours,
                w.season
                    .as_ref()
                    .map(|s| format!(" season {s}"))
                    .unwrap_or_default(),
                ch.join(", ")
            );
        }
    }
    o
}
