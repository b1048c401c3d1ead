"""Residual depth, age-binned statistics and a least-squares fit of depth against sqrt(age)."""
from __future__ import annotations

import numpy as np
from scipy.stats import linregress

from agegrid.grouped import Groups


def residual(predicted, corrected):
    """Predicted minus sediment-corrected observed depth (m): positive where the sea floor is shallower."""
    return predicted - corrected


class AgeBins:
    """Cells grouped by age bin once, for the statistics of several layers over the same ages."""

    def __init__(self, age: np.ndarray, bin_myr: float):
        age = np.asarray(age).ravel()
        cells = np.flatnonzero(np.isfinite(age))
        bins = np.floor(age[cells] / bin_myr).astype(np.int64)
        self.lowest = int(bins.min()) if len(bins) else 0
        self.groups, self.bin_myr = Groups(bins - self.lowest, cells), bin_myr

    def statistics(self, values: np.ndarray) -> list[dict]:
        """Cell count, median and interquartile range of the finite ``values`` per age bin that has any."""
        counts, quartiles = self.groups.quantiles(values, (25, 50, 75))
        rows = []
        for code, count, (low, mid, high) in zip(self.groups.codes, counts, quartiles):
            if count:
                lo = float((code + self.lowest) * self.bin_myr)
                rows.append({"age_from_myr": lo, "age_to_myr": float(lo + self.bin_myr), "cells": int(count),
                             "median_m": float(mid), "iqr_m": float(high - low)})
        return rows


def binned_statistics(age: np.ndarray, values: np.ndarray, bin_myr: float) -> list[dict]:
    """Cell count, median and interquartile range of ``values`` per age bin."""
    return AgeBins(age, bin_myr).statistics(values)


def fit_sqrt_age(age: np.ndarray, depth: np.ndarray, age_range: tuple[float, float]) -> dict | None:
    """Least-squares fit of depth = d_r + a sqrt(age) over an age range, with 1-sigma uncertainties
    (:func:`scipy.stats.linregress` on sqrt(age), in float64)."""
    ok = np.isfinite(age) & np.isfinite(depth) & (age >= age_range[0]) & (age <= age_range[1])
    if ok.sum() < 3:
        return None
    x, y = np.sqrt(age[ok], dtype=np.float64), np.asarray(depth[ok], dtype=np.float64)
    if np.ptp(x) == 0:
        return None
    line = linregress(x, y)
    resid = y - (line.intercept + line.slope * x)
    return {"ridge_depth_m": float(line.intercept), "ridge_depth_sigma_m": float(line.intercept_stderr),
            "sqrt_coefficient_m": float(line.slope), "sqrt_coefficient_sigma_m": float(line.stderr),
            "rms_m": float(np.sqrt(resid @ resid / (len(y) - 2))), "cells": int(ok.sum()),
            "age_range_myr": list(age_range)}
