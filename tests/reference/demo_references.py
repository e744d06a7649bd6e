#!/usr/bin/env python3
"""Exact log evidence of the two demo targets that use vectors, index columns, priors and the
built-in densities, from outside Kiln.

Run from anywhere:  python3 tests/reference/demo_references.py
It reads the demo specs themselves (their data and the constants stated in their notes) and
rewrites tests/reference/demo_values.json beside it, with the scipy and numpy versions.

1. demo-targets/rain-gauge-offsets-hierarchical.json: reading_i = theta[gauge_i] + e_i,
   e_i ~ N(0, 0.4^2); theta[j] ~ N(mu, 0.6^2) for j = 1..6; mu ~ N(0, 2^2). The model is linear
   and Gaussian: with u = (mu, theta) ~ N(m, P) and y | u ~ N(A u, R), the marginal of y is
   N(A m, A P A^T + R) (the marginal of a linear-Gaussian model; C. M. Bishop, 2006, Pattern
   Recognition and Machine Learning, eq. 2.115). Here that is mean 0 and covariance
   0.4^2 I + 0.6^2 [same gauge] + 2^2 (every pair), and log Z = log N(y; 0, C), computed with
   scipy.stats.multivariate_normal.logpdf. Cross-check: the same value by integrating out mu and
   theta in closed form gauge by gauge and then mu by one-dimensional quadrature.

2. demo-targets/seed-lengths-three-cultivars.json: p(m) = prod_k N(m_k; 5, 3^2),
   p(y | m) = prod_i (1/3) sum_k N(y_i; m_k, 0.5^2). Expanding the product of sums,
   Z = sum over the 3^12 assignments z of seeds to cultivars of 3^-12 prod_k Z_k(z), where
   Z_k = integral of N(m; 5, 9) prod_{i: z_i = k} N(y_i; m, 0.25) dm is the multivariate normal
   density of the seeds assigned to k, with mean 5 and covariance 0.25 I + 9 J (J all ones; the
   same identity). Each Z_k has a closed form (the determinant and inverse of an equicorrelated
   matrix); a sample of assignments is checked against scipy.stats.multivariate_normal.logpdf,
   and the whole sum against three-dimensional quadrature on a fine grid.
"""

import itertools
import json
import math
import os
import sys

import numpy as np
import scipy
from scipy import integrate, stats
from scipy.special import logsumexp

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(os.path.dirname(HERE))
OUT = os.path.join(HERE, "demo_values.json")


def load(name):
    with open(os.path.join(ROOT, "demo-targets", name)) as f:
        return json.load(f)


def gauges():
    spec = load("rain-gauge-offsets-hierarchical.json")
    y = np.array(spec["data"]["reading"], dtype=float)
    g = np.array(spec["data"]["gauge"], dtype=int)
    sigma, tau, s0 = 0.4, 0.6, 2.0
    same = (g[:, None] == g[None, :]).astype(float)
    cov = sigma**2 * np.eye(len(y)) + tau**2 * same + s0**2 * np.ones((len(y), len(y)))
    log_z = float(stats.multivariate_normal.logpdf(y, mean=np.zeros(len(y)), cov=cov))

    # Cross-check: given mu, each gauge's readings are N(mu 1, sigma^2 I + tau^2 J); integrate mu.
    def log_given_mu(mu):
        total = stats.norm.logpdf(mu, 0.0, s0)
        for j in np.unique(g):
            yj = y[g == j]
            n = len(yj)
            c = sigma**2 * np.eye(n) + tau**2 * np.ones((n, n))
            total += stats.multivariate_normal.logpdf(yj, mean=np.full(n, mu), cov=c)
        return total

    peak = log_given_mu(float(np.mean(y)))
    val, err = integrate.quad(lambda m: math.exp(log_given_mu(m) - peak), -20, 20,
                              points=[float(np.mean(y))], epsabs=0, epsrel=1e-13, limit=200)
    cross = peak + math.log(val)
    return {"log_z": log_z, "cross_check": cross, "method": "scipy.stats.multivariate_normal.logpdf of the readings (linear-Gaussian marginal); cross-check by closed-form gauges and quad over mu"}


