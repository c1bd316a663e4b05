"""Benchmark (not a test): the slice scan of `riskbound slices` against a numpy reference of
the same scan, in one run on this machine.

Data: n = 10^5 rows, 10 numeric features (uniform, rounded to 3 decimals, so heavily tied) and
3 categorical ones (8, 3 and 5 values), 0-1 losses with a planted bad interval. The timed work
is what the uniform certificate costs: index the window (sort each numeric feature and group
ties; code each categorical) and, for 100 sign vectors, the exact supremum over every category,
threshold and interval (group sums, max prefix, max suffix, max subarray). riskbound reports its
own split of the time (`--timings`: index, scan); numpy does the same with argsort,
np.unique(return_inverse), bincount, cumsum and minimum.accumulate, single-threaded.

Each side runs 7 times, alternating; medians are reported (one run each is noisy here).

Run: python3 bench/slices_bench.py [--bin target/release/riskbound]
"""
import argparse
import os
import statistics
import subprocess
import tempfile
import time

import numpy as np

N, NUM, DRAWS, THETA = 100_000, 10, 100, 0.15
REPEATS = 7
CATS = [8, 3, 5]


def make(path, rng):
    x = np.round(rng.random((N, NUM)), 3)
    c = [rng.integers(0, k, N) for k in CATS]
    p = np.where((x[:, 0] > 0.3) & (x[:, 0] <= 0.4), 0.3, 0.08)
    loss = (rng.random(N) < p).astype(int)
    with open(path, "w") as f:
        f.write(",".join([f"n{j}" for j in range(NUM)] + [f"c{j}" for j in range(len(CATS))] + ["loss"]) + "\n")
        for i in range(N):
            f.write(",".join(f"{v:g}" for v in x[i]) + "," + ",".join(f"v{cj[i]}" for cj in c) + f",{loss[i]}\n")
    return x, c, loss.astype(float)


def numpy_scan(x, c, loss, rng):
    t0 = time.perf_counter()
    inv = [np.unique(x[:, j], return_inverse=True)[1] for j in range(NUM)]
    sizes = [int(i.max()) + 1 for i in inv]
    codes = [np.unique(cj, return_inverse=True)[1] for cj in c]
    t_index = time.perf_counter() - t0
    excess = loss - THETA
    c0 = 0.5 - THETA
    t0 = time.perf_counter()
    total = 0.0
    for _ in range(DRAWS):
        s = rng.choice([-1.0, 1.0], size=N)
        w = s * excess
        best = 0.0
        for code in codes:
            best = max(best, np.bincount(code, weights=w).max())
        for inv_j, u in zip(inv, sizes):
            g = np.bincount(inv_j, weights=w, minlength=u)
            pre = np.concatenate([[0.0], np.cumsum(g)])
            best = max(best, pre.max(), pre[-1] - pre.min(), (pre - np.minimum.accumulate(pre)).max())
        total += best / N - c0 * s.sum() / N
    return t_index, time.perf_counter() - t0, total / DRAWS


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--bin", default="target/release/riskbound")
    a = ap.parse_args()
    rng = np.random.default_rng(20261202)
    with tempfile.TemporaryDirectory() as d:
        path = os.path.join(d, "window.csv")
        x, c, loss = make(path, rng)
        cmd = [a.bin, "slices", path, "--loss-column", "loss", "--loss-max", "1",
               "--numeric", ",".join(f"n{j}" for j in range(NUM)),
               "--categorical", ",".join(f"c{j}" for j in range(len(CATS))),
               "--sla-max-risk", str(THETA), "--sign-draws", str(DRAWS), "--timings", "--json"]
        # Each side runs REPEATS times, alternating, and the medians are compared: one run of
        # each on a shared machine is noisy (common practice for benchmarks).
        runs, refs, walls = [], [], []
        for _ in range(REPEATS):
            started = time.perf_counter()
            out = subprocess.run(cmd, capture_output=True, text=True, check=True)
            walls.append(time.perf_counter() - started)
            t = {}
            for line in out.stderr.splitlines():
                k, v = line.split()[-2:]
                t[k] = float(v)
            runs.append(t)
            refs.append(numpy_scan(x, c, loss, rng))
    med = lambda v: statistics.median(v)
    t = {k: med([r[k] for r in runs]) for k in ("index", "scan")}
    t["rademacher"] = runs[0]["rademacher"]
    ni, ns = med([r[0] for r in refs]), med([r[1] for r in refs])
    nr = refs[0][2]
    wall = med(walls)
    ours = med([r["index"] + r["scan"] for r in runs])
    ref = med([r[0] + r[1] for r in refs])
    print(f"n = {N}, {NUM} numeric + {len(CATS)} categorical features, {DRAWS} sign draws; medians of {REPEATS} runs each")
    print("| | index | scan (100 draws) | total | Rademacher average |")
    print("|---|---|---|---|---|")
    print(f"| riskbound | {t['index']:.3f} s | {t['scan']:.3f} s | {ours:.3f} s | {t['rademacher']:.6f} |")
    print(f"| numpy reference | {ni:.3f} s | {ns:.3f} s | {ref:.3f} s | {nr:.6f} |")
    ratios = sorted((r[0] + r[1]) / (o["index"] + o["scan"]) for r, o in zip(refs, runs))
    print(f"speed-up {ref / ours:.1f}x in all (run by run: {ratios[0]:.1f}x to {ratios[-1]:.1f}x), "
          f"{ns / t['scan']:.1f}x on the sign draws alone; "
          "target: riskbound under 0.5 s on one core and >= 10x numpy")
    print(f"(whole `riskbound slices` command, CSV read and both certificates included: {wall:.3f} s)")


if __name__ == "__main__":
    main()
