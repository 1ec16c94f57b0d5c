#!/usr/bin/env python3
"""SPE standardised per operating mode: do the demo drift scenarios get flagged sooner?

Question measured: the nominal SPE of the demo model wanders between operating
modes (BENCHMARKS.md, "Detection on the demo scenario": excursions of hundreds
of samples), so every chart on it needs a high limit. If the SPE is
standardised with a centre and spread per mixture component (the operating
mode the sample most likely comes from), is the nominal series tighter, and do
charts on it flag the drift scenarios sooner at the same false-alarm rate?

Steps (float64, numpy, scipy and scikit-learn):

1. Standardisation and PCA as `plumb fit` does (bench/residual_charts.py,
   `Residuals`: training mean, ddof = 0 scale, eigenvectors of the training
   correlation matrix, the fewest m components reaching 95 % of the variance).
2. A diagonal Gaussian mixture with k = 8 components on the training latent
   scores (scikit-learn `GaussianMixture`, diag, n_init = 4, seed 0; the same
   kind of mixture as `plumb fit`, fitted here, not read from a model file).
3. Per sample: g = cbrt(SPE) (the detector's transform of SPE, Wilson and
   Hilferty 1931) and the mode c = the component of highest posterior.
   Global score u = (g − μ)/σ with μ, σ over the calibration logs
   (demo-logs/generated/calibration, 10⁶ rows, seed 1001); mode score
   v = (g − μ_c)/σ_c with μ_c, σ_c over the calibration rows of mode c.
4. One-sided upper charts on u and on v: per sample (Shewhart 1931), EWMA
   with λ = 0.1 and 0.02 (Roberts 1959), CUSUM with k = 0.5 and 1 (Page 1954);
   each starts at 0 at each log and after an alarm. Limit: the smallest
   (bisection) with at most 9 alarms on the calibration logs (10⁻⁵ per sample
   budget, rounded down, less one: the project's rule).
5. Reported, never tuned on: alarms on the evaluation logs
   (demo-logs/generated/evaluation, 10⁶ rows, seed 2002) per 10⁵ samples, and
   each drift log's delay from the onset (row 3000) to the first alarm at or
   after it. The per-sample chart on u is the issue's baseline (a per-sample
   SPE limit at the same false-alarm rate; cbrt is monotone).
6. A scheme of three charts at a third of the budget each (at most 3
   calibration alarms per chart, so at most 9 together): the per-sample
   chart on u, the EWMA λ = 0.1 on v and the CUSUM k = 1 on v; its delay is
   the first alarm of any of them, and its evaluation alarms are counted
   together. What a detector combining the two scores could reach.
7. Diagnostics: the share of the variance of g between modes on the
   calibration logs, the lag-1 autocorrelation of u and of v, and the
   99.9 % quantile and maximum of each.

usage (from the repository root, after `./scripts/demo.sh --nominal-rows 1000000` wrote the
calibration and evaluation logs):
  nice -n 10 .venv/bin/python bench/mode_charts.py [--out bench/mode_charts.out.md]
"""
import argparse
import os
import sys
import time

import numpy as np
from scipy.signal import lfilter
from sklearn.mixture import GaussianMixture

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, HERE)
import residual_charts as rc  # noqa: E402  (data, the PCA fit, alarms and limits)

K = 8
BUDGET = 9  # alarms allowed on the 10⁶ calibration rows


class Upper:
    """A one-sided upper chart with a statistic from 0 (interface of residual_charts)."""

    def __init__(self, name, stat):
        self.name, self._stat = name, stat

    def stat(self, u):
        return self._stat(u)


def ewma(lam):
    return Upper(f"EWMA λ={lam:g}", lambda u: lfilter([lam], [1.0, -(1.0 - lam)], u, axis=0))


def cusum(k):
    return Upper(f"CUSUM k={k:g}", lambda u: rc.Cusum._one_side(u - k))


CHARTS = [Upper("per sample", lambda u: u), ewma(0.1), ewma(0.02), cusum(0.5), cusum(1.0)]


def first_alarm(series, chart, h):
    """(delay of the first alarm at or after the onset or None, alarms before it) on a drift log."""
    rows = rc.alarms_in(chart, series[:, 0], chart.stat(series)[:, 0], h)
    late = [r - rc.ONSET for r in rows if r >= rc.ONSET]
    return (late[0] if late else None), len(rows) - len(late)


def cell(first, early):
    return ("none" if first is None else str(first)) + (f" ({early} before)" if early else "")


def lag1(x):
    x = x - x.mean()
    return float(np.dot(x[1:], x[:-1]) / np.dot(x, x))


