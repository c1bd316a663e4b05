"""Reference values for riskbound's anytime-valid sequences, from the `confseq` package.

confseq 0.0.11 (PyPI; by the authors of the betting and stitching papers) is the reference
implementation of Waudby-Smith & Ramdas (2023) and Howard, Ramdas, McAuliffe & Sekhon (2021).
It needs a C++ build (Boost headers, pybind11<3; recipe in tests/reference/README.md), so this
script is run once by hand and its output, anytime_fixture.json, is committed. CI does not
rerun it; the Rust tests read the JSON.

Sections of the JSON and their sources:
  stitching         confseq.boundaries.poly_stitching_bound(v, alpha, v_min, c, s=1.4, eta=2)
  normal_mixture    confseq.boundaries.normal_mixture_bound(v, alpha, v_opt, alpha_opt, one_sided)
  streams           seeded data streams (numpy PCG64) and, at checkpoints, with running
                    intersections:
    empirical_bernstein_lower  confseq.predmix.predmix_empbern_lower_cs(x, alpha, truncation=1/2)
    empirical_bernstein_upper  1 - the same on 1 - x
    betting_lower/upper        confseq.betting.betting_cs(x, alpha=2*delta, breaks=1000), the
                               hedged two-sided CS with theta = 1/2, i.e. each side at delta
    hoeffding_stitched_upper/lower  running min/max of xbar_t +- poly_stitching_bound(t/4,
                               delta, v_min=25, c=0)/t (confseq's boundary; the sequence
                               around it is two lines of numpy)
Run: PATH=/tmp/cs-venv/bin:$PATH python3 tests/reference/make_anytime_fixture.py
"""
import json
import os
import platform

import numpy as np

np.float_ = np.float64  # confseq 0.0.11 still references np.float_ (removed in numpy 2)
import confseq  # noqa: E402
import confseq.betting as cb  # noqa: E402
import confseq.boundaries as cbd  # noqa: E402
import confseq.predmix as cpm  # noqa: E402
from importlib.metadata import version  # noqa: E402

HERE = os.path.dirname(os.path.abspath(__file__))
SEED = 5_2026_12
DELTA = 0.05
rng = np.random.default_rng(SEED)

out = {
    "generator": {
        "script": "tests/reference/make_anytime_fixture.py",
        "python": platform.python_version(),
        "numpy": np.__version__,
        "confseq": version("confseq"),
        "seed": SEED,
    },
    "delta": DELTA,
}

v = [0.5, 1.0, 25.0, 100.0, 1e3, 1e4, 1e5, 1e6]
va = np.array(v)
out["stitching"] = [
    {"v": v, "alpha": a, "v_min": vm, "c": c, "s": 1.4, "eta": 2.0,
     "bound": np.asarray(cbd.poly_stitching_bound(va, a, vm, c, 1.4, 2.0)).tolist()}
    for a in (0.05, 0.001) for vm in (1.0, 25.0) for c in (0.0, 1.0)
]
out["normal_mixture"] = [
    {"v": v, "alpha": a, "v_opt": vo, "alpha_opt": a, "one_sided": one,
     "bound": np.asarray(cbd.normal_mixture_bound(va, a, vo, a, one)).tolist()}
    for a in (0.05, 0.001) for vo in (100.0, 250.0) for one in (True, False)
]


def stream(name, x, law):
    t = np.arange(1, x.size + 1)
    xbar = np.cumsum(x) / t
    eb_l = cpm.predmix_empbern_lower_cs(x, alpha=DELTA, truncation=0.5, running_intersection=True)
    eb_u = 1.0 - cpm.predmix_empbern_lower_cs(1.0 - x, alpha=DELTA, truncation=0.5, running_intersection=True)
    bet_l, bet_u = cb.betting_cs(x, alpha=2 * DELTA, breaks=1000, running_intersection=True)
    r = np.asarray(cbd.poly_stitching_bound(t / 4.0, DELTA, 25.0, 0.0, 1.4, 2.0)) / t
    h_u = np.minimum.accumulate(np.minimum(xbar + r, 1.0))
    h_l = np.maximum.accumulate(np.maximum(xbar - r, 0.0))
    checks = sorted({1, 2, 3, 10, 50, 100, 500, 1000, x.size})
    idx = [c - 1 for c in checks]
    return {
        "name": name, "law": law, "x": x.tolist(), "checkpoints": checks,
        "empirical_bernstein_lower": eb_l[idx].tolist(),
        "empirical_bernstein_upper": eb_u[idx].tolist(),
        "betting_lower": np.asarray(bet_l)[idx].tolist(),
        "betting_upper": np.asarray(bet_u)[idx].tolist(),
        "hoeffding_stitched_lower": h_l[idx].tolist(),
        "hoeffding_stitched_upper": h_u[idx].tolist(),
    }


out["streams"] = [
    stream("bernoulli", (rng.random(2000) < 0.1).astype(float), "Bernoulli(0.1), n = 2000"),
    stream("beta", rng.beta(2.0, 5.0, size=1500), "Beta(2, 5), n = 1500"),
    stream("rare", (rng.random(1200) < 0.01).astype(float), "Bernoulli(0.01), n = 1200"),
]

with open(os.path.join(HERE, "anytime_fixture.json"), "w") as f:
    json.dump(out, f, indent=1)
    f.write("\n")
print("wrote anytime_fixture.json")
