"""End to end with the real Prometheus server (Debian's `prometheus` package, installed by
.ci/run): riskbound runs on 127.0.0.1, Prometheus scrapes it every second and evaluates the
rules `riskbound rules` generated; batches push a window into violation; the test asserts,
through Prometheus's HTTP API, that the bound series are stored and that the violation alert
and the anytime page reach the firing state.

With --alertmanager a real Alertmanager (Debian's `prometheus-alertmanager`) receives the
alerts from Prometheus and routes them by the rules' `severity` label to two webhook receivers
served by this script: pages to /pager, tickets to /tickets.

With --secure the same run goes through TLS and basic auth: riskbound serves with a web
config file (a self-signed certificate made here with openssl, a bcrypt-hashed password) and
Prometheus scrapes with the right credentials.

Run: python3 tests/prometheus_e2e.py [--bin target/release/riskbound] [--secure] [--alertmanager]
Only the standard library; no network beyond 127.0.0.1.
"""
import argparse
import warnings
import json
import os
import shutil
import socket
import subprocess
import sys
import tempfile
import time
import urllib.parse
import urllib.request


def free_port():
    s = socket.socket()
    s.bind(("127.0.0.1", 0))
    p = s.getsockname()[1]
    s.close()
    return p


def drop(folder, name, body):
    tmp = os.path.join(folder, "." + name + ".tmp")
    with open(tmp, "w") as f:
        f.write(body)
    os.rename(tmp, os.path.join(folder, name))


def api(port, path, **params):
    url = f"http://127.0.0.1:{port}{path}?" + urllib.parse.urlencode(params)
    with urllib.request.urlopen(url, timeout=5) as r:
        return json.load(r)


def wait(what, timeout, f):
    deadline = time.time() + timeout
    last = None
    while time.time() < deadline:
        try:
            last = f()
            if last:
                return last
        except OSError as e:  # not up yet
            last = e
        time.sleep(0.5)
    raise SystemExit(f"timed out waiting for {what}; last: {last}")


def stop_all(procs, work):
    """Stops the processes a test started (SIGTERM, then SIGKILL after 10 s) and removes its
    folder, unless KEEP is set."""
    for p in procs:
        if p.poll() is None:
            p.terminate()
    for p in procs:
        try:
            p.wait(timeout=10)
        except subprocess.TimeoutExpired:
            p.kill()
    if os.environ.get("KEEP"):
        print("kept", work)
    else:
        shutil.rmtree(work, ignore_errors=True)


def webhook_server():
    """A webhook receiver on 127.0.0.1: returns (list of (path, JSON body), port)."""
    import http.server
    import threading
    received = []

    class Hook(http.server.BaseHTTPRequestHandler):
        def do_POST(self):
            body = self.rfile.read(int(self.headers.get("Content-Length", 0)))
            received.append((self.path, json.loads(body)))
            self.send_response(200)
            self.end_headers()

        def log_message(self, *args):
            pass

    srv = http.server.ThreadingHTTPServer(("127.0.0.1", 0), Hook)
    threading.Thread(target=srv.serve_forever, daemon=True).start()
    return received, srv.server_address[1]


