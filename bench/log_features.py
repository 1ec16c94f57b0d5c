#!/usr/bin/env python3
"""Energy features on a log scale: do the demo drift scenarios get flagged sooner?

Question measured: `plumb fit` standardises every feature linearly. The demo's
vibration band energies and IMU RMS values are positive and vary by factors
with speed and load, and the drifts that remain slow to flag (`loose_mount`,
`bearing_wear`) multiply some of them. If those features enter the PCA as
logarithms, does the SPE flag the scenarios sooner at the same false-alarm
rate? (A study for a possible per-feature transform in a later model format;
nothing here is built into plumbline.)

Steps (float64, numpy and scipy):

1. Two versions of every log: as logged, and with each energy feature
   (`vib_band*`, `accel_rms_*`, `gyro_rms`, `jerk_rms`: all positive in the
   demo logs; a value below 10⁻⁶ of the feature's training median would be
   clamped there, and the count of clamped cells is printed) replaced by its
   natural logarithm. Other features unchanged.
2. For each version, standardisation and PCA as `plumb fit` does
   (bench/residual_charts.py, `Residuals`: fewest components reaching 95 % of
   the variance) on demo-logs/train; g = cbrt(SPE) (the detector's transform,
   Wilson and Hilferty 1931); u = (g − μ)/σ with μ, σ over the calibration
   logs (demo-logs/generated/calibration, 10⁶ rows, seed 1001).
3. One-sided upper charts on u: per sample (Shewhart 1931), EWMA λ = 0.1
   (Roberts 1959), CUSUM k = 1 (Page 1954); each starts at 0 at each log and
   after an alarm. Limit: the smallest (bisection) with at most 9 alarms on the
   calibration logs (the project's rule at 10⁻⁵ per sample for one chart, as
   in bench/mode_charts.py). The per-sample chart on the logs as logged is the
   issue's baseline.
4. Reported, never tuned on: alarms on the evaluation logs
   (demo-logs/generated/evaluation, 10⁶ rows, seed 2002) per 10⁵ samples and
   each drift log's delay from the onset (row 3000) to the first alarm at or
   after it; a scheme of the three charts at 3 calibration alarms each.

usage (from the repository root, after `./scripts/demo.sh --nominal-rows 1000000` wrote the
calibration and evaluation logs):
  nice -n 10 .venv/bin/python bench/log_features.py [--out bench/log_features.out.md]
"""
import argparse
import os
import sys
import time

import numpy as np

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, HERE)
import mode_charts as mc  # noqa: E402  (one-sided charts, first alarm, cells)
import residual_charts as rc  # noqa: E402  (data, the PCA fit, alarms and limits)

ENERGY = ("vib_band", "accel_rms_", "gyro_rms", "jerk_rms")
CHARTS = [mc.CHARTS[0], mc.CHARTS[1], mc.CHARTS[4]]  # per sample, EWMA λ = 0.1, CUSUM k = 1


def main():
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--out", default=os.path.join(HERE, "log_features.out.md"))
    args = ap.parse_args()
    t0 = time.perf_counter()

    names, train, cal_x, ev_x, drift_x = rc.read_study_logs()
    energy = [i for i, n in enumerate(names) if n.startswith(ENERGY)]
    floor = 1e-6 * np.median(train[:, energy], axis=0)

    lines = [
        "# Energy features on a log scale (`bench/log_features.py`)",
        "",
        f"Energy features ({len(energy)}): " + ", ".join(names[i] for i in energy) + ".",
        f"Calibration {sum(len(x) for x in cal_x):,} rows, evaluation "
        f"{sum(len(x) for x in ev_x):,} rows; at most {mc.BUDGET} calibration alarms per chart.",
        "",
        "| features | m | chart | limit | evaluation alarms per 10⁵ | "
        + " | ".join(f"`{s}`" for s in rc.SCENARIOS) + " |",
        "|---" * (5 + len(rc.SCENARIOS)) + "|",
    ]
    clamped = 0

    def logged(x):
        nonlocal clamped
        y = x.copy()
        e = y[:, energy]
        clamped += int((e < floor).sum())
        y[:, energy] = np.log(np.maximum(e, floor))
        return y

    schemes = []
    for label, f in [("as logged", lambda x: x), ("log of energies", logged)]:
        model = rc.Residuals(f(train))

        def g(x):
            r = model.residual(f(x))
            return np.cbrt(np.einsum("ij,ij->i", r, r))

        cal_g = [g(x) for x in cal_x]
        flat = np.concatenate(cal_g)
        mu, sd = flat.mean(), flat.std()
        cal_u = [((v - mu) / sd)[:, None] for v in cal_g]
        ev_u = [((g(x) - mu) / sd)[:, None] for x in ev_x]
        drift_u = {s: ((g(x) - mu) / sd)[:, None] for s, x in drift_x.items()}
        n_ev = sum(len(u) for u in ev_u)
        for chart in CHARTS:
            h = rc.search_limit(chart, cal_u, [chart.stat(u) for u in cal_u], mc.BUDGET)
            ev_alarms = rc.scheme_alarms(chart, ev_u, [chart.stat(u) for u in ev_u], h)
            cells = [mc.cell(*mc.first_alarm(drift_u[s], chart, h)) for s in rc.SCENARIOS]
            lines.append(
                f"| {label} | {model.m} | {chart.name} | {h:.3f} | {1e5 * len(ev_alarms) / n_ev:.2f} | "
                + " | ".join(cells) + " |"
            )
            print(lines[-1], flush=True)
        # The three charts at a third of the budget each.
        total, first, early = 0, {s: None for s in rc.SCENARIOS}, {s: 0 for s in rc.SCENARIOS}
        for chart in CHARTS:
            h = rc.search_limit(chart, cal_u, [chart.stat(u) for u in cal_u], mc.BUDGET // 3)
            total += len(rc.scheme_alarms(chart, ev_u, [chart.stat(u) for u in ev_u], h))
            for s in rc.SCENARIOS:
                delay, before = mc.first_alarm(drift_u[s], chart, h)
                early[s] += before
                if delay is not None and (first[s] is None or delay < first[s]):
                    first[s] = delay
        schemes.append(
            f"| {label} | {1e5 * total / n_ev:.2f} | "
            + " | ".join(mc.cell(first[s], early[s]) for s in rc.SCENARIOS) + " |"
        )
        print(schemes[-1], flush=True)

    lines += [
        "",
        "The three charts together, at most 3 calibration alarms each:",
        "",
        "| features | evaluation alarms per 10⁵ | " + " | ".join(f"`{s}`" for s in rc.SCENARIOS) + " |",
        "|---" * (2 + len(rc.SCENARIOS)) + "|",
        *schemes,
        "",
        f"Cells clamped before the logarithm: {clamped}. Run time {time.perf_counter() - t0:.0f} s.",
    ]
    with open(args.out, "w") as fh:
        fh.write("\n".join(lines) + "\n")
    print("\n".join(lines))


if __name__ == "__main__":
    main()
