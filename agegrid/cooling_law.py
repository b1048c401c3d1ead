"""The two-branch law of the empirical cooling models, compiled: a root (or inverse root) of age up to a switch
age, an exponential approach to an asymptote after it.

Kept apart from :mod:`agegrid.thermal` so that reading the model registry (a build file's check, a no-op
rerun, ``agegrid models``) does not import numba.
"""
from __future__ import annotations

import math

import numpy as np
from numba import njit


def two_branches(age, youngest, offset, coefficient, inverse, switch, through_switch, asymptote, amplitude, decay
                 ) -> np.ndarray:
    """:func:`_law` over every cell of ``age`` (any shape): one branch per cell and no temporaries
    (2.5x faster than both branches in numpy over a 512 x 512 block). Computed in float64; float32 ages give
    float32 values (the float64 result rounded once), anything else float64."""
    age = np.asarray(age)
    if age.dtype != np.float32:
        age = age.astype(float)
    out = np.empty(age.shape, dtype=age.dtype)
    _law(np.ascontiguousarray(age).reshape(-1), out.reshape(-1), float(youngest), float(offset),
         float(coefficient), bool(inverse), float(switch), bool(through_switch), float(asymptote),
         float(amplitude), float(decay))
    return out


@njit(cache=True, nogil=True)
def _law(age, out, youngest, offset, coefficient, inverse, switch, through_switch, asymptote, amplitude, decay):
    """offset + coefficient sqrt(t) (or / sqrt(t) when ``inverse``) before ``switch`` (at it too when
    ``through_switch``), asymptote + amplitude exp(-decay t) after; t no younger than ``youngest``; NaN for
    negative or missing ages."""
    for i in range(age.size):
        t = float(age[i])  # float64 arithmetic for float32 ages too
        if not t >= 0.0:
            out[i] = np.nan
            continue
        t = max(t, youngest)
        if t < switch or (through_switch and t == switch):
            root = math.sqrt(t)
            out[i] = offset + (coefficient / root if inverse else coefficient * root)
        else:
            out[i] = asymptote + amplitude * math.exp(-decay * t)
