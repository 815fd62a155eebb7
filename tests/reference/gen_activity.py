#!/usr/bin/env python3
"""Reference data for outrider's activity engine (service/activity/).

Writes tests/reference/data/activity.json. Deterministic: fixed seeds
(Python's `random`, whose stream is stable across versions), no clock, sorted
keys, so two runs give byte-identical output. Library versions are recorded
in the file's "meta" section.

Sources of truth, by section:
- ln_gamma, gamma_inc, beta_inc: scipy.special (gammaln, gammainc,
  gammaincc, betainc, betaincc).
- poisson_tail, nbinom_tail: scipy.stats (poisson.sf(c - 1, mean),
  nbinom.sf(c - 1, r, p)) and, independently, mpmath at 50 digits
  (regularised incomplete gamma / beta).
- critical_*: smallest c with scipy sf(c - 1) < alpha, by a plain scan.
- spike: METHODS 3 written out here in Python (prior, posterior,
  predictive), p-value from scipy.stats.nbinom.sf.
- cusum: METHODS 4 (Lucas 1985 [memory]) written out here in Python.
- events, effort: METHODS 1 and 2 written out here in Python, separately
  from the Rust code (not a port of it).

Run: target/py/bin/python tests/reference/gen_activity.py
"""

import json
import math
import os
import platform
import random

import mpmath
import numpy
import scipy
from scipy import special, stats

OUT = os.path.join(os.path.dirname(os.path.abspath(__file__)), "data", "activity.json")

mpmath.mp.dps = 50


def f(x):
    """A plain Python float (numpy scalars serialise the same everywhere)."""
    return float(x)


# ---------------------------------------------------------------- special --

def gen_ln_gamma():
    xs = [1e-3, 0.1, 0.5, 0.9, 1.0, 1.5, 2.0, 2.5, 3.7, 9.99, 10.0, 14.5, 15.0,
          27.3, 100.0, 512.5, 1000.0, 12345.6, 1e6]
    return [[x, f(special.gammaln(x))] for x in xs]


def gen_gamma_inc():
    rows = []
    for a in [0.5, 1.0, 3.0, 12.5, 80.0, 501.0]:
        for m in [0.05, 0.3, 0.8, 1.0, 1.3, 2.5, 6.0]:
            x = a * m
            rows.append({"a": a, "x": x, "p": f(special.gammainc(a, x)),
                         "q": f(special.gammaincc(a, x))})
    return rows


def gen_beta_inc():
    rows = []
    for a in [0.5, 1.0, 4.0, 30.5, 400.0]:
        for b in [0.7, 2.0, 15.5, 250.5]:
            for x in [0.001, 0.05, 0.2, 0.5, 0.8, 0.95, 0.999]:
                rows.append({"a": a, "b": b, "x": x,
                             "i": f(special.betainc(a, b, x)),
                             "ic": f(special.betaincc(a, b, x))})
    return rows


def counts_around(mean, sd, cap):
    cs = {1, 2, 3, 5, 10}
    cs.add(max(1, int(round(mean))))
    for j in [1, 2, 3, 4, 6, 8, 10, 14, 20, 30, 45]:
        cs.add(int(round(mean + j * sd + j)))
    for m in [2, 3, 5, 10, 20]:
        cs.add(int(round(mean * m)) + 1)
    return sorted(c for c in cs if 1 <= c <= cap)


def gen_poisson_tail():
    rows = []
    for mean in [0.001, 0.05, 0.3, 1.0, 2.5, 7.0, 20.0, 50.0, 100.0, 250.0, 500.0]:
        for c in counts_around(mean, math.sqrt(mean), 5000):
            mp = mpmath.gammainc(c, 0, mean, regularized=True)
            rows.append({"c": c, "mean": mean, "scipy": f(stats.poisson.sf(c - 1, mean)),
                         "mpmath": float(mp)})
    return rows


