#!/usr/bin/env python3
"""Issue 8: outrider side by side with the limit and with a hand-written
baseline, on one backlog queued at one Mosquitto, in one run.

  target/py/bin/python benches/side_by_side.py [--count 200000]
      [--subscribers 100000] [--sites 10000] [--baseline-seconds 120]
      [--perf FILE] [--json FILE]

1. Starts Mosquitto on a free loopback port (persistence on,
   `max_queued_messages 0`, `max_inflight_messages 1000`).
2. Writes a 10,000-site grid (`outrider load --write-sites`) and an
   outrider.toml with 100,000 subscribers: circles of radius uniform in
   1-20 km, centres uniform over the grid (seeded), one presence watch each
   on wild dog, red fox, feral cat and feral pig, notices on the MQTT
   channel (published back to the broker, where nobody listens, so no
   mail server's speed enters the figure).
3. Creates four persistent sessions (clean session off, QoS 1 on
   `outrider/+/observation`): mosquitto_sub, the counting rumqttc client
   (benches/count_sub.rs), outrider itself (it subscribes when it first
   connects) and the Python baseline.
4. Publishes the backlog once with `outrider load --grid-sites 10000
   --count N --qos 1`: Mosquitto queues N messages for each session.
5. Drains each session in turn and times it:
   - limit: `mosquitto_sub -q 1 -c -i ID -C N | wc -l` (process start to
     exit) and `count_sub --count N` (CONNACK to the N-th message); the
     faster of the two is the limit;
   - outrider: `outrider run` from its "Connected to the MQTT broker" log
     line to the moment its store holds N observations (every batch's
     observations, events and notice decisions commit in one transaction,
     so stored means processed); peak memory VmHWM of the process from
     /proc; its start-up (config, rule book, warm-up) is reported apart;
   - baseline: benches/baseline/naive_pipeline.py until it has handled N
     messages or --baseline-seconds have passed (it is slow; its rate is
     messages handled / time).
6. Prints one JSON object with every figure and the ratios.

Measures, never asserts. Absolute rates on a shared 2-core machine are
noisy; the ratios come from one run.
"""
import argparse
import json
import math
import os
import random
import shutil
import signal
import socket
import sqlite3
import subprocess
import sys
import tempfile
import time

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
CENTRE = (-31.6, 148.1)
SPECIES = ["Canis familiaris", "Vulpes vulpes", "Felis catus", "Sus scrofa"]


def free_port():
    s = socket.socket()
    s.bind(("127.0.0.1", 0))
    p = s.getsockname()[1]
    s.close()
    return p


def wait_for(what, f, limit=120, step=0.05):
    end = time.monotonic() + limit
    while time.monotonic() < end:
        v = f()
        if v:
            return v
        time.sleep(step)
    sys.exit(f"timed out after {limit} s waiting for {what}")


def listening(port):
    try:
        socket.create_connection(("127.0.0.1", port)).close()
        return True
    except OSError:
        return False


def log_has(path, needle):
    try:
        with open(path, errors="replace") as f:
            return needle in f.read()
    except FileNotFoundError:
        return False


def count_sub_binary():
    """Builds benches/count_sub.rs (bench profile) and returns its path."""
    out = subprocess.run(
        ["cargo", "bench", "-j", "1", "--bench", "count_sub", "--no-run", "--message-format=json"],
        cwd=ROOT, check=True, stdout=subprocess.PIPE, stderr=subprocess.DEVNULL, text=True).stdout
    for line in out.splitlines():
        try:
            m = json.loads(line)
        except ValueError:
            continue
        if m.get("reason") == "compiler-artifact" and m.get("target", {}).get("name") == "count_sub" \
                and m.get("executable"):
            return m["executable"]
    sys.exit("could not find the count_sub bench binary")


def subscribers_toml(n, sites, spacing_km, seed):
    """`n` circle subscribers over the grid (as benches/engine.rs's
    `big_config`: radius 1-20 km, centres uniform over the grid)."""
    side = math.ceil(math.sqrt(sites))
    half = (side - 1) * spacing_km / 2.0
    rng = random.Random(seed)
    coslat = math.cos(math.radians(CENTRE[0]))
    species = ", ".join(f'"{s}"' for s in SPECIES)
    parts = []
    for i in range(n):
        dx, dy = rng.uniform(-half, half), rng.uniform(-half, half)
        lat = CENTRE[0] + dy / 110.9
        lon = CENTRE[1] + dx / (111.32 * coslat)
        r = rng.uniform(1.0, 20.0)
        parts.append(
            f'[[subscriber]]\nid = "sub-{i:07d}"\n'
            f"area = {{ lat = {lat:.6f}, lon = {lon:.6f}, radius_km = {r:.3f} }}\n"
            f'  [[subscriber.watch]]\n  name = "pests"\n  trigger = "presence"\n'
            f'  species = [{species}]\n  channels = ["mqtt"]\n')
    return "\n".join(parts)


