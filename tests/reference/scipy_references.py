#!/usr/bin/env python3
"""Reference values of log Z for tests/references.rs, computed with scipy.integrate.

Run from anywhere:  python3 tests/reference/scipy_references.py
It prints the scipy and numpy versions and rewrites tests/reference/scipy_values.json beside it.

Every case below has three parts kept side by side:
  * the formula text exactly as the Rust test hands it to Kiln (energy: density ∝ exp(-energy);
    log_density: density ∝ exp(log_density)), with its bounds and data;
  * the same density written again by hand in numpy (`logf`), integrated with scipy.integrate.quad
    (nested, with break points at the known peaks / ridges / kinks), giving log Z and quad's own
    error estimate;
  * an independent cross-check by a second method (a change of variables, a closed form for part
    of the integral, or scipy.integrate.simpson on a fine grid), recorded as `cross_check`.
log Z is log ∫ density over the unknowns' box (the user's coordinates, no Jacobians).
"""

import json
import math
import os
import sys
import time

import numpy as np
import scipy
from scipy import integrate
from scipy.special import logsumexp

HERE = os.path.dirname(os.path.abspath(__file__))
OUT = os.path.join(HERE, "scipy_values.json")

EPSABS_INNER = 1e-14
EPSREL_INNER = 1e-12
EPSABS_OUTER = 1e-13
EPSREL_OUTER = 1e-11
LIMIT = 500


def quad1(f, a, b, points=None):
    """quad over [a, b] (a or b may be infinite), split at `points`; returns (value, abserr)."""
    cuts = [a] + sorted(p for p in (points or []) if a < p < b) + [b]
    total, err = 0.0, 0.0
    for lo, hi in zip(cuts[:-1], cuts[1:]):
        v, e = integrate.quad(f, lo, hi, epsabs=EPSABS_INNER, epsrel=EPSREL_INNER, limit=LIMIT)
        total += v
        err += e
    return total, err


def quad2(f, xa, xb, ya, yb, xpoints=None, ypoints=None):
    """∫_{xa}^{xb} ∫_{ya(x)}^{yb(x)} f(x, y) dy dx by nested quad with break points.

    Returns (value, error estimate): the outer quad's error plus the widest inner error
    times the outer length (a generous bound on how inner errors add up)."""
    worst_inner = [0.0]

    def inner(x):
        pts = ypoints(x) if callable(ypoints) else ypoints
        v, e = quad1(lambda y: f(x, y), ya(x), yb(x), pts)
        worst_inner[0] = max(worst_inner[0], e)
        return v

    cuts = [xa] + sorted(p for p in (xpoints or []) if xa < p < xb) + [xb]
    total, err = 0.0, 0.0
    for lo, hi in zip(cuts[:-1], cuts[1:]):
        v, e = integrate.quad(inner, lo, hi, epsabs=EPSABS_OUTER, epsrel=EPSREL_OUTER, limit=LIMIT)
        total += v
        err += e
    return total, err + worst_inner[0] * (xb - xa)


def simpson2(logf, xa, xb, ya, yb, n, shift):
    """log ∫∫ exp(logf) by scipy.integrate.simpson on an n × n grid (n odd), row by row."""
    xs = np.linspace(xa, xb, n)
    ys = np.linspace(ya, yb, n)
    rows = np.empty(n)
    for i, x in enumerate(xs):
        rows[i] = integrate.simpson(np.exp(logf(x, ys) - shift), x=ys)
    return shift + math.log(integrate.simpson(rows, x=xs))


def log_of(value, err, shift=0.0):
    """log Z and its error in nats from a value of Z·exp(-shift) and its absolute error."""
    return shift + math.log(value), err / value


CASES = []