def main():
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--out", default=os.path.join(HERE, "mode_charts.out.md"))
    args = ap.parse_args()
    t0 = time.perf_counter()

    _, train, cal_x, ev_x, drift_x = rc.read_study_logs()
    model = rc.Residuals(train)
    m = model.m
    # Latent scores: the first m eigenvectors (Residuals keeps only the projector).
    z_train = (train - model.mean) / model.scale
    corr = z_train.T @ z_train / len(z_train)
    values, vectors = np.linalg.eigh(corr)
    p = vectors[:, np.argsort(values)[::-1][:m]]
    gmm = GaussianMixture(K, covariance_type="diag", n_init=4, random_state=0).fit(z_train @ p)

    def scores(x):
        z = (x - model.mean) / model.scale
        r = z @ model.projector
        g = np.cbrt(np.einsum("ij,ij->i", r, r))
        return g, gmm.predict(z @ p)

    cal = [scores(x) for x in cal_x]
    ev = [scores(x) for x in ev_x]
    drift = {s: scores(x) for s, x in drift_x.items()}
    del cal_x, ev_x, drift_x

    g_all = np.concatenate([g for g, _ in cal])
    c_all = np.concatenate([c for _, c in cal])
    mu, sd = g_all.mean(), g_all.std()
    mu_c = np.array([g_all[c_all == c].mean() if (c_all == c).any() else mu for c in range(K)])
    sd_c = np.array([g_all[c_all == c].std() if (c_all == c).sum() > 1 else sd for c in range(K)])
    share = np.array([(c_all == c).mean() for c in range(K)])
    between = float((share * (mu_c - mu) ** 2).sum() / sd**2)

    glob = lambda gc: ((gc[0] - mu) / sd)[:, None]
    mode = lambda gc: ((gc[0] - mu_c[gc[1]]) / sd_c[gc[1]])[:, None]

    lines = [
        "# SPE standardised per operating mode (`bench/mode_charts.py`)",
        "",
        f"m = {m}, k = {K}; calibration {len(g_all):,} rows, evaluation "
        f"{sum(len(g) for g, _ in ev):,} rows; at most {BUDGET} calibration alarms per chart.",
        "",
        f"Variance of cbrt(SPE) between modes: {between:.1%} of the total.",
        "",
        "| mode | share of calibration rows | centre μ_c | spread σ_c |",
        "|---|---|---|---|",
    ]
    lines += [f"| {c} | {share[c]:.3f} | {mu_c[c]:.4f} | {sd_c[c]:.4f} |" for c in range(K)]
    lines += ["", f"Global: centre {mu:.4f}, spread {sd:.4f}.", ""]
    lines += ["| series | lag-1 autocorrelation | 99.9 % quantile | maximum |", "|---|---|---|---|"]
    for label, f in [("u (global)", glob), ("v (per mode)", mode)]:
        s = np.concatenate([f(gc)[:, 0] for gc in cal])
        lines.append(f"| {label} | {lag1(s):.3f} | {np.quantile(s, 0.999):.2f} | {s.max():.2f} |")
    lines += ["", "| series | chart | limit | evaluation alarms per 10⁵ | "
              + " | ".join(f"`{s}`" for s in rc.SCENARIOS) + " |",
              "|---" * (4 + len(rc.SCENARIOS)) + "|"]
    for label, f in [("u (global)", glob), ("v (per mode)", mode)]:
        cal_u = [f(gc) for gc in cal]
        ev_u = [f(gc) for gc in ev]
        for chart in CHARTS:
            cal_st = [chart.stat(u) for u in cal_u]
            h = rc.search_limit(chart, cal_u, cal_st, BUDGET)
            ev_alarms = rc.scheme_alarms(chart, ev_u, [chart.stat(u) for u in ev_u], h)
            per = 1e5 * len(ev_alarms) / sum(len(u) for u in ev_u)
            cells = [cell(*first_alarm(f(drift[s]), chart, h)) for s in rc.SCENARIOS]
            lines.append(f"| {label} | {chart.name} | {h:.3f} | {per:.2f} | " + " | ".join(cells) + " |")
            print(lines[-1], flush=True)
    # The scheme: three charts at a third of the budget each.
    scheme = [(glob, CHARTS[0]), (mode, CHARTS[1]), (mode, CHARTS[4])]
    ev_total = 0
    first = {s: None for s in rc.SCENARIOS}
    early = {s: 0 for s in rc.SCENARIOS}
    parts = []
    for f, chart in scheme:
        cal_u = [f(gc) for gc in cal]
        h = rc.search_limit(chart, cal_u, [chart.stat(u) for u in cal_u], BUDGET // 3)
        ev_u = [f(gc) for gc in ev]
        ev_total += len(rc.scheme_alarms(chart, ev_u, [chart.stat(u) for u in ev_u], h))
        parts.append(f"{chart.name} on {'u' if f is glob else 'v'} (limit {h:.3f})")
        for s in rc.SCENARIOS:
            delay, before = first_alarm(f(drift[s]), chart, h)
            early[s] += before
            if delay is not None and (first[s] is None or delay < first[s]):
                first[s] = delay
    per = 1e5 * ev_total / sum(len(g) for g, _ in ev)
    cells = [cell(first[s], early[s]) for s in rc.SCENARIOS]
    lines += ["", "Scheme: " + "; ".join(parts) + ", at most 3 calibration alarms each.", "",
              "| scheme | evaluation alarms per 10⁵ | "
              + " | ".join(f"`{s}`" for s in rc.SCENARIOS) + " |",
              "|---" * (2 + len(rc.SCENARIOS)) + "|",
              f"| three charts | {per:.2f} | " + " | ".join(cells) + " |"]
    rc.write_report(lines, t0, args.out)


if __name__ == "__main__":
    main()
