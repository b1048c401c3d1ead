"""The age engine's cell kernel, compiled with numba: one pass per cell, without the GIL (dask runs the
blocks in parallel, so no numba threading layer is needed).

For each cell: its compartment's frame coordinates (w, s), the column of the trace table, a binary
search for the two traces that bracket s, and from that pair, in one of two parts:

- *dating* (the age stage): the age, its uncertainty (which needs the pair's half-rate), the flag, and
  the brackets and fraction kept for retiming;
- *motion* (the kinematic layers): the half-rate, the spreading azimuth, the flank, and the full rate
  and asymmetry against the conjugate flank's pair at the same age.

A pass over a block fills one part, or both at once (a build writing every layer locates each cell's pair
once); the age stage alone computes and stores only what the age needs. Every pass locates the bracketing
pair the same way, so the layers always agree (see :mod:`agegrid.age`).
"""
from __future__ import annotations

import math

import numpy as np
from numba import njit

from agegrid.sphere import EARTH_RADIUS_KM

#: The two parts' layers, in plane order; every plane is float32 (integers are exact in it, and an age to
#: within about 10 years at 200 Ma; the fraction between the brackets, which retiming reads, to 6e-8).
PARTS = {
    "dating": ("age", "age_fraction", "age_uncertainty", "age_flag", "age_bracket_young", "age_bracket_old",
               "compartment"),
    "motion": ("half_rate", "spreading_azimuth", "flank", "full_rate", "asymmetry"),
}
#: The kernel's passes: either part alone, or both.
DATING, MOTION, BOTH = range(3)
#: Cells farther than about 80 degrees from their compartment frame's centre are not dated.
MIN_COS_FROM_CENTRE = 0.17
AGE, FRACTION, SIGMA, FLAG, YOUNG, OLD, COMPARTMENT = range(len(PARTS["dating"]))
RATE, AZIMUTH, FLANK, FULL_RATE, ASYMMETRY = range(len(PARTS["motion"]))


@njit(cache=True, nogil=True, error_model="numpy")
def _pair_rate(V, ages, vo, to, i0, nc, j0, t, dw, w):
    """Half-rate (km/Myr) between traces i0 and i0 + 1 of the compartment at offsets (vo, to), at a column."""
    ia = vo + i0 * nc + j0
    ib = ia + nc
    va = V[ia] * (1.0 - t) + V[ia + 1] * t
    vb = V[ib] * (1.0 - t) + V[ib + 1] * t
    gap = abs(vb - va)
    dt = abs(ages[to + i0 + 1] - ages[to + i0])
    if gap <= 0 or dt <= 0:
        return np.nan
    mid = 0.5 * (va + vb)
    cos2 = max(1.0 - mid * mid, 1e-12)
    slope = 0.5 * ((V[ia + 1] - V[ia]) + (V[ib + 1] - V[ib])) / dw
    tilt = slope * (1.0 + w * w) / cos2
    return gap * EARTH_RADIUS_KM / (dt * math.sqrt(cos2 * (1.0 + tilt * tilt)))


@njit(cache=True, nogil=True, error_model="numpy")
def column_span(rs, rx, ry, rz, labels, has, frames, w0, dw):
    """Least and greatest trace-table column (fractional) that each compartment's cells in a block fall on,
    for the unit vectors (rs rx, rs ry, rz); +inf and -inf for a compartment without such cells (the cells
    behind its frame, which the kernel leaves out, included)."""
    n = has.size
    lo, hi = np.full(n, np.inf), np.full(n, -np.inf)
    for i in range(labels.shape[0]):
        for j in range(labels.shape[1]):
            label = labels[i, j]
            if label <= 0 or label >= n or not has[label]:
                continue
            x, y, z = rs[i, j] * rx[i, j], rs[i, j] * ry[i, j], rz[i, j]
            xc = x * frames[label, 0, 0] + y * frames[label, 0, 1] + z * frames[label, 0, 2]
            if not xc > MIN_COS_FROM_CENTRE:
                continue
            xe = x * frames[label, 1, 0] + y * frames[label, 1, 1] + z * frames[label, 1, 2]
            column = (xe / xc - w0[label]) / dw[label]
            lo[label] = min(lo[label], column)
            hi[label] = max(hi[label], column)
    return lo, hi


