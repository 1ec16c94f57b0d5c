#!/usr/bin/env python3
"""Per-feature residual charts against plumbline's current detector, on the demo logs.

Question measured: would one EWMA or CUSUM chart per feature, on that feature's
standardised PCA residual, flag the demo drift scenarios sooner than the current
detector (charts on SPE, Hotelling T² and mixture NLL) at the same false-alarm rate?
In particular `gain_change` (+4 % gain on one motor current), which no current
chart flags.

Steps (all float64, numpy and scipy only):

1. Fit as `plumb fit` does: standardise with the training mean and ddof = 0
   standard deviation (demo-logs/train), PCA of the training correlation matrix
   by symmetric eigendecomposition, keep the fewest m components whose
   cumulative explained variance reaches 95 %.
2. Residual per sample r = z − P Pᵀ z (d = 24 values). On the calibration logs
   (demo-logs/generated/calibration, 10⁶ rows, seed 1001) estimate each
   feature's residual mean μ_i and ddof = 0 deviation σ_i; u_i = (r_i − μ_i)/σ_i.
3. Charts on each u_i, one scheme per chart type (each scheme alone, all 24
   features, one limit shared by the features):
     * two-sided EWMA (Lucas & Saccucci 1990), λ = 0.1 and λ = 0.02,
       alarm when |EWMA| > L;
     * two-sided CUSUM (Page 1954), reference k = 0.5 and k = 0.25,
       alarm when either side > h;
     * per-sample (Shewhart 1931), alarm when |u_i| > L.
   Every chart starts at 0 at the start of each log and restarts at 0 after an
   alarm; an alarm is a crossing of the limit (no warm-up, no dwell).
4. Limit: the smallest (bisection) for which the scheme alarms at most
   ⌊B⌋ − 1 times on the calibration logs, B = 10⁻⁵ × calibration rows
   (the project's "budget rounded down, less one" rule).
5. Report, never tuning on them: alarms on the evaluation logs
   (demo-logs/generated/evaluation, 10⁶ rows, seed 2002) per 10⁵ samples, and
   on each drift log (onset at data row 3000) the delay of the first alarm at
   or after the onset, the feature that alarmed, and any alarm before it.
6. Baseline for each scheme: a per-sample (Shewhart) chart on SPE = Σ r_i²
   whose limit is the calibration quantile that lets through as many
   calibration samples as the scheme alarmed there (same false-alarm rate).
7. With --plumb, the current detector as shipped: `plumb fit` on the same
   training and calibration logs (into a temporary folder), `plumb replay` of
   the drift and evaluation logs.
8. Diagnostics: lag-1 autocorrelation of u_i on the calibration logs, the
   spread of 2000-sample block means of u_i, and the mean shift of u for
   motor_current_left in gain_change (rows 3000–5000 against 1000–3000).

usage (from the repository root, after ./scripts/demo.sh --nominal-rows 1000000
has generated the sets at the size these figures were measured at):
  nice -n 10 .venv/bin/python bench/residual_charts.py [--plumb target/release/plumb]
        [--out bench/residual_charts.out.md]
"""
import argparse
import glob
import json
import os
import subprocess
import sys
import tempfile
import time

import numpy as np
from scipy.signal import lfilter

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(HERE)
LOGS = os.path.join(ROOT, "demo-logs")
SCENARIOS = ["loose_mount", "new_floor", "bearing_wear", "gain_change"]
ONSET = 3000
RATE = 1e-5
VARIANCE = 0.95
BLOCK = 2000  # block length for the spread of block means (the gain_change window)


# ---------------------------------------------------------------- data


def read_log(path):
    """One demo CSV: (feature names without units, rows × features), time column dropped."""
    with open(path) as f:
        header, body = f.read().split("\n", 1)
    cols = header.strip().split(",")
    values = np.fromstring(body.replace("\n", ","), sep=",")
    x = values.reshape(-1, len(cols))
    if not np.isfinite(x).all():
        sys.exit(f"{path}: empty or non-finite cells (not expected in these logs)")
    names = [c.split("[", 1)[0] for c in cols[1:]]
    return names, x[:, 1:]


