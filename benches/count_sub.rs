//! A bare counting subscriber: the limit side of `benches/side_by_side.py`
//! (issue 8). It does nothing with a message but count it, so its drain
//! rate is what the broker and one rumqttc connection can give; outrider's
//! rate with its whole pipeline is compared against it.
//!
//!   count_sub --port P --client-id ID --create-session   subscribe and leave
//!   count_sub --port P --client-id ID --count N          drain N, print JSON
//!
//! QoS 1 on a persistent session (clean session off), as outrider holds;
//! rumqttc acknowledges each message as it arrives (automatic acks). The
//! time runs from the CONNACK to the N-th message. Measures, never asserts.

use rumqttc::{AsyncClient, Event, MqttOptions, Packet, QoS};
use std::time::{Duration, Instant};

struct Args {
    host: String,
    port: u16,
    client_id: String,
    filter: String,
    count: u64,
    create_session: bool,
}

fn args() -> Result<Args, String> {
    let mut a = Args {
        host: "127.0.0.1".into(),
        port: 1883,
        client_id: "count-sub".into(),
        filter: "outrider/+/observation".into(),
        count: 0,
        create_session: false,
    };
    let mut it = std::env::args().skip(1);
    while let Some(k) = it.next() {
        let mut val = || it.next().ok_or(format!("{k} needs a value"));
        match k.as_str() {
            "--host" => a.host = val()?,
            "--port" => a.port = val()?.parse().map_err(|e| format!("--port: {e}"))?,
            "--client-id" => a.client_id = val()?,
            "--filter" => a.filter = val()?,
            "--count" => a.count = val()?.parse().map_err(|e| format!("--count: {e}"))?,
            "--create-session" => a.create_session = true,
            // `cargo bench` passes this to a harness = false bench.
            "--bench" => {}
            other => return Err(format!("unknown argument {other}")),
        }
    }
    Ok(a)
}

#[tokio::main(flavor = "current_thread")]
async fn main() -> Result<(), String> {
    let a = args()?;
    let mut o = MqttOptions::new(a.client_id.clone(), a.host.clone(), a.port);
    o.set_clean_session(false)
        .set_keep_alive(Duration::from_secs(30))
        .set_max_packet_size(1 << 20, 1 << 20);
    let (client, mut eventloop) = AsyncClient::new(o, 1024);
    let mut started: Option<Instant> = None;
    let mut n = 0u64;
    loop {
        match eventloop.poll().await.map_err(|e| e.to_string())? {
            Event::Incoming(Packet::ConnAck(ack)) => {
                started = Some(Instant::now());
                if a.create_session || !ack.session_present {
                    client
                        .subscribe(a.filter.clone(), QoS::AtLeastOnce)
                        .await
                        .map_err(|e| e.to_string())?;
                }
            }
            Event::Incoming(Packet::SubAck(_)) if a.create_session => {
                client.disconnect().await.map_err(|e| e.to_string())?;
            }
            Event::Outgoing(rumqttc::Outgoing::Disconnect) => break,
            Event::Incoming(Packet::Publish(_)) => {
                n += 1;
                if n == a.count {
                    let secs = started.map_or(0.0, |s| s.elapsed().as_secs_f64());
                    println!(
                        "{{\"messages\": {n}, \"seconds\": {secs:.4}, \"messages_per_second\": {:.1}}}",
                        n as f64 / secs
                    );
                    // Let the last PUBACKs out, then leave.
                    client.disconnect().await.map_err(|e| e.to_string())?;
                }
            }
            _ => {}
        }
    }
    Ok(())
}
