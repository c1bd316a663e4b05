"""Benchmark (not a test) of the daemon: end-to-end ingest throughput (files -> committed state
-> updated bounds) on labelled rows, and /metrics latency with about 1000 series.

Usage: python3 bench/daemon_bench.py [--rows 1000000] [--files 100] [--binary target/release/riskbound]
Prints a Markdown table. Standard library only.
"""
import argparse
import os
import random
import shutil
import subprocess
import tempfile
import time

from benchlib import free_port, get, value, wait_ready


def scrape(port):
    return get(port, "/metrics")[1]


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--rows", type=int, default=1_000_000)
    ap.add_argument("--files", type=int, default=100)
    ap.add_argument("--binary", default="target/release/riskbound")
    a = ap.parse_args()
    binary = os.path.abspath(a.binary)
    work = tempfile.mkdtemp(prefix="riskbound-bench-")
    try:
        spool = os.path.join(work, "spool")
        stage = os.path.join(work, "stage")
        os.makedirs(spool)
        os.makedirs(stage)
        port = free_port()
        models = []
        # Model "load" takes the rows; models m1..m9 exist to give /metrics about 1000 series.
        for i in range(10):
            name = "load" if i == 0 else f"m{i}"
            windows = "\n".join(f"      - {{ name: w{j}, last: {500 * (j + 1)} }}" for j in range(10))
            models.append(f"""  - name: {name}
    predictions: {{ dir: spool, pattern: "{name}-pred-*.csv", columns: {{ id: id, time: t, prediction: p }} }}
    labels: {{ dir: spool, pattern: "{name}-label-*.csv", columns: {{ id: id, time: t, label: y }} }}
    label_wait: 30d
    windows:
{windows}
    sla: {{ max_risk: 0.1 }}""")
        cfg = os.path.join(work, "riskbound.yaml")
        with open(cfg, "w") as f:
            f.write(f'listen: "127.0.0.1:{port}"\nstate_dir: state\nrescan_interval: 1s\nmodels:\n' + "\n".join(models) + "\n")
        rng = random.Random(1)
        per = a.rows // a.files
        t0 = 1_790_000_000
        names = []
        for k in range(a.files):
            rows = range(k * per, (k + 1) * per)
            with open(os.path.join(stage, f"load-pred-{k:05d}.csv"), "w") as f:
                f.write("id,t,p\n" + "".join(f"r{i},{t0 + i},{'a' if i % 3 else 'b'}\n" for i in rows))
            with open(os.path.join(stage, f"load-label-{k:05d}.csv"), "w") as f:
                f.write("id,t,y\n" + "".join(f"r{i},{t0 + i + 60},{'a' if (i % 3) and rng.random() > 0.05 else 'b'}\n" for i in rows))
            names += [f"load-pred-{k:05d}.csv", f"load-label-{k:05d}.csv"]
        # a few labelled rows for the other models, so their series exist
        for i in range(1, 10):
            with open(os.path.join(spool, f"m{i}-pred-0.csv"), "w") as f:
                f.write("id,t,p\n" + "".join(f"x{j},{t0 + j},a\n" for j in range(100)))
            with open(os.path.join(spool, f"m{i}-label-0.csv"), "w") as f:
                f.write("id,t,y\n" + "".join(f"x{j},{t0 + j + 5},{'a' if j % 10 else 'b'}\n" for j in range(100)))
        proc = subprocess.Popen([binary, "run", "--config", cfg], stderr=open(os.environ.get("RB_BENCH_LOG", os.devnull), "w"))
        try:
            wait_ready(port, proc)
            while value(scrape(port), "riskbound_samples_labelled_total", {"model": "m9"}) != 100:
                time.sleep(0.05)
            start = time.perf_counter()
            for n in names:
                os.rename(os.path.join(stage, n), os.path.join(spool, n))
            while True:
                v = value(scrape(port), "riskbound_window_samples", {"model": "load", "window": "w9"})
                done = value(scrape(port), "riskbound_samples_labelled_total", {"model": "load"})
                if done == per * a.files and v == 5000:
                    break
                time.sleep(0.02)
            elapsed = time.perf_counter() - start
            text = scrape(port)
            series = sum(1 for l in text.splitlines() if l and not l.startswith("#"))
            lat = []
            for _ in range(1000):
                s = time.perf_counter()
                scrape(port)
                lat.append(time.perf_counter() - s)
            lat.sort()
            rss = 0
            with open(f"/proc/{proc.pid}/status") as f:
                for line in f:
                    if line.startswith("VmHWM"):
                        rss = int(line.split()[1]) // 1024
        finally:
            proc.terminate()
            proc.wait()
        print(f"| labelled rows | files | ingest wall time | labelled rows/s | /metrics series | p50 | p99 | peak RSS |")
        print("|---|---|---|---|---|---|---|---|")
        print(f"| {per * a.files} | {2 * a.files} | {elapsed:.2f} s | {per * a.files / elapsed:,.0f} | {series} | "
              f"{lat[len(lat) // 2] * 1000:.2f} ms | {lat[int(len(lat) * 0.99)] * 1000:.2f} ms | {rss} MiB |")
    finally:
        shutil.rmtree(work, ignore_errors=True)


if __name__ == "__main__":
    main()