def read_folder(folder):
    paths = sorted(glob.glob(os.path.join(folder, "*.csv")))
    if not paths:
        sys.exit(f"no *.csv in {folder}")
    names, logs = None, []
    for p in paths:
        n, x = read_log(p)
        if names is not None and n != names:
            sys.exit(f"{p}: columns differ from the other logs")
        names = n
        logs.append(x)
    return names, logs, paths


def read_study_logs():
    """The logs every study reads: feature names, the training rows stacked,
    the calibration and evaluation logs (lists of arrays) and each drift
    scenario's log by name; exits when a drift log's columns differ."""
    names, train, _ = read_folder(os.path.join(LOGS, "train"))
    _, cal, _ = read_folder(os.path.join(LOGS, "generated", "calibration"))
    _, ev, _ = read_folder(os.path.join(LOGS, "generated", "evaluation"))
    drift = {}
    for s in SCENARIOS:
        n, x = read_log(os.path.join(LOGS, "drift", s + ".csv"))
        if n != names:
            sys.exit(f"{s}: columns differ from training")
        drift[s] = x
    return names, np.vstack(train), cal, ev, drift


def write_report(lines, t0, path):
    """Prints the study's markdown lines with its run time and writes them to `path`."""
    text = "\n".join(lines + ["", f"Run time {time.perf_counter() - t0:.0f} s."]) + "\n"
    print(text)
    with open(path, "w", encoding="utf-8") as f:
        f.write(text)


def truth_features():
    """Scenario → set of features it changes (demo-logs/truth.csv); for labelling only."""
    out = {}
    with open(os.path.join(LOGS, "truth.csv")) as f:
        head = f.readline().strip().split(",")
        for line in f:
            row = dict(zip(head, line.strip().split(",")))
            out[row["scenario"]] = set(row["features"].split(";"))
            if int(row["onset_row"]) != ONSET:
                sys.exit(f"truth.csv: onset of {row['scenario']} is not {ONSET}")
    return out


# ---------------------------------------------------------------- model


class Residuals:
    """Standardisation and PCA fitted on the training rows (as `plumb fit`)."""

    def __init__(self, train):
        self.mean = train.mean(axis=0)
        self.scale = train.std(axis=0)  # ddof = 0
        z = (train - self.mean) / self.scale
        corr = z.T @ z / len(z)
        values, vectors = np.linalg.eigh(corr)
        order = np.argsort(values)[::-1]
        self.eigenvalues, vectors = values[order], vectors[:, order]
        ratios = np.maximum(self.eigenvalues, 0) / np.maximum(self.eigenvalues, 0).sum()
        self.cumulative = np.cumsum(ratios)
        self.m = int(np.searchsorted(self.cumulative, VARIANCE) + 1)
        p = vectors[:, : self.m]
        self.projector = np.eye(len(corr)) - p @ p.T  # r = (I − P Pᵀ) z

    def residual(self, x):
        return ((x - self.mean) / self.scale) @ self.projector  # projector is symmetric


# ---------------------------------------------------------------- charts


class Ewma:
    """Two-sided EWMA of u from 0; statistic |EWMA|."""

    def __init__(self, lam):
        self.lam = lam
        self.name = f"EWMA λ={lam:g}"
        # Asymptotic deviation for independent N(0, 1) input: limits in these "spreads" too.
        self.spread = np.sqrt(lam / (2 - lam))

    def stat(self, u):
        return np.abs(lfilter([self.lam], [1.0, -(1.0 - self.lam)], u, axis=0))

    def describe(self, h):
        return f"L = {h:.4f} ({h / self.spread:.2f} spreads)"


