#!/usr/bin/env python3
"""Short-memory charts on the SPE of the demo model: can any flag `loose_mount` sooner?

Question measured: the `loose_mount` step is flagged 8 samples after its onset
by both `plumb demo`'s detector and the per-sample SPE baseline. Do charts
built for large, abrupt shifts do better at the same false-alarm rate?

Input: the model `plumb demo` writes (out/demo/tugger.plumb) and its
calibration and evaluation sets (demo-logs/generated/, written by
`plumb demo`). Every score comes from `plumb replay --trace` of that model
(the firmware detector on the host), so nothing here refits anything.

Monitored value: the model's own standardised SPE, u = (cbrt(SPE) − center)
/ spread, with center and spread from `plumb inspect --json`.

Charts (each alone; limit chosen on the calibration set only, never on the
drift logs):
  * one-sided CUSUM (Page 1954) with a large reference value k = 2, 3, 4, 5
    (tuned to shifts of 2k spreads), restarted from 0 after an alarm and at
    each log; the limit h is the smallest (bisection) with at most one
    calibration alarm;
  * run rules: an alarm when r consecutive samples all have u > a, for
    r = 1 … 8 (r = 1 is the per-sample chart); an episode of consecutive
    qualifying samples counts once; a is the smallest with at most one
    calibration episode.
At most one calibration alarm per chart: about the per-chart share of the
10⁻⁵ per sample the detector is calibrated to (BENCHMARKS.md, calibration).

Reported: the limit, alarms on the evaluation set, and the delay from the
onset (row 3000, demo-logs/truth.csv) to the first alarm at or after it on
each drift log.

usage (repository root, after ./scripts/demo.sh --nominal-rows 1000000, the
size these figures were measured at):
  nice -n 10 .venv/bin/python bench/step_charts.py [--plumb target/release/plumb]
        [--model out/demo/tugger.plumb]
"""
import argparse
import json
import os
import subprocess
import sys
import tempfile

import numpy as np
from numpy.lib.stride_tricks import sliding_window_view

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(HERE)
LOGS = os.path.join(ROOT, "demo-logs")
SCENARIOS = ["loose_mount", "new_floor", "bearing_wear", "gain_change"]
ONSET = 3000


def trace(plumb, model, path, out):
    """(log index per row, SPE per row) from `plumb replay --trace`."""
    subprocess.run([plumb, "replay", model, path, "--trace", out, "-q"],
                   stdout=subprocess.DEVNULL, check=False)
    if not os.path.exists(out):
        sys.exit(f"plumb replay wrote no trace for {path}")
    a = np.genfromtxt(out, delimiter=",", names=True, usecols=(0, 3))
    return a["log"].astype(int), a["spe"]


def by_log(logs, u):
    return [u[logs == i] for i in np.unique(logs)]


def cusum_alarms(u, k, h):
    """Alarm rows of a one-sided CUSUM on one log, restarting after each alarm."""
    rows, c = [], 0.0
    for i, x in enumerate(u):
        c = max(0.0, c + x - k)
        if c > h:
            rows.append(i)
            c = 0.0
    return rows


def run_alarms(u, r, a):
    """First rows of episodes where r consecutive samples exceed a."""
    if len(u) < r:
        return []
    ok = sliding_window_view(u, r).min(axis=1) > a
    starts = np.flatnonzero(ok & ~np.concatenate(([False], ok[:-1])))
    return list(starts + r - 1)


def smallest_limit(count, hi):
    """Smallest limit in [0, hi] (bisection, 1e-4) with count(limit) ≤ 1."""
    lo = 0.0
    while hi - lo > 1e-4:
        mid = 0.5 * (lo + hi)
        if count(mid) <= 1:
            hi = mid
        else:
            lo = mid
    return hi


def first_after_onset(rows):
    late = [r for r in rows if r >= ONSET]
    return str(late[0] - ONSET) if late else "none"


def main():
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--plumb", default=os.path.join(ROOT, "target", "release", "plumb"))
    ap.add_argument("--model", default=os.path.join(ROOT, "out", "demo", "tugger.plumb"))
    args = ap.parse_args()
    for p in (args.plumb, args.model, os.path.join(LOGS, "generated", "calibration")):
        if not os.path.exists(p):
            sys.exit(f"{p} is missing: run ./scripts/demo.sh first")

    info = json.loads(subprocess.run([args.plumb, "inspect", args.model, "--json"],
                                     stdout=subprocess.PIPE, check=True).stdout)
    spe = next(l for l in info["limits"] if l["score"] == "spe")
    to_u = lambda q: (np.cbrt(q) - spe["center"]) / spe["spread"]

    with tempfile.TemporaryDirectory() as tmp:
        sets = {}
        for name in ("calibration", "evaluation"):
            logs, q = trace(args.plumb, args.model, os.path.join(LOGS, "generated", name),
                            os.path.join(tmp, name + ".csv"))
            sets[name] = by_log(logs, to_u(q))
        drift = {}
        for s in SCENARIOS:
            _, q = trace(args.plumb, args.model, os.path.join(LOGS, "drift", s + ".csv"),
                         os.path.join(tmp, s + ".csv"))
            drift[s] = to_u(q)
    cal, ev = sets["calibration"], sets["evaluation"]
    n_cal, n_ev = sum(map(len, cal)), sum(map(len, ev))
    top = max(float(u.max()) for u in cal)

    print(f"# Short-memory charts on the demo model's SPE\n")
    print(f"Model {os.path.relpath(args.model, ROOT)} (id {info['model']['id']}); u of SPE: "
          f"center {spe['center']:.5f}, spread {spe['spread']:.5f}; calibration {n_cal} rows, "
          f"evaluation {n_ev} rows; at most 1 calibration alarm per chart.\n")
    q = np.concatenate(cal)
    print("u on calibration: median {:.2f}, 99 % {:.2f}, 99.9 % {:.2f}, 99.99 % {:.2f}, "
          "max {:.2f}\n".format(*np.percentile(q, [50, 99, 99.9, 99.99]), top))
    print("| chart | limit | evaluation alarms | "
          + " | ".join(f"`{s}`" for s in SCENARIOS) + " |")
    print("|---" * (3 + len(SCENARIOS)) + "|")
    for k in (2.0, 3.0, 4.0, 5.0):
        count = lambda h, us: sum(len(cusum_alarms(u, k, h)) for u in us)
        # h above the largest possible sum means no alarm: the sum of (u − k)⁺ per log.
        hi = max(float(np.clip(u - k, 0, None).sum()) for u in cal) + 1.0
        h = smallest_limit(lambda h: count(h, cal), hi)
        cells = [first_after_onset(cusum_alarms(drift[s], k, h)) for s in SCENARIOS]
        print(f"| CUSUM k = {k:g} | h = {h:.2f} | {count(h, ev)} | " + " | ".join(cells) + " |")
    for r in (1, 2, 3, 4, 5, 6, 8):
        count = lambda a, us: sum(len(run_alarms(u, r, a)) for u in us)
        a = smallest_limit(lambda a: count(a, cal), top + 1.0)
        cells = [first_after_onset(run_alarms(drift[s], r, a)) for s in SCENARIOS]
        label = "per-sample u > a" if r == 1 else f"{r} in a row over a"
        print(f"| {label} | a = {a:.2f} | {count(a, ev)} | " + " | ".join(cells) + " |")


if __name__ == "__main__":
    main()
