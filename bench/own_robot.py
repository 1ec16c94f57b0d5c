#!/usr/bin/env python3
"""The residual chart calibrated on the robot's own nominal logs: does it reach `gain_change`?

Question measured: the demo calibrates its limits on generated nominal logs of a
fleet (seed 1001: robots 1-4 with constants of their own) and evaluates on
another fleet (seed 2002). The slow charts that would see `gain_change`'s
shift (attempts 11 and 13 in BENCHMARKS.md) held the false-alarm rate on one
fleet and not on the other. If the robot-to-robot spread is what breaks them,
a chart centred, scaled and limited on the robot's own nominal logs (what a
refit from that robot's logs gives, `plumb fit --base`) should hold it. Does
it, and does it then flag `gain_change` (+4 % on one current)?

Data: the demo's drift logs come from robots 1-3 of the demo's seed (424242);
`plumb-scenario --seed 424242 --holdout-rows 4000000 --holdout-files 128
--holdout-out DIR` writes nominal logs of those same robots (the same robot
constants) on days 1000-1127, 32 logs of 31,250 rows per robot (10⁶ rows, about
28 hours of one robot's work). Each robot's logs are split by day into two
halves (A: even positions, B: odd; 500,000 rows each); every chart is
calibrated on one half and counted on the other, both ways round.

Statistic: g as bench/whitened_residuals.py (PCA on demo-logs/train; the
whitening from the fleet's calibration logs, as the product: W does not
change). Charts, each evaluated on the robot's own scenarios (robot 1:
`bearing_wear`, `new_floor`; robot 2: `gain_change`; robot 3: `loose_mount`):
  * fleet: the chart as shipped, calibrated on the fleet (centres, scales and
    limit from demo-logs/generated/calibration), lambda = 0.1;
  * own, 0.1: centres (mean of g), scales (the shipped rule) and limit (the
    highest scaled value) from the robot's own half, lambda = 0.1;
  * own, per feature: the same with a constant per feature chosen on that half
    by bench/feature_lambda.py's rule (attempt 13);
  * both: the fleet chart and the own per-feature chart side by side, the
    first flag of either (flags on the other half: the two charts' added).
Raise and clear as the detector (bench/whitened_residuals.py, `flags`).

Reported, never tuned on them: flags on the robot's other half (per 10⁵) and
the delays (samples after the onset at row 3000) on its scenarios.

usage (repository root, after ./scripts/demo.sh, which generates the fleets):
  target/release/plumb-scenario --seed 424242 --holdout-rows 4000000 \\
      --holdout-files 128 --holdout-out /tmp/own -q
  nice -n 10 .venv/bin/python bench/own_robot.py --own /tmp/own [--out bench/own_robot.out.md]
(about 4 minutes; the logs take 18 s to write and 677 MB on disk)
"""
import argparse
import os
import re
import sys
import time

import numpy as np

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
import feature_lambda as fl  # noqa: E402  (the per-feature constants)
import residual_charts as rc  # noqa: E402  (the shared fit and log readers)
import whitened_residuals as wr  # noqa: E402  (g, the raise/clear rule)

ROBOT_SCENARIOS = {1: ["bearing_wear", "new_floor"], 2: ["gain_change"], 3: ["loose_mount"]}


class Centred:
    """g with each feature's mean on `gs` taken off."""

    def __init__(self, gs):
        self.mu = np.vstack(gs).mean(axis=0)

    def __call__(self, g):
        return g - self.mu