class Cusum:
    """Two-sided CUSUM of u from 0 (Page); statistic max(C⁺, C⁻)."""

    def __init__(self, k):
        self.k = k
        self.name = f"CUSUM k={k:g}"

    @staticmethod
    def _one_side(x):
        # C_t = max(0, C_{t−1} + x_t), C_0 = 0, equals S_t − min(0, min_{s≤t} S_s).
        s = np.cumsum(x, axis=0)
        return s - np.minimum.accumulate(np.minimum(s, 0.0), axis=0)

    def stat(self, u):
        return np.maximum(self._one_side(u - self.k), self._one_side(-u - self.k))

    def describe(self, h):
        return f"h = {h:.3f}"


class PerSample:
    """Per-sample (Shewhart) chart: statistic |u|, no memory."""

    name = "per-sample |u|"

    @staticmethod
    def stat(u):
        return np.abs(u)

    @staticmethod
    def describe(h):
        return f"|u| > {h:.3f}"


def alarms_in(chart, u, stat, h, cap=None):
    """Alarm rows of one chart on one series u (its statistic from 0 is `stat`).

    After an alarm the chart restarts from 0 on the next sample. Stops after
    cap + 1 alarms when cap is given (enough to know the limit is too low).
    """
    rows, pos = [], 0
    while True:
        over = stat > h
        i = int(np.argmax(over))
        if not over[i]:
            return rows
        rows.append(pos + i)
        if cap is not None and len(rows) > cap:
            return rows
        pos += i + 1
        if pos >= len(u):
            return rows
        stat = chart.stat(u[pos:])


def scheme_alarms(chart, us, stats, h, cap=None):
    """All alarms of the scheme (every feature) over several logs: list of (log, row, feature)."""
    out = []
    for j, (u, st) in enumerate(zip(us, stats)):
        peak = st.max(axis=0)
        for i in np.flatnonzero(peak > h):
            left = None if cap is None else cap - len(out)
            out += [(j, r, i) for r in alarms_in(chart, u[:, i], st[:, i], h, left)]
            if cap is not None and len(out) > cap:
                return out
    return out


def search_limit(chart, us, stats, allowed):
    """Smallest limit (bisection, relative 1e-6) with at most `allowed` calibration alarms."""
    hi = max(float(st.max()) for st in stats) * (1 + 1e-9)  # nothing crosses: 0 alarms
    lo = 0.0
    while hi - lo > 1e-6 * hi:
        mid = 0.5 * (lo + hi)
        if len(scheme_alarms(chart, us, stats, mid, cap=allowed)) <= allowed:
            hi = mid
        else:
            lo = mid
    return hi


# ---------------------------------------------------------------- current detector


def current_detector(plumb, drift_paths, tmp, rate):
    """`plumb fit` + `plumb replay` as shipped: drift delays and evaluation flags."""
    model = os.path.join(tmp, "current.plumb")
    run = lambda *a: subprocess.run([plumb, *a], stdout=subprocess.PIPE, check=False)
    p = run("fit", os.path.join(LOGS, "train"), "--holdout",
            os.path.join(LOGS, "generated", "calibration"), "--false-alarm-rate", str(rate),
            "--threads", "1", "--out", model, "-q", "--json")
    if p.returncode != 0:
        sys.exit("plumb fit failed")
    fit = json.loads(p.stdout)
    out = {"m": fit["model"]["m"], "rate": rate, "drift": {},
           "limits": {l["score"]: l for l in fit["limits"]}}
    for name, path in drift_paths.items():
        log = json.loads(run("replay", model, path, "--json", "-q", "--threads", "1").stdout)
        flags = log["logs"][0]["flags"]
        early = [f["raised_at"] for f in flags if f["raised_at"] < ONSET]
        late = [f for f in flags if f["raised_at"] >= ONSET]
        first = None
        if late:
            first = (late[0]["raised_at"] - ONSET,  # flags are in time order
                     "+".join(late[0]["scores"]).upper() + ": "
                     + ", ".join(t["name"] for t in late[0]["top_features"]))
        out["drift"][name] = (first, early)
    ev = json.loads(run("replay", model, os.path.join(LOGS, "generated", "evaluation"),
                        "--json", "-q", "--threads", "1").stdout)
    out["eval_flags"] = sum(len(l["flags"]) for l in ev["logs"])
    out["eval_rows"] = sum(l["samples"] for l in ev["logs"])
    return out


