#!/usr/bin/env python3
"""Reference values of Kiln's built-in log densities (logd_*), from scipy.stats.

Run from anywhere:  python3 tests/reference/density_references.py
It rewrites tests/reference/density_values.json beside it, recording the scipy and numpy
versions. tests/densities.rs reads the file and compares Kiln's value at every point.

Each case is (arguments in Kiln's order, scipy's logpdf / logpmf there). Kiln's
parameterisations, and the scipy call that gives the same density:
  normal(x, mean, sd)            norm.logpdf(x, mean, sd)
  student(x, df, loc, scale)     t.logpdf(x, df, loc, scale)
  cauchy(x, loc, scale)          cauchy.logpdf(x, loc, scale)
  laplace(x, loc, scale)         laplace.logpdf(x, loc, scale)
  logistic(x, loc, scale)        logistic.logpdf(x, loc, scale)
  exponential(x, rate)           expon.logpdf(x, scale=1/rate)
  gamma(x, shape, rate)          gamma.logpdf(x, shape, scale=1/rate)
  invgamma(x, shape, scale)      invgamma.logpdf(x, shape, scale=scale)
  beta(x, a, b)                  beta.logpdf(x, a, b)
  lognormal(x, meanlog, sdlog)   lognorm.logpdf(x, sdlog, scale=exp(meanlog))
  vonmises(x, loc, kappa)        vonmises.logpdf(x, kappa, loc)
  uniform(x, lower, upper)       uniform.logpdf(x, lower, upper - lower)
  poisson(k, rate)               poisson.logpmf(k, rate)
  binomial(k, n, p)              binom.logpmf(k, n, p)
  negbinomial(k, mean, size)     nbinom.logpmf(k, size, size / (size + mean))
  bernoulli(y, p)                bernoulli.logpmf(y, p)
  bernoulli_logodds(y, eta)      log_expit(eta) for y = 1, log_expit(-eta) for y = 0
Points cover the centre, far tails, extreme parameters and points outside the support
(where the reference is -inf). Values that scipy itself cannot give accurately (catastrophic
cancellation in its own formula) are left out; the comment beside each list says so.
"""

import json
import math
import os
import sys

import numpy as np
import scipy
from scipy import stats
from scipy.special import log_expit

HERE = os.path.dirname(os.path.abspath(__file__))
OUT = os.path.join(HERE, "density_values.json")