def gen_nbinom_tail():
    rows = []
    for r in [0.5, 1.0, 1.9, 5.5, 14.5, 40.5, 150.5, 600.5]:
        for p in [0.05, 0.3, 0.5, 0.8, 0.93, 0.98, 0.995]:
            mean = r * (1 - p) / p
            sd = math.sqrt(mean / p)
            for c in counts_around(mean, sd, 4000):
                q = 1 - mpmath.mpf(p)
                mp = mpmath.betainc(c, r, 0, q, regularized=True)
                rows.append({"c": c, "r": r, "p": p,
                             "scipy": f(stats.nbinom.sf(c - 1, r, p)),
                             "mpmath": float(mp)})
    return rows


def first_below(sf, alpha):
    """Smallest c with sf(c) < alpha, where sf(c) = P(Y >= c); None if the
    answer sits within 1e-6 (relative) of alpha and so could flip on
    rounding."""
    c = 0
    while True:
        t = sf(c)
        if abs(t / alpha - 1) < 1e-6:
            return None
        if t < alpha:
            return c
        c += 1


def gen_critical():
    pois, nb = [], []
    for mean in [0.01, 0.1, 0.5, 1.0, 3.0, 10.0, 30.0, 100.0, 300.0]:
        for alpha in [0.05, 0.01, 0.001]:
            c = first_below(lambda k: 1.0 if k == 0 else f(stats.poisson.sf(k - 1, mean)), alpha)
            if c is not None:
                pois.append({"mean": mean, "alpha": alpha, "c": c})
    for r, p in [(0.5, 0.9), (1.0, 0.5), (1.2, 14 / 15), (3.5, 0.8), (14.5, 0.95),
                 (40.0, 0.6), (120.5, 0.97), (600.5, 0.99)]:
        for alpha in [0.05, 0.01, 0.001]:
            c = first_below(lambda k: 1.0 if k == 0 else f(stats.nbinom.sf(k - 1, r, p)), alpha)
            if c is not None:
                nb.append({"r": r, "p": p, "alpha": alpha, "c": c})
    return pois, nb


# ------------------------------------------------------------------ spike --

def gen_spike(rng):
    """METHODS 3 written out: a0 = r N + 0.5, b0 = N; a = a0 + n, b = b0 + t;
    Y ~ NB(a, b / (b + e)); p = P(Y >= c); spike = p < alpha and c >= min
    and c / (a e / b) >= ratio."""
    rows = []
    while len(rows) < 150:
        regional = rng.choice([0.0, 0.01, 0.05, 0.2, 0.8, 2.5])
        prior_nights = rng.choice([1.0, 7.0, 14.0, 30.0])
        t = rng.choice([0.0, 3.5, 14.0, 27.25, 28.0, 112.0])
        site_rate = rng.choice([0.0, 0.02, 0.1, 0.5, 3.0])
        n = int(round(site_rate * t * rng.uniform(0.5, 1.5)))
        e = rng.choice([0.25, 1.0, 1.0, 3.0, 7.0, 16.0])
        alpha = rng.choice([0.05, 0.01, 0.001])
        min_count = rng.choice([1, 2, 3, 5])
        ratio = rng.choice([1.5, 2.0, 3.0])
        a = regional * prior_nights + 0.5 + n
        b = prior_nights + t
        expected = a * e / b
        c = int(rng.choice([0, 1, 2, 3]) + expected * rng.choice([0.5, 1.0, 2.0, 4.0, 8.0, 15.0]))
        p = b / (b + e)
        pval = 1.0 if c == 0 else f(stats.nbinom.sf(c - 1, a, p))
        obs_ratio = c / expected
        # Skip decisions that sit on a knife edge of rounding.
        if abs(pval / alpha - 1) < 1e-6 or abs(obs_ratio / ratio - 1) < 1e-9:
            continue
        spike = pval < alpha and c >= min_count and obs_ratio >= ratio
        rows.append({"regional_rate": regional, "prior_nights": prior_nights, "n": n, "t": t,
                     "e": e, "c": c, "alpha": alpha, "min_count": min_count, "ratio": ratio,
                     "a": a, "b": b, "expected": expected, "p_value": pval, "spike": spike})
    return rows


# ------------------------------------------------------------------ cusum --