def equicorrelated_logpdf(d, n, var, s2):
    """log N_n(d; 0, var I + s2 J) from n, S = sum d, Q = sum d^2 (arrays over assignments)."""
    S = d[0]
    Q = d[1]
    logdet = n * math.log(var) + np.log1p(n * s2 / var)
    quad = (Q - s2 / (var + n * s2) * S**2) / var
    return -0.5 * (n * math.log(2 * math.pi) + logdet + quad)


def seeds():
    spec = load("seed-lengths-three-cultivars.json")
    y = np.array(spec["data"]["length"], dtype=float)
    m0, s0, sd, K = 5.0, 3.0, 0.5, 3
    N = len(y)
    d = y - m0
    assign = np.array(list(itertools.product(range(K), repeat=N)), dtype=np.int8)
    total = np.full(len(assign), -N * math.log(K))
    for k in range(K):
        mask = (assign == k).astype(float)
        n = mask.sum(axis=1)
        S = mask @ d
        Q = mask @ (d * d)
        total += equicorrelated_logpdf((S, Q), n, sd**2, s0**2)
    log_z = float(logsumexp(total))

    # Closed form against scipy for a sample of assignments.
    rng = np.random.default_rng(3)
    worst = 0.0
    for idx in rng.integers(0, len(assign), 200):
        z = assign[idx]
        ref = -N * math.log(K)
        for k in range(K):
            yk = y[z == k]
            if len(yk):
                c = sd**2 * np.eye(len(yk)) + s0**2 * np.ones((len(yk), len(yk)))
                ref += stats.multivariate_normal.logpdf(yk, mean=np.full(len(yk), m0), cov=c)
        worst = max(worst, abs(ref - total[idx]))
    assert worst < 1e-9, worst

    # Three-dimensional quadrature on a grid (Simpson's rule), a rough independent check.
    g = np.linspace(m0 - 8 * s0 / 3, m0 + 8 * s0 / 3, 241)
    lp_axis = stats.norm.logpdf(g, m0, s0)
    comp = stats.norm.logpdf(y[:, None], g[None, :], sd)  # (N, G)
    A, B, C = np.meshgrid(np.arange(len(g)), np.arange(len(g)), np.arange(len(g)), indexing="ij")
    lik = np.zeros(A.shape)
    for i in range(N):
        lik += logsumexp(np.stack([comp[i][A], comp[i][B], comp[i][C]]), axis=0) - math.log(K)
    lik += lp_axis[A] + lp_axis[B] + lp_axis[C]
    peak = lik.max()
    w = np.exp(lik - peak)
    val = integrate.simpson(integrate.simpson(integrate.simpson(w, x=g), x=g), x=g)
    cross = float(peak + math.log(val))
    return {"log_z": log_z, "cross_check": cross, "method": "sum over the 3^12 assignments of closed-form multivariate normal densities (checked against scipy.stats.multivariate_normal.logpdf); cross-check by Simpson quadrature on a 241^3 grid"}


def main():
    doc = {
        "generated_by": "tests/reference/demo_references.py",
        "scipy_version": scipy.__version__,
        "numpy_version": np.__version__,
        "python_version": sys.version.split()[0],
        "demos": {
            "rain-gauge-offsets-hierarchical.json": gauges(),
            "seed-lengths-three-cultivars.json": seeds(),
        },
    }
    with open(OUT, "w") as f:
        json.dump(doc, f, indent=1)
        f.write("\n")
    for k, v in doc["demos"].items():
        print(f"{k}: log Z = {v['log_z']:.10f} (cross-check {v['cross_check']:.10f})")
    print(f"scipy {scipy.__version__}, numpy {np.__version__}: wrote {OUT}")


if __name__ == "__main__":
    main()
