//! `/metrics` in the Prometheus text exposition format (version 0.0.4):
//! `# HELP` and `# TYPE` lines, then one sample per line, label values
//! escaped (backslash, double quote, line feed). Pure: the process's
//! counters ([`Snapshot`]) and a few facts read from the store in, text out.
//!
//! Counters are since the process started; gauges read from the store
//! (outbox depth, deliveries by state, events, silent cameras) are the
//! store's state now, so they survive a restart. Names are listed with
//! their meaning in docs/web.md.

use crate::telemetry::{HistogramSnapshot, Snapshot};
use std::collections::BTreeMap;
use std::fmt::Write;

/// The facts `/metrics` reads from the store at each scrape.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct StoreFacts {
    /// Deliveries by (channel, state): pending, sent, failed, closed.
    pub deliveries: BTreeMap<(String, String), u64>,
    pub outbox_pending: u64,
    pub events: u64,
    pub deployments_silent: u64,
    pub unsubscribed: u64,
    /// False when the store could not be read for this scrape (the store
    /// gauges are then 0 and not to be trusted).
    pub store_readable: bool,
}

/// The Content-Type of the text format.
pub const CONTENT_TYPE: &str = "text/plain; version=0.0.4; charset=utf-8";

/// Renders every metric.
pub fn render(s: &Snapshot, store: &StoreFacts) -> String {
    let mut o = String::with_capacity(4096);
    counter(
        &mut o,
        "outrider_messages_received_total",
        "MQTT messages taken by the pipeline (stored, duplicate or rejected).",
        s.received,
    );
    counter(
        &mut o,
        "outrider_messages_stored_total",
        "Messages stored as new observations, heartbeats or corrections.",
        s.stored,
    );
    counter(
        &mut o,
        "outrider_duplicates_total",
        "Messages seen before (same observationID, heartbeat or correction) and ignored.",
        s.duplicates,
    );
    family(
        &mut o,
        "outrider_messages_rejected_total",
        "Messages refused, by reason (docs/ingest.md).",
        "counter",
    );
    for (reason, n) in &s.rejected {
        sample(
            &mut o,
            "outrider_messages_rejected_total",
            &[("reason", reason)],
            *n as f64,
        );
    }
    counter(
        &mut o,
        "outrider_commits_total",
        "Store transactions committed by the pipeline.",
        s.commits,
    );
    counter(
        &mut o,
        "outrider_events_written_total",
        "Independent events written (new or changed).",
        s.events_written,
    );
    counter(
        &mut o,
        "outrider_events_removed_total",
        "Independent events removed (retracted or merged).",
        s.events_removed,
    );
    gauge(
        &mut o,
        "outrider_events",
        "Independent events in the store.",
        store.events as f64,
    );
    family(
        &mut o,
        "outrider_notices_total",
        "Notice decisions, by trigger and disposition (sent, folded, deferred).",
        "counter",
    );
    for ((trigger, disposition), n) in &s.notices {
        sample(
            &mut o,
            "outrider_notices_total",
            &[("trigger", trigger), ("disposition", disposition)],
            *n as f64,
        );
    }
    family(
        &mut o,
        "outrider_delivery_outcomes_total",
        "Delivery outcomes recorded by the outbox, by channel and outcome (sent, retry, failed, closed).",
        "counter",
    );
    for ((channel, outcome), n) in &s.deliveries {
        sample(
            &mut o,
            "outrider_delivery_outcomes_total",
            &[("channel", channel), ("outcome", outcome)],
            *n as f64,
        );
    }
    family(
        &mut o,
        "outrider_deliveries",
        "Deliveries in the store, by channel and state (pending, sent, failed, closed).",
        "gauge",
    );
    for ((channel, state), n) in &store.deliveries {
        sample(
            &mut o,
            "outrider_deliveries",
            &[("channel", channel), ("state", state)],
            *n as f64,
        );
    }
    gauge(
        &mut o,
        "outrider_outbox_pending",
        "Deliveries waiting to be sent (outbox depth).",
        store.outbox_pending as f64,
    );
    gauge(
        &mut o,
        "outrider_deployments_silent",
        "Deployments with no sign of life for longer than the silence limit.",
        store.deployments_silent as f64,
    );
    gauge(
        &mut o,
        "outrider_unsubscribed",
        "Subscribers who asked for no more email.",
        store.unsubscribed as f64,
    );
    gauge(
        &mut o,
        "outrider_store_readable",
        "1 when this scrape could read the store (the store gauges above come from it).",
        f64::from(u8::from(store.store_readable)),
    );
    gauge(
        &mut o,
        "outrider_broker_connected",
        "1 while the MQTT connection is up.",
        f64::from(u8::from(s.broker_connected)),
    );
    gauge(
        &mut o,
        "outrider_store_writable",
        "1 while the store takes writes.",
        f64::from(u8::from(s.store_writable)),
    );
    histogram(
        &mut o,
        "outrider_ingest_to_commit_seconds",
        "From a message read off the MQTT connection to the commit that holds it.",
        &s.ingest_to_commit,
    );
    histogram(
        &mut o,
        "outrider_delivery_attempt_seconds",
        "Duration of one delivery attempt (SMTP, mail folder, webhook, MQTT).",
        &s.delivery_attempt,
    );
    histogram(
        &mut o,
        "outrider_notice_to_delivery_seconds",
        "From a notice's decision to its delivery being accepted, on the service clock (simulated time in the demo).",
        &s.notice_to_delivery,
    );
    o
}

