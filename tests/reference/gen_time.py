#!/usr/bin/env python3
"""Reference data for outrider's local-time rules (service/calendar/local.rs,
window.rs).

Source: Python `zoneinfo` with the pinned `tzdata` package (system zone files
are switched off with reset_tzpath). Conventions (METHODS.md section 6,
docs/geography-and-time.md):
- a local time in an autumn fold resolves to its first occurrence: zoneinfo
  fold=0 (PEP 495: fold=0 is the earlier instant);
- a local time in a spring-forward gap resolves to the first instant after the
  jump, i.e. the transition: found here by scanning UTC seconds between the
  two PEP 495 readings (fold=1 and fold=0) for the change of utcoffset;
- a local day is [local midnight, next local midnight);
- the next occurrence of a daily local time is the smallest resolved instant
  strictly after the given instant.

Zones: Australia/Sydney (DST changes 2026-04-05 and 2026-10-04),
Australia/Lord_Howe (30-minute DST), Australia/Adelaide (half-hour offset),
Australia/Brisbane and Australia/Perth (no DST), Europe/London and
America/New_York (northern changes).

Deterministic: no clock; rerun gives identical bytes.
Run: target/py/bin/python tests/reference/gen_time.py
"""
import datetime as dt
import importlib.metadata as md
import json
import os
import sys
import zoneinfo
from zoneinfo import ZoneInfo

zoneinfo.reset_tzpath(to=[])
UTC = dt.timezone.utc
OUT = os.path.join(os.path.dirname(os.path.abspath(__file__)), "data", "time.json")

ZONES = ["Australia/Sydney", "Australia/Lord_Howe", "Australia/Adelaide", "Australia/Brisbane",
         "Australia/Perth", "Europe/London", "America/New_York"]
# Change days of 2026 per zone (and a plain day), from the zone data itself.


def change_dates(tz, year=2026):
    out = []
    d = dt.date(year, 1, 1)
    while d.year == year:
        a = dt.datetime.combine(d, dt.time(0), tz).utcoffset()
        b = dt.datetime.combine(d + dt.timedelta(days=1), dt.time(0), tz).utcoffset()
        if a != b:
            out.append(d)
        d += dt.timedelta(days=1)
    return out


def resolve(date, time, tz):
    """Returns (utc datetime, kind) with kind in single/fold/gap."""
    naive = dt.datetime.combine(date, time)
    a = naive.replace(tzinfo=tz, fold=0)
    b = naive.replace(tzinfo=tz, fold=1)
    ua, ub = a.astimezone(UTC), b.astimezone(UTC)
    back = ua.astimezone(tz).replace(tzinfo=None)
    if back != naive:
        # Gap: scan between the two readings for the first second whose
        # local reading is >= the wanted time.
        lo, hi = min(ua, ub), max(ua, ub)
        t = lo
        while t.astimezone(tz).replace(tzinfo=None) < naive:
            t += dt.timedelta(seconds=60)
        t -= dt.timedelta(seconds=60)
        while t.astimezone(tz).replace(tzinfo=None) < naive:
            t += dt.timedelta(seconds=1)
        assert lo <= t <= hi
        return t, "gap"
    if ua != ub:
        return min(ua, ub), "fold"
    return ua, "single"


def iso(t):
    return t.astimezone(UTC).strftime("%Y-%m-%dT%H:%M:%SZ")


def main():
    resolves, bounds, samples, nexts = [], [], [], []
    times = [dt.time(h, m) for h, m in [(0, 0), (0, 30), (1, 30), (1, 59), (2, 0), (2, 15), (2, 30),
                                        (2, 59), (3, 0), (3, 30), (8, 0), (12, 0), (23, 59)]]
    windows = ["01:30-02:30", "02:00-03:00", "21:30-05:00", "02:30-02:45", "00:00-08:00"]
    for zone in ZONES:
        tz = ZoneInfo(zone)
        days = set()
        for c in change_dates(tz):
            for k in (-1, 0, 1):
                days.add(c + dt.timedelta(days=k))
        days.add(dt.date(2026, 7, 15))
        days.add(dt.date(2026, 1, 15))
        for d in sorted(days):
            for t in times:
                u, kind = resolve(d, t, tz)
                resolves.append({"tz": zone, "date": d.isoformat(), "time": t.strftime("%H:%M"),
                                 "utc": iso(u), "kind": kind})
            s, _ = resolve(d, dt.time(0), tz)
            e, _ = resolve(d + dt.timedelta(days=1), dt.time(0), tz)
            bounds.append({"tz": zone, "date": d.isoformat(), "start": iso(s), "end": iso(e),
                           "minutes": int((e - s).total_seconds() // 60)})
        # Samples every 20 minutes (offset 7 min) over each change day +-1.
        for c in change_dates(tz):
            start, _ = resolve(c - dt.timedelta(days=1), dt.time(0), tz)
            end, _ = resolve(c + dt.timedelta(days=2), dt.time(0), tz)
            u = start + dt.timedelta(minutes=7)
            while u < end:
                local = u.astimezone(tz)
                lt = local.time().replace(tzinfo=None)
                inside = {}
                for w in windows:
                    a, b = [dt.time.fromisoformat(x) for x in w.split("-")]
                    inside[w] = (a <= lt < b) if a < b else (lt >= a or lt < b)
                samples.append({"tz": zone, "utc": iso(u), "local_date": local.date().isoformat(),
                                "local_time": lt.strftime("%H:%M:%S"), "in_window": inside})
                u += dt.timedelta(minutes=20)
            # Next occurrences of several daily times from instants around the change.
            u = start + dt.timedelta(minutes=13)
            while u < end:
                for t in [dt.time(2, 30), dt.time(2, 0), dt.time(3, 0), dt.time(7, 0), dt.time(0, 0)]:
                    local_day = u.astimezone(tz).date()
                    cands = [resolve(local_day + dt.timedelta(days=k), t, tz)[0] for k in range(-1, 3)]
                    nxt = min(c2 for c2 in cands if c2 > u)
                    nexts.append({"tz": zone, "after": iso(u), "time": t.strftime("%H:%M"), "next": iso(nxt)})
                u += dt.timedelta(minutes=97)
    data = {
        "generator": "tests/reference/gen_time.py",
        "versions": {"python": sys.version.split()[0], "tzdata": md.version("tzdata")},
        "source": "Python zoneinfo + tzdata (PEP 495 fold=0 = first occurrence; gap -> transition instant)",
        "resolve": resolves,
        "day_bounds": bounds,
        "samples": samples,
        "next_occurrence": nexts,
    }
    with open(OUT, "w", encoding="utf-8") as f:
        json.dump(data, f, indent=1, sort_keys=True)
        f.write("\n")


if __name__ == "__main__":
    main()