def poisson_draw(rng, lam):
    """Knuth's multiplication method; fine for the small means used here."""
    limit = math.exp(-lam)
    k, prod = 0, rng.random()
    while prod > limit:
        k += 1
        prod *= rng.random()
    return k


def cusum_sequence(rate, ratio, h, floor, xs, es):
    """Lucas's Poisson CUSUM with exposure (METHODS 4)."""
    r0 = max(rate, floor)
    r1 = ratio * r0
    s = 0.0
    ks, ss, sig = [], [], []
    for x, e in zip(xs, es):
        if e == 0:
            ks.append(0.0)
            ss.append(s)
            sig.append(False)
            continue
        k = e * (r1 - r0) / math.log(r1 / r0)
        s = max(0.0, s + x - k)
        signal = s >= h
        ks.append(k)
        ss.append(s)
        sig.append(signal)
        if signal:
            s = 0.0
    return r0, ks, ss, sig


def gen_cusum(rng):
    cases = []
    for rate, ratio, h, floor, days, shift in [
        (0.1, 2.0, 4.0, 0.5 / 42, 120, 60),
        (0.02, 3.0, 3.0, 0.5 / 42, 200, 100),
        (0.0, 3.0, 2.0, 0.5 / 42, 150, 50),  # r0 = 0: floored
        (0.5, 1.5, 6.0, 1e-3, 90, 45),
        (1.4, 2.0, 5.0, 1e-3, 60, 30),
    ]:
        xs, es = [], []
        for d in range(days):
            e = 0.0 if rng.random() < 0.1 else rng.choice([0.5, 1.0, 1.0, 1.0, 2.75, 4.0])
            lam = max(rate, floor) * (ratio if d >= shift else 1.0) * e
            x = poisson_draw(rng, lam)
            if e == 0 and rng.random() < 0.3:
                x = 1  # an event on a zero-effort day still leaves S unchanged
            xs.append(x)
            es.append(e)
        r0, ks, ss, sig = cusum_sequence(rate, ratio, h, floor, xs, es)
        cases.append({"rate": rate, "ratio": ratio, "h": h, "floor": floor, "r0": r0,
                      "x": xs, "e": es, "k": ks, "s": ss, "signal": sig})
    return cases


# ----------------------------------------------------------------- events --

def collapse_events(triggers, interval_s):
    """METHODS 1: first copy of an id wins; group by (deployment, species);
    sort by (instant, id); a gap to the previous trigger > interval starts a
    new event; count = max."""
    kept, ids = [], set()
    for t in triggers:
        if t["id"] in ids:
            continue
        ids.add(t["id"])
        kept.append(t)
    groups = {}
    for t in kept:
        groups.setdefault((t["dep"], t["sp"]), []).append(t)
    out = []
    for key in sorted(groups):
        ts = sorted(groups[key], key=lambda t: (t["t"], t["id"]))
        cur = None
        for t in ts:
            if cur is not None and t["t"] - cur["end"] <= interval_s:
                cur["end"] = t["t"]
                cur["count"] = max(cur["count"], t["n"])
                cur["triggers"] += 1
                cur["ids"].append(t["id"])
            else:
                if cur is not None:
                    out.append(cur)
                cur = {"dep": key[0], "sp": key[1], "start": t["t"], "end": t["t"],
                       "count": t["n"], "triggers": 1, "ids": [t["id"]]}
        if cur is not None:
            out.append(cur)
    return out


def gen_events(rng):
    # 2026-04-04T14:00Z = 2026-04-05 01:00 AEDT, one hour before the fold.
    base = 1775311200
    cases = []
    for case in range(6):
        interval = [1800, 1800, 1800, 600, 3600, 0][case]
        triggers = []
        t = base
        for i in range(80):
            step = rng.choice([0, 60, 60, 61, 300, interval, interval + 1, 2400, 7200])
            t += step
            when = t if rng.random() < 0.8 else base + rng.randrange(0, 6 * 3600)
            triggers.append({"id": "ob-%d-%03d" % (case, i),
                             "dep": rng.choice(["KB-01", "KB-02"]),
                             "sp": rng.choice(["Canis familiaris", "Vulpes vulpes", "Sus scrofa"]),
                             "t": when, "n": rng.randrange(1, 6)})
        for _ in range(10):  # repeated deliveries, exact copies
            triggers.append(dict(rng.choice(triggers)))
        # A same-id copy with different content: the first copy must win.
        first = dict(triggers[0])
        first["n"] = 99
        triggers.append(first)
        rng.shuffle(triggers)
        cases.append({"interval_s": interval, "triggers": triggers,
                      "events": collapse_events(triggers, interval)})
    return cases


