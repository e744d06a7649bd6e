#!/usr/bin/env python3
"""Log evidence of demo-targets/decay-two-isotopes-background.json (five unknowns) by importance
sampling written from scratch in numpy/scipy, outside Kiln, for tests/demos.rs.

Run from anywhere:  python3 tests/reference/isotopes_is.py   (about a minute and a half)
It reads the demo's data itself, writes the energy in numpy (transcribed by hand from the
spec's formula, quoted below), and rewrites tests/reference/isotopes_values.json beside it with
the numpy, scipy and Python versions.

Z = integral over the spec's box of exp(-energy). The two modes are mirror images (swap
(A1, tau1) with (A2, tau2)); each is found with scipy.optimize.minimize, its covariance is the
inverse of a finite-difference Hessian, and the proposal is an equal mixture of multivariate
Student-t densities (scipy.stats.multivariate_t) at the two modes. A draw outside the box has
f = 0. Two estimates with different proposals (nu = 5, scale 1.3; nu = 10, scale 1.6) and
different seeds must agree; both are kept with their standard errors, and the script prints
each one's largest normalised weight (a share near 1/draws means tame weights).

Energy (from the spec):
  k1 = 2 A1 tau1 sinh(1 / tau1); k2 = 2 A2 tau2 sinh(1 / tau2)
  mu = k1 exp(-t_mid / tau1) + k2 exp(-t_mid / tau2) + 2 b
  E = sum(mu - counts log(mu) + lgamma(counts + 1))
"""

import json
import math
import os
import sys

import numpy as np
import scipy
from scipy import optimize, special, stats

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(os.path.dirname(HERE))
DEMO = "decay-two-isotopes-background.json"
OUT = os.path.join(HERE, "isotopes_values.json")

with open(os.path.join(ROOT, "demo-targets", DEMO)) as f:
    spec = json.load(f)
t = np.asarray(spec["data"]["t_mid"], dtype=float)
n = np.asarray(spec["data"]["counts"], dtype=float)
lo = np.array([v["lower"] for v in spec["variables"]], dtype=float)
hi = np.array([v["upper"] for v in spec["variables"]], dtype=float)
const = special.gammaln(n + 1).sum()


def energy(x):
    """Energy at the rows of x (shape (m, 5)); inf outside the box."""
    x = np.atleast_2d(x)
    a1, t1, a2, t2, b = (x[:, i : i + 1] for i in range(5))
    inside = np.all((x >= lo) & (x <= hi), axis=1)
    with np.errstate(all="ignore"):
        k1 = 2 * a1 * t1 * np.sinh(1 / t1)
        k2 = 2 * a2 * t2 * np.sinh(1 / t2)
        mu = k1 * np.exp(-t / t1) + k2 * np.exp(-t / t2) + 2 * b
        e = (mu - n * np.log(mu)).sum(axis=1) + const
    e = np.where(inside & np.isfinite(e), e, np.inf)
    return e


def hessian(fun, x, h):
    d = len(x)
    out = np.zeros((d, d))
    for i in range(d):
        for j in range(d):
            ei = np.zeros(d)
            ej = np.zeros(d)
            ei[i] = h[i]
            ej[j] = h[j]
            out[i, j] = (
                fun(x + ei + ej) - fun(x + ei - ej) - fun(x - ei + ej) + fun(x - ei - ej)
            ) / (4 * h[i] * h[j])
    return 0.5 * (out + out.T)


def mode():
    f = lambda x: float(energy(x)[0])
    best = None
    for start in ([900, 2, 150, 15, 4], [500, 3, 100, 20, 3], [1200, 1.5, 200, 12, 5]):
        r = optimize.minimize(f, start, method="Nelder-Mead",
                              options={"xatol": 1e-10, "fatol": 1e-12, "maxiter": 40000, "maxfev": 80000})
        r = optimize.minimize(f, r.x, method="BFGS", options={"gtol": 1e-9})
        if best is None or r.fun < best.fun:
            best = r
    x = best.x
    h = 1e-4 * np.maximum(np.abs(x), 1e-2)
    cov = np.linalg.inv(hessian(f, x, h))
    return x, cov, best.fun


def estimate(centres, cov, nu, scale, seed, draws):
    rng = np.random.default_rng(seed)
    parts = [stats.multivariate_t(loc=c, shape=scale**2 * cov_i, df=nu)
             for c, cov_i in zip(centres, cov)]
    log_w = []
    for _ in range(draws // 200_000):
        pick = rng.integers(0, len(parts), size=200_000)
        x = np.empty((200_000, 5))
        for k, p in enumerate(parts):
            m = pick == k
            x[m] = p.rvs(size=int(m.sum()), random_state=rng)
        lq = special.logsumexp([p.logpdf(x) for p in parts], axis=0) - math.log(len(parts))
        log_w.append(-energy(x) - lq)
    log_w = np.concatenate(log_w)
    peak = log_w.max()
    w = np.exp(log_w - peak)
    mean = w.mean()
    se = w.std(ddof=1) / math.sqrt(len(w)) / mean
    return peak + math.log(mean), se, float(w.max() / w.sum())


def main():
    x, cov, e_min = mode()
    swap = [2, 3, 0, 1, 4]
    centres = [x, x[swap]]
    covs = [cov, cov[np.ix_(swap, swap)]]
    a, a_se, a_max = estimate(centres, covs, 5.0, 1.3, 11, 16_000_000)
    b, b_se, b_max = estimate(centres, covs, 10.0, 1.6, 12, 16_000_000)
    print(f"mode {x}, energy {e_min:.6f}")
    print(f"log Z = {a:.6f} ± {a_se:.6f} (largest weight share {a_max:.2e})")
    print(f"cross  {b:.6f} ± {b_se:.6f} (largest weight share {b_max:.2e})")
    out = {
        "about": "log Z of the two-isotope demo by importance sampling (isotopes_is.py)",
        "python_version": sys.version.split()[0],
        "numpy_version": np.__version__,
        "scipy_version": scipy.__version__,
        "demos": {
            DEMO: {
                "log_z": a,
                "log_z_se": a_se,
                "cross_check": b,
                "cross_check_se": b_se,
                "mode": x.tolist(),
            }
        },
    }
    with open(OUT, "w") as f:
        json.dump(out, f, indent=2)
        f.write("\n")


if __name__ == "__main__":
    main()