@njit(cache=True, nogil=True, error_model="numpy")
def evaluate(rs, rx, ry, rz, labels, domain, has, frames, w0, dw, ncol, ntrace, voff, toff, ridge, V, D, ages, bounds,
             sigma, support, borrows, max_extrapolation, timescale_fraction, growth, extrapolation_fraction, flags,
             part, dated, moving):
    """Fill the planes of a pass (:data:`DATING`, :data:`MOTION` or :data:`BOTH`; layers in :data:`PARTS`) for the
    unit vectors (rs rx, rs ry, rz) of a block of cells (2-D arrays; broadcast views welcome): ``dated`` the
    dating part's planes, ``moving`` the motion part's (a part the pass leaves out may be an empty array).

    ``flags`` holds the codes (interpolated, extrapolated, outside, no control, too far). ``borrows`` says,
    per compartment, whether any of its traces is borrowed; ``support`` is, per trace, NaN for a trace
    through control, or for a trace carried over from the conjugate flank the age of its flank's oldest
    controlled trace: cells dated by such a trace are flagged extrapolated, their uncertainty counts the
    age beyond that support as extrapolated, and they get no full rate or asymmetry.
    """
    ny, nx = labels.shape
    nan = np.nan
    dating, motion = part != MOTION, part != DATING
    # every plane first holds its value for an undated cell, plane by plane (one write stream at a time: filled
    # cell by cell, the twelve streams cost the pass about a fifth of its time)
    if dating:
        for i in range(ny):
            for jj in range(nx):
                dated[COMPARTMENT, i, jj] = labels[i, jj]
        for i in range(ny):
            for jj in range(nx):
                dated[FLAG, i, jj] = flags[2] if not domain[i, jj] else flags[3]
        dated[YOUNG] = -1.0
        dated[OLD] = -1.0
        dated[SIGMA] = nan
        dated[AGE] = nan
        dated[FRACTION] = nan
    if motion:
        moving[FLANK] = 0.0
        moving[RATE] = nan
        moving[AZIMUTH] = nan
        moving[FULL_RATE] = nan
        moving[ASYMMETRY] = nan
    for i in range(ny):
        last_lab, last_a, conj_lab, conj_lo = -1, -1, -1, -1
        for jj in range(nx):
            lab = labels[i, jj]
            if not domain[i, jj]:
                continue
            if lab <= 0 or lab >= has.shape[0] or not has[lab]:
                continue
            px, py, pz = rs[i, jj] * rx[i, jj], rs[i, jj] * ry[i, jj], rz[i, jj]
            f0 = frames[lab]
            xc = px * f0[0, 0] + py * f0[0, 1] + pz * f0[0, 2]
            if xc <= MIN_COS_FROM_CENTRE:
                continue
            xe = px * f0[1, 0] + py * f0[1, 1] + pz * f0[1, 2]
            s = px * f0[2, 0] + py * f0[2, 1] + pz * f0[2, 2]
            w = xe / xc
            nc = ncol[lab]
            colf = (w - w0[lab]) / dw[lab]
            if colf < 0.0:
                colf = 0.0
            if colf > nc - 1:
                colf = nc - 1.0
            j0 = int(colf)
            if j0 > nc - 2:
                j0 = nc - 2
            t = colf - j0
            K = ntrace[lab]
            vo = voff[lab]
            to = toff[lab]
            # neighbouring cells mostly share a bracket: test the last one before searching (V grows with k,
            # so a pair that brackets s is exactly what the binary search would find)
            lo = -1
            if lab == last_lab and 0 <= last_a < K - 1:
                ia = vo + last_a * nc + j0
                if V[ia] * (1.0 - t) + V[ia + 1] * t <= s < V[ia + nc] * (1.0 - t) + V[ia + nc + 1] * t:
                    lo = last_a + 1
            if lo < 0:
                lo = 0
                hi = K
                while lo < hi:
                    mid = (lo + hi) // 2
                    vm = V[vo + mid * nc + j0] * (1.0 - t) + V[vo + mid * nc + j0 + 1] * t
                    if vm <= s:
                        lo = mid + 1
                    else:
                        hi = mid
            last_lab, last_a = lab, lo - 1
            a = lo - 1
            if a < 0:
                a = 0
            if a > K - 2:
                a = K - 2
            b = a + 1
            ia, ib = vo + a * nc + j0, vo + b * nc + j0
            va = V[ia] * (1.0 - t) + V[ia + 1] * t
            vb = V[ib] * (1.0 - t) + V[ib + 1] * t
            gap = vb - va
            f = (s - va) / gap if gap > 0 else 0.0
            ta, tb = ages[to + a], ages[to + b]
            age = ta + f * (tb - ta)
            mirror = age < 0.0
            young_first = ta <= tb
            if mirror:
                age = -age
            outside = f < 0.0 or f > 1.0 or mirror
            span = 0.0
            if outside:
                t_end = ta if f < 0.0 else tb
                span = abs(age - t_end)
            if span > max_extrapolation:
                if dating:
                    dated[FLAG, i, jj] = flags[4]
                continue
            borrowed = False
            if borrows[lab]:
                sup_a, sup_b = support[to + a], support[to + b]
                borrowed = sup_a == sup_a or sup_b == sup_b  # a bracket from the conjugate flank (not NaN)
                if borrowed:
                    span += max(age - (sup_a if sup_a == sup_a else sup_b), 0.0)
            # the pair's half-rate r = gap R / (dt sqrt(stretch)): their perpendicular great-circle separation
            # over their age difference
            fc = min(max(f, 0.0), 1.0)
            slope = ((1.0 - fc) * (V[ia + 1] - V[ia]) + fc * (V[ib + 1] - V[ib])) / dw[lab]
            cos2 = max(1.0 - s * s, 1e-12)
            tilt = slope * (1.0 + w * w) / cos2
            stretch = cos2 * (1.0 + tilt * tilt)
            dt = abs(tb - ta)
            paired = gap > 0 and dt > 0
            if dating:
                fy = f if young_first else 1.0 - f
                dated[FLAG, i, jj] = flags[1] if outside or borrowed else flags[0]
                dated[AGE, i, jj] = age
                dated[FRACTION, i, jj] = -fy if mirror else fy
                dated[YOUNG, i, jj] = bounds[to + a] if young_first else bounds[to + b]
                dated[OLD, i, jj] = bounds[to + b] if young_first else bounds[to + a]
                da = D[ia] * (1.0 - t) + D[ia + 1] * t
                db = D[ib] * (1.0 - t) + D[ib + 1] * t
                sa2 = sigma[to + a] ** 2 + (growth * da) ** 2
                sb2 = sigma[to + b] ** 2 + (growth * db) ** 2
                # the traces' position variance over r^2, without the square root r needs
                position2 = (((1.0 - fc) ** 2 * sa2 + fc * fc * sb2) * (dt * dt * stretch)
                             / (gap * gap * EARTH_RADIUS_KM * EARTH_RADIUS_KM)) if paired else nan
                dated[SIGMA, i, jj] = math.sqrt(position2 + (timescale_fraction * age) ** 2
                                              + (extrapolation_fraction * span) ** 2)
                if not motion:
                    continue
            rate = gap * EARTH_RADIUS_KM / (dt * math.sqrt(stretch)) if paired else nan
            moving[RATE, i, jj] = rate
            # flank and the conjugate flank's rate at the same age and along-strike position
            r = ridge[lab]
            if r >= 0:
                plus = a >= r and not mirror
                moving[FLANK, i, jj] = 1.0 if plus else -1.0
                conj = np.nan
                pair = -1
                if not mirror:
                    # the other side's ages are monotone away from the ridge: binary search for the pair
                    if plus and r > 0 and ages[to] >= age:  # minus side: ages fall from index 0 to r
                        if lab == conj_lab and 0 <= conj_lo < r and ages[to + conj_lo] >= age > ages[to + conj_lo + 1]:
                            pair = conj_lo  # the neighbouring cell's pair still brackets this age
                        else:
                            lo, hi = 0, r
                            while hi - lo > 1:
                                mid = (lo + hi) // 2
                                if ages[to + mid] >= age:
                                    lo = mid
                                else:
                                    hi = mid
                            pair = lo
                    elif not plus and r < K - 1 and ages[to + K - 1] >= age:  # plus side: ages rise from r
                        if lab == conj_lab and r <= conj_lo < K - 1 and ages[to + conj_lo] <= age < ages[to + conj_lo + 1]:
                            pair = conj_lo
                        else:
                            lo, hi = r, K - 1
                            while hi - lo > 1:
                                mid = (lo + hi) // 2
                                if ages[to + mid] <= age:
                                    lo = mid
                                else:
                                    hi = mid
                            pair = lo
                if pair >= 0:
                    conj_lab, conj_lo = lab, pair
                    if not borrows[lab] or (support[to + pair] != support[to + pair]
                                            and support[to + pair + 1] != support[to + pair + 1]):
                        conj = _pair_rate(V, ages, vo, to, pair, nc, j0, t, dw[lab], w)
                if conj == conj and rate == rate and not borrowed:
                    moving[FULL_RATE, i, jj] = rate + conj
                    moving[ASYMMETRY, i, jj] = 100.0 * rate / (rate + conj)
            # across-strike direction n - s p and along-strike n x p: both have length sqrt(1 - s^2), which
            # the direction (atan2) does not need
            nx_, ny_, nz_ = f0[2, 0], f0[2, 1], f0[2, 2]
            evx, evy, evz = nx_ - s * px, ny_ - s * py, nz_ - s * pz
            eux, euy, euz = ny_ * pz - nz_ * py, nz_ * px - nx_ * pz, nx_ * py - ny_ * px
            sign = 1.0 if tb > ta else -1.0
            if mirror:
                sign = -sign
            gx = sign * (evx - tilt * eux)
            gy = sign * (evy - tilt * euy)
            gz = sign * (evz - tilt * euz)
            east = -py * gx + px * gy
            north = -pz * px * gx - pz * py * gy + (px * px + py * py) * gz
            az = math.degrees(math.atan2(east, north))
            moving[AZIMUTH, i, jj] = az + 360.0 if az < 0 else az
