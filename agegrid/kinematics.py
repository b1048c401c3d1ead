"""Per-segment rate tables: median half-rate, full rate and asymmetry by flank and age band.

The kinematic layers themselves (half-rate, azimuth, flank, full rate, asymmetry) come out of the
age kernel's motion part, from the same bracketing traces as the age (see :mod:`agegrid.age_kernel`).
"""
from __future__ import annotations

import csv
import io

import numpy as np

from agegrid.grouped import Groups

COLUMNS = ("segment", "flank", "flank_azimuth_deg", "age_from_myr", "age_to_myr", "cells", "half_rate_mm_yr",
           "full_rate_mm_yr", "asymmetry_percent", "full_rate_cells")


def rate_rows(compartment, flank, age, half_rate, full_rate, asymmetry, azimuth, band_myr: float) -> list[dict]:
    """Rows of the rate table from flattened layers; segments are compartments (see the ``compartment`` layer).

    Rows run by segment, flank (-1 first) and age band; a flank's azimuth is the circular mean over its cells.
    """
    cells = np.flatnonzero(np.isfinite(age) & np.isfinite(half_rate) & (flank != 0))
    if not len(cells):
        return []
    band = np.floor(age[cells] / band_myr).astype(np.int64)
    segment = compartment[cells].astype(np.int64)
    lowest_segment, lowest_band = int(segment.min()), int(band.min())
    bands = int(band.max()) - lowest_band + 1
    side = (segment - lowest_segment) * 2 + (flank[cells] > 0)
    groups = Groups(side * bands + band - lowest_band, cells)
    side_of_group = groups.codes // bands
    rad = np.radians(azimuth[groups.cells], dtype=np.float32)  # float32: headings are rounded to 0.1 degree
    east, north = (np.bincount(side_of_group, np.add.reduceat(f(rad), groups.starts, dtype=np.float64))
                   for f in (np.sin, np.cos))
    headings = np.round(np.degrees(np.arctan2(east, north)) % 360, 1)
    count, half = groups.quantiles(half_rate, (50,))
    full_count, full = groups.quantiles(full_rate, (50,))
    _, asym = groups.quantiles(np.where(np.isfinite(full_rate), asymmetry, np.nan), (50,))
    rows = []
    for g, code in enumerate(groups.codes.tolist()):
        s, b = divmod(code, bands)
        b += lowest_band
        rows.append({"segment": s // 2 + lowest_segment, "flank": 1 if s % 2 else -1,
                     "flank_azimuth_deg": float(headings[s]), "age_from_myr": round(b * band_myr, 6),
                     "age_to_myr": round((b + 1) * band_myr, 6), "cells": int(count[g]),
                     "half_rate_mm_yr": round(float(half[g, 0]), 3),
                     "full_rate_mm_yr": round(float(full[g, 0]), 3) if full_count[g] else "",
                     "asymmetry_percent": round(float(asym[g, 0]), 2) if full_count[g] else "",
                     "full_rate_cells": int(full_count[g])})
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
