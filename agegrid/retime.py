"""Re-express a chron-dated age grid in another timescale without regridding.

Each cell keeps the indices of its two bracketing boundaries and its fraction between them, so its
age in another timescale is t'_young + f (t'_old - t'_young), with every boundary's age looked up by
its chron label in the new scale. Half-rates scale by the ratio of the bracket age spans.
"""
from __future__ import annotations

import numpy as np
import xarray as xr

from agegrid.control import RIDGE_LABEL
from agegrid.errors import BadInput

KEPT = ("age", "age_uncertainty", "age_flag", "age_bracket_young", "age_bracket_old", "age_fraction",
        "half_rate", "spreading_azimuth", "compartment", "flank", "crs")


def boundary_ages(labels: list[str], scale, source=None, named_in=None) -> tuple[np.ndarray, list[str]]:
    """Ages of boundary labels in a timescale, and warnings for labels whose meaning differs.

    A chron end means the boundary between two intervals; when the timescale the grid was built in
    (``named_in``) puts other intervals on either side of it than ``scale`` does (CK95's C1r.2r ends at
    C2n, GTS2012's at C1r.2n), the label is retimed as ``scale`` defines it, with a warning.
    """
    ages, warnings = [], []
    for label in labels:
        if label == RIDGE_LABEL:
            ages.append(0.0)
            continue
        if label.startswith("age:"):
            raise BadInput("the grid was built from picks dated by age_ma, not by chron: it cannot be retimed "
                           "(rebuild it from chron-labelled picks)", source, "age_bracket_young.boundary_labels")
        chron, _, edge = label.partition(":")
        try:
            ages.append(scale.boundary(chron, edge))
        except KeyError as exc:
            raise BadInput(f"boundary {label}: {exc.args[0]}", source, "age_bracket_young.boundary_labels") from None
        if named_in is not None:
            try:
                before = named_in.neighbours(chron, edge)
            except KeyError:
                continue
            after = scale.neighbours(chron, edge)
            if before != after:
                warnings.append(f"{label} lies between {before[0]} and {before[1]} in {named_in.name} but between "
                                f"{after[0]} and {after[1]} in {scale.name}: retimed as {scale.name} defines it")
    return np.asarray(ages), warnings


def retime_dataset(ds: xr.Dataset, scale, source=None) -> tuple[xr.Dataset, list[str]]:
    """The age layers of a built dataset under another timescale."""
    for name in ("age_bracket_young", "age_bracket_old", "age_fraction"):
        if name not in ds:
            raise BadInput(f"not an agegrid age grid: variable {name!r} is missing", source)
    labels = ds["age_bracket_young"].attrs.get("boundary_labels", "").split()
    old_ages = np.asarray(ds["age_bracket_young"].attrs.get("boundary_ages_ma"), dtype=float)
    from agegrid import timescale as timescales

    built_in = str(ds.attrs.get("timescale", "")).upper()
    named_in = timescales.load(built_in) if built_in in timescales.BUNDLED else None
    new_ages, warnings = boundary_ages(labels, scale, source, named_in)
    young = ds["age_bracket_young"].fillna(-1).values.astype(np.int64)
    older = ds["age_bracket_old"].fillna(-1).values.astype(np.int64)
    frac = ds["age_fraction"].values.astype(np.float64)
    valid = (young >= 0) & (older >= 0) & np.isfinite(frac)
    y, o = np.where(valid, young, 0), np.where(valid, older, 0)
    age = np.where(valid, new_ages[y] + frac * (new_ages[o] - new_ages[y]), np.nan)
    span_old = np.abs(old_ages[o] - old_ages[y])
    span_new = np.abs(new_ages[o] - new_ages[y])
    with np.errstate(invalid="ignore", divide="ignore"):
        ratio = np.where(span_old > 0, span_new / span_old, 1.0)
    out = ds[[v for v in KEPT if v in ds]].copy()
    out["age"].values = age.astype(np.float32)  # the type a build stores
    if "age_uncertainty" in out:
        out["age_uncertainty"].values = (ds["age_uncertainty"].values * ratio).astype(np.float32)
    if "half_rate" in out:
        with np.errstate(invalid="ignore", divide="ignore"):
            out["half_rate"].values = np.where(ratio > 0, ds["half_rate"].values / ratio, np.nan).astype(np.float32)
    for name in ("age_bracket_young", "age_bracket_old"):
        out[name].attrs["boundary_ages_ma"] = new_ages
    out["age"].attrs["timescale"] = scale.name
    out.attrs["timescale"] = scale.name
    out.attrs["history"] = (ds.attrs.get("history", "") + f"\nretimed from {ds.attrs.get('timescale')} to "
                            f"{scale.name} by agegrid retime (no regridding)").strip()
    return out, warnings