def vm_hwm_kib(pid):
    with open(f"/proc/{pid}/status") as f:
        for line in f:
            if line.startswith("VmHWM:"):
                return int(line.split()[1])
    return None


def stored(db):
    try:
        c = sqlite3.connect(f"file:{db}?mode=ro", uri=True, timeout=5)
        try:
            return c.execute("SELECT count(*) FROM observations").fetchone()[0]
        finally:
            c.close()
    except sqlite3.Error:
        return 0


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--count", type=int, default=200_000)
    ap.add_argument("--subscribers", type=int, default=100_000)
    ap.add_argument("--sites", type=int, default=10_000)
    ap.add_argument("--spacing-km", type=float, default=3.0)
    ap.add_argument("--baseline-seconds", type=float, default=120.0)
    ap.add_argument("--outrider-seconds", type=float, default=3600.0,
                    help="give up on the outrider drain after this long")
    ap.add_argument("--binary", default=os.path.join(ROOT, "target/release/outrider"))
    ap.add_argument("--perf", help="record a perf profile of the outrider drain into FILE")
    ap.add_argument("--json", help="also write the result to FILE")
    ap.add_argument("--keep", action="store_true", help="keep the work directory")
    a = ap.parse_args()
    # Stop cleanly on SIGTERM too (a background job ignores SIGINT).
    signal.signal(signal.SIGTERM, lambda *_: sys.exit("stopped by SIGTERM"))

    subprocess.run(["cargo", "build", "-j", "1", "--release", "-q"], cwd=ROOT, check=True)
    count_sub = count_sub_binary()
    py = sys.executable
    work = tempfile.mkdtemp(prefix="outrider-sbs-")
    procs = []
    result = {"count": a.count, "subscribers": a.subscribers, "sites": a.sites,
              "nproc": os.cpu_count(), "date": time.strftime("%Y-%m-%d"), "work": work}
    try:
        port = free_port()
        mq = f"{work}/mq"
        os.makedirs(mq)
        with open(f"{mq}/mosquitto.conf", "w") as f:
            f.write(f"listener {port} 127.0.0.1\nallow_anonymous true\npersistence true\n"
                    f"persistence_location {mq}/\nuser root\nmax_queued_messages 0\n"
                    f"max_inflight_messages 1000\nlog_dest file {mq}/mosquitto.log\n")
        procs.append(subprocess.Popen(["/usr/sbin/mosquitto", "-c", f"{mq}/mosquitto.conf"]))
        wait_for("mosquitto", lambda: listening(port))

        url = f"mqtt://127.0.0.1:{port}"
        subprocess.run([a.binary, "load", "--count", "0", "--grid-sites", str(a.sites),
                        "--spacing-km", str(a.spacing_km), "--write-sites", f"{work}/sites.csv"],
                       check=True)
        t = time.monotonic()
        with open(f"{work}/outrider.toml", "w") as f:
            f.write(f'[service]\nstate_dir = "state"\ntimezone = "Australia/Sydney"\n'
                    f'shutdown_timeout_seconds = 5\n\n[mqtt]\nurl = "{url}"\n'
                    f'client_id = "sbsoutrider"\n\n[sites]\nfile = "sites.csv"\n\n')
            f.write(subscribers_toml(a.subscribers, a.sites, a.spacing_km, 8))
        result["config_bytes"] = os.path.getsize(f"{work}/outrider.toml")
        print(f"wrote {a.subscribers} subscribers in {time.monotonic() - t:.1f} s", file=sys.stderr)

        # 3. Sessions.
        topic = "outrider/+/observation"
        subprocess.run(["mosquitto_sub", "-p", str(port), "-q", "1", "-c", "-i", "sbs-mosq",
                        "-t", topic, "-E"], check=True)
        subprocess.run([count_sub, "--port", str(port), "--client-id", "sbs-count",
                        "--create-session"], check=True)
        subprocess.run([py, f"{ROOT}/benches/baseline/naive_pipeline.py", "--port", str(port),
                        "--client-id", "sbs-naive", "--config", f"{work}/outrider.toml",
                        "--db", f"{work}/naive.db", "--create-session"], check=True)
        log1 = f"{work}/outrider-1.log"
        t = time.monotonic()
        with open(log1, "w") as lf:
            p = subprocess.Popen([a.binary, "run", "-c", f"{work}/outrider.toml"], stderr=lf,
                                 stdout=lf, env={**os.environ, "RUST_LOG": "info"})
        wait_for("outrider to connect",
                 lambda: log_has(log1, "Connected to the MQTT broker") or p.poll() is not None, 300)
        if p.poll() is not None:
            sys.exit("outrider stopped:\n" + open(log1, errors="replace").read()[-3000:])
        result["outrider_first_start_seconds"] = round(time.monotonic() - t, 2)
        time.sleep(1.0)  # its SUBSCRIBEs go out right after the CONNACK
        p.terminate()
        p.wait(30)
        with open(f"{mq}/mosquitto.log", errors="replace") as f:
            subs = f.read().count("sbsoutrider")
        if subs == 0:
            sys.exit("outrider's session does not show in the Mosquitto log")

        # 4. The backlog.
        out = subprocess.run([a.binary, "load", "--url", url, "--grid-sites", str(a.sites),
                              "--spacing-km", str(a.spacing_km), "--count", str(a.count),
                              "--qos", "1", "--client-id", "sbs-load", "--json"],
                             check=True, stdout=subprocess.PIPE, text=True).stdout
        result["publish"] = json.loads(out)
        print(f"published: {result['publish']}", file=sys.stderr)

        # 5a. The limit.
        t = time.monotonic()
        out = subprocess.run(
            f"mosquitto_sub -p {port} -q 1 -c -i sbs-mosq -t '{topic}' -C {a.count} | wc -l",
            shell=True, check=True, stdout=subprocess.PIPE, text=True).stdout
        secs = time.monotonic() - t
        result["mosquitto_sub"] = {"messages": int(out.strip()), "seconds": round(secs, 3),
                                   "messages_per_second": round(int(out.strip()) / secs, 1)}
        print(f"mosquitto_sub: {result['mosquitto_sub']}", file=sys.stderr)
        out = subprocess.run([count_sub, "--port", str(port), "--client-id", "sbs-count",
                              "--count", str(a.count)], check=True, stdout=subprocess.PIPE,
                             text=True).stdout
        result["count_sub"] = json.loads(out)
        print(f"count_sub: {result['count_sub']}", file=sys.stderr)
        limit = max(result["mosquitto_sub"]["messages_per_second"],
                    result["count_sub"]["messages_per_second"])

        # 5b. outrider.
        log2 = f"{work}/outrider-2.log"
        db = f"{work}/state/outrider.db"
        t0 = time.monotonic()
        with open(log2, "w") as lf:
            p = subprocess.Popen([a.binary, "run", "-c", f"{work}/outrider.toml"], stderr=lf,
                                 stdout=lf, env={**os.environ, "RUST_LOG": "info"})
        procs.append(p)
        wait_for("outrider to connect", lambda: log_has(log2, "Connected to the MQTT broker"), 300,
                 0.01)
        t1 = time.monotonic()
        perf = None
        if a.perf:
            perf = subprocess.Popen(["perf", "record", "-F", "99", "-g", "-o", a.perf, "-p",
                                     str(p.pid)], stdout=subprocess.DEVNULL,
                                    stderr=subprocess.DEVNULL)
        progress = []
        while True:
            n = stored(db)
            now = time.monotonic()
            if not progress or now - progress[-1][0] >= 10:
                progress.append((now, n))
                print(f"  outrider: {n} stored after {now - t1:.0f} s", file=sys.stderr)
            if n >= a.count or now - t1 > a.outrider_seconds or p.poll() is not None:
                break
            time.sleep(0.1)
        t2 = time.monotonic()
        hwm = vm_hwm_kib(p.pid) if p.poll() is None else None
        if perf:
            perf.send_signal(signal.SIGINT)  # perf installs its own handler
            perf.wait(60)
        p.terminate()
        p.wait(60)
        st = json.loads(subprocess.run([a.binary, "status", "-c", f"{work}/outrider.toml",
                                        "--json"], check=True, stdout=subprocess.PIPE,
                                       text=True).stdout)
        result["outrider"] = {
            "messages": n, "seconds": round(t2 - t1, 2),
            "messages_per_second": round(n / (t2 - t1), 1),
            "finished": n >= a.count,
            "start_to_connected_seconds": round(t1 - t0, 2),
            "vm_hwm_mib": round(hwm / 1024, 1) if hwm else None,
            "events": st.get("events"), "notices": st.get("notices"),
            "duplicates_ignored": st.get("duplicates_ignored"), "rejected": st.get("rejected"),
        }
        print(f"outrider: {result['outrider']}", file=sys.stderr)

        # 5c. The baseline.
        out = subprocess.run([py, f"{ROOT}/benches/baseline/naive_pipeline.py", "--port",
                              str(port), "--client-id", "sbs-naive", "--config",
                              f"{work}/outrider.toml", "--db", f"{work}/naive.db", "--count",
                              str(a.count), "--max-seconds", str(a.baseline_seconds)],
                             check=True, stdout=subprocess.PIPE, text=True).stdout
        result["baseline"] = json.loads(out)
        print(f"baseline: {result['baseline']}", file=sys.stderr)

        o = result["outrider"]["messages_per_second"]
        b = result["baseline"]["messages_per_second"]
        result["ratios"] = {
            "outrider_over_limit": round(o / limit, 4),
            "outrider_over_baseline": round(o / b, 1) if b else None,
        }
        print(json.dumps(result, indent=2))
        if a.json:
            with open(a.json, "w") as f:
                json.dump(result, f, indent=2)
    finally:
        for p in reversed(procs):
            if p.poll() is None:
                p.terminate()
                try:
                    p.wait(10)
                except subprocess.TimeoutExpired:
                    p.kill()
        if not a.keep:
            shutil.rmtree(work, ignore_errors=True)


if __name__ == "__main__":
    main()
