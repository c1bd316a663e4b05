"""Reference values for the input-shift tests (tests/input_shift.rs), from numpy and scipy
only (versions pinned in requirements.txt). Seeded: rerunning gives the same file.

- mmd: a reference of 40 and a current of 50 points, 3 numeric columns and 1 categorical.
  Standardised by the reference's mean and sd (ddof 1), squared distance = numeric squared
  distance + 1 per differing category, Gaussian kernel exp(-d2 / (2 s^2)). MMD^2 unbiased and
  biased written out from the Gram matrix (Gretton et al. 2012, eq. 3), at s = 1.3 and at the
  median pairwise distance of the pooled sample; the spectral statistic (mn/(m+n)) MMD^2_u and
  the leading eigenvalues of HKH / (m+n) (numpy.linalg.eigvalsh); the spectral p-value from
  200 000 null draws of sum_l lambda_l (z_l^2 - 1) over every positive eigenvalue.
- ks: per numeric column, scipy.stats.ks_2samp (method "auto", two-sided).
- shifted: 20 pairs (40 + 40 points, one column, the current shifted by 0.6), with numpy
  permutation p-values (4999 permutations, p = (1 + #{T_b >= T}) / (1 + B)) of MMD^2_u at the
  median bandwidth.

Run: python3 tests/reference/make_input_shift_fixture.py  (writes input_shift_fixture.json beside it)
"""
import json
import os

import numpy as np
import scipy
from scipy import stats


def standardise(x, ref):
    return (x - ref.mean(axis=0)) / ref.std(axis=0, ddof=1)


def d2(a, ca, b, cb):
    num = ((a[:, None, :] - b[None, :, :]) ** 2).sum(axis=2)
    cat = (ca[:, None, :] != cb[None, :, :]).sum(axis=2) if ca.size else 0
    return num + cat


def mmd(K, m):
    n = K.shape[0] - m
    kxx, kyy, kxy = K[:m, :m], K[m:, m:], K[:m, m:]
    u = (kxx.sum() - np.trace(kxx)) / (m * (m - 1)) + (kyy.sum() - np.trace(kyy)) / (n * (n - 1)) - 2 * kxy.sum() / (m * n)
    b = kxx.sum() / m**2 + kyy.sum() / n**2 - 2 * kxy.sum() / (m * n)
    return float(u), float(b)


def median_sigma(D2):
    iu = np.triu_indices(D2.shape[0], 1)
    v = np.sort(D2[iu])
    return float(np.sqrt(v[(len(v) - 1) // 2]))


def main():
    rng = np.random.default_rng(20261203)
    m, n = 40, 50
    xr = rng.normal(size=(m, 3)) * [1.0, 2.0, 0.5] + [0.0, 1.0, -1.0]
    xc = rng.normal(size=(n, 3)) * [1.0, 2.0, 0.5] + [0.3, 1.0, -1.0]
    cr = rng.choice(["north", "south", "east"], size=(m, 1))
    cc = rng.choice(["north", "south", "east"], size=(n, 1), p=[0.5, 0.3, 0.2])
    z = standardise(np.vstack([xr, xc]), xr)
    c = np.vstack([cr, cc])
    D2 = d2(z, c, z, c)
    out = {"versions": {"scipy": scipy.__version__, "numpy": np.__version__},
           "reference": {"numeric": xr.tolist(), "categorical": cr[:, 0].tolist()},
           "current": {"numeric": xc.tolist(), "categorical": cc[:, 0].tolist()}}
    cases = []
    for sigma in (1.3, median_sigma(D2)):
        K = np.exp(-D2 / (2 * sigma**2))
        u, b = mmd(K, m)
        N = m + n
        H = np.eye(N) - np.ones((N, N)) / N
        ev = np.sort(np.linalg.eigvalsh(H @ K @ H / N))[::-1]
        ev = ev[ev > 0]
        stat = m * n / N * u
        draws = 200_000
        zz = rng.standard_normal(size=(draws, len(ev)))
        null = ((zz**2 - 1) * ev).sum(axis=1)
        p = (1 + (null >= stat).sum()) / (1 + draws)
        cases.append({"sigma": sigma, "mmd2_unbiased": u, "mmd2_biased": b, "spectral_statistic": stat,
                      "eigenvalues_top10": ev[:10].tolist(), "eigenvalue_sum": float(ev.sum()),
                      "spectral_p_value": float(p), "spectral_draws": draws})
    out["mmd"] = cases
    out["ks"] = [{"column": j, "statistic": float(r.statistic), "p_value": float(r.pvalue)}
                 for j, r in ((j, stats.ks_2samp(xr[:, j], xc[:, j])) for j in range(3))]
    pairs = []
    B = 4999
    for _ in range(20):
        a = rng.normal(size=40)
        b2 = rng.normal(size=40) + 0.6
        zz = standardise(np.concatenate([a, b2])[:, None], a[:, None])
        D2 = d2(zz, np.empty((80, 0)), zz, np.empty((80, 0)))
        K = np.exp(-D2 / (2 * median_sigma(D2) ** 2))
        t = mmd(K, 40)[0]
        ge = 0
        for _ in range(B):
            perm = rng.permutation(80)
            ge += mmd(K[np.ix_(perm, perm)], 40)[0] >= t - 1e-12 * abs(t)
        pairs.append({"reference": a.tolist(), "current": b2.tolist(), "mmd2_unbiased": t,
                      "permutation_p_value": (1 + ge) / (1 + B), "permutations": B})
    out["shifted"] = pairs
    path = os.environ.get("RISKBOUND_FIXTURE_OUT") or os.path.join(os.path.dirname(__file__), "input_shift_fixture.json")
    with open(path, "w") as f:
        json.dump(out, f, indent=1)
        f.write("\n")


if __name__ == "__main__":
    main()
