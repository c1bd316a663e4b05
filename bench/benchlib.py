"""Helpers shared by the daemon benchmarks (standard library only): a free loopback port, GET
requests, waiting for /readyz, and series lookups in a Prometheus text exposition."""
import http.client
import socket
import time


def free_port():
    s = socket.socket()
    s.bind(("127.0.0.1", 0))
    p = s.getsockname()[1]
    s.close()
    return p


def get(port, path, timeout=30):
    """(status, body) of GET path on 127.0.0.1:port."""
    c = http.client.HTTPConnection("127.0.0.1", port, timeout=timeout)
    c.request("GET", path)
    r = c.getresponse()
    body = r.read().decode()
    c.close()
    return r.status, body


def value(text, name, labels):
    """The value of the first series `name` whose labels include `labels`, or None."""
    for line in text.splitlines():
        if line.startswith(name + "{") and all(f'{k}="{v}"' in line for k, v in labels.items()):
            return float(line.rsplit(" ", 1)[1])
    return None


def wait_ready(port, proc):
    """Returns once /readyz answers 200; exits if the daemon `proc` ends or is not ready in 20 s."""
    for _ in range(400):
        try:
            c = http.client.HTTPConnection("127.0.0.1", port, timeout=2)
            c.request("GET", "/readyz")
            if c.getresponse().status == 200:
                return
        except OSError:
            pass
        if proc.poll() is not None:
            raise SystemExit("daemon exited")
        time.sleep(0.05)
    raise SystemExit("daemon not ready")
