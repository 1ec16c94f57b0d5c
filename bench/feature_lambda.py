#!/usr/bin/env python3
"""A smoothing constant per feature for the whitened residual chart: does it reach `gain_change`?

Question measured: the shipped residual chart (model format 4) smooths every
feature's whitened residual g_i with one EWMA constant, lambda = 0.1. On the
demo, `gain_change` (+4 % on the left motor current) shifts its feature's g by
about 0.70 spreads, while that feature's per-log means on nominal data spread
only 0.034 (bench/whitened_residuals.out.md): a slow average would see it, but
a slow EWMA on every feature let the slow features (temperatures, lag-1
autocorrelation near 0.99) set the shared limit and raise false alarms on the
other nominal set (BENCHMARKS.md, attempt 11). Would a constant chosen per
feature, from the calibration logs alone, keep the fast features fast and
make the quiet ones slow?

Statistic: g exactly as bench/whitened_residuals.py (training standardisation
and PCA at 95 %, the residual's covariance on the calibration logs, its
pseudo-inverse, g_i = e_i' S+ (r - mu) / sqrt(e_i' S+ e_i)).

Per-feature constant: for each candidate lambda in CANDIDATES, each feature's
|EWMA| scale s_i(lambda) by the shipped rule (the larger of its quantile with
100 calibration rows beyond it and the prediction bound on a new log's level;
host-tools/src/residual.rs). A persistent shift of delta spreads moves an
EWMA from 0 to delta (1 - (1 - lambda)^n) after n samples, so with the chart's
limit near L (in units of s) it crosses after
    n_i(lambda) = ln(1 - L s_i(lambda) / delta) / ln(1 - lambda)
samples, or never when L s_i(lambda) >= delta. Each feature takes the lambda
with the smallest n_i at the design shift DELTA = 1 spread and L = L0 = 1.8
(the shipped chart's limit on the demo, 1.836: a prior, not tuned here; EWMA
design for a one-sigma shift is the usual textbook case, e.g. Lucas and
Saccucci 1990); ties go to the larger lambda. Then the chart's limit is set as
shipped (the highest scaled value on the calibration logs), raise after 3
samples over it, clear after 50 below half of it and at least 100 raised.

Reported, never tuned on them: flags on the other nominal set and the delays
on each drift log, both ways round (calibrated on demo-logs/generated/
calibration and evaluated on .../evaluation, then the other way), with the
shipped single lambda = 0.1 beside it; and the constant each feature took.

usage (from the repository root, after ./scripts/demo.sh has generated the
sets at 2 x 10^6 rows, the demo's default):
  nice -n 10 .venv/bin/python bench/feature_lambda.py [--out bench/feature_lambda.out.md]
"""
import argparse
import math
import os
import sys
import time

import numpy as np
from scipy.signal import lfilter
from scipy.stats import t as student_t

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
import residual_charts as rc  # noqa: E402  (the shared fit and log readers)
import whitened_residuals as wr  # noqa: E402  (g, the shipped raise/clear rule)

CANDIDATES = [0.1, 0.05, 0.02, 0.01, 0.005, 0.002]
DELTA = 1.0  # design shift, spreads of g
L0 = 1.8  # prior on the chart's limit, units of s


def ewma_abs(g, lams):
    out = np.empty_like(g)
    for i, lam in enumerate(lams):
        out[:, i] = np.abs(lfilter([lam], [1.0, -(1.0 - lam)], g[:, i]))
    return out


def scales(gs, lams):
    """The shipped scale rule, per feature, for per-feature constants `lams`."""
    e = np.vstack([ewma_abs(g, lams) for g in gs])
    tail = np.quantile(e, 1 - wr.TAIL_ROWS / len(e), axis=0)
    levels = np.array([g.mean(axis=0) for g in gs])
    logs, d = levels.shape
    t = student_t.ppf(1 - wr.LEVEL_ALPHA / (2 * d), logs - 1)
    bound = np.abs(levels.mean(axis=0)) + t * levels.std(axis=0, ddof=1) * np.sqrt(1 + 1 / logs)
    return np.maximum(tail, bound)


def delay(s, lam):
    q = L0 * s / DELTA
    return math.inf if q >= 1 else math.log(1 - q) / math.log(1 - lam)


def choose(gs):
    d = gs[0].shape[1]
    by = {lam: scales(gs, [lam] * d) for lam in CANDIDATES}
    lams, notes = [], []
    for i in range(d):
        best = min(CANDIDATES, key=lambda lam: (delay(by[lam][i], lam), -lam))
        lams.append(best)
        notes.append((best, by[0.1][i], by[best][i]))
    return lams, notes


def evaluate(lams, cal_g, ev_g, drift_g, names, truth):
    s = scales(cal_g, lams)
    limit = max(float((ewma_abs(g, lams) / s).max()) for g in cal_g)
    ev_flags = sum(len(wr.flags((ewma_abs(g, lams) / s).max(axis=1), limit)) for g in ev_g)
    cells = wr.drift_cells(lambda name: ewma_abs(drift_g[name], lams) / s, limit, names, truth)
    return limit, ev_flags, sum(len(g) for g in ev_g), cells


def main():
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--out", default=os.path.join(rc.HERE, "feature_lambda.out.md"))
    ap.add_argument("--candidates", type=float, nargs="+", default=CANDIDATES,
                    help="the constants a feature may take (0.1, the shipped one, first)")
    args = ap.parse_args()
    CANDIDATES[:] = args.candidates
    t0 = time.perf_counter()
    names, truth, model, sets, drift_r = wr.residual_sets()
    lines = ["# A smoothing constant per feature for the whitened residual chart "
             "(`bench/feature_lambda.py`)", "",
             f"{wr.sizes(model, sets)}; candidates {CANDIDATES}; design "
             f"shift {DELTA} spread, limit prior {L0}; delays in samples after the onset.", ""]
    lines += wr.table_head("constants")
    chosen = []
    for a, b in [("calibration", "evaluation"), ("evaluation", "calibration")]:
        w = wr.Whitened(sets[a])
        cal_g = [w(r) for r in sets[a]]
        ev_g = [w(r) for r in sets[b]]
        drift_g = {s: w(r) for s, r in drift_r.items()}
        d = len(names)
        lams, notes = choose(cal_g)
        chosen.append((a, lams, notes))
        for label, ls in [("one, 0.1 (shipped)", [0.1] * d), ("per feature", lams)]:
            limit, nf, nrows, cells = evaluate(ls, cal_g, ev_g, drift_g, names, truth)
            lines.append(f"| {label} | {a} | {limit:.3f} | {nf} in {nrows} | " + " | ".join(cells) + " |")
            print(lines[-1], flush=True)
    lines += ["", "Constant per feature (scale at 0.1 → scale at the chosen constant, units of g):", "",
              "| feature | " + " | ".join(f"calibrated on {a}" for a, _, _ in chosen) + " |",
              "|---" * (1 + len(chosen)) + "|"]
    for i, n in enumerate(names):
        lines.append(f"| {n} | " + " | ".join(
            f"{notes[i][0]:g} ({notes[i][1]:.3f} → {notes[i][2]:.3f})" for _, _, notes in chosen) + " |")
    rc.write_report(lines, t0, args.out)


if __name__ == "__main__":
    main()