def add(name, description, kind, formula, variables, data, log_z, err, method, cross_value, cross_method):
    CASES.append(
        {
            "name": name,
            "description": description,
            "kind": kind,
            "formula": formula,
            "variables": variables,
            "data": data,
            "log_z": log_z,
            "error_estimate": err,
            "method": method,
            "cross_check": {"log_z": cross_value, "method": cross_method,
                            "difference": abs(cross_value - log_z)},
            "scipy_version": scipy.__version__,
            "numpy_version": np.__version__,
        }
    )
    print(f"  {name:28s} log Z = {log_z:.10f}   quad error ≈ {err:.1e}   "
          f"cross-check {cross_value:.10f} (Δ = {abs(cross_value - log_z):.1e})")


def var(name, lower=None, upper=None):
    return {"name": name, "lower": lower, "upper": upper}


# ---------------------------------------------------------------------------------------------
# a. The egg-crate target on [0, 10π]², uniform prior folded in as +2 log(10π).
def egg_crate():
    L = 10 * math.pi
    formula = "-(2 + cos(x/2)*cos(y/2))^5 + 2*log(10*pi)"
    peak = 243.0  # max of (2 + cos cos)^5, factored out so exp() stays in range

    def f(x, y):
        return math.exp((2 + math.cos(x / 2) * math.cos(y / 2)) ** 5 - peak)

    def logf(x, y):
        return (2 + np.cos(x / 2) * np.cos(y / 2)) ** 5

    # Peaks of cos(x/2)cos(y/2) = ±1 sit at multiples of 2π; break there and half-way between.
    pts = [k * math.pi for k in range(1, 10)]
    v, e = quad2(f, 0, L, lambda x: 0, lambda x: L, pts, pts)
    log_z, err = log_of(v, e, peak - 2 * math.log(L))
    cross = simpson2(logf, 0, L, 0, L, 4001, peak) - 2 * math.log(L)
    add("egg_crate", "egg-crate: 18 peaks of (2 + cos(x/2)cos(y/2))^5 on [0, 10π]², uniform prior",
        "energy", formula, [var("x", 0.0, L), var("y", 0.0, L)], None,
        log_z, err, "nested scipy.integrate.quad, breaks at multiples of π", cross,
        "scipy.integrate.simpson, 4001 × 4001 grid")


# ---------------------------------------------------------------------------------------------
# b. Two Gaussian shells (radius 2, width 0.1, centres (±3.5, 0)) times a uniform prior on [-6, 6]².
def shells():
    w, r0, c, half = 0.1, 2.0, 3.5, 6.0
    formula = ("logsumexp(-(sqrt((x - 3.5)^2 + y^2) - 2)^2/(2*0.1^2), "
               "-(sqrt((x + 3.5)^2 + y^2) - 2)^2/(2*0.1^2)) - 0.5*log(2*pi*0.1^2) - log(144)")
    norm = 1 / math.sqrt(2 * math.pi * w * w)

    # Each shell separately, in polar coordinates about its own centre, over exactly the box:
    # r runs from 0 to the distance r_max(θ) from the centre to the box's edge along θ.
    def shell_integral(cx):
        def r_max(t):
            ct, st = math.cos(t), math.sin(t)
            hits = []
            if ct > 0:
                hits.append((half - cx) / ct)
            if ct < 0:
                hits.append((-half - cx) / ct)
            if st > 0:
                hits.append(half / st)
            if st < 0:
                hits.append(-half / st)
            return min(hits)

        corners = sorted(math.atan2(sy * half, sx * half - cx) % (2 * math.pi)
                         for sx in (-1, 1) for sy in (-1, 1))

        def f(t, r):
            return r * norm * math.exp(-((r - r0) ** 2) / (2 * w * w))

        return quad2(f, 0, 2 * math.pi, lambda t: 0.0, r_max, corners, [r0])

    v1, e1 = shell_integral(+c)
    v2, e2 = shell_integral(-c)
    log_z, err = log_of(v1 + v2, e1 + e2, -math.log((2 * half) ** 2))

    def logf(x, y):
        a = -((np.sqrt((x - c) ** 2 + y ** 2) - r0) ** 2) / (2 * w * w)
        b = -((np.sqrt((x + c) ** 2 + y ** 2) - r0) ** 2) / (2 * w * w)
        return np.logaddexp(a, b) + math.log(norm)

    cross = simpson2(logf, -half, half, -half, half, 6001, 0.0) - math.log((2 * half) ** 2)
    add("gaussian_shells", "two thin Gaussian rings (radius 2, width 0.1) at (±3.5, 0), uniform prior on [-6, 6]²",
        "log_density", formula, [var("x", -half, half), var("y", -half, half)], None,
        log_z, err, "nested scipy.integrate.quad in polar coordinates about each centre, over the box",
        cross, "scipy.integrate.simpson, 6001 × 6001 Cartesian grid")