def cases():
    out = {}

    out["normal"] = [
        ((x, m, s), stats.norm.logpdf(x, m, s))
        for (x, m, s) in [
            (0.0, 0.0, 1.0), (1.3, -0.4, 2.5), (-3.0, 2.0, 0.7), (40.0, 0.0, 1.0),
            (-40.0, 0.0, 1.0), (1e6, 0.0, 1.0), (1e-300, 0.0, 1e-300), (5.0, 5.0, 1e-8),
            (2.0, 1.0, 1e8), (-7.5, 1e5, 3e4), (0.1, 0.2, 0.3), (123.0, 120.0, 1.5),
            (-1e3, 1e3, 10.0), (3.0, 3.0, 1e150), (1e-5, -1e-5, 1e-5), (2.5, 0.0, 0.01),
            (0.0, 0.0, 1e-100), (9.0, -9.0, 6.0), (-0.5, 0.5, 0.5), (1e10, 1e10, 1.0),
        ]
    ]
    out["student"] = [
        ((x, df, m, s), stats.t.logpdf(x, df, m, s))
        for (x, df, m, s) in [
            (0.0, 1.0, 0.0, 1.0), (1.0, 3.0, 0.0, 1.0), (-2.5, 4.0, 1.0, 2.0),
            (100.0, 2.0, 0.0, 1.0), (-1e6, 3.0, 0.0, 1.0), (1e50, 5.0, 0.0, 1.0),
            (0.3, 0.1, 0.0, 1.0), (2.0, 0.01, 1.0, 3.0), (1.5, 1e4, 0.0, 1.0),
            (4.0, 300.0, 1.0, 0.5), (0.0, 30.0, 0.0, 1e-6), (7.0, 7.0, 7.0, 7.0),
            (-3.0, 1.5, 2.0, 0.25), (1e3, 10.0, 0.0, 10.0), (0.5, 2.5, -0.5, 0.1),
            (12.0, 6.0, 2.0, 1e-3), (-0.2, 50.0, 0.1, 0.2), (5e3, 1.0, 0.0, 1e3),
            (3.3, 3.3, -3.3, 1.0), (2.0, 100.0, 2.0, 1e8),
        ]
    ]
    out["cauchy"] = [
        ((x, m, s), stats.cauchy.logpdf(x, m, s))
        for (x, m, s) in [
            (0.0, 0.0, 1.0), (1.0, 0.0, 1.0), (-5.0, 2.0, 0.5), (1e8, 0.0, 1.0),
            (-1e100, 0.0, 1.0), (3.0, 3.0, 1e-7), (0.2, -0.3, 40.0), (1e3, 1e3, 1e3),
            (2.0, 1.0, 1e10), (-0.7, 0.7, 0.07), (10.0, 0.0, 2.5), (-25.0, 5.0, 3.0),
            (0.0, 1e5, 1.0), (6.0, 6.5, 0.5), (1.0, 1.0, 1.0), (-1.0, 0.0, 1e-3),
            (42.0, 0.0, 1e-9), (0.5, 0.25, 0.125), (7.0, -7.0, 7.0), (1e-10, 0.0, 1e-10),
        ]
    ]
    # scipy's Laplace logpdf is the log of its pdf, which underflows to -inf beyond |x|/scale
    # of about 745; the far tails stay below that.
    out["laplace"] = [
        ((x, m, s), stats.laplace.logpdf(x, m, s))
        for (x, m, s) in [
            (0.0, 0.0, 1.0), (1.0, 0.0, 1.0), (-3.0, 1.0, 2.0), (500.0, 0.0, 1.0),
            (-2000.0, 0.0, 3.0), (2.0, 2.0, 1e-9), (0.1, -0.1, 1e6), (6.0, 0.0, 1e-2),
            (-7.0, -7.5, 0.25), (3.0, 4.0, 0.5), (8.0, 0.0, 8.0), (-0.2, 0.3, 0.05),
            (1e-8, 0.0, 1e-8), (60.0, 10.0, 5.0), (-2.0, 2.0, 1.0), (0.5, 0.5, 0.5),
            (1e200, 0.0, 1e199), (33.0, 3.0, 3.0), (-9.0, 9.0, 18.0), (4.4, -4.4, 0.4),
        ]
    ]
    out["logistic"] = [
        ((x, m, s), stats.logistic.logpdf(x, m, s))
        for (x, m, s) in [
            (0.0, 0.0, 1.0), (1.0, 0.0, 1.0), (-1.0, 0.0, 1.0), (40.0, 0.0, 1.0),
            (-40.0, 0.0, 1.0), (800.0, 0.0, 1.0), (-800.0, 0.0, 1.0), (1e6, 0.0, 2.0),
            (-1e6, 0.0, 2.0), (3.0, 1.0, 0.5), (2.0, 2.0, 1e-6), (0.1, -0.2, 1e5),
            (-5.0, 5.0, 2.5), (12.0, 10.0, 0.1), (0.7, 0.3, 0.2), (-0.01, 0.0, 0.001),
            (50.0, 25.0, 5.0), (-3.0, -2.0, 1.0), (1e3, 0.0, 10.0), (6.0, 0.0, 3.0),
        ]
    ]
    out["exponential"] = [
        ((x, r), stats.expon.logpdf(x, scale=1.0 / r))
        for (x, r) in [
            (0.0, 1.0), (1.0, 1.0), (0.5, 2.0), (1e3, 0.5), (1e-10, 1e10), (7.0, 1e-7),
            (40.0, 3.0), (1e6, 1.0), (2.0, 0.001), (0.25, 4.0), (3.0, 1.0 / 3.0),
            (1e-300, 1.0), (100.0, 0.01), (9.0, 9.0), (0.01, 100.0), (5.0, 1.0),
            (-1.0, 1.0), (-1e-12, 2.0), (12.5, 0.8), (0.0, 1e-300),
        ]
    ]
    out["gamma"] = [
        ((x, a, r), stats.gamma.logpdf(x, a, scale=1.0 / r))
        for (x, a, r) in [
            (1.0, 1.0, 1.0), (2.0, 3.0, 1.5), (0.01, 0.5, 2.0), (50.0, 2.0, 0.1),
            (1e-8, 0.1, 1.0), (1e4, 100.0, 0.01), (300.0, 2.0, 1.0), (0.0, 1.0, 2.0),
            (0.0, 3.0, 1.0), (5.0, 1e-3, 1.0), (1e3, 1e3, 1.0), (0.5, 0.5, 0.5),
            (7.0, 7.0, 7.0), (2e-5, 1e-2, 1e3), (1e6, 2.5, 1e-6), (3.0, 30.0, 10.0),
            (-1.0, 2.0, 1.0), (0.2, 4.0, 20.0), (12.0, 1.5, 0.25), (0.9, 0.9, 0.9),
        ]
    ]
    out["invgamma"] = [
        ((x, a, s), stats.invgamma.logpdf(x, a, scale=s))
        for (x, a, s) in [
            (1.0, 1.0, 1.0), (0.5, 3.0, 2.0), (10.0, 2.0, 1.0), (1e-3, 2.0, 1.0),
            (1e5, 0.5, 1.0), (2.0, 50.0, 100.0), (0.01, 0.1, 0.01), (3.0, 3.0, 3.0),
            (7.0, 1.5, 0.5), (1e-6, 5.0, 1e-5), (1e8, 2.0, 1e8), (0.2, 0.2, 0.2),
            (4.0, 10.0, 1.0), (0.05, 1.0, 2.0), (25.0, 4.0, 60.0), (1.5, 0.01, 1.0),
            (0.0, 2.0, 1.0), (-1.0, 2.0, 1.0), (0.7, 300.0, 200.0), (6.0, 6.0, 0.6),
        ]
    ]
    # Large shapes only up to 1e3: beyond, lbeta = lgamma(a) + lgamma(b) - lgamma(a + b) loses
    # digits to cancellation (in scipy's formula as in Kiln's).
    out["beta"] = [
        ((x, a, b), stats.beta.logpdf(x, a, b))
        for (x, a, b) in [
            (0.5, 1.0, 1.0), (0.3, 2.0, 5.0), (0.9, 0.5, 0.5), (1e-10, 2.0, 3.0),
            (1.0 - 1e-10, 2.0, 3.0), (1e-8, 0.5, 2.0), (0.999, 0.1, 0.1), (0.2, 100.0, 400.0),
            (0.5, 1e3, 1e3), (0.0, 1.0, 2.0), (1.0, 2.0, 1.0), (0.0, 2.0, 2.0),
            (0.75, 3.0, 1.5), (0.01, 0.01, 10.0), (0.4, 7.0, 7.0), (0.6, 1.5, 0.7),
            (1.2, 2.0, 2.0), (-0.1, 2.0, 2.0), (0.05, 1.0, 50.0), (0.33, 4.5, 9.5),
        ]
    ]
    out["lognormal"] = [
        ((x, m, s), stats.lognorm.logpdf(x, s, scale=math.exp(m)))
        for (x, m, s) in [
            (1.0, 0.0, 1.0), (2.5, 0.5, 0.3), (0.01, 0.0, 1.0), (1e6, 0.0, 1.0),
            (1e-8, 2.0, 0.5), (3.0, 1.1, 1e-6), (7.0, -2.0, 3.0), (0.5, 0.0, 0.1),
            (1e100, 200.0, 10.0), (1e-100, -200.0, 10.0), (20.0, 3.0, 0.05), (0.3, -1.0, 0.7),
            (5.0, 1.6, 2.0), (0.0, 0.0, 1.0), (-1.0, 0.0, 1.0), (42.0, 4.0, 0.4),
            (1.5, 0.4, 0.2), (100.0, 0.0, 0.5), (0.9, -0.1, 1e3), (8.0, 2.0, 1.0),
        ]
    ]
    out["vonmises"] = [
        ((x, m, k), stats.vonmises.logpdf(x, k, loc=m))
        for (x, m, k) in [
            (0.0, 0.0, 1.0), (1.0, 0.0, 1.0), (3.0, 0.0, 1.0), (-2.0, 1.0, 0.1),
            (0.5, 0.4, 50.0), (2.0, -2.0, 5.0), (0.0, 0.0, 1e-8), (1.0, 1.0, 1e4),
            (1.001, 1.0, 1e5), (3.1, -3.1, 19.9), (0.3, 0.0, 20.0), (0.3, 0.0, 20.1),
            (-1.5, 0.5, 200.0), (2.9, 0.0, 0.5), (0.05, 0.0, 700.0), (1.2, 1.0, 2.5),
            (-0.4, -0.5, 35.0), (3.0, 3.0, 1e6), (0.8, -0.2, 8.0), (1.6, 0.0, 0.01),
        ]
    ]
    out["uniform"] = [
        ((x, a, b), stats.uniform.logpdf(x, a, b - a))
        for (x, a, b) in [
            (0.5, 0.0, 1.0), (0.0, 0.0, 1.0), (1.0, 0.0, 1.0), (-0.1, 0.0, 1.0),
            (1.1, 0.0, 1.0), (5.0, -10.0, 10.0), (1e-9, 0.0, 1e-8), (3.0, 2.0, 1e12),
            (-1e6, -2e6, 0.0), (7.0, 6.999, 7.001), (2.0, 1.0, 3.0), (0.25, 0.2, 0.3),
            (100.0, 0.0, 50.0), (-3.0, -4.0, -2.0), (1e300, 0.0, 1e300), (0.0, -1.0, 1.0),
            (9.5, 9.0, 10.0), (4.0, 4.0, 4.5), (-0.5, -0.5, 0.5), (2.5, 0.0, 2.0),
        ]
    ]
    out["poisson"] = [
        ((k, r), stats.poisson.logpmf(k, r))
        for (k, r) in [
            (0, 1.0), (1, 1.0), (3, 2.5), (0, 0.0), (2, 0.0), (10, 1e-3), (0, 50.0),
            (100, 100.0), (1000, 10.0), (5, 1e4), (7, 7.0), (20, 0.5), (1, 1e-300),
            (50, 48.5), (12, 3.0), (0, 1e-9), (400, 380.0), (2, 9.0), (30, 1.0),
            (8, 2e-2),
        ]
    ]
    out["binomial"] = [
        ((k, n, p), stats.binom.logpmf(k, n, p))
        for (k, n, p) in [
            (0, 10, 0.5), (5, 10, 0.5), (10, 10, 0.5), (3, 20, 0.1), (0, 5, 0.0),
            (5, 5, 1.0), (1, 5, 0.0), (4, 5, 1.0), (500, 1000, 0.5), (1, 1000, 1e-6),
            (999, 1000, 0.999), (7, 12, 0.3), (0, 1, 0.2), (1, 1, 0.2), (30, 100, 0.02),
            (2, 3, 0.99), (60, 200, 0.3), (15, 40, 0.375), (3, 3, 1e-4), (0, 50, 0.9),
        ]
    ]
    # Sizes up to 1e4: scipy's own lgamma(k + size) - lgamma(size) cancels beyond; and means not
    # far below the size, where scipy's log(1 - p) loses digits (p = size / (size + mean)).
    out["negbinomial"] = [
        ((k, m, sz), stats.nbinom.logpmf(k, sz, sz / (sz + m)))
        for (k, m, sz) in [
            (0, 1.0, 1.0), (3, 2.0, 5.0), (10, 3.0, 0.5), (0, 10.0, 2.0), (50, 5.0, 1.0),
            (7, 7.0, 1e4), (0, 0.0, 3.0), (2, 0.0, 3.0), (100, 100.0, 10.0), (1, 1e-2, 1.0),
            (20, 1.0, 0.1), (5, 4.5, 1000.0), (0, 1e3, 0.01), (300, 250.0, 30.0),
            (4, 0.5, 0.5), (12, 12.0, 12.0), (1, 3.0, 1e-3), (9, 2.0, 8.0), (40, 1.0, 5.0),
            (6, 6.0, 60.0),
        ]
    ]
    out["bernoulli"] = [
        ((y, p), stats.bernoulli.logpmf(y, p))
        for (y, p) in [
            (0, 0.5), (1, 0.5), (0, 0.1), (1, 0.1), (0, 0.0), (1, 1.0), (1, 0.0), (0, 1.0),
            (1, 1e-300), (0, 1e-12), (1, 0.999999), (0, 0.999999), (1, 0.3), (0, 0.7),
            (1, 0.25), (0, 0.25), (1, 1e-5), (0, 1.0 - 1e-9), (1, 0.9), (0, 0.42),
        ]
    ]
    out["bernoulli_logodds"] = [
        ((y, e), float(log_expit(e) if y == 1 else log_expit(-e)))
        for (y, e) in [
            (1, 0.0), (0, 0.0), (1, 2.0), (0, 2.0), (1, -2.0), (0, -2.0), (1, 40.0),
            (0, 40.0), (1, -40.0), (0, -40.0), (1, 800.0), (0, 800.0), (1, -800.0),
            (0, -800.0), (1, 1e-10), (0, -1e-10), (1, 15.5), (0, -3.25), (1, -0.7),
            (0, 1e6),
        ]
    ]
    return out


def main():
    data = cases()
    table = {}
    for name, pts in data.items():
        rows = []
        for args, v in pts:
            v = float(v)
            rows.append({"args": [float(a) for a in args],
                         "value": v if math.isfinite(v) else ("-inf" if v < 0 else "inf")})
        assert len(rows) >= 20, name
        table[name] = rows
    doc = {
        "generated_by": "tests/reference/density_references.py",
        "scipy_version": scipy.__version__,
        "numpy_version": np.__version__,
        "python_version": sys.version.split()[0],
        "densities": table,
    }
    with open(OUT, "w") as f:
        json.dump(doc, f, indent=1)
        f.write("\n")
    print(f"scipy {scipy.__version__}, numpy {np.__version__}: wrote {OUT}")


if __name__ == "__main__":
    main()
