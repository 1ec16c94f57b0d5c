#!/usr/bin/env python3
"""plumb fit against scikit-learn, side by side in one run.

Generates ROWS x 32 nominal rows from 4 operating modes (our own synthetic
generator, seeded), writes them as CSV and as a .npy array, then times:

  * scikit-learn from the binary array: StandardScaler + PCA(svd_solver=
    "covariance_eigh", n_components=M) + GaussianMixture(diag, k=4, n_init=R,
    tol=1e-3, max_iter=100);
  * the same from CSV read by pandas;
  * `plumb fit` from the same .npy array (column names in rows.header beside
    it) and from the CSV (--components M --mixture 4 --restarts R; its
    calibration stage is timed separately and excluded from the ratio, since
    scikit-learn has none).

Each side runs --reps times (default 2) and its best run counts:
scikit-learn repeats its pipeline in one process that keeps freed memory (so
later runs do not pay the first touch of fresh pages, slow on virtual
machines), plumb runs as separate processes. Peak memory is each process's
max RSS (GNU time). Prints a Markdown table with ratios.

Needs GNU time (/usr/bin/time, Debian package `time`).

usage: bench/fit_vs_sklearn.py [--rows 1000000] [--restarts 4] [--plumb target/release/plumb]
"""
import argparse
import json
import os
import subprocess
import sys
import tempfile
import textwrap
import time

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(HERE)


def run_measured(cmd, env=None):
    """Runs cmd under GNU time; returns (seconds, max RSS in MiB, stdout).

    GNU time reports the RSS of the program itself (after exec); the rusage
    of a forked child would also count the pages of this Python process.
    """
    with tempfile.NamedTemporaryFile("r") as rss:
        t0 = time.perf_counter()
        p = subprocess.run(["/usr/bin/time", "-f", "%M", "-o", rss.name, *cmd],
                           stdout=subprocess.PIPE, env=env)
        dt = time.perf_counter() - t0
        if p.returncode != 0:
            sys.exit(f"failed ({p.returncode}): {' '.join(cmd)}")
        kib = int(rss.read().split()[-1])
    return dt, kib / 1024.0, p.stdout.decode()


def generate(rows, path_csv, path_npy, seed=7):
    import numpy as np

    rng = np.random.default_rng(seed)
    d, latent = 32, 6
    load = rng.normal(size=(latent, d))
    centres = rng.normal(scale=3.0, size=(4, latent))
    # Operating modes persist: a Markov chain with mean dwell of 200 rows.
    modes = np.empty(rows, dtype=np.int64)
    m, i = 0, 0
    while i < rows:
        dwell = int(rng.exponential(200)) + 1
        modes[i : i + dwell] = m
        i += dwell
        m = (m + 1 + rng.integers(3)) % 4
    z = centres[modes] + rng.normal(size=(rows, latent))
    x = z @ load + 0.3 * rng.normal(size=(rows, d)) + np.arange(d)
    x = x.astype(np.float32).astype(np.float64)
    np.save(path_npy, x)
    header = ",".join(f"f{j:02d}" for j in range(d))
    write_header(path_npy, header)
    with open(path_csv, "w") as f:
        f.write(header + "\n")
        # %.7g round-trips float32 values.
        np.savetxt(f, x, fmt="%.7g", delimiter=",")


def write_header(path_npy, header):
    """The column names of a 2-D array log, beside it (rows.npy -> rows.header)."""
    with open(os.path.splitext(path_npy)[0] + ".header", "w") as f:
        f.write(header + "\n")


