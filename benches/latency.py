#!/usr/bin/env python3
"""Latency from an observation's publish to SMTP acceptance, under load.

  target/py/bin/python benches/latency.py [--rate 100] [--probes 200]
      [--interval 0.5] [--binary target/release/outrider] [--plot FILE.png]

Starts, each on a free loopback port: Mosquitto (persistence on, no queue
limit), the aiosmtpd sink of the tests (tests/clients/smtp_sink.py) and
`outrider run` with the invented district's 16 sites and one subscriber
watching wild dogs at KB-01 (presence, no cooldown, no hourly cap). A
background publisher (paho-mqtt, QoS 1) sends `--rate` kangaroo
observations per second at the other sites; every `--interval` seconds a
probe publishes one wild dog at KB-01 that starts a new independent event
(eventStart 31 min after the previous probe's), so each probe is one
notice and one email. A probe's latency is the time from just before its
publish to the sink's writing of the accepted message (the .eml file's
mtime, same clock). Prints p50, p90, p99 and max as JSON; --plot draws
the latencies (matplotlib, optional).
"""
import argparse
import json
import os
import shutil
import socket
import subprocess
import sys
import tempfile
import threading
import time
from datetime import datetime, timedelta, timezone

import paho.mqtt.client as mqtt

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))


def free_port():
    s = socket.socket()
    s.bind(("127.0.0.1", 0))
    p = s.getsockname()[1]
    s.close()
    return p


def iso(t):
    return t.astimezone(timezone.utc).strftime("%Y-%m-%dT%H:%M:%S.%fZ")


def wait_file_line(path, needle, limit=60):
    end = time.time() + limit
    while time.time() < end:
        if os.path.exists(path) and needle in open(path, errors="replace").read():
            return
        time.sleep(0.1)
    tail = open(path, errors="replace").read()[-2000:] if os.path.exists(path) else ""
    sys.exit(f"timed out waiting for {needle!r} in {path}:\n{tail}")


