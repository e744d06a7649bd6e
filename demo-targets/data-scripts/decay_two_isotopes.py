"""Invented counts for the demo decay-two-isotopes-background.json (numpy 2.x, seed 20261203).

Two isotopes (initial rates 900 and 150 counts per minute, mean lifetimes 2 and 15 minutes)
over a background of 4 counts per minute, counted in 50 two-minute bins from 0 to 100
minutes. By the last half hour the longer-lived isotope has nearly died away (100 min is
about seven of its lifetimes), which pins the background down. Prints the data object.
"""
import json

import numpy as np

rng = np.random.default_rng(20261203)
t_mid = np.arange(1, 100, 2)
half = 1.0


def expected(a, tau):
    return 2 * a * tau * np.sinh(half / tau) * np.exp(-t_mid / tau)


mu = expected(900.0, 2.0) + expected(150.0, 15.0) + 2 * half * 4.0
counts = rng.poisson(mu)
print(json.dumps({"t_mid": t_mid.tolist(), "counts": counts.tolist()}))