SKLEARN = textwrap.dedent(
    """
    import json, sys, time
    import numpy as np
    from sklearn.preprocessing import StandardScaler
    from sklearn.decomposition import PCA
    from sklearn.mixture import GaussianMixture

    src, m, restarts, reps = sys.argv[1], int(sys.argv[2]), int(sys.argv[3]), int(sys.argv[4])
    runs = []
    for rep in range(reps):
        t0 = time.perf_counter()
        if src.endswith(".npy"):
            x = np.load(src)
        else:
            import pandas as pd
            x = pd.read_csv(src).to_numpy(dtype=np.float64)
        t_read = time.perf_counter() - t0
        z = StandardScaler().fit_transform(x)
        t = PCA(n_components=m, svd_solver="covariance_eigh").fit_transform(z)
        t_pca = time.perf_counter() - t0 - t_read
        gm = GaussianMixture(4, covariance_type="diag", n_init=restarts, tol=1e-3,
                             max_iter=100, random_state=0)
        t1 = time.perf_counter()
        gm.fit(t)
        t_gmm = time.perf_counter() - t1
        runs.append({"read": t_read, "pca": t_pca, "gmm": t_gmm,
                     "whole": time.perf_counter() - t0})
        if rep + 1 < reps:
            del x, z, t, gm
    # One EM iteration alone (E step then M step, scikit-learn's own private
    # methods, as its fit loop calls them), best of three on the fitted model.
    t_iter = float("inf")
    for _ in range(3):
        t2 = time.perf_counter()
        _, log_resp = gm._e_step(t)
        gm._m_step(t, log_resp)
        t_iter = min(t_iter, time.perf_counter() - t2)
    warm = min(runs[1:] or runs, key=lambda r: r["whole"])
    print(json.dumps({"cold": runs[0], "warm": warm, "iter": t_iter,
                      "n_iter": int(gm.n_iter_), "mean_ll": float(gm.score(t))}))
    """
)

