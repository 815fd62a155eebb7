//! The `outrider` binary: parses the command line, sets up logging, runs the
//! command, and turns an error into a message and exit code 2.

use clap::Parser;
use outrider::cli::{Cli, Command};
use outrider::clock::{Clock, SystemClock};
use std::process::ExitCode;

fn main() -> ExitCode {
    let cli = Cli::parse();
    outrider::telemetry::init(cli.log_format);
    // One TLS provider for every crate (see Cargo.toml).
    let _ = rustls::crypto::ring::default_provider().install_default();
    match run(cli.command) {
        Ok(code) => code,
        Err(err) => {
            eprintln!("outrider: {err:#}");
            ExitCode::from(2)
        }
    }
}

fn runtime() -> anyhow::Result<tokio::runtime::Runtime> {
    Ok(tokio::runtime::Builder::new_multi_thread()
        .enable_all()
        .build()?)
}

fn load(path: &std::path::Path) -> anyhow::Result<outrider::config::Config> {
    outrider::config::load(path).map_err(|e| anyhow::anyhow!("{e}"))
}

fn run(cmd: Command) -> anyhow::Result<ExitCode> {
    match cmd {
        Command::Run(a) => {
            let cfg = load(&a.config)?;
            runtime()?.block_on(outrider::app::run(
                cfg,
                std::sync::Arc::new(SystemClock),
                outrider::app::shutdown_signal(),
                |_| {},
            ))?;
        }
        Command::Demo {
            state_dir,
            speed,
            duration,
            web,
        } => {
            if !(speed.is_finite() && speed > 0.0) {
                anyhow::bail!(
                    "--speed must be a positive number of simulated seconds per real second"
                );
            }
            let opts = outrider::demo::DemoOptions {
                state_dir,
                speed,
                duration_seconds: duration,
                web,
                history_days: 35,
            };
            runtime()?.block_on(outrider::demo::run(opts, SystemClock.now()))?;
        }
        Command::Check(a) => match outrider::config::load(&a.config) {
            Ok(cfg) => print!("{}", outrider::check::summary(&cfg)),
            Err(e) => {
                eprint!("{e}");
                return Ok(ExitCode::from(1));
            }
        },
        Command::Status {
            config,
            state_dir,
            json,
        } => {
            let (dir, cfg) = match (config, state_dir) {
                (Some(c), _) => {
                    let cfg = load(&c)?;
                    (cfg.service.state_dir.clone(), Some(cfg))
                }
                (None, Some(d)) => {
                    let beside = d.join("outrider.toml");
                    let cfg = if beside.exists() {
                        outrider::config::load(&beside).ok()
                    } else {
                        None
                    };
                    (d, cfg)
                }
                (None, None) => anyhow::bail!("give -c FILE or --state-dir DIR"),
            };
            let now = outrider::status::effective_now(&dir, SystemClock.now());
            let s = outrider::status::read(&dir, cfg.as_ref(), now)?;
            if json {
                println!("{}", serde_json::to_string_pretty(&s)?);
            } else {
                print!("{}", outrider::status::render_text(&s));
            }
        }
        Command::Rebuild(a) => {
            let cfg = load(&a.config)?;
            let mut db = outrider::store::sqlite::Sqlite::open(
                &cfg.service.state_dir,
                outrider::store::sqlite::Durability::Full,
            )?;
            let started = std::time::Instant::now();
            let (read, written) = db.rebuild_events(chrono::Duration::minutes(i64::from(
                cfg.detection.independence_minutes,
            )))?;
            println!(
                "rebuilt {written} independent events from {read} observations in {:.2} s",
                started.elapsed().as_secs_f64()
            );
        }
        Command::Digest {
            config,
            subscriber,
            at,
            out,
        } => {
            let cfg = load(&config)?;
            let due = at
                .map(|t| {
                    chrono::DateTime::parse_from_rfc3339(&t)
                        .map(|t| t.with_timezone(&chrono::Utc))
                        .map_err(|e| anyhow::anyhow!("--at {t:?} is not an RFC 3339 time: {e}"))
                })
                .transpose()?;
            let d = outrider::tools::build_digest(&cfg, &subscriber, due, SystemClock.now())?;
            println!(
                "{}",
                outrider::tools::write_preview(&cfg, &d, out.as_deref())?
            );
        }
        Command::SendTest { config, subscriber } => {
            let cfg = load(&config)?;
            let results = runtime()?.block_on(outrider::tools::send_test(
                &cfg,
                &subscriber,
                SystemClock.now(),
            ))?;
            let mut failed = false;
            for r in &results {
                match &r.outcome {
                    Ok(m) => println!("{:8} ok: {m}", r.channel),
                    Err(e) => {
                        failed = true;
                        println!("{:8} FAILED: {e}", r.channel)
                    }
                }
            }
            if results.is_empty() {
                println!("subscriber {subscriber} has no channel to test");
            }
            if failed {
                return Ok(ExitCode::from(1));
            }
        }
        Command::Replay(a) => {
            let cfg = load(&a.config)?;
            return outrider::replay::run(&cfg, &a);
        }
        Command::Export(a) => {
            let cfg = load(&a.config)?;
            let now = outrider::status::effective_now(&cfg.service.state_dir, SystemClock.now());
            outrider::export::run(&cfg, &a, now)?;
        }
        Command::Import(a) => {
            let cfg = load(&a.config)?;
            let now = outrider::status::effective_now(&cfg.service.state_dir, SystemClock.now());
            return outrider::import::run(&cfg, &a, now);
        }
        Command::Report(a) => {
            let cfg = load(&a.config)?;
            let now = outrider::status::effective_now(&cfg.service.state_dir, SystemClock.now());
            outrider::report::run(&cfg, &a, now)?;
        }
        Command::Load(a) => {
            let now = SystemClock.now();
            if !(a.spacing_km.is_finite() && a.spacing_km > 0.0 && a.spacing_km <= 100.0) {
                anyhow::bail!("--spacing-km must be more than 0 and at most 100");
            }
            let grid = a.grid_sites.map(|n| n as usize);
            if let Some(path) = &a.write_sites {
                let n = outrider::load::write_sites(path, grid, a.spacing_km, now)?;
                eprintln!("wrote {n} sites to {}", path.display());
            }
            if a.count == 0 {
                return Ok(ExitCode::SUCCESS);
            }
            let opts = outrider::load::LoadOptions {
                url: outrider::config::parse_mqtt_url(&a.url)
                    .map_err(|e| anyhow::anyhow!("--url {:?}: {e}", a.url))?,
                prefix: a.prefix,
                client_id: a
                    .client_id
                    .unwrap_or_else(|| format!("outrider-load-{}", std::process::id())),
                count: a.count,
                rate: a.rate,
                qos: if a.qos == 0 {
                    rumqttc::QoS::AtMostOnce
                } else {
                    rumqttc::QoS::AtLeastOnce
                },
                grid_sites: grid,
                spacing_km: a.spacing_km,
                heartbeats: a.heartbeats,
                seed: a.seed,
                id_prefix: a.id_prefix,
                inflight: a.inflight,
            };
            let report = runtime()?.block_on(outrider::load::run(&opts, now))?;
            if a.json {
                println!("{}", serde_json::to_string(&report)?);
            } else {
                println!("{}", report.text());
            }
        }
        Command::Backup {
            config,
            state_dir,
            to,
            force,
            pages_per_step,
        } => {
            let dir = match (config, state_dir) {
                (Some(c), _) => load(&c)?.service.state_dir,
                (None, Some(d)) => d,
                (None, None) => anyhow::bail!("give -c FILE or --state-dir DIR"),
            };
            let opts = outrider::backup::Options {
                pages_per_step,
                ..Default::default()
            };
            let report = outrider::backup::run(&dir, &to, force, &opts)?;
            print!("{}", outrider::backup::render_text(&report));
        }
    }
    Ok(ExitCode::SUCCESS)
}
