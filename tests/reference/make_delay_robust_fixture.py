"""Reference values for the delay-robust (worst-case completion) bounds and the KS test.

For k errors among the labelled rows, u rows without a label and N rows in all, the
worst-case completions are k/N (every unknown correct) and (k + u)/N (every unknown wrong);
the one-sided Clopper-Pearson bounds at level delta on them are scipy's beta quantiles:
    lower = beta.ppf(delta, k, N - k + 1)            (0 when k = 0)
    upper = beta.ppf(1 - delta, k + u + 1, N - k - u)   (1 when k + u = N)
Also scipy.special.kolmogorov (the Kolmogorov survival function) at a few points and
scipy.stats.ks_2samp statistics. Run: python3 tests/reference/make_delay_robust_fixture.py
(pinned versions in requirements.txt); writes delay_robust_fixture.json beside itself.
"""
import json
import os

import numpy as np
import scipy
from scipy import special, stats

cases = [(0, 0, 10, 0.95), (3, 7, 100, 0.95), (12, 40, 500, 0.99), (0, 90, 590, 0.95),
         (150, 0, 1000, 0.9), (5, 995, 1000, 0.95), (1066, 0, 7200, 0.95), (0, 2400, 2400, 0.95)]
cp = []
for k, u, n, conf in cases:
    d = 1.0 - conf
    lower = 0.0 if k == 0 else float(stats.beta.ppf(d, k, n - k + 1))
    upper = 1.0 if k + u == n else float(stats.beta.ppf(1 - d, k + u + 1, n - k - u))
    cp.append({"k": k, "u": u, "n": n, "confidence": conf, "lower": lower, "upper": upper})

kol = [{"x": x, "sf": float(special.kolmogorov(x))} for x in [0.3, 0.5, 0.8, 1.0, 1.2, 1.36, 1.63, 2.0]]

rng = np.random.default_rng(20261203)
ks = []
for n1, n2, shift in [(30, 50, 0.0), (200, 150, 0.3), (1000, 40, 1.0)]:
    a = np.round(rng.exponential(1.0, n1), 2)
    b = np.round(rng.exponential(1.0, n2) + shift, 2)
    r = stats.ks_2samp(a, b)
    ks.append({"a": a.tolist(), "b": b.tolist(), "statistic": float(r.statistic)})

out = {"scipy": scipy.__version__, "clopper_pearson_worst_case": cp, "kolmogorov_sf": kol, "ks_2samp": ks}
path = os.environ.get("RISKBOUND_FIXTURE_OUT",
                      os.path.join(os.path.dirname(os.path.abspath(__file__)), "delay_robust_fixture.json"))
with open(path, "w") as f:
    json.dump(out, f, indent=1)
    f.write("\n")
