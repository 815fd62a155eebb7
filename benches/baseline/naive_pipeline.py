#!/usr/bin/env python3
"""What a user might write instead of outrider, in an afternoon: the
baseline side of benches/side_by_side.py (issue 8).

  python naive_pipeline.py --port P --client-id ID --config outrider.toml
      [--db FILE] [--count N] [--max-seconds S] [--create-session]

paho-mqtt (QoS 1, persistent session, the default acknowledgement after
on_message returns) and sqlite3 (WAL, a commit per message before it is
acknowledged). Per message: decode the JSON, skip a repeated
observationID (INSERT OR IGNORE on the primary key), store it, and for an
animal of a watched species at or above the watch's probability look up
the camera's position and loop over every subscriber, haversine distance
from the camera to the centre of the subscriber's circle, one notice row
per subscriber within its radius. It reads the same outrider.toml and
sites CSV outrider reads (circle areas and explicit species lists only,
which is what side_by_side.py writes).

Written the way a competent user would: positions in radians and the
cosine of each subscriber's latitude worked out once at start, one
tuple per subscriber, local names in the loop. It does not collapse
triggers into independent events, keep baselines, cool down, or send
anything: it does less than outrider, so it flatters the baseline.

Stops after --count messages or --max-seconds, whichever comes first,
and prints JSON: messages handled, seconds (from CONNACK), rate, how many
went through the subscriber loop and the time spent in it.
"""
import argparse
import csv
import json
import math
import os
import sqlite3
import sys
import time
import tomllib

import paho.mqtt.client as mqtt

EARTH_RADIUS_KM = 6371.0088  # mean Earth radius (IUGG), as haversine code usually takes


def load(config_path):
    with open(config_path, "rb") as f:
        cfg = tomllib.load(f)
    base = os.path.dirname(os.path.abspath(config_path))
    sites = {}
    with open(os.path.join(base, cfg["sites"]["file"]), newline="") as f:
        for row in csv.DictReader(f):
            lat, lon = math.radians(float(row["latitude"])), math.radians(float(row["longitude"]))
            sites[row["deploymentID"]] = (lat, lon, math.cos(lat))
    default_p = cfg.get("detection", {}).get("min_probability", 0.8)
    subs = []
    watched = {}
    for s in cfg.get("subscriber", []):
        area = s["area"]
        lat = math.radians(area["lat"])
        for w in s.get("watch", []):
            species = frozenset(w["species"])
            p = w.get("min_probability", default_p)
            for sp in species:
                watched[sp] = min(watched.get(sp, 1.0), p)
            subs.append((s["id"], lat, math.radians(area["lon"]), math.cos(lat),
                         area["radius_km"], species, p))
    return sites, subs, watched


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--host", default="127.0.0.1")
    ap.add_argument("--port", type=int, required=True)
    ap.add_argument("--client-id", required=True)
    ap.add_argument("--config", required=True)
    ap.add_argument("--db", default="naive.db")
    ap.add_argument("--prefix", default="outrider")
    ap.add_argument("--count", type=int, default=0, help="stop after this many messages (0: no limit)")
    ap.add_argument("--max-seconds", type=float, default=0, help="stop after this long (0: no limit)")
    ap.add_argument("--create-session", action="store_true", help="subscribe, then leave")
    a = ap.parse_args()

    sites, subs, watched = load(a.config)
    db = sqlite3.connect(a.db)
    db.execute("PRAGMA journal_mode=WAL")
    db.execute("""CREATE TABLE IF NOT EXISTS observations (
        observation_id TEXT PRIMARY KEY, deployment_id TEXT, event_start TEXT,
        observation_type TEXT, scientific_name TEXT, count INTEGER,
        probability REAL, payload TEXT)""")
    db.execute("""CREATE TABLE IF NOT EXISTS notices (
        subscriber_id TEXT, observation_id TEXT, distance_km REAL)""")
    db.commit()

    st = {"messages": 0, "duplicates": 0, "bad": 0, "looped": 0, "loop_seconds": 0.0,
          "notices": 0, "start": None, "end": None}
    topic_filter = f"{a.prefix}/+/observation"
    asin, sqrt, sin = math.asin, math.sqrt, math.sin

    def on_connect(client, userdata, flags, reason_code, properties):
        st["start"] = time.monotonic()
        if a.create_session or not flags.session_present:
            client.subscribe(topic_filter, qos=1)

    def on_subscribe(client, userdata, mid, reason_codes, properties):
        if a.create_session:
            client.disconnect()

    def on_message(client, userdata, msg):
        try:
            o = json.loads(msg.payload)
            oid = o["observationID"]
            dep = o["deploymentID"]
        except (ValueError, KeyError, TypeError):
            st["bad"] += 1
            return
        species = o.get("scientificName")
        prob = o.get("classificationProbability", 1.0)
        cur = db.execute(
            "INSERT OR IGNORE INTO observations VALUES (?, ?, ?, ?, ?, ?, ?, ?)",
            (oid, dep, o.get("eventStart"), o.get("observationType"), species,
             o.get("count", 1), prob, msg.payload.decode("utf-8", "replace")))
        if cur.rowcount == 0:
            st["duplicates"] += 1
        elif (o.get("observationType") == "animal" and species in watched
              and prob >= watched[species] and dep in sites):
            t0 = time.perf_counter()
            lat1, lon1, cos1 = sites[dep]
            hits = []
            for sid, lat2, lon2, cos2, radius, sp, p in subs:
                if species not in sp or prob < p:
                    continue
                h = sin((lat2 - lat1) / 2) ** 2 + cos1 * cos2 * sin((lon2 - lon1) / 2) ** 2
                d = 2 * EARTH_RADIUS_KM * asin(sqrt(h))
                if d <= radius:
                    hits.append((sid, oid, d))
            if hits:
                db.executemany("INSERT INTO notices VALUES (?, ?, ?)", hits)
                st["notices"] += len(hits)
            st["looped"] += 1
            st["loop_seconds"] += time.perf_counter() - t0
        db.commit()
        st["messages"] += 1
        done = (a.count and st["messages"] >= a.count) or (
            a.max_seconds and time.monotonic() - st["start"] >= a.max_seconds)
        if done and st["end"] is None:
            st["end"] = time.monotonic()
            client.disconnect()

    c = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id=a.client_id, clean_session=False)
    c.on_connect, c.on_subscribe, c.on_message = on_connect, on_subscribe, on_message
    c.connect(a.host, a.port, keepalive=60)
    c.loop_forever()
    if a.create_session:
        return
    end = st["end"] or time.monotonic()
    secs = end - (st["start"] or end)
    out = {k: v for k, v in st.items() if k not in ("start", "end")}
    out.update(seconds=round(secs, 3), subscribers=len(subs),
               messages_per_second=round(st["messages"] / secs, 2) if secs else 0.0)
    json.dump(out, sys.stdout)
    print()


if __name__ == "__main__":
    main()
