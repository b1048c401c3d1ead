"""Residual depth, age-binned statistics and a least-squares fit of depth against sqrt(age)."""
from __future__ import annotations

import numpy as np


def residual(predicted, corrected):
    """Predicted minus sediment-corrected observed depth (m): positive where the sea floor is shallower."""
    return predicted - corrected


def binned_statistics(age: np.ndarray, values: np.ndarray, bin_myr: float) -> list[dict]:
    """Cell count, median and interquartile range of ``values`` per age bin."""
    ok = np.isfinite(age) & np.isfinite(values)
    age, values = age[ok], values[ok]
    rows = []
    if not len(age):
        return rows
    top = np.ceil(age.max() / bin_myr) * bin_myr
    for lo in np.arange(0.0, top, bin_myr):
        sel = (age >= lo) & (age < lo + bin_myr)
        if sel.any():
            q1, med, q3 = np.percentile(values[sel], [25, 50, 75])
            rows.append({"age_from_myr": float(lo), "age_to_myr": float(lo + bin_myr), "cells": int(sel.sum()),
                         "median_m": float(med), "iqr_m": float(q3 - q1)})
    return rows


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
