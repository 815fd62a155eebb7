#!/usr/bin/env python3
"""Reference data for outrider's civil twilight and dusk-to-dawn decisions
(service/geo/solar.rs).

Source: Python `astral` (NOAA solar calculator equations after Meeus),
astral.sun.dawn / astral.sun.dusk with depression 6 degrees (civil), observer
at elevation 0, times returned in the site's IANA zone (Python zoneinfo) and
stored as UTC Unix seconds. astral raises ValueError when the event does not
happen on the local date: stored as null.

Places: the invented Kellerby Basin point (-31.6, 148.1), and well-known
capital-city coordinates (from memory): Sydney, Brisbane, Perth, Darwin,
Hobart. Dates: every 5th day of 2026 plus the Australia/Sydney DST change
days (2026-04-05, 2026-10-04) and their neighbours, and the solstices.

Night samples apply METHODS.md section 6 to astral's times: night iff before
civil dawn or at/after civil dusk of the instant's local date. Every sample
is at least 10 minutes from a dawn or dusk (the tolerance is 2 minutes).

Deterministic: no clock; rerun gives identical bytes.
Run: target/py/bin/python tests/reference/gen_solar.py
"""
import datetime as dt
import importlib.metadata as md
import json
import os
import sys
import zoneinfo
from zoneinfo import ZoneInfo

from astral import Observer
from astral.sun import dawn, dusk

OUT = os.path.join(os.path.dirname(os.path.abspath(__file__)), "data", "solar.json")
UTC = dt.timezone.utc
# Use the pinned `tzdata` package, never the system zone files.
zoneinfo.reset_tzpath(to=[])

PLACES = [
    ("Kellerby Basin", -31.6, 148.1, "Australia/Sydney"),
    ("Sydney", -33.8688, 151.2093, "Australia/Sydney"),
    ("Brisbane", -27.4698, 153.0251, "Australia/Brisbane"),
    ("Perth", -31.9523, 115.8613, "Australia/Perth"),
    ("Darwin", -12.4634, 130.8456, "Australia/Darwin"),
    ("Hobart", -42.8821, 147.3272, "Australia/Hobart"),
]


def dates():
    d0 = dt.date(2026, 1, 1)
    out = {d0 + dt.timedelta(days=k) for k in range(0, 365, 5)}
    for s in ["2026-04-04", "2026-04-05", "2026-04-06", "2026-10-03", "2026-10-04",
              "2026-10-05", "2026-06-21", "2026-12-21"]:
        out.add(dt.date.fromisoformat(s))
    return sorted(out)


def event(fn, obs, date, tz):
    try:
        return fn(obs, date=date, depression=6.0, tzinfo=tz)
    except ValueError:
        return None


def ts(t):
    return None if t is None else round(t.astimezone(UTC).timestamp(), 3)


def main():
    days = []
    samples = []
    for name, lat, lon, zone in PLACES:
        tz = ZoneInfo(zone)
        obs = Observer(latitude=lat, longitude=lon, elevation=0.0)
        for date in dates():
            a, b = event(dawn, obs, date, tz), event(dusk, obs, date, tz)
            days.append({"place": name, "lat": lat, "lon": lon, "tz": zone, "date": date.isoformat(),
                         "dawn_utc_s": ts(a), "dusk_utc_s": ts(b)})
            if a is None or b is None:
                continue
            m10 = dt.timedelta(minutes=10)
            local = [dt.datetime.combine(date, dt.time(h, mi), tz) for h, mi in [(0, 30), (12, 0), (23, 30)]]
            for inst in [a - m10, a + m10, b - m10, b + m10] + local:
                inst_utc = inst.astimezone(UTC)
                # Every sample must lie on the same local date, away from events.
                assert inst_utc.astimezone(tz).date() == date
                assert min(abs(inst_utc - a), abs(inst_utc - b)) >= m10
                night = inst_utc < a.astimezone(UTC) or inst_utc >= b.astimezone(UTC)
                samples.append({"place": name, "lat": lat, "lon": lon, "tz": zone,
                                "instant_utc_s": round(inst_utc.timestamp(), 3), "night": night})
    data = {
        "generator": "tests/reference/gen_solar.py",
        "versions": {"python": sys.version.split()[0], "astral": md.version("astral"),
                     "tzdata": md.version("tzdata")},
        "source": "astral.sun.dawn/dusk depression=6, elevation 0 (NOAA equations after Meeus)",
        "tolerance_s": 120,
        "days": days,
        "night_samples": samples,
    }
    with open(OUT, "w", encoding="utf-8") as f:
        json.dump(data, f, indent=1, sort_keys=True)
        f.write("\n")


if __name__ == "__main__":
    main()