# ----------------------------------------------------------------- effort --

def up_seconds(start, end, silence, signs, frm, to, now):
    """METHODS 2: points = start, signs in [start, stop], stop = min(now,
    end); a stretch between consecutive points is up iff <= silence."""
    stop = now if end is None else min(now, end)
    if stop < start:
        return 0
    pts = sorted(set([start, stop] + [s for s in signs if start <= s <= stop]))
    total = 0
    for a, b in zip(pts, pts[1:]):
        if b - a <= silence:
            lo, hi = max(a, frm), min(b, to)
            if hi > lo:
                total += hi - lo
    return total


def silent_since(start, end, silence, signs, now):
    if now < start or (end is not None and now >= end):
        return None
    last = max([start] + [s for s in signs if start <= s <= now])
    return last if now - last > silence else None


def gen_effort(rng):
    base = 1775311200
    hour = 3600
    cases = []
    for case in range(8):
        start = base + rng.randrange(0, 48) * hour
        end = None if case % 3 == 0 else start + rng.randrange(24, 24 * 20) * hour
        silence = rng.choice([6, 12, 24]) * hour
        signs, t = [], start
        for _ in range(rng.randrange(20, 200)):
            t += rng.choice([600, 3600, 3600, silence, silence + 1, silence * 2, 40000])
            signs.append(t)
        signs += [rng.choice(signs) for _ in range(10)]  # duplicates
        signs.append(start - 7200)  # before the start: ignored
        rng.shuffle(signs)
        span_end = max(signs) + 3 * silence
        queries = []
        for _ in range(12):
            now = rng.randrange(start - 2 * hour, span_end)
            frm = rng.randrange(start - 24 * hour, now + 1)
            to = rng.randrange(frm, span_end + 1)
            if rng.random() < 0.3:
                frm, to = start - 10 * 24 * hour, span_end + 10 * 24 * hour
            queries.append({"from": frm, "to": to, "now": now,
                            "nights": up_seconds(start, end, silence, signs, frm, to, now) / 86400,
                            "silent_since": silent_since(start, end, silence, signs, now)})
        cases.append({"start": start, "end": end, "silence_s": silence, "signs": signs,
                      "queries": queries})
    return cases


def main():
    rng = random.Random(20260405)
    crit_pois, crit_nb = gen_critical()
    data = {
        "meta": {
            "generator": "tests/reference/gen_activity.py",
            "python": platform.python_version(),
            "scipy": scipy.__version__,
            "numpy": numpy.__version__,
            "mpmath": mpmath.__version__,
            "mpmath_dps": mpmath.mp.dps,
            "seed": 20260405,
        },
        "ln_gamma": gen_ln_gamma(),
        "gamma_inc": gen_gamma_inc(),
        "beta_inc": gen_beta_inc(),
        "poisson_tail": gen_poisson_tail(),
        "nbinom_tail": gen_nbinom_tail(),
        "critical_poisson": crit_pois,
        "critical_nbinom": crit_nb,
        "spike": gen_spike(rng),
        "cusum": gen_cusum(rng),
        "events": gen_events(rng),
        "effort": gen_effort(rng),
    }
    os.makedirs(os.path.dirname(OUT), exist_ok=True)
    text = json.dumps(data, indent=1, sort_keys=True, allow_nan=False) + "\n"
    with open(OUT, "w", encoding="utf-8", newline="\n") as fh:
        fh.write(text)
    print("wrote %s (%d bytes)" % (OUT, len(text)))


if __name__ == "__main__":
    main()
