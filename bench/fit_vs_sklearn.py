#!/usr/bin/env python3
"""plumb fit against scikit-learn, side by side in one run.

Generates ROWS x 32 nominal rows from 4 operating modes (our own synthetic
generator, seeded), writes them as CSV and as a .npy array, then times:

  * scikit-learn from the binary array: StandardScaler + PCA(svd_solver=
    "covariance_eigh", n_components=M) + GaussianMixture(diag, k=4, n_init=R,
    tol=1e-3, max_iter=100);
  * the same from CSV read by pandas;
  * `plumb fit` from the CSV (--components M --mixture 4 --restarts R; its
    calibration stage is timed separately and excluded from the ratio, since
    scikit-learn has none).

Each run is a separate process; peak memory is that process's max RSS
(os.wait4). Prints a Markdown table with ratios.

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
    with open(path_csv, "w") as f:
        f.write(header + "\n")
        # %.7g round-trips float32 values.
        np.savetxt(f, x, fmt="%.7g", delimiter=",")


SKLEARN = textwrap.dedent(
    """
    import json, sys, time
    import numpy as np
    from sklearn.preprocessing import StandardScaler
    from sklearn.decomposition import PCA
    from sklearn.mixture import GaussianMixture
    src, m, restarts = sys.argv[1], int(sys.argv[2]), int(sys.argv[3])
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
    # One EM iteration alone (E step then M step, scikit-learn's own private
    # methods, as its fit loop calls them), best of three on the fitted model.
    t_iter = float("inf")
    for _ in range(3):
        t2 = time.perf_counter()
        _, log_resp = gm._e_step(t)
        gm._m_step(t, log_resp)
        t_iter = min(t_iter, time.perf_counter() - t2)
    print(json.dumps({"read": t_read, "pca": t_pca, "gmm": t_gmm, "iter": t_iter,
                      "n_iter": int(gm.n_iter_), "mean_ll": float(gm.score(t))}))
    """
)


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--rows", type=int, default=1_000_000)
    ap.add_argument("--restarts", type=int, default=4)
    ap.add_argument("--components", type=int, default=8)
    ap.add_argument("--plumb", default=os.path.join(ROOT, "target/release/plumb"))
    ap.add_argument("--keep", help="folder to keep the generated data in")
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

    py = sys.executable
    sk_bin = run_measured([py, "-c", SKLEARN, npy, str(a.components), str(a.restarts)])
    sk_csv = run_measured([py, "-c", SKLEARN, csv, str(a.components), str(a.restarts)])
    out = os.path.join(work, "bench.plumb")
    pl = run_measured([a.plumb, "fit", csv, "--out", out, "--time-column", "none",
                       "--components", str(a.components), "--mixture", "4",
                       "--restarts", str(a.restarts), "--tol", "1e-3", "--max-iter", "100",
                       "--json", "--quiet"])
    skb, skc, rep = json.loads(sk_bin[2]), json.loads(sk_csv[2]), json.loads(pl[2])
    fit = rep["fit"]
    timings = {t["stage"]: t["seconds"] for t in fit["timings"]}
    calib = timings.get("calibrate", 0.0)
    pl_fit = pl[0] - calib
    mix = fit["mixture"]
    # The fastest single iteration, as for scikit-learn (best of three on the
    # fitted model); the mean over the fit, initialisations included, beside.
    pl_iter = mix["em_fastest_iteration_seconds"]
    pl_iter_mean = mix["em_seconds"] / max(mix["em_iterations"], 1)
    print(f"\n{a.rows} rows x 32 features, CSV {size:.0f} MiB, k = 4, m = {a.components}, "
          f"{a.restarts} restarts, tol 1e-3, max_iter 100\n")
    print("| what | scikit-learn | plumb | ratio (sklearn / plumb) |")
    print("|---|---|---|---|")
    print(f"| one EM iteration (fastest) | {skb['iter']*1e3:.1f} ms | {pl_iter*1e3:.1f} ms | {skb['iter']/pl_iter:.1f}x |")
    print(f"| EM time per iteration over the fit, initialisations included (plumb) | | {pl_iter_mean*1e3:.1f} ms | {skb['iter']/pl_iter_mean:.1f}x |")
    print(f"| whole fit from a binary array (sklearn) vs from CSV (plumb, without calibration) | {sk_bin[0]:.2f} s | {pl_fit:.2f} s | {sk_bin[0]/pl_fit:.1f}x |")
    print(f"| CSV end to end (pandas + sklearn vs plumb, without calibration) | {sk_csv[0]:.2f} s | {pl_fit:.2f} s | {sk_csv[0]/pl_fit:.1f}x |")
    print(f"| peak memory (binary array / CSV) | {sk_bin[1]:.0f} / {sk_csv[1]:.0f} MiB | {pl[1]:.0f} MiB | {sk_bin[1]/pl[1]:.1f}x / {sk_csv[1]/pl[1]:.1f}x |")
    print(f"| final mean log-likelihood (latent scores) | {skb['mean_ll']:.5f} | {mix['mean_ll']:.5f} | {mix['mean_ll']-skb['mean_ll']:+.5f} (plumb − sklearn) |")
    print(f"\nscikit-learn: read {skb['read']:.2f} s (npy) / {skc['read']:.2f} s (pandas), PCA {skb['pca']:.2f} s, "
          f"GMM {skb['gmm']:.2f} s ({skb['n_iter']} iterations in the best init)")
    print(f"plumb: total {pl[0]:.2f} s, calibration {calib:.2f} s (excluded above), stages "
          + ", ".join(f"{k} {v:.2f} s" for k, v in timings.items()))


if __name__ == "__main__":
    main()