def secure_checks(port, ca):  # noqa: C901
    """Wrong or missing credentials get 401; the probes stay open; TLS below 1.2 is refused
    by the server (its protocol_version alert), not merely unsupported by this client."""
    import base64
    import ssl
    import urllib.error
    ctx = ssl.create_default_context(cafile=ca)

    def get(path, user=None, password=None):
        req = urllib.request.Request(f"https://127.0.0.1:{port}{path}")
        if user is not None:
            token = base64.b64encode(f"{user}:{password}".encode()).decode()
            req.add_header("Authorization", "Basic " + token)
        try:
            with urllib.request.urlopen(req, context=ctx, timeout=10) as r:
                return r.status, dict(r.headers)
        except urllib.error.HTTPError as e:
            return e.code, dict(e.headers)

    assert get("/metrics", "prometheus", "s3cret")[0] == 200
    status, headers = get("/metrics", "prometheus", "wrong")
    assert status == 401 and headers.get("www-authenticate", headers.get("WWW-Authenticate", "")).startswith("Basic"), (status, headers)
    assert get("/metrics")[0] == 401
    assert get("/metrics", "nobody", "s3cret")[0] == 401
    assert get("/healthz")[0] == 200 and get("/readyz")[0] == 200
    # TLS 1.1 is deprecated in Python too; this client offers it on purpose.
    warnings.simplefilter("ignore", DeprecationWarning)
    old = ssl.SSLContext(ssl.PROTOCOL_TLS_CLIENT)
    old.check_hostname = False
    old.verify_mode = ssl.CERT_NONE
    old.set_ciphers("DEFAULT@SECLEVEL=0")
    old.minimum_version = ssl.TLSVersion.TLSv1_1
    old.maximum_version = ssl.TLSVersion.TLSv1_1
    try:
        with socket.create_connection(("127.0.0.1", port), timeout=10) as raw:
            with old.wrap_socket(raw) as tls:
                raise SystemExit(f"a TLS 1.1 handshake succeeded: {tls.version()}")
    except ssl.SSLError as e:
        # An alert received from the server (protocol_version or handshake_failure), so the
        # refusal is the server's, not this client's ("no protocols available" would be ours).
        assert "ALERT" in (e.reason or ""), e
        print(f"TLS 1.1 refused by the server: {e.reason}")
    print("basic auth: 401 on wrong, missing or unknown credentials; probes open")


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--bin", default="target/release/riskbound")
    ap.add_argument("--secure", action="store_true")
    ap.add_argument("--alertmanager", action="store_true")
    a = ap.parse_args()
    binary = os.path.abspath(a.bin)
    work = tempfile.mkdtemp(prefix="riskbound-prom-")
    procs = []
    try:
        os.makedirs(os.path.join(work, "in"))
        rb_port, prom_port = free_port(), free_port()
        with open(os.path.join(work, "riskbound.yaml"), "w") as f:
            f.write(f"""listen: "127.0.0.1:{rb_port}"
state_dir: state
rescan_interval: 200ms
models:
  - name: courier
    predictions: {{ dir: in, pattern: "pred-*.csv", columns: {{ id: id, time: t, prediction: p }} }}
    labels: {{ dir: in, pattern: "label-*.csv", columns: {{ id: id, time: t, label: y }} }}
    label_wait: 300s
    windows: [{{ name: recent, last: 400 }}]
    sla: {{ max_risk: 0.1, change_horizon: 1000 }}
""")
        run = [binary, "run", "--config", os.path.join(work, "riskbound.yaml")]
        scheme, scrape_extra = "http", ""
        if a.secure:
            subprocess.run(["openssl", "req", "-x509", "-newkey", "rsa:2048", "-nodes", "-days", "2",
                            "-subj", "/CN=127.0.0.1", "-addext", "subjectAltName=IP:127.0.0.1",
                            "-keyout", os.path.join(work, "key.pem"), "-out", os.path.join(work, "cert.pem")],
                           check=True, capture_output=True)
            hashed = subprocess.run([binary, "hash-password", "--cost", "10"], input=b"s3cret\n",
                                    check=True, capture_output=True).stdout.decode().strip()
            with open(os.path.join(work, "web.yaml"), "w") as f:
                f.write(f"""tls_server_config:
  cert_file: cert.pem
  key_file: key.pem
  min_version: TLS12
basic_auth_users:
  prometheus: "{hashed}"
""")
            run += ["--web-config", os.path.join(work, "web.yaml")]
            scheme = "https"
            scrape_extra = f"""    scheme: https
    tls_config: {{ ca_file: {work}/cert.pem }}
    basic_auth: {{ username: prometheus, password: s3cret }}
"""
        rb = subprocess.Popen(run, stderr=open(os.path.join(work, "riskbound.log"), "w"))
        procs.append(rb)
        rules = subprocess.run([binary, "rules", "--config", os.path.join(work, "riskbound.yaml")],
                               check=True, capture_output=True).stdout
        with open(os.path.join(work, "rules.yaml"), "wb") as f:
            f.write(rules)
        alerting = ""
        received = None
        if a.alertmanager:
            received, hook_port = webhook_server()
            am_port = free_port()
            with open(os.path.join(work, "alertmanager.yml"), "w") as f:
                f.write(f"""route:
  receiver: tickets
  group_by: [alertname, model]
  group_wait: 1s
  group_interval: 1s
  repeat_interval: 1h
  routes:
    - matchers: ['severity="page"']
      receiver: pager
receivers:
  - name: pager
    webhook_configs: [{{ url: "http://127.0.0.1:{hook_port}/pager" }}]
  - name: tickets
    webhook_configs: [{{ url: "http://127.0.0.1:{hook_port}/tickets" }}]
""")
            # --cluster.listen-address= turns gossip off: nothing listens beyond 127.0.0.1.
            am = subprocess.Popen(["prometheus-alertmanager", "--config.file", os.path.join(work, "alertmanager.yml"),
                                   "--storage.path", os.path.join(work, "am"),
                                   "--web.listen-address", f"127.0.0.1:{am_port}", "--cluster.listen-address="],
                                  stdout=subprocess.DEVNULL, stderr=open(os.path.join(work, "alertmanager.log"), "w"))
            procs.append(am)
            wait("Alertmanager ready", 60, lambda: urllib.request.urlopen(f"http://127.0.0.1:{am_port}/-/ready", timeout=2).status == 200)
            alerting = f"""alerting:
  alertmanagers:
    - static_configs: [{{ targets: ["127.0.0.1:{am_port}"] }}]
"""
        with open(os.path.join(work, "prometheus.yml"), "w") as f:
            f.write(f"""global: {{ scrape_interval: 1s, evaluation_interval: 1s }}
{alerting}rule_files: [{work}/rules.yaml]
scrape_configs:
  - job_name: riskbound
    static_configs: [{{ targets: ["127.0.0.1:{rb_port}"] }}]
{scrape_extra}""")
        prom = subprocess.Popen(["prometheus", "--config.file", os.path.join(work, "prometheus.yml"),
                                 "--storage.tsdb.path", os.path.join(work, "tsdb"),
                                 "--web.listen-address", f"127.0.0.1:{prom_port}"],
                                stdout=subprocess.DEVNULL, stderr=open(os.path.join(work, "prometheus.log"), "w"))
        procs.append(prom)
        wait("Prometheus ready", 60, lambda: urllib.request.urlopen(f"http://127.0.0.1:{prom_port}/-/ready", timeout=2).status == 200)

        def target_up():
            t = api(prom_port, "/api/v1/targets")["data"]["activeTargets"]
            return t and t[0]["health"] == "up" and t[0]["scrapeUrl"].startswith(scheme + "://")
        wait("the riskbound target up", 60, target_up)
        print(f"prometheus scrapes riskbound over {scheme}")
        if a.secure:
            secure_checks(rb_port, os.path.join(work, "cert.pem"))

        # 400 requests, 1 in 3 wrong: the CP lower bound on window recent is far above 0.1.
        folder = os.path.join(work, "in")
        t0 = 1_790_000_000
        # label_wait is 300 s: after the last batch the first 160 predictions have had their wait
        # (expiry runs on event time), and the anytime alarms take them. A batch at a time, so no
        # prediction's wait ends before its own label file is taken.
        for b in range(4):
            pred = "id,t,p\n" + "".join(f"b{b}r{i},{t0 + 100 * b + i},1\n" for i in range(100))
            label = "id,t,y\n" + "".join(f"b{b}r{i},{t0 + 100 * b + i + 60},{0 if i % 3 == 0 else 1}\n" for i in range(100))
            drop(folder, f"pred-{b}.csv", pred)
            drop(folder, f"label-{b}.csv", label)
            time.sleep(1)

        sel = 'riskbound_risk_lower_bound{model="courier",window="recent",method="clopper-pearson",guarantee="delay-robust"}'
        def stored():
            r = api(prom_port, "/api/v1/query", query=sel)["data"]["result"]
            return r and float(r[0]["value"][1]) > 0.1 and r
        r = wait("the lower bound series stored above max_risk", 60, stored)
        print(f"stored: {sel} = {r[0]['value'][1]}")
        r = api(prom_port, "/api/v1/query", query='count(riskbound_risk_upper_bound{guarantee="anytime"})')["data"]["result"]
        assert r and float(r[0]["value"][1]) == 3, r

        def firing(name):
            def f():
                alerts = api(prom_port, "/api/v1/alerts")["data"]["alerts"]
                return [x for x in alerts if x["labels"]["alertname"] == name and x["state"] == "firing"]
            return f
        v = wait("RiskboundWindowSlaViolated firing", 60, firing("RiskboundWindowSlaViolated"))
        assert v[0]["labels"]["severity"] == "ticket" and v[0]["labels"]["window"] == "recent", v
        print("firing:", v[0]["labels"]["alertname"], v[0]["annotations"]["summary"])
        p = wait("RiskboundRiskExceededSinceReset firing", 60, firing("RiskboundRiskExceededSinceReset"))
        assert p[0]["labels"]["severity"] == "page", p
        print("firing:", p[0]["labels"]["alertname"], p[0]["annotations"]["summary"])
        if received is not None:
            def routed():
                got = {(path, al["labels"]["alertname"]) for path, body in list(received) for al in body["alerts"]
                       if al["status"] == "firing"}
                want = {("/tickets", "RiskboundWindowSlaViolated"), ("/pager", "RiskboundRiskExceededSinceReset")}
                return want <= got and got
            got = wait("Alertmanager delivering the page and the ticket to their receivers", 60, routed)
            # Routing follows the rules' severity label: pages to the pager, the rest to tickets.
            wrong = [(path, al["labels"]["alertname"]) for path, body in list(received) for al in body["alerts"]
                     if (path == "/pager") != (al["labels"].get("severity") == "page")]
            assert not wrong, f"misrouted: {wrong}"
            print("alertmanager routed:", sorted(got))
        print("prometheus end to end: ok")
    finally:
        stop_all(procs, work)


if __name__ == "__main__":
    main()
