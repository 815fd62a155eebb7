"""Counts, effort and RAI per local day from an exported Camtrap DP package,
computed independently of outrider's Rust code (Python's csv, datetime and
zoneinfo), to check `outrider report --by day`.

  report_check.py --package DIR --tz Australia/Sydney --from T --to T
                  --silence-hours H

Rules, written from METHODS.md 1-2 and DESIGN.md "Activity", not from the
Rust: an independent event (one event-level row of observations.csv) counts
in the local day holding its eventStart; effort is camera-nights (up time /
24 h): between the deployment start, every sign of life (heartbeats.csv
timestamps and eventStart of observations) and the stop (the report's end or
the deployment's end), a stretch no longer than the silence limit is up, a
longer one is down for its whole length. RAI = 100 x events / camera-nights,
None at zero effort. Local days are [local midnight, next local midnight).

Prints JSON: a list of {"day", "deploymentID", "scientificName", "events",
"individuals", "camera_nights", "rai"} for every day, deployment and species.
"""

import argparse
import csv
import json
import os
from datetime import datetime, timedelta, timezone
from zoneinfo import ZoneInfo


def when(s):
    return datetime.strptime(s, "%Y-%m-%dT%H:%M:%S%z").astimezone(timezone.utc)


def rows(path):
    with open(path, newline="", encoding="utf-8") as f:
        return list(csv.DictReader(f))


def up_intervals(start, stop, signs, silence):
    pts = sorted({start, stop, *[s for s in signs if start <= s <= stop]})
    out = []
    for a, b in zip(pts, pts[1:]):
        if b - a <= silence:
            if out and out[-1][1] == a:
                out[-1] = (out[-1][0], b)
            else:
                out.append((a, b))
    return out


def nights(intervals, lo, hi):
    total = timedelta(0)
    for a, b in intervals:
        x, y = max(a, lo), min(b, hi)
        if y > x:
            total += y - x
    return total.total_seconds() / 86400.0


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--package", required=True)
    ap.add_argument("--tz", required=True)
    ap.add_argument("--from", dest="start", required=True)
    ap.add_argument("--to", dest="end", required=True)
    ap.add_argument("--silence-hours", type=float, required=True)
    a = ap.parse_args()
    tz = ZoneInfo(a.tz)
    lo, hi = when(a.start), when(a.end)
    silence = timedelta(hours=a.silence_hours)
    deps = rows(os.path.join(a.package, "deployments.csv"))
    obs = rows(os.path.join(a.package, "observations.csv"))
    hbs = rows(os.path.join(a.package, "heartbeats.csv"))
    species = sorted({o["scientificName"] for o in obs if lo <= when(o["eventStart"]) < hi})
    out = []
    day = lo.astimezone(tz).date()
    while True:
        d_lo = datetime(day.year, day.month, day.day, tzinfo=tz).astimezone(timezone.utc)
        nxt = day + timedelta(days=1)
        d_hi = datetime(nxt.year, nxt.month, nxt.day, tzinfo=tz).astimezone(timezone.utc)
        d_lo, d_hi = max(d_lo, lo), min(d_hi, hi)
        if d_lo >= hi:
            break
        for d in deps:
            dep = d["deploymentID"]
            start, end = when(d["deploymentStart"]), when(d["deploymentEnd"])
            signs = [when(h["timestamp"]) for h in hbs if h["deploymentID"] == dep]
            signs += [when(o["eventStart"]) for o in obs if o["deploymentID"] == dep]
            iv = up_intervals(start, min(end, hi), signs, silence)
            n = nights(iv, d_lo, d_hi)
            for sp in species:
                ev = [
                    o for o in obs
                    if o["deploymentID"] == dep and o["scientificName"] == sp
                    and d_lo <= when(o["eventStart"]) < d_hi
                ]
                out.append({
                    "day": day.isoformat(),
                    "deploymentID": dep,
                    "scientificName": sp,
                    "events": len(ev),
                    "individuals": sum(int(o["count"]) for o in ev),
                    "camera_nights": n,
                    "rai": (100.0 * len(ev) / n) if n > 0 else None,
                })
        day = nxt
    print(json.dumps(out))


if __name__ == "__main__":
    main()
