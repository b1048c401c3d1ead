"""The age engine: age between bracketing isochron traces within each compartment.

For each compartment a local frame is fitted on the sphere: ``u`` runs along the great circle that
best fits the compartment's ridge (or its longest isochron), ``v`` is the angular distance across it.
The code works in the trigonometry-free equivalents ``w = tan u`` and ``s = sin v`` (dot products of
unit vectors), which are monotone in ``u`` and ``v``.
Every dated boundary (ridge, isochron line, the picks of one chron end) becomes a *trace* v(u) on each
flank, resampled on a regular ``u`` axis: piecewise linear through its control, and continued along
strike to the compartment's edge parallel to the next younger trace of its flank (the ridge is
continued along its own end trend). Traces implying an implausible half-rate against their younger
neighbour, or lying on the wrong side of it, are dropped; picks within pick noise of a barrier count only
where they agree with the firm picks of their trace (:func:`_unambiguous`), and picks implying a half-rate
far from their trace's (:func:`_steady_rate`) belong to another isochron. A trace resting on one pick is
checked against the same flank of the other segments of its ridge system instead
(:func:`_drop_lone_picks_off_rate`).

A cell at (u, v) takes the two traces that bracket its v in its column, and the age
``t_a + f (t_b - t_a)`` with ``f`` the fraction of the great-circle distance between them (the
distance-ratio rule for gridding between dated isochrons). Beyond the outermost trace the last pair's
rate is continued up to ``max_extrapolation_myr``; beyond a ridge with no conjugate control the
conjugate flank is mirrored.

A flank that lacks isochrons borrows them. Segments of one ridge system (strike circles with poles
within :data:`SIBLING_MAX_POLE_ANGLE_DEG`) share their plates, so the same flank of every segment grows
alike: an isochron missing between two of the flank's own traces is placed at the fraction of the width
between them that it takes in the other segments, and isochrons beyond the flank's oldest control follow
the other segments' relative growth of that flank's width. Beyond what they reach, the conjugate's older
traces are carried over, their spacing scaled by the ratio of the two flanks' widths from the ridge to
the flank's oldest trace (the mean asymmetry of their common history). Cells dated beyond the flank's
own control are flagged extrapolated, count the age beyond its oldest control as extrapolated span ``x``
below, and get no full rate or asymmetry (there is no measured conjugate pair). The same pair gives the half-rate (their
perpendicular great-circle separation over their age difference) and the spreading azimuth (normal to
the traces, toward older).

Uncertainty (1 sigma, Myr)::

    sigma_k^2   = sigma_pick_k^2 + (g D_k)^2            trace position: pick sigma, grown with the
                                                        along-strike distance D_k to its nearest control
    sigma_age^2 = ((1-f)^2 sigma_a^2 + f^2 sigma_b^2) / r^2  +  (p age)^2  +  (e x)^2

with r the local half-rate, p the timescale's relative uncertainty (``timescale_sigma_percent``), x
the extrapolated span (Myr: beyond the outermost trace, plus the age beyond the flank's own control
where its traces are borrowed), g = :data:`GROWTH_PER_KM` and e = :data:`EXTRAPOLATION_FRACTION` (agegrid's
stated choices, not published values).
"""
from __future__ import annotations

import logging
import os
import uuid
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field

import dask.array as da
import numpy as np
from numba import njit

from agegrid import sphere
from agegrid.age_kernel import BOTH, DATING, MIN_COS_FROM_CENTRE, MOTION, PARTS, column_span
from agegrid.streaming import Plane

log = logging.getLogger("agegrid")

#: Growth of a trace's position uncertainty with along-strike distance from its control (km per km).
GROWTH_PER_KM = 0.02
#: Extrapolated age span counted as 1-sigma uncertainty (fraction).
EXTRAPOLATION_FRACTION = 0.25
#: Ridge segments whose strike circles' poles lie within this angle belong to one ridge system (agegrid's
#: choice: segments offset by transforms lie on nearly one great circle).
SIBLING_MAX_POLE_ANGLE_DEG = 25.0
#: How far, as a factor either way, a pick's half-rate against the younger trace may stray from its trace's
#: median (agegrid's choice: along one segment the rate varies with the sine of the distance from the
#: Euler pole, by less than a factor of 2 for a segment 1,000 km long 25 degrees or more from its pole).
RATE_SPREAD_ALONG_TRACE = 4.0
#: How far, as a factor either way, a lone pick's distance from its flank's younger trace may stray from what
#: the other segments of its ridge system imply before its trace is dropped (agegrid's choice; see
#: :func:`_drop_lone_picks_off_rate`).
LONE_PICK_RATE_FACTOR = 1.5
#: The empty trace passed as 'no younger trace' to :func:`_trace`.
NO_TRACE = np.zeros(0)

FLAG_INTERPOLATED, FLAG_EXTRAPOLATED, FLAG_OUTSIDE, FLAG_NO_CONTROL, FLAG_TOO_FAR = 1, 2, 3, 4, 5
FLAG_MEANINGS = ("interpolated_between_controls extrapolated_beyond_control outside_domain "
                 "no_control_in_compartment beyond_extrapolation_limit")

#: The part of the kernel (``"dating"``, the age stage, or ``"motion"``, the kinematic layers) that returns
#: each layer.
PART_OF = {name: part for part, names in PARTS.items() for name in names}
#: Layers the kernel returns, in order.
LAYERS = tuple(PART_OF)
#: The kernel's passes over a block (:mod:`agegrid.age_kernel`): either part alone, or both at once.
PASSES = {"dating": DATING, "motion": MOTION, "both": BOTH}
#: Each pass's layers: the planes of a block it returns (float32), part by part.
LAYERS_OF = {run: sum((PARTS[part] for part in PARTS if run in (part, "both")), ()) for run in PASSES}


