"""Residual depth, age-binned statistics and a least-squares fit of depth against sqrt(age)."""
from __future__ import annotations

import numpy as np


def residual(predicted, corrected):
    """Predicted minus sediment-corrected observed depth (m): positive where the sea floor is shallower."""
    return predicted - corrected


class AgeBins:
    """Cells grouped by age bin once (one sort), for the statistics of several layers over the same ages."""

    def __init__(self, age: np.ndarray, bin_myr: float):
        age = np.asarray(age).ravel()
        cells = np.flatnonzero(np.isfinite(age))
        bins = np.floor(age[cells] / bin_myr).astype(np.int64)
        if len(bins) and bins.max() < np.iinfo(np.int16).max:
            bins = bins.astype(np.int16)  # numpy sorts 16-bit integers by radix
        order = np.argsort(bins, kind="stable")
        self.cells, self.bin_myr = cells[order], bin_myr
        self.numbers, self.starts = np.unique(bins[order], return_index=True)

    def statistics(self, values: np.ndarray) -> list[dict]:
        """Cell count, median and interquartile range of the finite ``values`` per age bin that has any."""
        grouped = np.asarray(values).ravel()[self.cells]
        rows = []
        for number, start, stop in zip(self.numbers, self.starts, np.r_[self.starts[1:], len(grouped)]):
            part = grouped[start:stop]
            part = part[np.isfinite(part)]
            if part.size:
                q1, med, q3 = np.percentile(part, [25, 50, 75])
                lo = float(number * self.bin_myr)
                rows.append({"age_from_myr": lo, "age_to_myr": float(lo + self.bin_myr), "cells": int(part.size),
                             "median_m": float(med), "iqr_m": float(q3 - q1)})
        return rows


def binned_statistics(age: np.ndarray, values: np.ndarray, bin_myr: float) -> list[dict]:
    """Cell count, median and interquartile range of ``values`` per age bin."""
    return AgeBins(age, bin_myr).statistics(values)


def fit_sqrt_age(age: np.ndarray, depth: np.ndarray, age_range: tuple[float, float]) -> dict | None:
    """Least-squares fit of depth = d_r + a sqrt(age) over an age range, with 1-sigma uncertainties."""
    ok = np.isfinite(age) & np.isfinite(depth) & (age >= age_range[0]) & (age <= age_range[1])
    if ok.sum() < 3:
        return None
    x, y = np.sqrt(age[ok]), depth[ok]
    design = np.stack([np.ones_like(x), x], -1)
    coef = np.linalg.lstsq(design, y, rcond=None)[0]
    dof = max(1, len(y) - 2)
    resid = y - design @ coef
    s2 = float(resid @ resid) / dof
    cov = s2 * np.linalg.inv(design.T @ design)
    return {"ridge_depth_m": float(coef[0]), "ridge_depth_sigma_m": float(np.sqrt(cov[0, 0])),
            "sqrt_coefficient_m": float(coef[1]), "sqrt_coefficient_sigma_m": float(np.sqrt(cov[1, 1])),
            "rms_m": float(np.sqrt(s2)), "cells": int(ok.sum()), "age_range_myr": list(age_range)}
