#!/usr/bin/env python3
"""Log evidence of demo-targets/default-two-modes.json (the page's first demo), from outside Kiln.

Run from anywhere:  python3 tests/reference/beacon.py
It reads the demo's data (microphone positions and ranges) and writes beacon_values.json
beside it, with the scipy and numpy versions.

The demo's energy is E(x, y) = sum_i 0.5 ((sqrt((x - mic_x_i)^2 + y^2) - range_i) / 0.15)^2
+ 0.5 ((x - 2) / 5)^2 + 0.5 ((y - 1) / 1.5)^2 (the constants are those written in its formula,
which this script checks it reads), and log Z = log of the integral of exp(-E) over the plane.
The density is negligible (below e^-60 of its peak) outside [-4, 8] x [-5, 5], checked on
the box's edges. Two methods:
  1. nested scipy.integrate.quad over the box, each half-plane y < 0 and y > 0 apart (the two
     modes are mirror images across y = 0, weighted by the hunch);
  2. composite Simpson's rule on a 2001 x 2001 grid over the same box.
Stated accuracy: 1e-6 nats (the two agree far closer than that).
"""

import json
import math
import os

import numpy as np
import scipy
from scipy import integrate

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(os.path.dirname(HERE))
OUT = os.path.join(HERE, "beacon_values.json")
BOX = (-4.0, 8.0, -5.0, 5.0)


def load():
    with open(os.path.join(ROOT, "demo-targets", "default-two-modes.json")) as f:
        spec = json.load(f)
    e = spec["energy"]
    for piece in ["let sigma = 0.15;", "0.5 * ((x - 2) / 5)^2", "0.5 * ((y - 1) / 1.5)^2",
                  "sqrt((x - mic_x)^2 + y^2) - range"]:
        assert piece in e, f"the demo's formula changed: {piece!r} not in it"
    return np.array(spec["data"]["mic_x"], float), np.array(spec["data"]["range"], float)


MIC, RANGE = load()


def energy(x, y):
    x = np.asarray(x, float)[..., None]
    y = np.asarray(y, float)[..., None]
    fit = np.sum(0.5 * ((np.sqrt((x - MIC) ** 2 + y ** 2) - RANGE) / 0.15) ** 2, axis=-1)
    return fit + 0.5 * ((x[..., 0] - 2) / 5) ** 2 + 0.5 * ((y[..., 0] - 1) / 1.5) ** 2


def main():
    x0, x1, y0, y1 = BOX
    # The lowest energy on a fine grid, as the offset that keeps exp(-E) in range.
    gx = np.linspace(x0, x1, 2001)
    gy = np.linspace(y0, y1, 2001)
    X, Y = np.meshgrid(gx, gy, indexing="ij")
    E = energy(X, Y)
    e_min = float(E.min())
    edge = min(E[0, :].min(), E[-1, :].min(), E[:, 0].min(), E[:, -1].min())
    assert edge - e_min > 60, f"the box is too small: edge energy only {edge - e_min} above the peak"

    f = lambda y, x: math.exp(e_min - float(energy(x, y)))
    total = 0.0
    for lo, hi in [(y0, 0.0), (0.0, y1)]:
        v, err = integrate.dblquad(f, x0, x1, lo, hi, epsabs=0, epsrel=1e-11)
        total += v
    quad = e_min * -1 + math.log(total)

    w = np.ones(2001)
    w[1:-1:2] = 4
    w[2:-1:2] = 2
    hx = (x1 - x0) / 2000
    hy = (y1 - y0) / 2000
    simpson = -e_min + math.log(float(np.einsum("i,j,ij->", w, w, np.exp(e_min - E))) * hx * hy / 9)

    assert abs(quad - simpson) < 1e-6, (quad, simpson)
    out = {
        "generated_by": "tests/reference/beacon.py",
        "scipy_version": scipy.__version__,
        "numpy_version": np.__version__,
        "demo": "default-two-modes.json",
        "log_z": quad,
        "accuracy": 1e-6,
        "methods": {"nested_quad": quad, "simpson_2001": simpson},
    }
    with open(OUT, "w") as fh:
        json.dump(out, fh, indent=2)
        fh.write("\n")
    print(json.dumps(out, indent=2))


if __name__ == "__main__":
    main()
