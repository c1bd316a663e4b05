"""Soak (a benchmark; its short form also runs in CI): the daemon under a steady load for a
long time, measured from outside.

Load: ROWS predictions a minute, written as one batch file a second; each prediction's label
arrives after a lag drawn uniformly from [0, LAG] (labels batched a second at a time); SCRAPERS
threads scrape /metrics once a second each. Measured: resident memory every 5 s (VmRSS), CPU
time (utime + stime), /metrics latency, and file-to-metric lag (from the rename of a batch file
to the first scrape that counts it).

Checks (with --check): peak RSS under 256 MiB; RSS flat over the second half (its maximum at
most 10% above the first-half maximum: common practice for "no growth" on a noisy machine);
average CPU at most one core; /metrics p99 under 100 ms; file-to-metric lag p99 under 5 s.

  python3 bench/soak.py --minutes 60 --lag-minutes 60     # the full soak (an hour)
  python3 bench/soak.py --minutes 5 --lag-minutes 0.5 --rows 200000 --span 1m --check   # CI
Standard library only.
"""
import argparse
import os
import random
import shutil
import subprocess
import sys
import tempfile
import threading
import time

from benchlib import free_port, get, value


def counter(text, name, labels):
    return value(text, name, labels) or 0.0


def proc_stats(pid):
    with open(f"/proc/{pid}/status") as f:
        rss = next(int(l.split()[1]) for l in f if l.startswith("VmRSS")) / 1024
    with open(f"/proc/{pid}/stat") as f:
        fields = f.read().rsplit(")", 1)[1].split()
    cpu = (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")
    return rss, cpu


def pct(v, q):
    v = sorted(v)
    return v[min(len(v) - 1, int(q * len(v)))] if v else float("nan")


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--minutes", type=float, default=60)
    ap.add_argument("--rows", type=int, default=1_000_000, help="predictions a minute")
    ap.add_argument("--lag-minutes", type=float, default=60)
    ap.add_argument("--scrapers", type=int, default=10)
    ap.add_argument("--span", default="1h", help="the span window (windows are recomputed from their samples)")
    ap.add_argument("--binary", default="target/release/riskbound")
    ap.add_argument("--check", action="store_true")
    a = ap.parse_args()
    work = tempfile.mkdtemp(prefix="riskbound-soak-")
    port = free_port()
    spool = os.path.join(work, "spool")
    os.makedirs(spool)
    lag_ms = int(a.lag_minutes * 60_000)
    with open(os.path.join(work, "c.yaml"), "w") as f:
        f.write(f"""listen: "127.0.0.1:{port}"
state_dir: state
rescan_interval: 5s
models:
  - name: soak
    predictions: {{ dir: spool, pattern: "pred-*.csv", columns: {{ id: id, time: t, prediction: p }} }}
    labels: {{ dir: spool, pattern: "label-*.csv", columns: {{ id: id, time: t, label: y }} }}
    label_wait: {max(2 * lag_ms, 60_000)}ms
    windows:
      - {{ name: recent, last: 5000 }}
      - {{ name: span, span: {a.span} }}
    sla: {{ max_risk: 0.1 }}
""")
    proc = subprocess.Popen([os.path.abspath(a.binary), "run", "--config", os.path.join(work, "c.yaml")],
                            stderr=open(os.path.join(work, "daemon.log"), "w"))
    for _ in range(400):
        try:
            if get(port, "/readyz")[0] == 200:
                break
        except OSError:
            time.sleep(0.05)
    stop = threading.Event()
    latencies, observations = [], []  # observations: (time, label files counted)
    lock = threading.Lock()

    def scraper():
        while not stop.is_set():
            t0 = time.monotonic()
            try:
                _, body = get(port, "/metrics")
            except OSError:
                continue
            t1 = time.monotonic()
            files = counter(body, "riskbound_files_ingested_total", {"model": "soak", "kind": "label"})
            with lock:
                latencies.append(t1 - t0)
                observations.append((t1, files))
            stop.wait(max(0.0, 1.0 - (t1 - t0)))

    threads = [threading.Thread(target=scraper) for _ in range(a.scrapers)]
    for t in threads:
        t.start()
    rng = random.Random(5)
    per_sec = a.rows // 60
    t_start = time.monotonic()
    event0 = 1_790_000_000  # Unix seconds
    pending = {}  # second -> list of label lines
    written = []  # (monotonic time of rename, label file ordinal)
    samples = []  # (elapsed, rss, cpu)
    next_id = 0
    sec = 0
    label_files = 0
    try:
        while time.monotonic() - t_start < a.minutes * 60:
            now_s = event0 + sec
            lines = ["id,t,p"]
            for _ in range(per_sec):
                p = "a" if rng.random() < 0.7 else "b"
                lines.append(f"s{next_id},{now_s},{p}")
                y = p if rng.random() > 0.08 else ("b" if p == "a" else "a")
                due = sec + int(rng.random() * lag_ms / 1000)
                pending.setdefault(due, []).append(f"s{next_id},{now_s + (due - sec)},{y}")
                next_id += 1
            tmp = os.path.join(spool, f".pred-{sec:08d}.tmp")
            with open(tmp, "w") as f:
                f.write("\n".join(lines) + "\n")
            os.rename(tmp, os.path.join(spool, f"pred-{sec:08d}.csv"))
            due = pending.pop(sec, [])
            if due:
                tmp = os.path.join(spool, f".label-{sec:08d}.tmp")
                with open(tmp, "w") as f:
                    f.write("id,t,y\n" + "\n".join(due) + "\n")
                os.rename(tmp, os.path.join(spool, f"label-{sec:08d}.csv"))
                label_files += 1
                written.append((time.monotonic(), label_files))
            # Old files are the serving stack's to clean up; keep the spool small.
            old = sec - 120
            for n in (f"pred-{old:08d}.csv", f"label-{old:08d}.csv"):
                try:
                    os.remove(os.path.join(spool, n))
                except FileNotFoundError:
                    pass
            if sec % 5 == 0:
                rss, cpu = proc_stats(proc.pid)
                samples.append((time.monotonic() - t_start, rss, cpu))
            if sec % 300 == 0 and sec > 0:
                with lock:
                    p99 = pct(latencies, 0.99) * 1000
                cores_so_far = (samples[-1][2] - samples[0][2]) / max(1e-9, samples[-1][0] - samples[0][0])
                print(f"progress: {sec / 60:.0f} min, RSS {samples[-1][1]:.0f} MiB, CPU {cores_so_far:.2f} cores, "
                      f"/metrics p99 {p99:.1f} ms", flush=True)
            sec += 1
            time.sleep(max(0.0, t_start + sec - time.monotonic()))
        time.sleep(5)
    finally:
        stop.set()
        for t in threads:
            t.join()
        rss, cpu = proc_stats(proc.pid)
        samples.append((time.monotonic() - t_start, rss, cpu))
        _, final = get(port, "/metrics")
        proc.terminate()
        proc.wait()
    lags = []
    obs = sorted(observations)
    j = 0
    for (tw, n) in written:
        while j < len(obs) and (obs[j][0] < tw or obs[j][1] < n):
            j += 1
        if j < len(obs):
            lags.append(obs[j][0] - tw)
    half = samples[len(samples) // 2][0]
    first = max(s[1] for s in samples if s[0] <= half)
    second = max(s[1] for s in samples if s[0] > half)
    elapsed = samples[-1][0]
    cores = (samples[-1][2] - samples[0][2]) / (elapsed - samples[0][0])
    p99_scrape = pct(latencies, 0.99) * 1000
    p99_lag = pct(lags, 0.99)
    print(f"| duration | rows/min | label lag | scrapers | peak RSS | RSS 1st half / 2nd half max | CPU (cores) | /metrics p99 | file-to-metric lag p99 |")
    print("|---|---|---|---|---|---|---|---|---|")
    print(f"| {elapsed / 60:.1f} min | {per_sec * 60:,} | ≤ {a.lag_minutes:g} min | {a.scrapers} | {max(s[1] for s in samples):.0f} MiB | "
          f"{first:.0f} / {second:.0f} MiB | {cores:.2f} | {p99_scrape:.1f} ms | {p99_lag:.2f} s |")
    shutil.rmtree(work, ignore_errors=True)
    taken = counter(final, "riskbound_rows_ingested_total", {"model": "soak", "kind": "prediction"})
    rejected = sum(float(l.rsplit(" ", 1)[1]) for l in final.splitlines() if l.startswith("riskbound_rows_rejected_total{"))
    print(f"predictions written {next_id}, taken {taken:.0f}, rows rejected {rejected:.0f}")
    if a.check:
        problems = []
        if taken != next_id or rejected != 0:
            problems.append("not every written row was taken exactly once")
        if max(s[1] for s in samples) >= 256:
            problems.append("peak RSS >= 256 MiB")
        if second > 1.10 * first:
            problems.append("RSS grew in the second half")
        if cores > 1.0:
            problems.append("more than one core")
        if p99_scrape >= 100:
            problems.append("/metrics p99 >= 100 ms")
        if not lags or p99_lag >= 5:
            problems.append("file-to-metric lag p99 >= 5 s")
        for p in problems:
            print("soak check failed:", p)
        print(f"soak check: {'ok' if not problems else 'FAILED'}")
        sys.exit(1 if problems else 0)


if __name__ == "__main__":
    main()
