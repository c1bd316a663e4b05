"""Benchmark (not a test): `riskbound bound` end to end against the Python a user would write
instead (pandas.read_csv, then the same five methods with numpy/scipy, betting by the same
bisection) and against the read floor (`cat FILE > /dev/null`), all timed in one run.

Usage: python3 bench/bound_bench.py [--rows 1000000] [--repeat 3] [--binary target/release/riskbound]
Prints a Markdown table of best-of-N wall times and ratios. Needs numpy, scipy, pandas
(tests/reference/requirements.txt).
"""
import argparse
import math
import os
import subprocess
import tempfile
import time

import numpy as np
import pandas as pd
from scipy import stats

DELTA = 0.05


def hoeffding(x):
    m, n = x.mean(), x.size
    r = math.sqrt(math.log(1 / DELTA) / (2 * n))
    return max(m - r, 0), min(m + r, 1)


def emp_bernstein(x):
    m, n = x.mean(), x.size
    L = math.log(2 / DELTA)
    r = math.sqrt(2 * x.var(ddof=1) * L / n) + 7 * L / (3 * (n - 1))
    return max(m - r, 0), min(m + r, 1)


def clopper_pearson(x):
    k, n = int(x.sum()), x.size
    up = 1.0 if k == n else stats.beta.ppf(1 - DELTA, k + 1, n - k)
    lo = 0.0 if k == 0 else stats.beta.ppf(DELTA, k, n - k + 1)
    return lo, up


def kl_upper(m, n):
    eps = math.log(1 / DELTA) / n
    lo, hi = m, 1.0
    for _ in range(60):
        mid = (lo + hi) / 2
        v = (m * math.log(m / mid) if m > 0 else 0) + ((1 - m) * math.log((1 - m) / (1 - mid)) if m < 1 else 0)
        lo, hi = (mid, hi) if v <= eps else (lo, mid)
    return hi


def kl(x):
    m, n = x.mean(), x.size
    return 1 - kl_upper(1 - m, n), kl_upper(m, n)


def betting_upper(x):
    n = x.size
    t = np.arange(1, n + 1)
    mu = (0.5 + np.cumsum(x)) / (t + 1)
    s2 = (0.25 + np.cumsum((x - mu) ** 2)) / (t + 1)
    lam = np.minimum(np.sqrt(2 * math.log(1 / DELTA) / (n * np.concatenate([[0.25], s2[:-1]]))), 1.0)
    thr = math.log(1 / DELTA)

    def rejected(m):
        with np.errstate(divide="ignore"):
            return np.cumsum(np.log(np.maximum(1 + lam * (m - x), 0.0))).max() >= thr

    lo, hi = 0.0, 1.0
    while hi - lo > 1e-10:
        mid = (lo + hi) / 2
        lo, hi = (lo, mid) if rejected(mid) else (mid, hi)
    return hi


def betting(x):
    return 1 - betting_upper(1 - x), betting_upper(x)


METHODS = [hoeffding, emp_bernstein, clopper_pearson, kl, betting]


def python_reference(path, grouped):
    t0 = time.perf_counter()
    df = pd.read_csv(path)
    t_read = time.perf_counter() - t0
    t_bet = 0.0
    groups = df.groupby("g", sort=False)["loss"] if grouped else [(None, df["loss"])]
    for _, s in groups:
        x = s.to_numpy(dtype=float)
        for f in METHODS:
            t = time.perf_counter()
            f(x)
            if f is betting:
                t_bet += time.perf_counter() - t
    return time.perf_counter() - t0, t_read, t_bet


def best(fn, repeat):
    runs = [fn() for _ in range(repeat)]
    return min(runs, key=lambda r: r[0])


def run_riskbound(binary, path, grouped):
    args = [binary, "bound", path, "--loss-column", "loss", "--loss-max", "1", "--json", "--timings"]
    if grouped:
        args += ["--group-by", "g"]
    t0 = time.perf_counter()
    p = subprocess.run(args, capture_output=True, text=True, check=True)
    wall = time.perf_counter() - t0
    phases = dict((l.split()[1], float(l.split()[2])) for l in p.stderr.splitlines() if l.startswith("timing "))
    return wall, phases.get("read", 0.0), phases.get("betting", 0.0)


def run_cat(path):
    t0 = time.perf_counter()
    with open(os.devnull, "wb") as null:
        subprocess.run(["cat", path], stdout=null, check=True)
    return (time.perf_counter() - t0,)


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--rows", type=int, default=1_000_000)
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--binary", default="target/release/riskbound")
    a = ap.parse_args()
    rng = np.random.default_rng(20261201)
    with tempfile.TemporaryDirectory() as d:
        flat = os.path.join(d, "flat.csv")
        grouped = os.path.join(d, "grouped.csv")
        loss = (rng.random(a.rows) < 0.05).astype(int)
        pd.DataFrame({"loss": loss}).to_csv(flat, index=False)
        g = np.repeat(np.arange(1000), a.rows // 1000)
        rng.shuffle(g)
        pd.DataFrame({"g": g, "loss": loss[: g.size]}).to_csv(grouped, index=False)
        print(f"rows: {a.rows}, best of {a.repeat}, one run of this script\n")
        print("| input | read floor (cat) | riskbound | Python (pandas+numpy/scipy) | Python / riskbound | riskbound / cat | betting: numpy / riskbound |")
        print("|---|---|---|---|---|---|---|")
        for name, path, grp in [("10^6 rows, 1 group", flat, False), ("1000 groups x 1000 rows", grouped, True)]:
            cat = best(lambda: run_cat(path), a.repeat)[0]
            rb = best(lambda: run_riskbound(a.binary, path, grp), a.repeat)
            py = best(lambda: python_reference(path, grp), a.repeat)
            print(f"| {name} | {cat:.4f} s | {rb[0]:.3f} s | {py[0]:.3f} s | {py[0] / rb[0]:.1f}x | {rb[0] / cat:.0f}x | "
                  f"{py[2]:.3f} s / {rb[2]:.3f} s = {py[2] / max(rb[2], 1e-9):.1f}x |")


if __name__ == "__main__":
    main()
