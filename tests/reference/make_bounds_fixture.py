"""Reference values for riskbound's fixed-sample bounds, from libraries outside the project.

Writes bounds_fixture.json next to this file. The Rust tests read that JSON; they never run
Python. `.ci/run` regenerates the file and diffs it against the committed copy, so a change in
a reference library shows up as a CI failure rather than silently moving the check values.

Sources, per section of the JSON:
  clopper_pearson  scipy.stats.beta.ppf (one-sided beta quantiles) and, independently,
                   statsmodels proportion_confint(method="beta") two-sided at alpha = 2*delta,
                   which equals the two one-sided bounds at delta each.
  beta_quantiles   scipy.special.betaincinv / betainccinv (Boost.Math under the hood).
  rule_of_three    the closed form 1 - delta**(1/n) for k = 0 (P(X = 0) = (1 - p)**n = delta).
  hoeffding, empirical_bernstein
                   the published closed forms (Hoeffding 1963 Thm 2; Maurer & Pontil 2009
                   Thm 4) evaluated with numpy on the data arrays stored here.
  kl               an independent bisection on kl(mean || q) written below (200 halvings).
  betting          a numpy transcription of the fixed-n hedged-capital interval of
                   Waudby-Smith & Ramdas (2023) with plug-in bets capped at 1, solved by plain
                   bisection on [0, 1] (the code a user would write), plus confseq 0.0.11
                   `betting_ci` grid values (grid 1/2000) recorded from one run by hand with the
                   install recipe in tests/reference/README.md.
Run: python3 tests/reference/make_bounds_fixture.py
"""
import json
import math
import os
import platform

import numpy as np
import scipy
import statsmodels
from scipy import special, stats
from statsmodels.stats.proportion import proportion_confint

HERE = os.path.dirname(os.path.abspath(__file__))
SEED = 7_2026_12
rng = np.random.default_rng(SEED)


def cp(k, n, conf):
    delta = 1.0 - conf
    upper = 1.0 if k == n else float(stats.beta.ppf(1.0 - delta, k + 1, n - k))
    lower = 0.0 if k == 0 else float(stats.beta.ppf(delta, k, n - k + 1))
    sm_lo, sm_hi = proportion_confint(k, n, alpha=2.0 * delta, method="beta")
    return {"n": n, "k": k, "confidence": conf, "lower": lower, "upper": upper,
            "statsmodels_lower": float(sm_lo), "statsmodels_upper": float(sm_hi)}


cp_cases = []
for (n, k) in [(1, 0), (1, 1), (2, 1), (10, 0), (10, 3), (10, 10), (20, 4), (50, 0), (50, 1),
               (100, 5), (100, 12), (400, 49), (1000, 50), (1000, 999), (1000, 1000),
               (10_000, 17), (100_000, 3), (1_000_000, 0), (1_000_000, 1), (1_000_000, 1000),
               (1_000_000, 500_000), (1_000_000, 999_999), (1_000_000, 1_000_000)]:
    for conf in (0.95, 0.999999):
        cp_cases.append(cp(k, n, conf))
for (n, k, conf) in [(30, 2, 0.5), (30, 2, 0.8), (250, 40, 0.99), (5000, 4999, 0.9)]:
    cp_cases.append(cp(k, n, conf))

beta_q = []
for (a, b, p) in [(2.0, 999_999.0, 1e-6), (2.0, 999_999.0, 0.05), (0.5, 0.5, 0.3), (3.0, 7.5e6, 1e-3),
                  (1e5, 1e5, 0.975), (50.0, 950.0, 0.05), (1000.0, 1.0, 1e-6), (1.0, 1e6, 0.05),
                  (7.0, 3.0, 0.999999), (500_001.0, 500_000.0, 1e-6), (0.9, 40.0, 0.2)]:
    beta_q.append({"a": a, "b": b, "p": p, "tail": "lower", "x": float(special.betaincinv(a, b, p))})
    beta_q.append({"a": a, "b": b, "p": p, "tail": "upper", "x": float(special.betainccinv(a, b, p))})

rule_of_three = [{"n": n, "confidence": 0.95, "upper": 1.0 - 0.05 ** (1.0 / n)} for n in (10, 100, 1000, 100_000)]


def kl_bern(p, q):
    out = 0.0
    if p > 0:
        out += p * math.log(p / q)
    if p < 1:
        out += (1 - p) * math.log((1 - p) / (1 - q))
    return out


def kl_upper(mean, n, delta):
    eps = math.log(1 / delta) / n
    if mean >= 1:
        return 1.0
    lo, hi = mean, 1.0
    for _ in range(200):
        mid = 0.5 * (lo + hi)
        if mid >= 1.0 or kl_bern(mean, mid) > eps:
            hi = mid
        else:
            lo = mid
    return hi