def percentile(xs, q):
    xs = sorted(xs)
    k = max(0, min(len(xs) - 1, int(round(q * (len(xs) - 1)))))
    return xs[k]


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--rate", type=float, default=100.0)
    ap.add_argument("--probes", type=int, default=200)
    ap.add_argument("--interval", type=float, default=0.5)
    ap.add_argument("--binary", default=os.path.join(ROOT, "target/release/outrider"))
    ap.add_argument("--plot")
    a = ap.parse_args()
    work = tempfile.mkdtemp(prefix="outrider-latency-")
    procs = []
    try:
        mq_port, smtp_port = free_port(), free_port()
        os.makedirs(f"{work}/mq")
        with open(f"{work}/mq/mosquitto.conf", "w") as f:
            f.write(f"listener {mq_port} 127.0.0.1\nallow_anonymous true\npersistence true\n"
                    f"persistence_location {work}/mq/\nuser root\nmax_queued_messages 0\n"
                    f"max_inflight_messages 1000\nlog_dest file {work}/mq/mosquitto.log\n")
        procs.append(subprocess.Popen(["/usr/sbin/mosquitto", "-c", f"{work}/mq/mosquitto.conf"]))
        smtp = subprocess.Popen([sys.executable, f"{ROOT}/tests/clients/smtp_sink.py", "serve",
                                 "--port", str(smtp_port), "--dir", f"{work}/smtp"],
                                stdin=subprocess.PIPE, stdout=subprocess.PIPE)
        procs.append(smtp)
        smtp.stdout.readline()  # "ready"
        shutil.copy(f"{ROOT}/config_examples/sites.csv", f"{work}/sites.csv")
        with open(f"{work}/outrider.toml", "w") as f:
            f.write(f"""[service]
state_dir = "state"
timezone = "Australia/Sydney"
[mqtt]
url = "mqtt://127.0.0.1:{mq_port}"
client_id = "outriderlatency"
[sites]
file = "sites.csv"
[smtp]
host = "127.0.0.1"
port = {smtp_port}
security = "none"
from = "outrider <notices@kellerby.example>"
[[subscriber]]
id = "probe"
name = "Probe"
email = "probe@kellerby.example"
max_per_hour = 10000
area = {{ sites = ["KB-01"] }}
  [[subscriber.watch]]
  name = "dogs"
  trigger = "presence"
  species = ["Canis familiaris"]
  cooldown_minutes = 0
  channels = ["email"]
""")
        log = open(f"{work}/outrider.log", "w")
        procs.append(subprocess.Popen([a.binary, "run", "-c", f"{work}/outrider.toml"],
                                      stderr=log, stdout=log, env={**os.environ, "RUST_LOG": "info"}))
        wait_file_line(f"{work}/outrider.log", "Connected to the MQTT broker")

        stop = threading.Event()
        bg = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id="latency-background")
        bg.max_inflight_messages_set(1000)
        bg.connect("127.0.0.1", mq_port)
        bg.loop_start()
        sites = [f"KB-{i:02d}" for i in range(2, 17)]

        def background():
            n = 0
            t0 = time.time()
            while not stop.is_set():
                dep = sites[n % len(sites)]
                p = {"observationID": f"bg-{n}", "deploymentID": dep,
                     "eventStart": iso(datetime.now(timezone.utc) - timedelta(seconds=5)),
                     "observationType": "animal", "scientificName": "Macropus giganteus",
                     "count": 1, "classificationProbability": 0.9}
                bg.publish(f"outrider/{dep}/observation", json.dumps(p), qos=1)
                n += 1
                delay = t0 + n / a.rate - time.time()
                if delay > 0:
                    time.sleep(delay)

        threading.Thread(target=background, daemon=True).start()
        time.sleep(2)
        pr = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id="latency-probe")
        pr.connect("127.0.0.1", mq_port)
        pr.loop_start()
        base = datetime.now(timezone.utc) - timedelta(minutes=31 * (a.probes + 2))
        sent = {}
        for k in range(a.probes):
            p = {"observationID": f"probe-{k}", "deploymentID": "KB-01",
                 "eventStart": iso(base + timedelta(minutes=31 * k)),
                 "observationType": "animal", "scientificName": "Canis familiaris",
                 "count": 1, "classificationProbability": 0.95,
                 "filePath": f"https://images.kellerby.example/probe-{k}.jpg"}
            sent[f"probe-{k}.jpg"] = time.time()
            pr.publish("outrider/KB-01/observation", json.dumps(p), qos=1)
            time.sleep(a.interval)
        # Collect.
        end = time.time() + 30
        got = {}
        while time.time() < end and len(got) < a.probes:
            for name in os.listdir(f"{work}/smtp"):
                if not name.endswith(".eml") or name in got:
                    continue
                body = open(f"{work}/smtp/{name}", errors="replace").read()
                for key in sent:
                    if key in body:
                        got[name] = (key, os.stat(f"{work}/smtp/{name}").st_mtime)
                        break
            time.sleep(0.2)
        stop.set()
        lat = sorted((mtime - sent[key]) * 1000.0 for key, mtime in got.values())
        if not lat:
            sys.exit("no probe email arrived; see " + f"{work}/outrider.log")
        result = {
            "probes": a.probes, "received": len(lat), "background_per_s": a.rate,
            "p50_ms": round(percentile(lat, 0.50), 1), "p90_ms": round(percentile(lat, 0.90), 1),
            "p99_ms": round(percentile(lat, 0.99), 1), "max_ms": round(lat[-1], 1),
            "cores": os.cpu_count(),
        }
        print(json.dumps(result))
        if a.plot:
            import matplotlib
            matplotlib.use("Agg")
            import matplotlib.pyplot as plt
            fig, ax = plt.subplots(figsize=(6, 3))
            ax.plot(range(1, len(lat) + 1), lat, color="#2f5d50")
            ax.axhline(500, color="#a83f1e", linestyle="--", label="target p99 500 ms")
            ax.set_xlabel("probes, sorted by latency")
            ax.set_ylabel("publish to SMTP accept (ms)")
            ax.set_title(f"{a.rate:.0f} obs/s background, {os.cpu_count()} cores")
            ax.legend()
            fig.tight_layout()
            fig.savefig(a.plot, dpi=100)
    finally:
        for p in reversed(procs):
            p.terminate()
            try:
                p.wait(5)
            except subprocess.TimeoutExpired:
                p.kill()
        shutil.rmtree(work, ignore_errors=True)


if __name__ == "__main__":
    main()
