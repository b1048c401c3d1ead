"""Per-segment rate tables: median half-rate, full rate and asymmetry by flank and age band.

The kinematic layers themselves (half-rate, azimuth, flank, full rate, asymmetry) come out of the
age kernel's motion part, from the same bracketing traces as the age (see :mod:`agegrid.age_kernel`).
"""
from __future__ import annotations

import csv
import io

import numpy as np

COLUMNS = ("segment", "flank", "flank_azimuth_deg", "age_from_myr", "age_to_myr", "cells", "half_rate_mm_yr",
           "full_rate_mm_yr", "asymmetry_percent", "full_rate_cells")


def _circular_mean(degrees: np.ndarray) -> float:
    rad = np.radians(degrees)
    return float(np.degrees(np.arctan2(np.sin(rad).mean(), np.cos(rad).mean())) % 360)


def rate_rows(compartment, flank, age, half_rate, full_rate, asymmetry, azimuth, band_myr: float) -> list[dict]:
    """Rows of the rate table from flattened layers; segments are compartments (see the ``compartment`` layer)."""
    ok = np.isfinite(age) & np.isfinite(half_rate) & (flank != 0)
    band = np.floor(age[ok] / band_myr).astype(np.int64)
    order = np.lexsort((band, flank[ok], compartment[ok]))  # one sort: groups by segment, flank, band
    comp, fl, band = compartment[ok][order], flank[ok][order], band[order]
    hr, fr, asym, az = (a[ok][order] for a in (half_rate, full_rate, asymmetry, azimuth))
    side_starts = _starts(comp, fl)
    group_starts = _starts(comp, fl, band)
    rows = []
    for s0, s1 in zip(side_starts, np.r_[side_starts[1:], len(comp)]):
        heading = round(_circular_mean(az[s0:s1]), 1)
        inside = group_starts[(group_starts >= s0) & (group_starts < s1)]
        for g0, g1 in zip(inside, np.r_[inside[1:], s1]):
            finite = np.isfinite(fr[g0:g1])
            b = band[g0]
            rows.append({"segment": int(comp[g0]), "flank": int(fl[g0]), "flank_azimuth_deg": heading,
                         "age_from_myr": round(b * band_myr, 6), "age_to_myr": round((b + 1) * band_myr, 6),
                         "cells": int(g1 - g0), "half_rate_mm_yr": round(float(np.median(hr[g0:g1])), 3),
                         "full_rate_mm_yr": round(float(np.median(fr[g0:g1][finite])), 3) if finite.any() else "",
                         "asymmetry_percent": round(float(np.median(asym[g0:g1][finite])), 2) if finite.any() else "",
                         "full_rate_cells": int(finite.sum())})
    return rows


def _starts(*keys: np.ndarray) -> np.ndarray:
    """Where a run of equal keys starts in arrays sorted by those keys."""
    if not len(keys[0]):
        return np.zeros(0, np.int64)
    change = np.zeros(len(keys[0]), bool)
    change[0] = True
    for key in keys:
        change[1:] |= key[1:] != key[:-1]
    return np.flatnonzero(change)


RATE_LAYERS = ("compartment", "flank", "age", "half_rate", "full_rate", "asymmetry", "spreading_azimuth")


def rate_table(layers: dict, stride: int, band_myr: float) -> str:
    """The rates CSV text from flattened layers read every ``stride``-th row and column (counts scaled)."""
    rows = rate_rows(layers["compartment"], layers["flank"], layers["age"], layers["half_rate"], layers["full_rate"],
                     layers["asymmetry"], layers["spreading_azimuth"], band_myr)
    for row in rows:
        row["cells"] *= stride**2
        row["full_rate_cells"] *= stride**2
        row["sampled_every"] = stride
    buffer = io.StringIO()
    writer = csv.DictWriter(buffer, COLUMNS + ("sampled_every",), lineterminator="\n")
    writer.writeheader()
    writer.writerows(rows)
    return buffer.getvalue()
