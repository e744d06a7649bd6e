#!/usr/bin/env python3
"""Log evidence of the demo targets in one to two unknowns, by adaptive quadrature from outside
Kiln (scipy.integrate), for the check that each demo's log Z matches an outside value.

Run from anywhere:  python3 tests/reference/demo_quadrature.py
It reads the constants and data of each demo spec itself, writes the same density in numpy
(transcribed by hand from the spec's formula, which is quoted beside each function), and
rewrites tests/reference/demo_quadrature_values.json beside it, with the scipy, numpy and
Python versions.

Z = integral of exp(-energy) (or of exp(log density)) over the unknowns' box; the integrand is
scaled by exp(-peak) to stay in floating point, and the peak is added back to log Z. Each value
is computed twice, on the box and on a box twice as wide (or, for bounded unknowns, with the
breakpoints moved), and both are kept: their difference bounds what the box and the quadrature
rule leave out.

1. default-two-modes.json (a beacon from three ranges): 2-D, nquad with breakpoints at the modes.
2. crystal-sensor-two-temperatures.json: 2-D on the spec's bounds, nquad with breakpoints.
3. ultrasonic-phase-range-comb.json: 1-D on [50, 200] mm, quad with a breakpoint at every
   tooth of the comb (a wavelength apart).
4. search-area-three-scenarios.json: 2-D; each patch is a normalised density times its odds,
   so Z = 5 + 3 + 1 = 9 exactly (the identity the spec states); quadrature confirms it.
"""

import json
import math
import os
import sys

import numpy as np
import scipy
from scipy import integrate, stats

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(os.path.dirname(HERE))
OUT = os.path.join(HERE, "demo_quadrature_values.json")
OPTS = {"epsabs": 0.0, "epsrel": 1e-10, "limit": 400}


def load(name):
    with open(os.path.join(ROOT, "demo-targets", name)) as f:
        return json.load(f)


def log_z_2d(logf, xs, ys, xpoints, ypoints):
    """log of the integral of exp(logf(x, y)) over the box xs × ys (nquad, breakpoints)."""
    # The peak, from a coarse grid, keeps exp() in range.
    gx = np.linspace(xs[0], xs[1], 801)
    gy = np.linspace(ys[0], ys[1], 801)
    peak = max(logf(x, y) for x in gx[::4] for y in gy[::4])
    for p in xpoints:
        for q in ypoints:
            peak = max(peak, logf(p, q))
    val, err = integrate.nquad(
        lambda y, x: math.exp(logf(x, y) - peak),
        [lambda x: (ys[0], ys[1]), (xs[0], xs[1])],
        opts=[{**OPTS, "points": ypoints}, {**OPTS, "points": xpoints}],
    )
    return peak + math.log(val), err / val


def beacon():
    spec = load("default-two-modes.json")
    mic = np.array(spec["data"]["mic_x"], dtype=float)
    rng = np.array(spec["data"]["range"], dtype=float)

    # let sigma = 0.15; fit = sum(0.5 * ((sqrt((x - mic_x)^2 + y^2) - range) / sigma)^2);
    # hunch = 0.5 * ((x - 2) / 5)^2 + 0.5 * ((y - 1) / 1.5)^2; energy = fit + hunch
    def logf(x, y):
        fit = np.sum(0.5 * ((np.sqrt((x - mic) ** 2 + y**2) - rng) / 0.15) ** 2)
        hunch = 0.5 * ((x - 2) / 5) ** 2 + 0.5 * ((y - 1) / 1.5) ** 2
        return -(fit + hunch)

    a = log_z_2d(logf, (0.5, 4.5), (-3.0, 3.0), [2.59], [-0.87, 0.0, 0.87])
    b = log_z_2d(logf, (-1.5, 6.5), (-6.0, 6.0), [2.59], [-0.87, 0.0, 0.87])
    return {"log_z": a[0], "cross_check": b[0], "rel_error_estimate": a[1],
            "method": "scipy.integrate.nquad of exp(-energy) on x in [0.5, 4.5], y in [-3, 3] (breakpoints at the modes); cross-check on a box twice as wide"}


def crystal():
    spec = load("crystal-sensor-two-temperatures.json")
    shift = np.array(spec["data"]["shift_ppm"], dtype=float)
    t_lo, t_hi = spec["variables"][0]["lower"], spec["variables"][0]["upper"]
    s_lo, s_hi = spec["variables"][1]["lower"], spec["variables"][1]["upper"]

    # beta = 0.034; noise = 0.3; predicted = -beta (T - T0)^2;
    # energy = sum(0.5 ((shift - predicted) / noise)^2) + 0.5 ((T0 - 25) / 2)^2
    def logf(t, t0):
        pred = -0.034 * (t - t0) ** 2
        return -(np.sum(0.5 * ((shift - pred) / 0.3) ** 2) + 0.5 * ((t0 - 25) / 2) ** 2)

    a = log_z_2d(logf, (t_lo, t_hi), (s_lo, s_hi), [8.0, 25.0, 42.0], [25.0])
    b = log_z_2d(logf, (t_lo, t_hi), (s_lo, s_hi), [0.0, 8.0, 16.0, 25.0, 34.0, 42.0, 50.0], [20.0, 25.0, 30.0])
    return {"log_z": a[0], "cross_check": b[0], "rel_error_estimate": a[1],
            "method": "scipy.integrate.nquad of exp(-energy) on the spec's bounds (T in [-40, 85], T0 in [15, 35]); cross-check with other breakpoints"}