# ---------------------------------------------------------------- report


def cell(first, early, truth):
    """Delay cell: 'delay (feature★)', or 'none'; '; n before onset' when early alarms."""
    s = "none" if first is None else f"{first[0]} ({first[1]})"
    if early:
        s += f"; {len(early)} before onset (first at {min(early)})"
    return s


def star(names, truth):
    return "/".join(n + ("★" if n in truth else "") for n in names)



def table_header():
    """The two header lines of a results table."""
    return ["| scheme | limit | calibration alarms | evaluation alarms | "
            + " | ".join(f"`{s}`" for s in SCENARIOS) + " |",
            "|---" * (4 + len(SCENARIOS)) + "|"]

def main():
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--plumb", default=os.path.join(ROOT, "target", "release", "plumb"),
                    help="plumb binary for the current detector's figures ('' to skip)")
    ap.add_argument("--out", default=os.path.join(HERE, "residual_charts.out.md"))
    args = ap.parse_args()
    t0 = time.perf_counter()

    # ---- data and fit
    names, train, _ = read_folder(os.path.join(LOGS, "train"))
    model = Residuals(np.vstack(train))
    d = len(names)
    _, cal_x, _ = read_folder(os.path.join(LOGS, "generated", "calibration"))
    _, ev_x, _ = read_folder(os.path.join(LOGS, "generated", "evaluation"))
    drift_paths = {s: os.path.join(LOGS, "drift", s + ".csv") for s in SCENARIOS}
    drift_x = {}
    for s, p in drift_paths.items():
        n, x = read_log(p)
        if n != names:
            sys.exit(f"{p}: columns differ from training")
        drift_x[s] = x
    truth = truth_features()

    cal_r = [model.residual(x) for x in cal_x]
    ev_r = [model.residual(x) for x in ev_x]
    drift_r = {s: model.residual(x) for s, x in drift_x.items()}
    del cal_x, ev_x

    # Residual centre and spread per feature, calibration logs only (ddof = 0).
    allr = np.vstack(cal_r)
    mu, sigma = allr.mean(axis=0), allr.std(axis=0)
    del allr
    std_u = lambda r: (r - mu) / sigma
    cal_u = [std_u(r) for r in cal_r]
    ev_u = [std_u(r) for r in ev_r]
    drift_u = {s: std_u(r) for s, r in drift_r.items()}
    spe = lambda rs: [np.einsum("ij,ij->i", r, r) for r in rs]
    cal_spe, ev_spe = np.concatenate(spe(cal_r)), np.concatenate(spe(ev_r))
    drift_spe = {s: spe([r])[0] for s, r in drift_r.items()}
    del cal_r, ev_r

    n_cal, n_ev = sum(len(u) for u in cal_u), sum(len(u) for u in ev_u)
    budget = RATE * n_cal
    allowed = int(np.floor(budget)) - 1
    if allowed < 0:
        sys.exit(f"calibration too short: budget {budget:.2f} alarms")

    # ---- schemes
    def run_scheme(chart, allowed):
        """Limit on calibration, then alarms on evaluation and on each drift log."""
        cal_stat = [chart.stat(u) for u in cal_u]
        h = search_limit(chart, cal_u, cal_stat, allowed)
        cal_al = scheme_alarms(chart, cal_u, cal_stat, h)
        del cal_stat
        ev_al = scheme_alarms(chart, ev_u, [chart.stat(u) for u in ev_u], h)
        drift = {}
        for s, u in drift_u.items():
            al = scheme_alarms(chart, [u], [chart.stat(u)], h)
            early = sorted(r for _, r, _ in al if r < ONSET)
            late = [r for _, r, _ in al if r >= ONSET]
            first = None
            if late:
                r0 = min(late)
                feats = sorted({names[i] for _, r, i in al if r == r0})
                first = (r0 - ONSET, star(feats, truth[s]))
            drift[s] = (first, early)
        return dict(chart=chart, h=h, allowed=allowed, cal=cal_al, ev=ev_al, drift=drift)

    charts = [Ewma(0.1), Ewma(0.02), Cusum(0.5), Cusum(0.25), PerSample()]
    results = []
    for chart in charts:
        tc = time.perf_counter()
        res = run_scheme(chart, allowed)
        results.append(res)
        print(f"{chart.name}: {chart.describe(res['h'])}, calibration alarms {len(res['cal'])}, "
              f"evaluation alarms {len(res['ev'])} ({time.perf_counter() - tc:.0f} s)", flush=True)

    # Half the budget, for adding the EWMA schemes to the current detector (which then
    # gets the other half): ⌊B/2⌋ − 1 alarms on calibration.
    allowed_half = int(np.floor(budget / 2)) - 1
    halves = [run_scheme(c, allowed_half) for c in charts if isinstance(c, Ewma)]

    # What one feature-specific limit could do for gain_change: each chart's statistic on
    # u of motor_current_left (from 0 in each log, no restarts), its maximum on the
    # calibration and evaluation logs, and on the gain_change log after the onset.
    imc = names.index("motor_current_left")
    # The two smaller λ are here only, to see whether any smoothing reaches the shift;
    # they are not schemes and choose nothing.
    reach = []
    for chart in charts + [Ewma(0.005), Ewma(0.002)]:
        cal_max = max(float(chart.stat(u[:, imc]).max()) for u in cal_u)
        ev_max = max(float(chart.stat(u[:, imc]).max()) for u in ev_u)
        g = chart.stat(drift_u["gain_change"][:, imc])
        over = np.flatnonzero(g[ONSET:] > cal_max)
        reach.append((chart, cal_max, ev_max, float(g[:ONSET].max()), float(g[ONSET:].max()),
                      int(over[0]) if len(over) else None))

    # ---- SPE per-sample baseline at each scheme's calibration rate
    desc = np.sort(cal_spe)[::-1]
    baselines = {}
    for a in sorted({len(res["cal"]) for res in results}):
        limit = desc[a]  # exactly a calibration samples lie above it (no ties in practice)
        drift = {}
        for s, q in drift_spe.items():
            over = np.flatnonzero(q > limit)
            late = over[over >= ONSET]
            first = (int(late[0]) - ONSET, "SPE") if len(late) else None
            drift[s] = (first, [int(r) for r in over[over < ONSET]])
        baselines[a] = dict(limit=limit, cal=int((cal_spe > limit).sum()),
                            ev=int((ev_spe > limit).sum()), drift=drift)

    # ---- current detector
    cur = cur_half = None
    if args.plumb and os.path.exists(args.plumb):
        with tempfile.TemporaryDirectory() as tmp:
            cur = current_detector(args.plumb, drift_paths, tmp, RATE)
            cur_half = current_detector(args.plumb, drift_paths, tmp, RATE / 2)

    # ---- diagnostics
    num = sum((u[1:] * u[:-1]).sum(axis=0) for u in cal_u)
    den = sum((u * u).sum(axis=0) for u in cal_u)
    lag1 = num / den
    blocks = np.vstack([u[: len(u) // BLOCK * BLOCK].reshape(-1, BLOCK, d).mean(axis=1)
                        for u in cal_u])
    block_sd = blocks.std(axis=0)
    per_log_mean = np.array([u.mean(axis=0) for u in cal_u])
    ug = drift_u["gain_change"][:, imc]
    shift = ug[3000:5000].mean() - ug[1000:3000].mean()

    # ---- report
    per = lambda n_alarms, rows: f"{n_alarms} ({n_alarms / rows * 1e5:.2f})"
    cmd = "nice -n 10 .venv/bin/python bench/residual_charts.py" + (
        "" if args.plumb else " --plumb ''")
    L = []
    L.append("# Per-feature residual charts against the current detector")
    L.append("")
    L.append(f"Reproduce (repository root): `{cmd}`")
    L.append("")
    L.append(f"Training rows {sum(len(x) for x in train)}, d = {d}, m = {model.m} components "
             f"({model.cumulative[model.m - 1] * 100:.2f} % of variance; m − 1 gives "
             f"{model.cumulative[model.m - 2] * 100:.2f} %). Calibration {n_cal} rows "
             f"(8 logs, seed 1001), evaluation {n_ev} rows (8 logs, seed 2002). Target "
             f"{RATE:g} false alarms per sample: budget {budget:.1f} on calibration, "
             f"allowed ⌊B⌋ − 1 = {allowed} alarms per scheme (24 charts, one shared limit). "
             "Alarm = crossing; chart restarts at 0 after an alarm and at each log start; "
             "no warm-up, no dwell.")
    L.append("")
    L.append("Delays in samples (10 Hz) from onset row 3000 to the first alarm at or after "
             "it; ★ = a feature the scenario changes (demo-logs/truth.csv). Alarm counts: "
             "number (per 10⁵ samples).")
    L.append("")
    L.extend(table_header())
    for res in results:
        c = res["chart"]
        L.append(f"| per-feature {c.name} | {c.describe(res['h'])} | "
                 f"{per(len(res['cal']), n_cal)} | {per(len(res['ev']), n_ev)} | "
                 + " | ".join(cell(*res["drift"][s], truth[s]) for s in SCENARIOS) + " |")
    for a, b in baselines.items():
        L.append(f"| SPE per-sample, {a} samples over on calibration | SPE > {b['limit']:.3f} | "
                 f"{per(b['cal'], n_cal)} | {per(b['ev'], n_ev)} | "
                 + " | ".join(cell(*b["drift"][s], truth[s]) for s in SCENARIOS) + " |")
    if cur is not None:
        L.append(f"| current detector (`plumb fit`, replay; m = {cur['m']}) | per score, see "
                 f"`plumb fit` | — | {per(cur['eval_flags'], cur['eval_rows'])} flags | "
                 + " | ".join(cell(*cur["drift"][s], truth[s]) for s in SCENARIOS) + " |")
    L.append("")

    # The per-feature EWMA added to the current detector, the budget split in two halves.
    L.append(f"Added to the current detector, same total rate: the per-feature EWMA at half the "
             f"budget (⌊B/2⌋ − 1 = {allowed_half} calibration alarms) and the current detector "
             f"fitted with `--false-alarm-rate {RATE / 2:g}`; a scenario's delay is the earlier "
             "of the two, evaluation alarms are the sum.")
    L.append("")
    L.extend(table_header())
    for res in halves:
        c = res["chart"]
        L.append(f"| per-feature {c.name}, half budget | {c.describe(res['h'])} | "
                 f"{per(len(res['cal']), n_cal)} | {per(len(res['ev']), n_ev)} | "
                 + " | ".join(cell(*res["drift"][s], truth[s]) for s in SCENARIOS) + " |")
    if cur_half is not None:
        L.append(f"| current detector at rate {RATE / 2:g} | per score | — | "
                 f"{per(cur_half['eval_flags'], cur_half['eval_rows'])} flags | "
                 + " | ".join(cell(*cur_half["drift"][s], truth[s]) for s in SCENARIOS) + " |")
        for res in halves:
            cells = []
            for s in SCENARIOS:
                (fa, ea), (fb, eb) = res["drift"][s], cur_half["drift"][s]
                firsts = [f for f in (fa, fb) if f is not None]
                first = min(firsts, key=lambda f: f[0]) if firsts else None
                cells.append(cell(first, ea + eb, truth[s]))
            n = len(res["ev"]) + cur_half["eval_flags"]
            L.append(f"| **both**: current + per-feature {res['chart'].name} | | — | "
                     f"{per(n, n_ev)} | " + " | ".join(cells) + " |")
    if cur is not None:
        fmt = lambda c: ", ".join(f"{k.upper()} EWMA {v['ewma_limit']:.4f} / CUSUM "
                                  f"{v['cusum_limit']:.2f}" for k, v in c["limits"].items())
        L.append("")
        L.append(f"Current detector's limits at rate {RATE:g}: {fmt(cur)}; at {RATE / 2:g}: "
                 f"{fmt(cur_half)} (its nine charts get {RATE:g} / 9 × {n_cal} = "
                 f"{RATE / 9 * n_cal:.2f} alarms of budget each, so 0 allowed at both rates).")
    L.append("")

    # Could a limit of its own for motor_current_left flag gain_change?
    L.append("motor_current_left alone (each chart from 0 per log, no restarts): the largest "
             "statistic on calibration and evaluation, and on `gain_change` before and after "
             "the onset. A limit of its own at the calibration maximum (no calibration alarm "
             "from this feature) would flag `gain_change` at the delay in the last column.")
    L.append("")
    L.append("| chart | max calibration | max evaluation | `gain_change` max before onset | "
             "after onset | delay at the calibration max |")
    L.append("|---|---|---|---|---|---|")
    for chart, cal_max, ev_max, g_before, g_after, first in reach:
        tag = "" if chart in charts else " (diagnostic only)"
        L.append(f"| {chart.name}{tag} | {cal_max:.3f} | {ev_max:.3f} | {g_before:.3f} | "
                 f"{g_after:.3f} | {'none' if first is None else first} |")
    L.append("")

    # Where the false alarms come from.
    L.append("False alarms by feature (calibration / evaluation):")
    L.append("")
    for res in results:
        def count(al):
            f = {}
            for _, _, i in al:
                f[names[i]] = f.get(names[i], 0) + 1
            return ", ".join(f"{k} {v}" for k, v in sorted(f.items(), key=lambda kv: -kv[1]))
        L.append(f"* {res['chart'].name}: {count(res['cal']) or 'none'} / "
                 f"{count(res['ev']) or 'none'}")
    L.append("")

    L.append("Diagnostics on the calibration logs (u standardised residual): lag-1 "
             f"autocorrelation, deviation of {BLOCK}-sample block means (independent input: "
             f"{1 / np.sqrt(BLOCK):.3f}), range of the 8 per-log means.")
    L.append("")
    L.append("| feature | lag-1 autocorrelation | block-mean deviation | per-log means |")
    L.append("|---|---|---|---|")
    show = ["motor_current_left", "motor_current_right", "vib_band1", "vib_band6",
            "gearbox_temp", "driver_temp", "winding_temp_left", "jerk_rms"]
    for n in show:
        i = names.index(n)
        L.append(f"| {n} | {lag1[i]:.3f} | {block_sd[i]:.3f} | "
                 f"{per_log_mean[:, i].min():+.3f} … {per_log_mean[:, i].max():+.3f} |")
    L.append(f"| all 24: median (min … max) | {np.median(lag1):.3f} ({lag1.min():.3f} … "
             f"{lag1.max():.3f}) | {np.median(block_sd):.3f} ({block_sd.min():.3f} … "
             f"{block_sd.max():.3f}) | |")
    L.append("")
    L.append(f"`gain_change`, u of motor_current_left: mean over rows 3000–5000 minus mean "
             f"over rows 1000–3000 = {shift:+.3f} (in units of its calibration deviation σ = "
             f"{sigma[imc]:.4f} of the standardised residual; {shift / block_sd[imc]:.1f}× the "
             f"deviation of its {BLOCK}-sample block means on calibration).")
    L.append("")
    text = "\n".join(L)
    print()
    print(text)
    with open(args.out, "w") as f:
        f.write(text + "\n")
    print(f"written {os.path.relpath(args.out, ROOT)} ({time.perf_counter() - t0:.0f} s)",
          file=sys.stderr)


if __name__ == "__main__":
    main()
