"""Per-segment rate tables: median half-rate, full rate and asymmetry by flank and age band.

The kinematic layers themselves (half-rate, azimuth, flank, full rate, asymmetry) come out of the
age kernel, from the same bracketing traces as the age (see :mod:`agegrid.age_kernel`).
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
    comp, fl, age, hr = compartment[ok], flank[ok], age[ok], half_rate[ok]
    fr, asym, az = full_rate[ok], asymmetry[ok], azimuth[ok]
    band = np.floor(age / band_myr).astype(np.int64)
    rows = []
    for seg in np.unique(comp):
        for side in (-1, 1):
            on = (comp == seg) & (fl == side)
            if not on.any():
                continue
            heading = round(_circular_mean(az[on]), 1)
            for b in np.unique(band[on]):
                sel = on & (band == b)
                both = sel & np.isfinite(fr)
                rows.append({"segment": int(seg), "flank": int(side), "flank_azimuth_deg": heading,
                             "age_from_myr": round(b * band_myr, 6), "age_to_myr": round((b + 1) * band_myr, 6),
                             "cells": int(sel.sum()), "half_rate_mm_yr": round(float(np.median(hr[sel])), 3),
                             "full_rate_mm_yr": round(float(np.median(fr[both])), 3) if both.any() else "",
                             "asymmetry_percent": round(float(np.median(asym[both])), 2) if both.any() else "",
                             "full_rate_cells": int(both.sum())})
    return rows


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