def comb():
    spec = load("ultrasonic-phase-range-comb.json")
    phase = np.array(spec["data"]["phase"], dtype=float)
    lo, hi = spec["variables"][0]["lower"], spec["variables"][0]["upper"]
    lam, kappa = 8.575, 1 / 0.2**2

    # fringe = sum(kappa (1 - cos(2 pi d / wavelength - phase))); coarse = 0.5 ((d - 120) / 6)^2
    def logf(d):
        fringe = np.sum(kappa * (1 - np.cos(2 * math.pi * d / lam - phase)))
        return -(fringe + 0.5 * ((d - 120) / 6) ** 2)

    # The teeth: where 2 pi d / lam = mean phase (mod 2 pi).
    p0 = float(np.mean(phase)) * lam / (2 * math.pi)
    teeth = [p0 + k * lam for k in range(-10, 40) if lo < p0 + k * lam < hi]
    peak = max(logf(d) for d in teeth)
    val, err = integrate.quad(lambda d: math.exp(logf(d) - peak), lo, hi, points=teeth, **{**OPTS, "limit": 2000})
    halves = [t + lam / 2 for t in teeth if t + lam / 2 < hi]
    val2, _ = integrate.quad(lambda d: math.exp(logf(d) - peak), lo, hi, points=halves, **{**OPTS, "limit": 2000})
    return {"log_z": peak + math.log(val), "cross_check": peak + math.log(val2), "rel_error_estimate": err / val,
            "method": "scipy.integrate.quad of exp(-energy) on [50, 200] mm with a breakpoint at every tooth; cross-check with breakpoints between the teeth"}


def search_area():
    # ridge = log 5 + logd_normal(east, 3.2, 0.8) + logd_normal(north, 4.1 + 0.5 (east - 3.2)^2, 0.3)
    # valley = log 3 + logd_student(east, 4, -1.5, 0.9) + logd_normal(north, 2.0 - 0.3 (east + 1.5)^2, 0.45)
    # lake = log 1 + logd_normal(east, 1.0, 0.6) + logd_normal(north, -2.5, 0.6); logsumexp of the three
    def logf(e, n):
        ridge = math.log(5) + stats.norm.logpdf(e, 3.2, 0.8) + stats.norm.logpdf(n, 4.1 + 0.5 * (e - 3.2) ** 2, 0.3)
        valley = math.log(3) + stats.t.logpdf(e, 4, -1.5, 0.9) + stats.norm.logpdf(n, 2.0 - 0.3 * (e + 1.5) ** 2, 0.45)
        lake = stats.norm.logpdf(e, 1.0, 0.6) + stats.norm.logpdf(n, -2.5, 0.6)
        return float(np.logaddexp.reduce([ridge, valley, lake]))

    # Integrating north first, each patch's conditional normal integrates to one wherever its
    # mean lies, so north's range must follow the curves: the box is wide in north.
    def inner(e):
        centres = [4.1 + 0.5 * (e - 3.2) ** 2, 2.0 - 0.3 * (e + 1.5) ** 2, -2.5]
        lo, hi = min(centres) - 12, max(centres) + 12
        v, _ = integrate.quad(lambda n: math.exp(logf(e, n)), lo, hi, points=sorted(centres), **OPTS)
        return v

    # east: the Student-t tail of the valley; integrate on [-L, L] and add the valley patch's
    # mass beyond, 3 (P(east < -L) + P(east > L)) from the t distribution's survival function
    # (the normal patches hold nothing measurable there).
    L = 60.0
    body, _ = integrate.quad(inner, -L, L, points=[-1.5, 1.0, 3.2], **OPTS)
    tail = 3 * (stats.t.sf((L - 1.5) / 0.9, 4) + stats.t.sf((L + 1.5) / 0.9, 4))
    return {"log_z": math.log(body + tail), "cross_check": math.log(9.0), "identity": math.log(9.0),
            "tail_mass": tail,
            "method": "log 9: each patch a normalised density times its odds (identity); checked by scipy.integrate.quad over north inside quad over east on [-60, 60] plus the Student-t tail mass beyond (scipy.stats.t.sf)"}


def main():
    demos = {
        "default-two-modes.json": beacon(),
        "crystal-sensor-two-temperatures.json": crystal(),
        "ultrasonic-phase-range-comb.json": comb(),
        "search-area-three-scenarios.json": search_area(),
    }
    doc = {
        "generated_by": "tests/reference/demo_quadrature.py",
        "scipy_version": scipy.__version__,
        "numpy_version": np.__version__,
        "python_version": sys.version.split()[0],
        "demos": demos,
    }
    with open(OUT, "w") as f:
        json.dump(doc, f, indent=1)
        f.write("\n")
    for k, v in demos.items():
        print(f"{k}: log Z {v['log_z']:.10f} (cross-check {v['cross_check']:.10f})")


if __name__ == "__main__":
    main()