@dataclass
class Settings:
    """Engine settings taken from ``[age]`` and ``[picks]``."""

    max_extrapolation_myr: float = 5.0
    timescale_sigma_percent: float = 1.0
    min_half_rate: float = 2.0
    max_half_rate: float = 100.0


@dataclass
class Frame:
    """A compartment's frame: centre ``c``, strike direction ``e_u``, pole ``n`` of the strike circle."""

    c: np.ndarray
    e_u: np.ndarray
    n: np.ndarray

    @classmethod
    def fit(cls, xyz: np.ndarray) -> "Frame | None":
        """The great circle best fitting points (smallest eigenvector of their scatter), or None."""
        if len(xyz) < 2 or sphere.angle(xyz.min(0) * 0 + xyz[0], xyz).max() < 1e-6:
            return None
        _, vectors = np.linalg.eigh(xyz.T @ xyz)
        n = vectors[:, 0]
        c = xyz.mean(0)
        c = c - (c @ n) * n
        c /= np.linalg.norm(c)
        return cls(c, np.cross(n, c), n)

    def ws(self, xyz: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Along-strike gnomonic coordinate ``w = tan(u)`` and across-strike ``s = sin(v)`` of unit vectors.

        Both are trigonometry-free (dot products), monotone in the along- and across-strike angles,
        and exact great-circle quantities: ``asin(s)`` is the angular distance from the strike circle.
        Points 80 degrees or more from the frame's centre get NaN.
        """
        xc = xyz @ self.c
        with np.errstate(invalid="ignore", divide="ignore"):
            w = np.where(xc > MIN_COS_FROM_CENTRE, (xyz @ self.e_u) / xc, np.nan)
        return w, xyz @ self.n


@dataclass
class CompartmentModel:
    """The traces of one compartment on a regular ``u`` axis, ordered so ``V`` grows along axis 0."""

    label: int
    frame: Frame
    u0: float
    du: float
    V: np.ndarray
    D: np.ndarray
    sigma: np.ndarray
    ages: np.ndarray
    bounds: np.ndarray
    #: Per trace, NaN for a trace drawn through control; for a trace carried over from the conjugate flank
    #: (:func:`_conjugate_fill`), the age of its flank's oldest controlled trace.
    support: np.ndarray = None

    @property
    def ncol(self) -> int:
        return self.V.shape[1]


@dataclass
class AgeModel:
    """Everything the kernel needs: one model per compartment with control, and the settings."""

    compartments: dict[int, CompartmentModel]
    settings: Settings
    labels: list[str] = field(default_factory=list)
    ages: np.ndarray = field(default_factory=lambda: np.zeros(1))
    dropped: list[dict] = field(default_factory=list)
    outliers: np.ndarray = field(default_factory=lambda: np.zeros(0, np.int64))
    #: The compartment of each control point the model was fitted to (0: none).
    control_compartments: np.ndarray = field(default_factory=lambda: np.zeros(0, np.int32))


# --- building the traces ---------------------------------------------------------------------------
@njit(cache=True)
def _binned(col: np.ndarray, v: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Mean position per integer column of the control of one trace, sorted along strike."""
    key = np.rint(col)
    order = np.argsort(key, kind="mergesort")
    xp = np.empty(len(col))
    vp = np.empty(len(col))
    m = -1
    count = 0
    for k in range(len(order)):
        p = order[k]
        if k == 0 or key[p] != key[order[k - 1]]:
            if m >= 0:
                xp[m] /= count
                vp[m] /= count
            m += 1
            xp[m], vp[m], count = 0.0, 0.0, 0
        xp[m] += col[p]
        vp[m] += v[p]
        count += 1
    xp[m] /= count
    vp[m] /= count
    return xp[:m + 1], vp[:m + 1]


@njit(cache=True)
def _end_fit(xp: np.ndarray, vp: np.ndarray, end: int) -> tuple[float, float]:
    """Slope (least squares) and anchor of a line through the control nearest one end of a trace."""
    anchor = vp[-1] if end > 0 else vp[0]
    span = max(3.0, 0.1 * (xp[-1] - xp[0]))
    sel = (xp >= xp[-1] - span) if end > 0 else (xp <= xp[0] + span)
    if sel.sum() < 2:
        return 0.0, anchor
    x, y = xp[sel], vp[sel]
    dx = x - x.mean()
    return (dx * (y - y.mean())).sum() / (dx * dx).sum(), anchor


@njit(cache=True)
def _trace(col: np.ndarray, v: np.ndarray, ncol: int, previous: np.ndarray, km_per_col: float):
    """Resample one trace on the column axis; returns (V, D) with D the along-strike km to control.

    ``previous`` is the next younger trace of the flank, whose shape continues this one beyond its
    control, or an empty array (the trace is continued along its own end trend).
    """
    xp, vp = _binned(col, v)
    cols = np.arange(ncol) * 1.0
    values = np.interp(cols, xp, vp)
    if len(previous):
        lead = vp[0] - np.interp(xp[0], cols, previous)
        tail = vp[-1] - np.interp(xp[-1], cols, previous)
    slope0, anchor0 = _end_fit(xp, vp, -1)
    slope1, anchor1 = _end_fit(xp, vp, 1)
    near = np.empty(ncol)
    last = len(xp) - 1
    for j in range(ncol):
        if cols[j] < xp[0]:
            values[j] = previous[j] + lead if len(previous) else anchor0 + slope0 * (cols[j] - xp[0])
        elif cols[j] > xp[-1]:
            values[j] = previous[j] + tail if len(previous) else anchor1 + slope1 * (cols[j] - xp[-1])
        pos = min(max(np.searchsorted(xp, cols[j]), 1), max(1, last))
        near[j] = min(abs(cols[j] - xp[pos - 1]), abs(cols[j] - xp[min(pos, last)])) * km_per_col
    return values, near


@njit(cache=True)
def _consistent(col: np.ndarray, offset: np.ndarray, sigma_km: np.ndarray) -> np.ndarray:
    """Which control points of one trace agree with a robust line through the rest.

    ``offset`` is each point's across-strike position relative to the next younger trace (radians);
    along one isochron it varies slowly, so a Theil-Sen line (Sen 1968) through it, with a tolerance of three
    pick sigmas or four robust standard deviations, separates points that belong to another
    isochron (a pick moved across a fracture zone, a mis-identified anomaly).
    """
    n = len(col)
    if n < 3 or col.max() == col.min():
        return np.ones(n, np.bool_)
    fit = np.linspace(0, n - 1, min(n, 150)).astype(np.int64)  # Theil-Sen is O(n^2) in pairs
    slope = _sen_slope(col[fit], offset[fit])
    resid = offset - slope * col
    resid -= np.median(resid)
    mad = 1.4826 * np.median(np.abs(resid))
    tol = max(3 * np.median(sigma_km) / sphere.EARTH_RADIUS_KM, 4 * mad)
    return np.abs(resid) <= tol


@njit(cache=True)
def _sen_slope(x: np.ndarray, y: np.ndarray) -> float:
    """Sen (1968): the median of the slopes between all pairs of points with distinct x."""
    n = len(x)
    slopes = np.empty(n * (n - 1) // 2)
    k = 0
    for i in range(n):
        for j in range(i + 1, n):
            dx = x[j] - x[i]
            if dx != 0:
                slopes[k] = (y[j] - y[i]) / dx
                k += 1
    return np.median(slopes[:k]) if k else np.nan


@njit(cache=True)
def _median(values: np.ndarray) -> float:
    """The median of a small array (compiled: numpy's call overhead dominates at this size)."""
    return np.median(values)


def _unambiguous(offset: np.ndarray, sigma_km: np.ndarray, ambiguous: np.ndarray, keep: np.ndarray) -> np.ndarray:
    """Which points of one trace to keep among those that may lie across a barrier (``ambiguous``: within pick
    noise of one, so they may belong to the neighbouring compartment).

    An ambiguous point is kept when its offset from the younger trace agrees with the median of the
    trace's firm points, within three pick sigmas (common practice) or a tenth of that offset (agegrid's
    choice: the spacing of two isochrons varies slowly along strike); a trace with no firm point keeps
    none, and is left to the borrowed isochrons (see :func:`_filled_flanks`).
    """
    firm = keep & ~ambiguous
    if not ambiguous.any():
        return np.ones(len(offset), bool)
    if not firm.any():
        return ~ambiguous
    reference = _median(offset[firm])
    tolerance = max(3 * _median(sigma_km) / sphere.EARTH_RADIUS_KM, 0.1 * abs(reference))
    return ~ambiguous | (np.abs(offset - reference) <= tolerance)


def _steady_rate(offset: np.ndarray, sigma_km: np.ndarray, keep: np.ndarray) -> np.ndarray:
    """Which points lie beyond the younger trace within :data:`RATE_SPREAD_ALONG_TRACE` times, or a fraction
    as large, of the median distance of the ``keep`` points, allowing three pick sigmas.

    A trace's distance from the next younger one is the half-rate times their age difference, which varies
    along strike only with the distance from the Euler pole: a pick far outside that belongs to another
    isochron even where it stands alone along strike, so that no robust line through the trace's points
    can tell it from a bend (a misidentified anomaly laid on a younger isochron is the usual case).
    """
    if not keep.any():
        return keep
    typical = _median(offset[keep])
    if typical <= 0:
        return keep
    slack = 3 * sigma_km / sphere.EARTH_RADIUS_KM
    spread = RATE_SPREAD_ALONG_TRACE
    return keep & (offset + slack >= typical / spread) & (offset - slack <= typical * spread)


def _plausible(offset: np.ndarray, sigma_km: np.ndarray, dt: float, settings: Settings) -> np.ndarray:
    """Which points lie beyond the younger trace at a plausible half-rate, allowing 3 sigma of noise."""
    slack = 3 * sigma_km / sphere.EARTH_RADIUS_KM
    dt = max(dt, 1e-9)
    fast = (offset - slack) * sphere.EARTH_RADIUS_KM / dt > settings.max_half_rate
    slow = (offset + slack) * sphere.EARTH_RADIUS_KM / dt < settings.min_half_rate
    return ~(fast | slow)


@dataclass
class TraceSet:
    """The traces of one compartment drawn through its control, before the flanks are filled and ordered.

    A trace is a tuple ``(flank, age, boundary, V, D, sigma, support)`` (see :class:`CompartmentModel`).
    """

    label: int
    frame: Frame
    u0: float
    du: float
    ridge: tuple | None
    traces: list
    #: +1 or -1: the side a ridge-less compartment's ages grow toward
    orientation: int = 1
    #: (flank, age) of the traces resting on a single pick
    lone: set = field(default_factory=set, repr=False)
    profiles: dict = field(default_factory=dict, repr=False)

    def flank(self, side: int) -> list:
        """The controlled traces of one flank, youngest first."""
        return [tr for tr in self.traces if tr[0] == side]

    def profile(self, side: int) -> tuple[np.ndarray, list, np.ndarray]:
        """Ages, boundaries and median widths from the ridge (across-strike, along the segment) of the
        controlled traces of one flank, ridge first (computed once)."""
        if side not in self.profiles:
            own = self.flank(side)
            widths = [0.0] + [_median(np.abs(tr[3] - self.ridge[3])) for tr in own]
            self.profiles[side] = (np.array([0.0] + [tr[1] for tr in own]), [0] + [tr[2] for tr in own],
                                   np.array(widths))
        return self.profiles[side]


def _compartment_traces(label, xyz, age, bound, kind, sigma, ambiguous, extent, spacing_rad, settings, dropped,
                        outliers):
    """Fit the frame and draw the traces of one compartment through its control (None if it has none)."""
    ridge = kind == 0
    frame = Frame.fit(xyz[ridge]) if ridge.sum() >= 2 else None
    if frame is None:
        groups = [np.flatnonzero(bound == b) for b in np.unique(bound)]
        frame = Frame.fit(xyz[max(groups, key=len)])
    if frame is None:
        return None
    u, v = frame.ws(xyz)
    origin = np.arange(len(u))  # each point's index in the arguments (points 80 degrees or more away go)
    if not np.isfinite(u).all():
        keep_pts = np.isfinite(u)
        u, v, age, bound, kind, sigma = u[keep_pts], v[keep_pts], age[keep_pts], bound[keep_pts], kind[keep_pts], sigma[keep_pts]
        ambiguous, origin = ambiguous[keep_pts], origin[keep_pts]
        ridge = kind == 0
    ext_u = [u.min(), u.max()]
    if extent is not None:
        eu, _ = frame.ws(extent)
        eu = eu[np.isfinite(eu)]
        if len(eu):
            ext_u = [min(ext_u[0], eu.min()), max(ext_u[1], eu.max())]
    du = spacing_rad
    u0 = ext_u[0] - 2 * du
    ncol = int(np.ceil((ext_u[1] + 2 * du - u0) / du)) + 1
    if ncol > 200_000:
        du = (ext_u[1] - ext_u[0] + 4 * spacing_rad) / 200_000
        ncol = 200_001
    col = (u - u0) / du
    km_per_col = du * sphere.EARTH_RADIUS_KM
    traces = []  # (flank, age, bound, V, D, sigma)
    lone = set()
    used = ridge.copy()
    if ridge.any():
        keep = _consistent(col[ridge], v[ridge], sigma[ridge])
        if not keep.all():
            outliers.extend(int(i) for i in origin[np.flatnonzero(ridge)[~keep]])
            used[np.flatnonzero(ridge)[~keep]] = False
    if used.any():
        rv, rd = _trace(col[used], v[used], ncol, NO_TRACE, km_per_col)
        ridge_trace = (0, 0.0, 0, rv, rd, _median(sigma[used]), np.nan)
        cols = np.arange(ncol)
        side = np.sign(v - np.interp(col, cols, rv))
        flanks = (-1, 1)
    else:
        # no ridge here: ages grow toward one side, which the control's own age-position trend tells
        trend = np.polyfit(age, v, 1)[0] if np.ptp(age) > 0 else 1.0
        orientation = 1 if trend >= 0 else -1
        ridge_trace, side, flanks = None, np.full(len(v), orientation), (orientation,)
    for flank in flanks:
        previous = ridge_trace
        for idx in _boundary_groups(np.flatnonzero((side == flank) & ~ridge), bound, age):
            t = float(age[idx[0]])
            base = None if previous is None else np.interp(col[idx], np.arange(ncol), previous[3])
            offset = v[idx] - (0 if base is None else base)
            keep = np.ones(len(idx), bool)
            if previous is not None:
                keep = _plausible(offset * flank, sigma[idx], t - previous[1], settings)
            keep[keep] = _consistent(col[idx][keep], offset[keep], sigma[idx][keep])
            if previous is not None:
                keep &= _unambiguous(offset, sigma[idx], ambiguous[idx], keep)
                keep &= _steady_rate(offset * flank, sigma[idx], keep)
            if not keep.all():
                outliers.extend(int(i) for i in origin[idx[~keep]])
                idx = idx[keep]
            if not len(idx):
                continue
            V, D = _trace(col[idx], v[idx], ncol, NO_TRACE if previous is None else previous[3], km_per_col)
            if previous is not None:
                xp = np.rint(col[idx]).astype(int).clip(0, ncol - 1)
                gap = _median((V[xp] - previous[3][xp]) * flank)
                rate = gap * sphere.EARTH_RADIUS_KM / max(t - previous[1], 1e-9)
                if not (settings.min_half_rate <= rate <= settings.max_half_rate):
                    dropped.append({"compartment": int(label), "boundary": int(bound[idx[0]]), "age_ma": t,
                                    "flank": flank, "points": int(len(idx)), "implied_half_rate_mm_yr": float(rate),
                                    "reason": "implausible half-rate"})
                    continue
            traces.append((flank, t, int(bound[idx[0]]), V, D, _median(sigma[idx]), np.nan))
            if len(idx) == 1:
                lone.add((flank, t))
            previous = traces[-1]
    return TraceSet(int(label), frame, float(u0), float(du), ridge_trace, traces, flanks[0], lone)


def _assemble(ts: TraceSet, filled: list) -> CompartmentModel | None:
    """The compartment model: its traces and the ``filled`` ones ordered so V grows (None if fewer than two)."""
    traces = ts.traces + filled
    if ts.ridge is None:
        ordered = traces if ts.orientation > 0 else traces[::-1]
    else:
        minus = sorted((tr for tr in traces if tr[0] < 0), key=lambda tr: -tr[1])
        plus = sorted((tr for tr in traces if tr[0] > 0), key=lambda tr: tr[1])
        ordered = minus + [ts.ridge] + plus
    if len(ordered) < 2:
        return None
    V = np.array([tr[3] for tr in ordered])
    anchor = next((i for i, tr in enumerate(ordered) if tr[0] == 0), int(np.argmin([tr[1] for tr in ordered])))
    for k in range(anchor + 1, len(V)):
        V[k] = np.maximum(V[k], V[k - 1])
    for k in range(anchor - 1, -1, -1):
        V[k] = np.minimum(V[k], V[k + 1])
    return CompartmentModel(
        label=ts.label, frame=ts.frame, u0=ts.u0, du=ts.du, V=V, D=np.array([tr[4] for tr in ordered]),
        sigma=np.array([tr[5] for tr in ordered]), ages=np.array([tr[1] for tr in ordered]),
        bounds=np.array([tr[2] for tr in ordered], dtype=np.int32), support=np.array([tr[6] for tr in ordered]))


def _boundary_groups(points: np.ndarray, bound: np.ndarray, age: np.ndarray) -> list[np.ndarray]:
    """The indices ``points`` grouped by dated boundary (each group in its original order), youngest first."""
    order = np.argsort(bound[points], kind="stable")
    ordered = points[order]
    starts = np.flatnonzero(np.diff(bound[ordered])) + 1
    return sorted(np.split(ordered, starts), key=lambda group: age[group[0]]) if len(points) else []


def _position_at(traces: list, age: float) -> np.ndarray:
    """Across-strike position per column at an age, linear in age between a flank's traces (ridge first)."""
    ages = np.array([tr[1] for tr in traces])
    k = int(np.clip(np.searchsorted(ages, age), 1, len(ages) - 1))
    w = (age - ages[k - 1]) / max(ages[k] - ages[k - 1], 1e-9)
    return traces[k - 1][3] + w * (traces[k][3] - traces[k - 1][3])


def _siblings(ts: TraceSet, sets: dict) -> list[tuple[TraceSet, int]]:
    """The other ridge segments of ``ts``'s ridge system, each with the sign that maps ``ts``'s flanks to its
    flanks on the same side.

    Segments offset by transforms lie on nearly the same great circle, so the poles of their strike
    circles are close (within :data:`SIBLING_MAX_POLE_ANGLE_DEG`); the same side is the side the poles
    point to, which is the other's opposite flank when its frame is turned the other way.
    """
    found = []
    for other in sets.values():
        if other is ts or other.ridge is None:
            continue
        cos = float(ts.frame.n @ other.frame.n)
        if abs(cos) >= np.cos(np.radians(SIBLING_MAX_POLE_ANGLE_DEG)):
            found.append((other, 1 if cos > 0 else -1))
    return found


def _drop_lone_picks_off_rate(sets: dict, dropped: list) -> None:
    """Drop the traces resting on a single pick whose distance from their flank's next younger trace
    disagrees with every other segment of the ridge system that has both isochrons on that flank.

    A lone pick cannot be checked against its own trace, and a mislabelled one moves the flank's dating from
    there outward (its older isochrons are borrowed from it). The same flank of the other segments (the
    same plate) gives the expected distance: theirs between the same two isochrons, scaled by the ratio of
    the flanks' widths at their other common isochrons (the rate grows with the distance from the Euler
    pole). The trace goes when at least two segments have the pair and the distance is off every one of them
    by more than a factor of :data:`LONE_PICK_RATE_FACTOR` and by more than three sigmas of the two traces.
    """
    for ts in sets.values():
        segments = _siblings(ts, sets) if ts.ridge is not None else []
        if len(segments) < 2:
            continue
        for side in (-1, 1):
            if not any(flank == side for flank, _ in ts.lone):
                continue
            own = ts.flank(side)
            ages, _, widths = ts.profile(side)
            others = [other.profile(sign * side) for other, sign in segments]
            younger, drop = 0, []
            for k, trace in enumerate(own, start=1):
                if (side, trace[1]) in ts.lone and _off_rate(ages, widths, k, younger, 3 * np.hypot(
                        trace[5], (own[younger - 1] if younger else ts.ridge)[5]) / sphere.EARTH_RADIUS_KM, others):
                    drop.append(trace)
                    rate = (widths[k] - widths[younger]) * sphere.EARTH_RADIUS_KM / max(ages[k] - ages[younger], 1e-9)
                    dropped.append({"compartment": ts.label, "boundary": trace[2], "age_ma": trace[1], "flank": side,
                                    "points": 1, "implied_half_rate_mm_yr": float(rate),
                                    "reason": "a lone pick off the other segments' rate"})
                else:
                    younger = k
            if drop:
                ts.traces = [tr for tr in ts.traces if not any(tr is d for d in drop)]
                ts.profiles.pop(side, None)


def _off_rate(ages: np.ndarray, widths: np.ndarray, k: int, j: int, noise: float, others: list) -> bool:
    """Whether the width step of a flank from its isochron ``j`` to its isochron ``k`` (``ages``, ``widths``:
    its profile, ridge first) is off the same step of every profile in ``others`` that has both isochrons, by
    more than a factor of :data:`LONE_PICK_RATE_FACTOR` and more than ``noise``, with at least two such
    profiles. Each other profile's step is scaled by the median ratio of the widths at the flank's other
    isochrons that it has."""
    gap = widths[k] - widths[j]
    mine = np.ones(len(ages), bool)
    mine[[0, k]] = False  # the ridge has no width; isochron k is on trial
    verdicts = []
    for other_ages, _, other_widths in others:
        if other_ages[-1] < ages[k]:
            continue
        at = np.interp(ages, other_ages, other_widths)
        usable = mine & (ages <= other_ages[-1]) & (at > 0)
        if not usable.any():
            continue
        expected = float(np.median(widths[usable] / at[usable])) * (at[k] - at[j])
        if expected > 0:
            verdicts.append(abs(gap - expected) > noise
                            and not expected / LONE_PICK_RATE_FACTOR <= gap <= expected * LONE_PICK_RATE_FACTOR)
    return len(verdicts) >= 2 and all(verdicts)


def _sibling_gap_fill(ts: TraceSet, side: int, siblings: list[tuple[TraceSet, int]]) -> list:
    """Traces for the isochrons a flank lacks between two of its own traces that the same flank of other
    segments of its ridge system has: each placed between its neighbours at the fraction of the width
    between them that it takes in those segments (median over them), where distance alone would assume
    one rate across the gap. Returns the new traces; their cells stay interpolated (between own control).
    """
    own = ts.flank(side)
    profiles = [sibling.profile(sibling_side) for sibling, sibling_side in siblings]
    filled = []
    for young, old in zip([ts.ridge] + own, own):
        inside: dict[int, tuple[float, list]] = {}
        for ages, bounds, widths in profiles:
            w_young, w_old = np.interp(young[1], ages, widths), np.interp(old[1], ages, widths)
            if ages[-1] < old[1] or w_old <= w_young:
                continue
            for age, bound, width in zip(ages, bounds, widths):
                if young[1] < age < old[1]:
                    inside.setdefault(bound, (age, []))[1].append((width - w_young) / (w_old - w_young))
        for bound, (age, fractions) in sorted(inside.items(), key=lambda item: item[1][0]):
            f = float(np.clip(np.median(fractions), 0.0, 1.0))
            filled.append((side, age, bound, young[3] + f * (old[3] - young[3]), np.maximum(young[4], old[4]),
                           max(young[5], old[5]), np.nan))
    return filled


def _sibling_fill(ts: TraceSet, side: int, siblings: list[tuple[TraceSet, int]]) -> list:
    """Traces for a flank whose control stops younger than that of the same flank of other segments of its
    ridge system (the same plate): their isochrons carried over as relative growth of the flank's width,
    ``width(t) = width(last) * median over siblings of w_sib(t) / w_sib(last)``.

    On one plate pair the flank widths of all segments grow alike (a common Euler pole scales them by a
    constant per segment), so this carries the plate's own changes of rate and asymmetry, which the
    conjugate flank (the other plate) does not. Returns the new traces, youngest first, marked with the
    age of the flank's oldest controlled trace (their support, see :func:`_conjugate_fill`).
    """
    own = ts.flank(side)
    if not own:
        return []
    last = own[-1][1]
    growth: dict[int, tuple[float, list]] = {}
    for sibling, sibling_side in siblings:
        ages, bounds, widths = sibling.profile(sibling_side)
        reference = np.interp(last, ages, widths)
        if ages[-1] <= last or reference <= 0:
            continue
        for age, bound, width in zip(ages, bounds, widths):
            if age > last:
                growth.setdefault(bound, (age, []))[1].append(width / reference)
    own_width = np.abs(own[-1][3] - ts.ridge[3])
    filled = []
    for bound, (age, ratios) in sorted(growth.items(), key=lambda item: item[1][0]):
        widen = own_width * (float(np.median(ratios)) - 1.0)
        filled.append((side, age, bound, own[-1][3] + side * widen, own[-1][4] + widen * sphere.EARTH_RADIUS_KM,
                       own[-1][5], last))
    return filled


def _conjugate_fill(ridge: tuple, own: list, conjugate: list, flank: int, support: float) -> list:
    """Traces for a flank whose control stops younger than its conjugate's: the conjugate's isochrons
    carried over, their spacing scaled by the ratio of the two flanks' widths from the ridge to the
    flank's oldest trace (the mean asymmetry of spreading over the common history; a window of recent
    stages would extrapolate a transient asymmetry).

    Returns the new traces, marked with ``support``, the age of the flank's oldest controlled trace; cells
    they date are flagged as extrapolated and their uncertainty grows with the age beyond that support.
    """
    if not own or not conjugate or conjugate[-1][1] <= own[-1][1]:
        return []
    conj_path = [ridge] + conjugate
    last = own[-1][1]
    own_span = np.abs(own[-1][3] - ridge[3])
    conj_span = np.abs(_position_at(conj_path, last) - ridge[3])
    ok = conj_span > 0
    ratio = float(np.clip(np.median(own_span[ok] / conj_span[ok]), 0.2, 5.0)) if ok.any() else 1.0
    base = _position_at(conj_path, last)
    filled = []
    for tr in conjugate:
        if tr[1] <= last:
            continue
        widen = ratio * np.abs(tr[3] - base)
        filled.append((flank, tr[1], tr[2], own[-1][3] + flank * widen, tr[4] + widen * sphere.EARTH_RADIUS_KM, tr[5],
                       support))
    return filled


def _filled_flanks(ts: TraceSet, sets: dict) -> list:
    """The traces a segment's flanks lack: isochrons missing between their own traces and beyond their
    own control, from the same flank of the other segments of its ridge system where they have them
    (:func:`_sibling_gap_fill`, :func:`_sibling_fill`), then from the conjugate flank (:func:`_conjugate_fill`)."""
    if ts.ridge is None:
        return []
    filled = []
    segments = _siblings(ts, sets)
    for side in (-1, 1):
        own = ts.flank(side)
        if not own:
            continue
        siblings = [(other, sign * side) for other, sign in segments]
        beyond = _sibling_fill(ts, side, siblings)
        filled += _sibling_gap_fill(ts, side, siblings) + beyond
        filled += _conjugate_fill(ts.ridge, own + beyond, ts.flank(-side), side, own[-1][1])
    return filled


def _extent_samples(spec, compartments) -> dict[int, np.ndarray]:
    """Unit vectors of a decimated sample of each compartment's cells, to size its ``u`` axis."""
    rows, cols, labels = compartments.sample
    x, y, z = block_xyz(spec, rows, cols)
    return {int(k): np.stack([x[m], y[m], z[m]], -1) for k in np.unique(labels) if k > 0 for m in [labels == k]}


def build_age_model(spec, compartments, control, settings: Settings) -> AgeModel:
    """Fit the per-compartment trace models from the dated control.

    Parameters
    ----------
    spec : GridSpec
    compartments : Compartments
    control : ControlSet
    settings : Settings
    """
    where = compartments.assign(spec, control.lon, control.lat)
    # picks within three sigmas of a barrier may lie on its other side
    ambiguous = control.kind == 2
    ambiguous[ambiguous] = compartments.near_barrier(spec, control.lon[ambiguous], control.lat[ambiguous],
                                                     3 * float(np.max(control.sigma_km[ambiguous], initial=0.0)))
    xyz = control.xyz
    extents = _extent_samples(spec, compartments)
    spacing_rad = np.radians(spec.spacing) if spec.geographic else spec.spacing / (sphere.EARTH_RADIUS_KM * 1e3)
    sets, dropped, outliers = {}, [], []
    for label in range(1, compartments.count + 1):
        sel = np.flatnonzero(where == label)
        if not len(sel):
            continue
        local = []
        traces = _compartment_traces(label, xyz[sel], control.age[sel], control.boundary[sel], control.kind[sel],
                                     control.sigma_km[sel], ambiguous[sel], extents.get(label), spacing_rad, settings,
                                     dropped, local)
        outliers.extend(int(sel[i]) for i in local)
        if traces is not None:
            sets[label] = traces
    _drop_lone_picks_off_rate(sets, dropped)
    models = {label: model for label, ts in sets.items()
              for model in [_assemble(ts, _filled_flanks(ts, sets))] if model is not None}
    if outliers:
        log.info("%d control points disagree with their isochron trace and were left out", len(outliers))
    for item in dropped:
        log.info("compartment %d: dropped trace of %.3f Ma on flank %+d (%d points, implied half-rate %.1f mm/yr): %s",
                 item["compartment"], item["age_ma"], item["flank"], item["points"], item["implied_half_rate_mm_yr"],
                 item["reason"])
    return AgeModel(models, settings, list(control.boundaries.labels), np.asarray(control.boundaries.ages), dropped,
                    np.asarray(sorted(outliers), dtype=np.int64), where)


# --- the kernel --------------------------------------------------------------------------------------
@dataclass
class PackedModel:
    """The compartment models packed into flat arrays indexed by compartment label, for the kernel."""

    has: np.ndarray
    frames: np.ndarray
    w0: np.ndarray
    dw: np.ndarray
    ncol: np.ndarray
    ntrace: np.ndarray
    voff: np.ndarray
    toff: np.ndarray
    ridge: np.ndarray
    V: np.ndarray
    D: np.ndarray
    ages: np.ndarray
    bounds: np.ndarray
    sigma: np.ndarray
    support: np.ndarray
    borrows: np.ndarray

    @classmethod
    def pack(cls, model: AgeModel) -> "PackedModel":
        n = max(model.compartments, default=0) + 1
        has = np.zeros(n, np.bool_)
        frames = np.zeros((n, 3, 3))
        w0, dw = np.zeros(n), np.ones(n)
        ncol, ntrace, voff, toff = (np.zeros(n, np.int64) for _ in range(4))
        ridge = np.full(n, -1, np.int64)
        borrows = np.zeros(n, np.bool_)
        V, D, ages, bounds, sigma, support = [], [], [], [], [], []
        v_at, t_at = 0, 0
        for label, m in sorted(model.compartments.items()):
            has[label] = True
            frames[label] = np.stack([m.frame.c, m.frame.e_u, m.frame.n])
            w0[label], dw[label], ncol[label], ntrace[label] = m.u0, m.du, m.ncol, len(m.ages)
            voff[label], toff[label] = v_at, t_at
            at_ridge = np.flatnonzero((m.ages == 0) & (m.bounds == 0))
            ridge[label] = at_ridge[0] if len(at_ridge) else -1
            V.append(m.V.ravel())
            D.append(m.D.ravel())
            ages.append(m.ages)
            bounds.append(m.bounds)
            sigma.append(m.sigma)
            support.append(m.support)
            borrows[label] = bool(np.isfinite(m.support).any())
            v_at += m.V.size
            t_at += len(m.ages)

        def join(parts, dtype):
            return np.concatenate(parts).astype(dtype) if parts else np.zeros(1, dtype)

        return cls(has, frames, w0, dw, ncol, ntrace, voff, toff, ridge, join(V, np.float64), join(D, np.float64),
                   join(ages, np.float64), join(bounds, np.float64), join(sigma, np.float64),
                   join(support, np.float64), borrows)


FLAGS = np.array([FLAG_INTERPOLATED, FLAG_EXTRAPOLATED, FLAG_OUTSIDE, FLAG_NO_CONTROL, FLAG_TOO_FAR], np.float64)


def evaluate_block(packed: PackedModel, settings: Settings, labels: np.ndarray, domain: np.ndarray,
                   factors: tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray], run: str = "dating",
                   dated: dict[str, np.ndarray] | None = None) -> np.ndarray:
    """The layers of one pass (:data:`PASSES`) over one block of cells, stacked: shape (layers, rows, columns),
    float32, in the order of :data:`LAYERS_OF`.

    ``factors`` are the block's unit-vector factors (:func:`block_factors`). ``dated``, the dating part's
    layers of the block (read back from a cache), leaves the pass only the motion part to compute.
    """
    from agegrid.age_kernel import evaluate

    planes = np.empty((len(LAYERS_OF[run]),) + labels.shape, dtype=np.float32)
    split = len(PARTS["dating"]) if run != "motion" else 0
    part = PASSES[run]
    if dated is not None:
        for k, name in enumerate(PARTS["dating"]):
            planes[k] = dated[name]
        part = MOTION
    p = packed
    evaluate(*factors, np.ascontiguousarray(labels), np.ascontiguousarray(domain, dtype=np.bool_), p.has,
             p.frames, p.w0, p.dw, p.ncol, p.ntrace, p.voff, p.toff, p.ridge, p.V, p.D, p.ages, p.bounds, p.sigma,
             p.support, p.borrows,
             float(settings.max_extrapolation_myr), float(settings.timescale_sigma_percent) / 100.0,
             GROWTH_PER_KM, EXTRAPOLATION_FRACTION, FLAGS, part, planes[:split], planes[split:])
    return planes


def block_factors(spec, rows, cols) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Factors ``(scale, fx, fy, fz)`` of the unit vectors ``(scale fx, scale fy, fz)`` of a window's or a
    sub-grid's cell centres (slices or index arrays), as 2-D arrays of the window's shape.

    On a geographic grid the trigonometry is separable: ``scale = cos(lat)`` and ``fz = sin(lat)`` vary by
    row only and ``fx, fy = cos(lon), sin(lon)`` by column only, so they are broadcast views of 1-D arrays
    (nothing of the window's size is computed or stored); on a projected grid ``scale`` is 1.
    """
    if spec.geographic:
        lam, phi = np.radians(spec.x[cols]), np.radians(spec.y[rows])
        shape = (len(phi), len(lam))
        return (np.broadcast_to(np.cos(phi)[:, None], shape), np.broadcast_to(np.cos(lam)[None, :], shape),
                np.broadcast_to(np.sin(lam)[None, :], shape), np.broadcast_to(np.sin(phi)[:, None], shape))
    lon, lat = spec.lonlat(rows, cols)
    xyz = sphere.to_xyz(lon, lat)
    return np.broadcast_to(np.ones(()), lon.shape), xyz[..., 0], xyz[..., 1], xyz[..., 2]


def block_xyz(spec, rows, cols) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Unit-vector components of a window's or a sub-grid's cell centres (see :func:`block_factors`)."""
    scale, fx, fy, fz = block_factors(spec, rows, cols)
    return scale * fx, scale * fy, np.array(fz)


def age_layers(spec, compartments, model: AgeModel, cache=None, names: tuple[str, ...] = LAYERS,
               keys_in_tasks: bool = False, dtypes: dict | None = None) -> dict[str, da.Array]:
    """The age-engine layers ``names`` (default: all) as lazy dask arrays, chunked like the grid: the arrays
    of :func:`age_planes` (same arguments)."""
    return {name: plane.array() for name, plane in age_planes(spec, compartments, model, cache, names,
                                                              keys_in_tasks, dtypes).items()}


def age_planes(spec, compartments, model: AgeModel, cache=None, names: tuple[str, ...] = LAYERS,
               keys_in_tasks: bool = False, dtypes: dict | None = None) -> dict[str, Plane]:
    """The age-engine layers ``names`` (default: all) as planes of one lazy stack blocked like the grid:
    float32, or the type ``dtypes`` gives a layer.

    One task per block runs the kernel's pass for the parts the layers need: the age stage alone computes
    only the dating part; the kinematic layers with it take both parts in one pass. With a
    :class:`~agegrid.cache.BlockCache`, the dating part of blocks whose inputs are unchanged is read back
    from the last build's file, and the rest is computed. When that file cannot serve blocks and
    ``keys_in_tasks`` (the tasks run in this process), each task records its block's key for the next build
    with the labels it reads anyway, instead of all keys being computed beforehand.
    """
    parts = {PART_OF[name] for name in names}
    run = "both" if len(parts) > 1 else parts.pop()
    chunks = spec.chunks
    # tasks named by one random token: dask would otherwise pickle the model and the labels to hash them
    token = uuid.uuid4().hex
    packed = PackedModel.pack(model)
    settings = model.settings

    def block_key(location, labels, domain, factors):
        span = column_span(*factors, labels, packed.has, packed.frames, packed.w0, packed.dw)
        return cache.key(packed, settings, (*location, chunks), labels, domain, span)

    recording = cache is not None and keys_in_tasks and not cache.can_serve(chunks)
    if cache is not None:
        rows, cols = spec.block_sizes
        r_edges, c_edges = np.cumsum((0,) + rows), np.cumsum((0,) + cols)
        blocks = [(i, j) for i in range(len(rows)) for j in range(len(cols))]
        cache.blocks = len(blocks)

        def key(ij):
            i, j = ij
            window = (slice(r_edges[i], r_edges[i + 1]), slice(c_edges[j], c_edges[j + 1]))
            return block_key(ij, *compartments.window(*window), block_factors(spec, *window))

        if not recording:
            with ThreadPoolExecutor(os.cpu_count() or 1) as pool:  # hashing releases the GIL
                cache.plan(dict(zip(blocks, pool.map(key, blocks))), chunks)

    def block(block_info=None):
        info = block_info[None]
        _, (r0, r1), (c0, c1) = info["array-location"]
        window, location = (slice(r0, r1), slice(c0, c1)), tuple(info["chunk-location"][1:])
        stored = None
        if cache is not None and run != "motion":  # only the dating part is read back; motion is computed
            stored = cache.load(location, window, LAYERS_OF["dating"])
            if stored is not None and run == "dating":
                return np.stack([stored[name] for name in LAYERS_OF[run]]).astype(np.float32, copy=False)
        labels, domain = compartments.window(*window)
        factors = block_factors(spec, *window)
        if recording:
            cache.record(location, block_key(location, labels, domain, factors))
        return evaluate_block(packed, settings, labels, domain, factors, run, stored)

    stacks = da.map_blocks(block, dtype=np.float32, chunks=((len(LAYERS_OF[run]),),) + spec.block_sizes,
                           meta=np.empty((0, 0, 0), np.float32), name=f"age-engine-{run}-{token}")
    return {name: Plane(name, stacks, LAYERS_OF[run].index(name), np.dtype((dtypes or {}).get(name, np.float32)))
            for name in names}