# ---------------------------------------------------------------------------------------------
# c1. 1-D unbounded double well with a tilt: two unequal wells near ±2, barrier 6.4 high.
def tilted_double_well():
    formula = "(x^2 - 4)^2/2.5 + 0.6*x"

    def energy(x):
        return (x * x - 4) ** 2 / 2.5 + 0.6 * x

    v, e = quad1(lambda x: math.exp(-energy(x)), -math.inf, math.inf, [-2.0, 0.0, 2.0])
    log_z, err = log_of(v, e)
    xs = np.linspace(-6, 6, 120001)
    cross = math.log(integrate.simpson(np.exp(-energy(xs)), x=xs))
    add("tilted_double_well", "1-D quartic double well tilted by a linear term: unequal wells, unbounded",
        "energy", formula, [var("x")], None, log_z, err,
        "scipy.integrate.quad over (-inf, inf), split at -2, 0, 2", cross,
        "scipy.integrate.simpson on [-6, 6], 120001 points")


# ---------------------------------------------------------------------------------------------
# c2. 2-D curved ridge: mass along the parabola y = x²/2 − 1, 0.2 wide, unbounded.
def parabolic_ridge():
    s = 0.2
    formula = "(y - 0.5*x^2 + 1)^2/(2*0.2^2) + (x - 0.4)^2/8 + 0.05*x^4"

    def along(x):
        return (x - 0.4) ** 2 / 8 + 0.05 * x ** 4

    def f(x, y):
        return math.exp(-((y - 0.5 * x * x + 1) ** 2) / (2 * s * s) - along(x))

    def ridge(x):
        return 0.5 * x * x - 1

    # |x| > 12 carries exp(-0.05·12⁴) ≈ e^-1000 of the weight; 30 widths either side of the ridge
    # leave out e^-450: both far below double precision.
    v, e = quad2(f, -12, 12, lambda x: ridge(x) - 30 * s, lambda x: ridge(x) + 30 * s,
                 [0.0, 0.4], lambda x: [ridge(x)])
    log_z, err = log_of(v, e)
    # Cross-check: for each x the y-integral is exactly sqrt(2π)·0.2, leaving a 1-D quad.
    v1, _ = quad1(lambda x: math.exp(-along(x)), -math.inf, math.inf, [0.0])
    cross = math.log(math.sqrt(2 * math.pi) * s * v1)
    add("parabolic_ridge", "2-D density concentrated along the parabola y = x²/2 − 1, unbounded",
        "energy", formula, [var("x"), var("y")], None, log_z, err,
        "nested scipy.integrate.quad, inner break on the ridge line", cross,
        "closed-form Gaussian integral across the ridge, then 1-D quad along it")


