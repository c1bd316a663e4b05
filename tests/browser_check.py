#!/usr/bin/env python3
"""The status page and the report in a real browser (Debian's chromium, headless).

Runs `riskbound demo` (the daemon on the invented parcel scenario) on a loopback port, then has
chromium render the status page at / and the report the demo wrote, and checks for each:
  - the screenshot has exactly the requested size and is not blank (enough distinct colours, and
    enough pixels away from the page background);
  - the browser logged no console message (the pages run no script; a CSP violation or a
    failed load would be logged). A control page that logs on purpose must show up in the same
    log, or the check itself is not working.
  - the DOM after rendering holds the page's own title and the expected sections.
With --save PNG the status page's screenshot is kept (the README's picture comes from here).
"""

import argparse
import os
import shutil
import signal
import socket
import subprocess
import sys
import tempfile
import time

from PIL import Image

WIDTH, HEIGHT = 1280, 2400


def free_port():
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def chromium():
    for name in ("chromium", "chromium-browser", "google-chrome"):
        path = shutil.which(name)
        if path:
            return path
    sys.exit("browser_check: no chromium on PATH (apt-get install chromium)")


def render(url, out_png, profile):
    """Screenshot and console log of one page; returns (stderr text, dom text)."""
    base = [
        chromium(), "--headless", "--no-sandbox", "--disable-gpu", "--hide-scrollbars",
        "--no-first-run", "--disable-extensions", f"--user-data-dir={profile}",
        "--enable-logging=stderr", "--v=0", f"--window-size={WIDTH},{HEIGHT}",
    ]
    shot = subprocess.run(base + [f"--screenshot={out_png}", url], capture_output=True, text=True, timeout=120)
    dom = subprocess.run(base + ["--dump-dom", url], capture_output=True, text=True, timeout=120)
    if shot.returncode != 0 or not os.path.exists(out_png):
        sys.exit(f"browser_check: chromium failed on {url}:\n{shot.stderr[-2000:]}")
    return shot.stderr + dom.stderr, dom.stdout


def console_lines(log):
    return [l for l in log.splitlines() if ":CONSOLE" in l or "Uncaught" in l or "Content Security Policy" in l]


def check_image(path, what):
    im = Image.open(path).convert("RGB")
    if im.size != (WIDTH, HEIGHT):
        sys.exit(f"browser_check: {what}: screenshot is {im.size}, expected {(WIDTH, HEIGHT)}")
    small = im.resize((320, 600))
    colours = small.getcolors(maxcolors=1 << 20)
    background = max(colours)[1]
    away = sum(n for n, c in colours if sum(abs(a - b) for a, b in zip(c, background)) > 30)
    share = away / (320 * 600)
    if len(colours) < 16 or share < 0.03:
        sys.exit(f"browser_check: {what}: looks blank ({len(colours)} colours, {share:.1%} of pixels off the background)")
    print(f"browser_check: {what}: {im.size[0]}x{im.size[1]}, {len(colours)} colours, {share:.1%} of pixels drawn")


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--bin", default="target/release/riskbound")
    ap.add_argument("--save", help="keep the status page's screenshot here")
    a = ap.parse_args()
    work = tempfile.mkdtemp(prefix="riskbound-browser-")
    port = free_port()
    demo = subprocess.Popen(
        [a.bin, "demo", "--dir", os.path.join(work, "demo"), "--listen", f"127.0.0.1:{port}", "--ms-per-hour", "0"],
        stdout=subprocess.PIPE, stderr=subprocess.DEVNULL, text=True,
    )
    try:
        report = None
        deadline = time.time() + 600
        for line in demo.stdout:
            if "the validator's report" in line:
                report = line.split(": ", 1)[1].split(" (")[0].strip()
            if "serving until Ctrl-C" in line:
                break
            if time.time() > deadline:
                sys.exit("browser_check: the demo did not finish in 10 minutes")
        if not report or not os.path.exists(report):
            sys.exit(f"browser_check: the demo wrote no report ({report!r})")
        profile = os.path.join(work, "profile")

        # The control: a page that logs on purpose must appear in the log.
        control = os.path.join(work, "control.html")
        with open(control, "w") as f:
            f.write("<!doctype html><title>control</title><script>console.error('riskbound-probe')</script>")
        log, _ = render("file://" + control, os.path.join(work, "control.png"), profile)
        if not any("riskbound-probe" in l for l in console_lines(log)):
            sys.exit("browser_check: the console-log control did not show up: the console check would not see errors")

        for what, url, needles in [
            ("status page", f"http://127.0.0.1:{port}/", ["riskbound status", "window settled", "What the numbers promise"]),
            ("report", "file://" + report, ["riskbound report", "Input files taken in the period", "Reproducing these numbers"]),
        ]:
            png = os.path.join(work, what.replace(" ", "-") + ".png")
            log, dom = render(url, png, profile)
            bad = console_lines(log)
            if bad:
                sys.exit(f"browser_check: {what}: console messages:\n" + "\n".join(bad))
            missing = [n for n in needles if n not in dom]
            if missing:
                sys.exit(f"browser_check: {what}: the rendered page lacks {missing}")
            check_image(png, what)
            if what == "status page" and a.save:
                shutil.copy(png, a.save)
        print("browser_check: ok (no console messages; the control's message was seen)")
    finally:
        demo.send_signal(signal.SIGINT)
        try:
            demo.wait(timeout=30)
        except subprocess.TimeoutExpired:
            demo.kill()
        shutil.rmtree(work, ignore_errors=True)


if __name__ == "__main__":
    main()
