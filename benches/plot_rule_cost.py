"""Draws docs/rule-cost.png: rule-matching cost against subscribers.

Reads what `cargo bench --bench engine -- rule_matching` left under
target/criterion/: each size's mean time per event
(rule_matching/<n>/new/estimates.json) and the number of watches matched
per event (rule_matching_meta.csv, written by benches/engine.rs).

    target/py/bin/pip install matplotlib     # once; not a test requirement
    target/py/bin/python benches/plot_rule_cost.py
"""

import csv
import json
import pathlib

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402

ROOT = pathlib.Path(__file__).resolve().parent.parent
CRIT = ROOT / "target" / "criterion"
OUT = ROOT / "docs" / "rule-cost.png"


def main():
    rows = []
    with open(CRIT / "rule_matching_meta.csv") as f:
        for r in csv.DictReader(f):
            n = int(r["subscribers"])
            est = json.loads((CRIT / "rule_matching" / str(n) / "new" / "estimates.json").read_text())
            mean_ns = est["mean"]["point_estimate"]
            lo = est["mean"]["confidence_interval"]["lower_bound"]
            hi = est["mean"]["confidence_interval"]["upper_bound"]
            rows.append((n, int(r["matched_watches"]), mean_ns, lo, hi))
    rows.sort()
    ns = [r[0] for r in rows]
    per_event_ms = [r[2] / 1e6 for r in rows]
    per_watch_us = [r[2] / 1e3 / r[1] for r in rows]
    err_lo = [(r[2] - r[3]) / 1e3 / r[1] for r in rows]
    err_hi = [(r[4] - r[2]) / 1e3 / r[1] for r in rows]

    fig, (a, b) = plt.subplots(1, 2, figsize=(10, 4))
    a.loglog(ns, per_event_ms, "o-")
    for n, m, y in zip(ns, [r[1] for r in rows], per_event_ms):
        a.annotate(f"{m} watches", (n, y), textcoords="offset points", xytext=(4, -12), fontsize=8)
    a.set_xlabel("subscribers (10,000 sites, 1-20 km circles)")
    a.set_ylabel("time per new event (ms)")
    a.set_title("Engine::apply, one new event")
    a.grid(True, which="both", alpha=0.3)

    b.errorbar(ns, per_watch_us, yerr=[err_lo, err_hi], fmt="o-", capsize=3)
    b.axhline(1.0, color="red", linestyle="--", label="target: 1 us per matched watch")
    b.set_xscale("log")
    b.set_ylim(bottom=0)
    b.set_xlabel("subscribers")
    b.set_ylabel("time per matched watch (us)")
    b.set_title("cost per matched watch")
    b.legend()
    b.grid(True, which="both", alpha=0.3)

    fig.suptitle("outrider rule matching (synthetic Kellerby Basin grid)")
    fig.tight_layout()
    fig.savefig(OUT, dpi=110)
    print(f"wrote {OUT}")
    for n, m, ns_, _, _ in rows:
        print(f"{n:>9} subscribers: {m:>6} matched, {ns_ / 1e3:10.1f} us/event, {ns_ / 1e3 / m:6.2f} us/watch")


if __name__ == "__main__":
    main()
