#!/usr/bin/env python3
"""How large a sensor gain change does the demo's detector flag, and how soon?

Question measured: the demo's `gain_change` scenario (+4 % on the left motor
current's reading from row 3000 on) is flagged by neither the detector nor the
per-sample SPE baseline. From what size of gain change on is it flagged, by
which, and how soon?

Method: for each gain change P (percent), `plumb-scenario --gain-change P`
writes the demo's drift logs again (same seed: only `gain_change.csv`
differs, and only from its onset on; checked by the scenario crate's tests),
and `plumb demo --json` runs the whole job on a folder whose train/, holdout/
and generated/ are the committed demo's and whose drift set is that one log.
Everything (fit, calibration on 2 × 10⁶ generated nominal rows, the
baseline's limit, delays) is the product's own; nothing is tuned on the drift
log. The fit and calibration are the same in every run (same data), which the
script checks (same baseline limit in every run).

A change of 0.01 % (about 1 mA at 10 A, at the reading's 1 mA resolution) is
the control: a flag there, and at the same sample for other sizes, is a
nominal false alarm of the long log, not the gain change.

Reported per P: the detector's delay (first flag at or after the onset, in
samples), the charts whose crossing raised it (score, statistic, and the
feature of a residual chart), the features with the largest residual share
at the flag, flags before the onset, and the baseline's delay.

usage (repository root, after `cargo build --release -p plumb -p plumb-scenario`
and one `./scripts/demo.sh`, which makes demo-logs/generated/):
  nice -n 10 python3 bench/gain_sweep.py [--drift-rows 8000] [--percent 2 4 6 ...]
      [--out bench/gain_sweep.out.md]
About 35 s per gain change on this machine.
"""
import argparse
import json
import os
import shutil
import subprocess
import sys
import tempfile
import time

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))


def run(cmd):
    p = subprocess.run(cmd, capture_output=True, text=True)
    if p.returncode != 0:
        sys.exit(f"{' '.join(cmd)} failed ({p.returncode}):\n{p.stderr}")
    return p.stdout


def one(plumb, scenario, percent, drift_rows, work):
    gen = os.path.join(work, f"gen{percent}")
    run([scenario, "--out", gen, "--gain-change", str(percent), "--drift-rows", str(drift_rows), "-q",
         "--train-rows", "10", "--holdout-log-rows", "10"])
    logs = os.path.join(work, f"logs{percent}")
    os.makedirs(os.path.join(logs, "drift"))
    for d in ("train", "holdout", "generated"):
        os.symlink(os.path.join(ROOT, "demo-logs", d), os.path.join(logs, d))
    shutil.copy(os.path.join(gen, "drift", "gain_change.csv"), os.path.join(logs, "drift"))
    with open(os.path.join(gen, "truth.csv")) as f:
        lines = f.read().splitlines()
    with open(os.path.join(logs, "truth.csv"), "w") as f:
        f.write("\n".join([lines[0]] + [l for l in lines[1:] if l.startswith("gain_change,")]) + "\n")
    out = run([plumb, "demo", "--logs", logs, "--out", os.path.join(work, f"out{percent}"),
               "--no-report", "--json", "-q"])
    shutil.rmtree(gen)
    return json.loads(out)


def main():
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--plumb", default=os.path.join(ROOT, "target", "release", "plumb"))
    ap.add_argument("--scenario", default=os.path.join(ROOT, "target", "release", "plumb-scenario"))
    ap.add_argument("--drift-rows", type=int, default=8000)
    ap.add_argument("--percent", type=float, nargs="+",
                    default=[0.01, -30, -20, -16, -14, -12, -10, -8, -4, 4, 8, 10, 12, 13, 14, 16, 20,
                             30, 50])
    ap.add_argument("--out", default=None, help="also write the table to this file")
    a = ap.parse_args()
    if not os.path.isdir(os.path.join(ROOT, "demo-logs", "generated", "calibration")):
        sys.exit("demo-logs/generated/ is missing: run ./scripts/demo.sh once first")
    rows = []
    limits = set()
    with tempfile.TemporaryDirectory(prefix="gain-sweep-") as work:
        for p in a.percent:
            pct = f"{p:g}"
            t0 = time.time()
            d = one(a.plumb, a.scenario, pct, a.drift_rows, work)
            limits.add(d["baseline_spe_limit"])
            s = d["scenarios"][0]
            assert s["scenario"] == "gain_change", s
            rows.append((pct, s))
            print(f"{pct:>6} %: detector {s['delay']} ({','.join(s['drivers'])}; "
                  f"{','.join(s['top_features'])}), before onset {s['false_alarms']}, "
                  f"baseline {s['baseline_delay']}  [{time.time() - t0:.0f} s]", file=sys.stderr)
    if len(limits) != 1:
        sys.exit(f"the runs did not calibrate alike: baseline limits {sorted(limits)}")
    onset = rows[0][1]["onset"]
    post = a.drift_rows - onset
    out = []
    out.append(f"gain change on `motor_current_left` from row {onset}, {post} samples after the onset "
               f"(`--drift-rows {a.drift_rows}`); baseline SPE limit {limits.pop():.4f}; "
               f"delays in samples after the onset, — = not flagged within the log\n")
    out.append("| gain change | detector delay | charts | features named | flags before the onset "
               "| baseline delay | baseline samples over its limit before the onset | ratio |")
    out.append("|---|---|---|---|---|---|---|---|")
    for pct, s in rows:
        dd, bd = s["delay"], s["baseline_delay"]
        if dd is not None and bd is not None:
            ratio = f"{bd / max(dd, 1):.1f}×"
        elif dd is not None:
            ratio = "baseline none"
        else:
            ratio = "—"
        charts = ", ".join(f"{c['score']} {c['statistic']}" + (f" ({c['feature']})" if c.get('feature') else "")
                           for c in s["crossed"]) or "—"
        label = f"{float(pct):+g} %" + (" (control)" if abs(float(pct)) < 0.05 else "")
        out.append(f"| {label} | {'—' if dd is None else dd} | {charts} "
                   f"| {', '.join(s['top_features']) or '—'} | {s['false_alarms']} "
                   f"| {'—' if bd is None else bd} | {s['baseline_false_alarms']} | {ratio} |")
    text = "\n".join(out) + "\n"
    print(text)
    if a.out:
        if not os.path.exists(a.out):
            with open(a.out, "w") as f:
                f.write("# How large a gain change is flagged (`bench/gain_sweep.py`)\n\n")
        with open(a.out, "a") as f:
            f.write(text + "\n")


if __name__ == "__main__":
    main()
