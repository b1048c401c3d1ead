"""Residual depth, age-binned statistics and a least-squares fit of depth against sqrt(age)."""
from __future__ import annotations

import numpy as np

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
    """Least-squares fit of depth = d_r + a sqrt(age) over an age range, with 1-sigma uncertainties.

    Ordinary least squares on sqrt(age) in closed form, in float64 about the means: slope Sxy / Sxx, residual
    variance s^2 = SSR / (n - 2), sigma(a) = s / sqrt(Sxx), sigma(d_r) = s sqrt(1/n + mean(x)^2 / Sxx) (the
    standard results, from memory; the tests hold them to numpy.polyfit's covariance). scipy.stats.linregress
    gives the same, but importing scipy.stats costs a process about 0.5 s.
    """
    ok = np.isfinite(age) & np.isfinite(depth) & (age >= age_range[0]) & (age <= age_range[1])
    n = int(ok.sum())
    if n < 3:
        return None
    x, y = np.sqrt(age[ok], dtype=np.float64), np.asarray(depth[ok], dtype=np.float64)
    if np.ptp(x) == 0:
        return None
    x_mean, y_mean = x.mean(), y.mean()
    dx = x - x_mean
    sxx = dx @ dx
    slope = (dx @ (y - y_mean)) / sxx
    intercept = y_mean - slope * x_mean
    resid = y - (intercept + slope * x)
    s2 = (resid @ resid) / (n - 2)
    return {"ridge_depth_m": float(intercept), "ridge_depth_sigma_m": float(np.sqrt(s2 * (1 / n + x_mean**2 / sxx))),
            "sqrt_coefficient_m": float(slope), "sqrt_coefficient_sigma_m": float(np.sqrt(s2 / sxx)),
            "rms_m": float(np.sqrt(s2)), "cells": n, "age_range_myr": list(age_range)}
