"""Benchmark (not a test): memory and time of the daemon's evaluation rounds as windows grow.

An invented kiln-crack classifier (our own scenario): N labelled predictions spread over 25 days, fed as
60 prediction and 60 label CSV files; two windows, `span: 30d` and `last: N`, so each holds all N.
After the last file is taken it measures the daemon's peak resident memory (VmHWM) and the time
one evaluation round takes with the windows full: a one-row prediction file and its label are
dropped and the time until /metrics shows them is taken, R times, median and max.

Usage: python3 bench/window_bench.py [--sizes 100000,1000000,3000000] [--repeats 5]
       [--binary target/release/riskbound]
Prints a Markdown table. Standard library only.
"""
import argparse
import os
import random
import shutil
import statistics
import subprocess
import tempfile
import time

from benchlib import free_port, get, value, wait_ready

FILES = 60
SPREAD = 25 * 86_400  # seconds the predictions span: inside the 30-day window
T0 = 1_790_000_000


def wait(pred, timeout, what):
    deadline = time.monotonic() + timeout
    while not pred():
        if time.monotonic() > deadline:
            raise SystemExit(f"timed out waiting for {what}")
        time.sleep(0.02)


def labelled(port):
    try:
        return value(get(port, "/metrics")[1], "riskbound_samples_labelled_total", {"model": "kiln"}) or 0
    except OSError:
        return 0


def peak_rss_mib(pid):
    with open(f"/proc/{pid}/status") as f:
        for line in f:
            if line.startswith("VmHWM"):
                return int(line.split()[1]) / 1024
    return float("nan")


def run(binary, n, repeats):
    work = tempfile.mkdtemp(prefix="riskbound-window-bench-")
    try:
        spool, stage = os.path.join(work, "spool"), os.path.join(work, "stage")
        os.makedirs(spool)
        os.makedirs(stage)
        port = free_port()
        cfg = os.path.join(work, "riskbound.yaml")
        with open(cfg, "w") as f:
            f.write(f"""listen: "127.0.0.1:{port}"
state_dir: state
rescan_interval: 1s
models:
  - name: kiln
    predictions: {{ dir: spool, pattern: "pred-*.csv", columns: {{ id: id, time: t, prediction: p }} }}
    labels: {{ dir: spool, pattern: "label-*.csv", columns: {{ id: id, time: t, label: y }} }}
    label_wait: 60d
    windows:
      - {{ name: month, span: 30d }}
      - {{ name: newest, last: {n} }}
    sla: {{ max_risk: 0.1 }}
""")
        rng = random.Random(n)
        per = n // FILES
        names = []
        for k in range(FILES):
            rows = range(k * per, (k + 1) * per)
            with open(os.path.join(stage, f"pred-{k:03d}.csv"), "w") as f:
                f.write("id,t,p\n" + "".join(f"r{i},{T0 + i * SPREAD // n},crack\n" for i in rows))
            with open(os.path.join(stage, f"label-{k:03d}.csv"), "w") as f:
                f.write("id,t,y\n" + "".join(
                    f"r{i},{T0 + i * SPREAD // n + 60},{'sound' if rng.random() < 0.06 else 'crack'}\n" for i in rows))
            names += [f"pred-{k:03d}.csv", f"label-{k:03d}.csv"]
        log = open(os.path.join(work, "daemon.log"), "w")
        proc = subprocess.Popen([binary, "run", "--config", cfg], stderr=log)
        try:
            wait_ready(port, proc)
            start = time.perf_counter()
            for name in names:
                os.rename(os.path.join(stage, name), os.path.join(spool, name))
            wait(lambda: labelled(port) == per * FILES, 3600, "ingest")
            ingest_s = time.perf_counter() - start
            rounds = []
            for r in range(repeats):
                t = T0 + SPREAD + 120 + r
                with open(os.path.join(stage, f"pred-x{r}.csv"), "w") as f:
                    f.write(f"id,t,p\nx{r},{t},crack\n")
                with open(os.path.join(stage, f"label-x{r}.csv"), "w") as f:
                    f.write(f"id,t,y\nx{r},{t + 1},crack\n")
                want = per * FILES + r + 1
                s = time.perf_counter()
                os.rename(os.path.join(stage, f"pred-x{r}.csv"), os.path.join(spool, f"pred-x{r}.csv"))
                os.rename(os.path.join(stage, f"label-x{r}.csv"), os.path.join(spool, f"label-x{r}.csv"))
                wait(lambda: labelled(port) == want, 600, "the one-row files")
                rounds.append(time.perf_counter() - s)
            rss = peak_rss_mib(proc.pid)
        finally:
            proc.terminate()
            proc.wait()
            log.close()
        return {"n": per * FILES, "ingest_s": ingest_s, "rss": rss,
                "round_median": statistics.median(rounds), "round_max": max(rounds)}
    finally:
        shutil.rmtree(work, ignore_errors=True)


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--sizes", default="100000,1000000,3000000")
    ap.add_argument("--repeats", type=int, default=5)
    ap.add_argument("--binary", default="target/release/riskbound")
    a = ap.parse_args()
    binary = os.path.abspath(a.binary)
    print("| samples per window (two windows) | ingest wall time | peak RSS | one-row file to metric, median | max |")
    print("|---|---|---|---|---|")
    for n in (int(s) for s in a.sizes.split(",")):
        r = run(binary, n, a.repeats)
        print(f"| {r['n']:,} | {r['ingest_s']:.1f} s | {r['rss']:.0f} MiB | {r['round_median'] * 1000:.0f} ms | "
              f"{r['round_max'] * 1000:.0f} ms |", flush=True)


if __name__ == "__main__":
    main()