fn family(o: &mut String, name: &str, help: &str, kind: &str) {
    let _ = writeln!(o, "# HELP {name} {}", escape_help(help));
    let _ = writeln!(o, "# TYPE {name} {kind}");
}

fn counter(o: &mut String, name: &str, help: &str, v: u64) {
    family(o, name, help, "counter");
    sample(o, name, &[], v as f64);
}

fn gauge(o: &mut String, name: &str, help: &str, v: f64) {
    family(o, name, help, "gauge");
    sample(o, name, &[], v);
}

fn histogram(o: &mut String, name: &str, help: &str, h: &HistogramSnapshot) {
    family(o, name, help, "histogram");
    let bucket = format!("{name}_bucket");
    for (le, n) in &h.buckets {
        sample(o, &bucket, &[("le", &number(*le))], *n as f64);
    }
    sample(o, &format!("{name}_sum"), &[], h.sum_seconds);
    sample(o, &format!("{name}_count"), &[], h.count as f64);
}

fn sample(o: &mut String, name: &str, labels: &[(&str, &str)], v: f64) {
    o.push_str(name);
    if !labels.is_empty() {
        o.push('{');
        for (i, (k, val)) in labels.iter().enumerate() {
            if i > 0 {
                o.push(',');
            }
            let _ = write!(o, "{k}=\"{}\"", escape_label(val));
        }
        o.push('}');
    }
    let _ = writeln!(o, " {}", number(v));
}

/// A sample value: integers without a fraction, `+Inf`, `NaN`.
fn number(v: f64) -> String {
    if v.is_nan() {
        "NaN".into()
    } else if v == f64::INFINITY {
        "+Inf".into()
    } else if v == f64::NEG_INFINITY {
        "-Inf".into()
    } else if v.fract() == 0.0 && v.abs() < 1e15 {
        format!("{}", v as i64)
    } else {
        format!("{v}")
    }
}

/// Label values: `\` -> `\\`, `"` -> `\"`, line feed -> `\n`.
fn escape_label(s: &str) -> String {
    s.replace('\\', "\\\\")
        .replace('"', "\\\"")
        .replace('\n', "\\n")
}

/// HELP text: `\` -> `\\`, line feed -> `\n`.
fn escape_help(s: &str) -> String {
    s.replace('\\', "\\\\").replace('\n', "\\n")
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::telemetry::Counters;

    #[test]
    fn every_family_has_help_and_type_and_labels_are_escaped() {
        let c = Counters::new();
        c.count_notice("presence", "sent");
        c.count_delivery("email", "sent");
        c.ingest_to_commit.observe(0.003);
        let mut facts = StoreFacts::default();
        facts
            .deliveries
            .insert(("we\"ird\\\nchannel".into(), "pending".into()), 2);
        let text = render(&c.snapshot(), &facts);
        // The exposition format: TYPE before the samples of its family.
        let mut typed = std::collections::BTreeSet::new();
        for line in text.lines() {
            if let Some(rest) = line.strip_prefix("# TYPE ") {
                typed.insert(rest.split(' ').next().unwrap_or("").to_string());
            } else if !line.starts_with('#') {
                let name = line.split(['{', ' ']).next().unwrap_or("");
                let family = ["_bucket", "_sum", "_count"]
                    .iter()
                    .find_map(|s| name.strip_suffix(s).filter(|f| typed.contains(*f)))
                    .unwrap_or(name);
                assert!(typed.contains(family), "sample before its TYPE: {line}");
            }
        }
        assert!(text.contains(
            "outrider_deliveries{channel=\"we\\\"ird\\\\\\nchannel\",state=\"pending\"} 2\n"
        ));
        assert!(
            text.contains("outrider_notices_total{trigger=\"presence\",disposition=\"sent\"} 1\n")
        );
        assert!(text.contains("outrider_ingest_to_commit_seconds_bucket{le=\"0.005\"} 1\n"));
        assert!(text.contains("outrider_ingest_to_commit_seconds_bucket{le=\"+Inf\"} 1\n"));
        assert!(text.contains("outrider_broker_connected 0\n"));
        assert!(text.contains("outrider_store_writable 1\n"));
    }

    #[test]
    fn numbers_are_written_as_the_format_expects() {
        assert_eq!(number(3.0), "3");
        assert_eq!(number(0.25), "0.25");
        assert_eq!(number(f64::INFINITY), "+Inf");
        assert_eq!(number(f64::NAN), "NaN");
    }
}