# ---------------------------------------------------------------------------------------------
# c3. One-sided bound (t > 0): gamma-like log density with a √t edge (infinite slope at 0)
#     and a Gaussian factor that thins the tail.
def sqrt_edge_gamma():
    formula = "0.5*log(t) - 0.9*t - 0.1*t^2"

    def f(t):
        return math.sqrt(t) * math.exp(-0.9 * t - 0.1 * t * t)

    v, e = quad1(f, 0.0, math.inf, [1.0, 5.0])
    log_z, err = log_of(v, e)
    # Cross-check: t = u² removes the square-root edge: ∫ 2u² exp(-0.9u² - 0.1u⁴) du.
    v2, _ = quad1(lambda u: 2 * u * u * math.exp(-0.9 * u * u - 0.1 * u ** 4), 0.0, math.inf, [1.0])
    cross = math.log(v2)
    add("sqrt_edge_gamma", "t > 0 with density √t·exp(-0.9t - 0.1t²): infinite slope at the bound",
        "log_density", formula, [var("t", 0.0, None)], None, log_z, err,
        "scipy.integrate.quad on (0, inf), split at 1 and 5", cross,
        "scipy.integrate.quad after t = u²")


# ---------------------------------------------------------------------------------------------
# c4. 2-D location (a, b) of seven made-up points under a bivariate Student-t (ν = 1, scale 0.8)
#     likelihood, normal prior N(0, 5² I): two clusters of three and a stray point → multimodal.
def heavy_tailed_location():
    ox = [-2.8, -3.3, -2.5, 2.6, 3.1, 2.9, 0.2]
    oy = [-1.9, -1.4, -1.2, 1.1, 0.6, 1.6, 3.4]
    formula = ("sum(1.5*log(1 + ((ox - a)^2 + (oy - b)^2)/0.64) + log(2*pi*0.64)) "
               "+ (a^2 + b^2)/50 + log(50*pi)")
    OX, OY = np.array(ox), np.array(oy)
    const = len(ox) * math.log(2 * math.pi * 0.64) + math.log(50 * math.pi)

    def energy(a, b):
        return (np.sum(1.5 * np.log1p(((OX - a) ** 2 + (OY - b) ** 2) / 0.64))
                + (a * a + b * b) / 50 + const)

    # The minimum energy, factored out of the integrand so quad works near 1.
    shift = -min(energy(2.8, 1.1), energy(-2.9, -1.5))

    def f(a, b):
        return math.exp(-energy(a, b) - shift)

    # |a|, |b| > 40: the prior alone leaves e^-32 there and the likelihood a further |.|^-21.
    v, e = quad2(f, -40, 40, lambda a: -40, lambda a: 40, sorted(set(ox)), sorted(set(oy)))
    log_z, err = log_of(v, e, shift)

    def logf(a, bs):
        r2 = (OX[:, None] - a) ** 2 + (OY[:, None] - bs[None, :]) ** 2
        return -(np.sum(1.5 * np.log1p(r2 / 0.64), axis=0) + (a * a + bs * bs) / 50 + const)

    cross = simpson2(logf, -40, 40, -40, 40, 8001, shift)
    add("heavy_tailed_location", "2-D location of 7 points under a bivariate Student-t(1) likelihood, N(0, 25) prior",
        "energy", formula, [var("a"), var("b")], {"ox": ox, "oy": oy}, log_z, err,
        "nested scipy.integrate.quad on [-40, 40]², breaks at the data values", cross,
        "scipy.integrate.simpson, 8001 × 8001 grid on [-40, 40]²")


def main():
    print(f"scipy {scipy.__version__}, numpy {np.__version__}, Python {sys.version.split()[0]}")
    t0 = time.time()
    for run in (egg_crate, shells, tilted_double_well, parabolic_ridge, sqrt_edge_gamma,
                heavy_tailed_location):
        run()
    out = {
        "generated_by": "tests/reference/scipy_references.py",
        "scipy_version": scipy.__version__,
        "numpy_version": np.__version__,
        "python_version": sys.version.split()[0],
        "cases": CASES,
    }
    with open(OUT, "w") as fh:
        json.dump(out, fh, indent=2)
        fh.write("\n")
    print(f"wrote {OUT} ({len(CASES)} cases, {time.time() - t0:.0f} s)")


if __name__ == "__main__":
    main()