def block_spread(gs, col):
    """Standard deviation of the means of rc.BLOCK-sample blocks of column `col`, over `gs`."""
    means = [g[: len(g) // rc.BLOCK * rc.BLOCK, col].reshape(-1, rc.BLOCK).mean(axis=1) for g in gs]
    return float(np.concatenate(means).std())


def chart(lams, cal_g, ev_g, drift_g):
    s = fl.scales(cal_g, lams)
    limit = max(float((fl.ewma_abs(g, lams) / s).max()) for g in cal_g)
    ev = sum(len(wr.flags((fl.ewma_abs(g, lams) / s).max(axis=1), limit)) for g in ev_g)
    return limit, ev, {k: fl.ewma_abs(g, lams) / s for k, g in drift_g.items()}


def cells(charts, names, truth, scenarios):
    """The delays of the earliest of `charts` ([(scaled, limit)]) on each scenario."""
    out = []
    for sc_name in scenarios:
        got = [wr.first_flag(scaled[sc_name], limit, names) for scaled, limit in charts]
        hits = [g for g in got if g[0] is not None]
        if hits:
            delay, feat, _ = min(hits, key=lambda g: g[0])
            c = f"`{sc_name}` " + wr.delay_text(delay, feat, truth[sc_name])
        else:
            c = f"`{sc_name}` none"
        early = sum(g[2] for g in got)
        if early:
            c += f", {early} before the onset"
        out.append(c)
    return "; ".join(out)


def main():
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--own", required=True, help="folder of the robots' own nominal logs")
    ap.add_argument("--out", default=os.path.join(rc.HERE, "own_robot.out.md"))
    args = ap.parse_args()
    t0 = time.perf_counter()
    names, truth, model, sets, drift_r = wr.residual_sets()
    d = len(names)
    w = wr.Whitened(sets["calibration"])
    fleet_cal = [w(r) for r in sets["calibration"]]
    imc = names.index("motor_current_left")
    spread = {"the calibration fleet": block_spread(fleet_cal, imc),
              "the evaluation fleet": block_spread([w(r) for r in sets["evaluation"]], imc)}
    del sets
    _, own_logs, paths = rc.read_folder(args.own)
    by_robot = {}
    for p, x in zip(paths, own_logs):
        robot = int(re.search(r"robot(\d+)_", os.path.basename(p)).group(1))
        by_robot.setdefault(robot, []).append(w(model.residual(x)))
    del own_logs
    for robot in sorted(ROBOT_SCENARIOS):
        spread[f"robot {robot}'s own logs"] = block_spread(by_robot[robot], imc)
    drift_g = {s: w(r) for s, r in drift_r.items()}
    lines = ["# The residual chart calibrated on the robot's own logs (`bench/own_robot.py`)", "",
             f"m = {model.m}; whitening from the fleet's calibration logs; own logs from "
             f"`{os.path.basename(os.path.normpath(args.own))}`: "
             + ", ".join(f"robot {r} {len(v)} logs, {sum(len(g) for g in v)} rows"
                         for r, v in sorted(by_robot.items()) if r in ROBOT_SCENARIOS)
             + f"; per-feature candidates {fl.CANDIDATES}; delays in samples after the onset.", "",
             "| robot | chart | calibrated on | limit | flags on the other half (per 10⁵) | delays |",
             "|---|---|---|---|---|---|"]
    # The shipped chart on the fleet, for reference (its own centring is in g's mean).
    fleet_limit, _, fleet_scaled = chart([0.1] * d, fleet_cal, [], drift_g)
    for robot, scenarios in ROBOT_SCENARIOS.items():
        logs = by_robot[robot]
        halves = {"A": logs[0::2], "B": logs[1::2]}
        for a, b in [("A", "B"), ("B", "A")]:
            ev_rows = sum(len(g) for g in halves[b])
            nf = sum(len(wr.flags((fl.ewma_abs(g, [0.1] * d) / fl.scales(fleet_cal, [0.1] * d))
                                  .max(axis=1), fleet_limit)) for g in halves[b])
            rows = [("fleet (shipped)", "fleet", [(fleet_scaled, fleet_limit)], nf)]
            fleet_nf = nf
            c = Centred(halves[a])
            cal_g = [c(g) for g in halves[a]]
            ev_g = [c(g) for g in halves[b]]
            dg = {s: c(g) for s, g in drift_g.items()}
            lams, _ = fl.choose(cal_g)
            for label, ls in [("own, 0.1", [0.1] * d), ("own, per feature", lams)]:
                limit, nf, scaled = chart(ls, cal_g, ev_g, dg)
                slow = ", ".join(f"{names[i]} {lam:g}" for i, lam in enumerate(ls) if lam != 0.1)
                rows.append((label + (f" ({slow})" if slow and label.endswith("feature") else ""),
                             f"own half {a}", [(scaled, limit)], nf))
            own = rows[-1]
            rows.append(("fleet (shipped) and own per feature, the first flag of either",
                         f"fleet; own half {a}", rows[0][2] + own[2], fleet_nf + own[3]))
            for label, on, charts, nf in rows:
                limits = " and ".join(f"{limit:.3f}" for _, limit in charts)
                lines.append(f"| {robot} | {label} | {on} | {limits} | {nf} in {ev_rows} "
                             f"({1e5 * nf / ev_rows:.1f}) | "
                             + cells(charts, names, truth, scenarios) + " |")
                print(lines[-1], flush=True)
    lines += ["", f"Spread (standard deviation) of the means of {rc.BLOCK}-sample blocks of g on "
              "`motor_current_left` (`gain_change` shifts it by about 0.7):", "",
              "| logs | spread |", "|---|---|"]
    lines += [f"| {k} | {v:.3f} |" for k, v in spread.items()]
    rc.write_report(lines, t0, args.out)


if __name__ == "__main__":
    main()