def betting_bet(x, delta):
    n = x.size
    t = np.arange(1, n + 1)
    mu = (0.5 + np.cumsum(x)) / (t + 1)
    s2 = (0.25 + np.cumsum((x - mu) ** 2)) / (t + 1)
    s2_prev = np.concatenate([[0.25], s2[:-1]])
    return np.minimum(np.sqrt(2 * math.log(1 / delta) / (n * s2_prev)), 1.0)


def betting_upper(x, delta, tol=1e-11):
    lam = betting_bet(x, delta)
    thr = math.log(1 / delta)

    def rejected(m):
        with np.errstate(divide="ignore"):
            return np.cumsum(np.log(np.maximum(1 + lam * (m - x), 0.0))).max() >= thr

    if not rejected(1.0):
        return 1.0
    lo, hi = 0.0, 1.0
    while hi - lo > tol:
        mid = 0.5 * (lo + hi)
        if rejected(mid):
            hi = mid
        else:
            lo = mid
    return max(hi, float(x.mean()))


def all_bounds(x, conf):
    delta = 1 - conf
    n = x.size
    m = float(x.mean())
    h = math.sqrt(math.log(1 / delta) / (2 * n))
    out = {"hoeffding": {"lower": max(m - h, 0.0), "upper": min(m + h, 1.0)}}
    if n >= 2:
        L = math.log(2 / delta)
        r = math.sqrt(2 * float(np.var(x, ddof=1)) * L / n) + 7 * L / (3 * (n - 1))
        out["empirical-bernstein"] = {"lower": max(m - r, 0.0), "upper": min(m + r, 1.0)}
    if np.all((x == 0) | (x == 1)):
        c = cp(int(x.sum()), n, conf)
        out["clopper-pearson"] = {"lower": c["lower"], "upper": c["upper"]}
    out["kl"] = {"lower": 1 - kl_upper(1 - m, n, delta), "upper": kl_upper(m, n, delta)}
    out["betting"] = {"lower": 1 - betting_upper(1 - x, delta), "upper": betting_upper(x, delta)}
    return out


with open(os.path.join(HERE, "shared_datasets.json")) as f:
    _shared = json.load(f)
SHARED_A = [float(c) for c in _shared["A_losses_01_string"]]
SHARED_B = [float(v) for v in _shared["B_losses"]]

datasets = {}
A = (rng.random(400) < 0.12).astype(float)
B = rng.beta(1.0, 6.0, size=400)
C = np.zeros(1000)
C[:50] = 1.0
rng.shuffle(C)  # exactly 50 errors in 1000: mean 0.05
D = rng.uniform(0.0, 1.0, size=2)
E = np.zeros(30)
F = np.ones(30)
G = rng.beta(0.5, 0.5, size=5000)
for name, x, conf in [("A_binary_400", A, 0.95), ("B_beta16_400", B, 0.95), ("C_binary_1000_p05", C, 0.95),
                      ("D_uniform_2", D, 0.9), ("E_zeros_30", E, 0.95), ("F_ones_30", F, 0.95),
                      ("G_arcsine_5000", G, 0.999999)]:
    datasets[name] = {"confidence": conf, "n": int(x.size), "mean": float(x.mean()),
                      "losses": [float(v) for v in x], "bounds": all_bounds(x, conf)}

out = {
    "generated_by": "tests/reference/make_bounds_fixture.py",
    "seed": SEED,
    "versions": {"python": platform.python_version(), "numpy": np.__version__, "scipy": scipy.__version__,
                 "statsmodels": statsmodels.__version__},
    "clopper_pearson": cp_cases,
    "beta_quantiles": beta_q,
    "rule_of_three": rule_of_three,
    "datasets": datasets,
    "confseq_betting_ci": {
        "source": "confseq 0.0.11 betting_ci(alpha=2*delta, breaks=2000) on data sets A and B of "
                  "shared_datasets.json, recorded from one run by hand (recipe in tests/reference/README.md); "
                  "grid values, so an exact bisection lies within 2/2000 of them",
        "grid": 0.0005,
        "cases": [{"data": "A", "losses": SHARED_A, "confidence": 0.95, "lower": 0.0885, "upper": 0.165},
                  {"data": "B", "losses": SHARED_B, "confidence": 0.95, "lower": 0.1295, "upper": 0.159}],
    },
}
OUT = os.environ.get("RISKBOUND_FIXTURE_OUT", os.path.join(HERE, "bounds_fixture.json"))
with open(OUT, "w") as f:
    json.dump(out, f, indent=1)
    f.write("\n")
print("wrote", OUT)