# The scikit-learn child keeps freed memory in its own heap, so its second run
# reuses pages instead of asking the kernel for new ones. On a virtual machine
# whose host backs guest memory lazily, a page touched for the first time can
# cost tens of microseconds (74 us measured here, against about 1 us once
# backed); the first run pays that for about 1 GiB, plumb's 63 MiB far less.
SKLEARN_ENV = dict(os.environ, MALLOC_MMAP_THRESHOLD_="4294967296",
                   MALLOC_TRIM_THRESHOLD_="17179869184", MALLOC_TOP_PAD_="268435456")


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--rows", type=int, default=1_000_000)
    ap.add_argument("--restarts", type=int, default=4)
    ap.add_argument("--components", type=int, default=8)
    ap.add_argument("--plumb", default=os.path.join(ROOT, "target/release/plumb"))
    ap.add_argument("--keep", help="folder to keep the generated data in")
    ap.add_argument("--reps", type=int, default=2,
                    help="runs of each side; the best counts (default 2)")
    ap.add_argument("--generate-only", action="store_true", help=argparse.SUPPRESS)
    a = ap.parse_args()
    if a.generate_only:
        generate(a.rows, os.path.join(a.keep, "rows.csv"), os.path.join(a.keep, "rows.npy"))
        return
    work = a.keep or tempfile.mkdtemp(prefix="plumb-bench-")
    os.makedirs(work, exist_ok=True)
    csv, npy = os.path.join(work, "rows.csv"), os.path.join(work, "rows.npy")
    if not os.path.exists(csv):
        print(f"generating {a.rows} x 32 rows in {work} ...", file=sys.stderr)
        # In a child process, so this process stays small.
        subprocess.run([sys.executable, __file__, "--generate-only", "--rows", str(a.rows),
                        "--keep", work], check=True)
    size = os.path.getsize(csv) / 2**20
    if not os.path.exists(os.path.splitext(npy)[0] + ".header"):
        with open(csv) as f:
            write_header(npy, f.readline().strip())

    py = sys.executable
    sk_bin = run_measured([py, "-c", SKLEARN, npy, str(a.components), str(a.restarts),
                           str(a.reps)], env=SKLEARN_ENV)
    sk_csv = run_measured([py, "-c", SKLEARN, csv, str(a.components), str(a.restarts),
                           str(a.reps)], env=SKLEARN_ENV)
    out = os.path.join(work, "bench.plumb")

    def plumb_runs(src):
        return [run_measured([a.plumb, "fit", src, "--out", out, "--time-column", "none",
                              "--components", str(a.components), "--mixture", "4",
                              "--restarts", str(a.restarts), "--tol", "1e-3",
                              "--max-iter", "100", "--json", "--quiet"])
                for _ in range(a.reps)]

    pls_npy = plumb_runs(npy)
    pls = plumb_runs(csv)
    skb, skc = json.loads(sk_bin[2]), json.loads(sk_csv[2])

    def fit_seconds(p):
        rep = json.loads(p[2])["fit"]
        calib = {t["stage"]: t["seconds"] for t in rep["timings"]}.get("calibrate", 0.0)
        return p[0] - calib

    pl = min(pls, key=fit_seconds)
    pn = min(pls_npy, key=fit_seconds)
    pn_fit, pn_cold = fit_seconds(pn), fit_seconds(pls_npy[0])
    pn_timings = {t["stage"]: t["seconds"] for t in json.loads(pn[2])["fit"]["timings"]}
    pn_ll = json.loads(pn[2])["fit"]["mixture"]["mean_ll"]
    rep = json.loads(pl[2])
    fit = rep["fit"]
    timings = {t["stage"]: t["seconds"] for t in fit["timings"]}
    calib = timings.get("calibrate", 0.0)
    pl_fit = fit_seconds(pl)
    pl_cold = fit_seconds(pls[0])
    mix = fit["mixture"]
    # The fastest single iteration, as for scikit-learn (best of three on the
    # fitted model); the mean over the fit, initialisations included, beside.
    pl_iter = mix["em_fastest_iteration_seconds"]
    pl_iter_mean = mix["em_seconds"] / max(mix["em_iterations"], 1)
    bw, bc, cw, cc = skb["warm"], skb["cold"], skc["warm"], skc["cold"]
    print(f"\n{a.rows} rows x 32 features, CSV {size:.0f} MiB, k = 4, m = {a.components}, "
          f"{a.restarts} restarts, tol 1e-3, max_iter 100; {a.reps} runs of each side, "
          f"the best counted (\"first\": the first run of each)\n")
    print("| what | scikit-learn | plumb | ratio (sklearn / plumb) |")
    print("|---|---|---|---|")
    print(f"| one EM iteration (fastest) | {skb['iter']*1e3:.1f} ms | {pl_iter*1e3:.1f} ms | {skb['iter']/pl_iter:.1f}x |")
    print(f"| EM time per iteration over the fit, initialisations included (plumb) | | {pl_iter_mean*1e3:.1f} ms | {skb['iter']/pl_iter_mean:.1f}x |")
    print(f"| whole fit from the binary array (.npy, both; plumb without calibration) | {bw['whole']:.2f} s | {pn_fit:.2f} s | {bw['whole']/pn_fit:.1f}x |")
    print(f"| the same, first runs | {bc['whole']:.2f} s | {pn_cold:.2f} s | {bc['whole']/pn_cold:.1f}x |")
    print(f"| whole fit, scikit-learn from the binary array, plumb from CSV | {bw['whole']:.2f} s | {pl_fit:.2f} s | {bw['whole']/pl_fit:.1f}x |")
    print(f"| CSV end to end (pandas + sklearn vs plumb, without calibration) | {cw['whole']:.2f} s | {pl_fit:.2f} s | {cw['whole']/pl_fit:.1f}x |")
    print(f"| peak memory (binary array / CSV) | {sk_bin[1]:.0f} / {sk_csv[1]:.0f} MiB | {pn[1]:.0f} / {pl[1]:.0f} MiB | {sk_bin[1]/pn[1]:.1f}x / {sk_csv[1]/pl[1]:.1f}x |")
    print(f"| final mean log-likelihood (latent scores; binary array / CSV) | {skb['mean_ll']:.5f} / {skc['mean_ll']:.5f} | {pn_ll:.5f} / {mix['mean_ll']:.5f} | {pn_ll-skb['mean_ll']:+.5f} / {mix['mean_ll']-skc['mean_ll']:+.5f} (plumb − sklearn) |")
    print(f"\nscikit-learn, best run: read {bw['read']:.2f} s (npy) / {cw['read']:.2f} s (pandas), "
          f"scaler + PCA {bw['pca']:.2f} s, GMM {bw['gmm']:.2f} s ({skb['n_iter']} iterations in "
          f"the best init); first run: read {bc['read']:.2f} s, scaler + PCA {bc['pca']:.2f} s, "
          f"GMM {bc['gmm']:.2f} s")
    print(f"plumb from CSV: total {pl[0]:.2f} s, calibration {calib:.2f} s (excluded above), stages "
          + ", ".join(f"{k} {v:.2f} s" for k, v in timings.items()))
    print(f"plumb from .npy: total {pn[0]:.2f} s, stages "
          + ", ".join(f"{k} {v:.2f} s" for k, v in pn_timings.items()))


if __name__ == "__main__":
    main()
