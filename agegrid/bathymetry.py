"""Observed depth: elevation or depth detected from attributes and sign, positive down."""
from __future__ import annotations

from typing import Callable

import numpy as np

DEPTH_WORDS = ("depth", "bathymetry_depth")
ELEVATION_WORDS = ("elevation", "height", "altitude", "topography", "surface_height")


def depth_sign(attrs: dict, mode: str = "auto", values: Callable[[], np.ndarray] | None = None) -> tuple[bool, str]:
    """Whether a bathymetry grid holds depth (positive down) rather than elevation, and a sentence saying why.

    Parameters
    ----------
    attrs : dict
        The grid's attributes (``standard_name``, ``long_name``, ``positive``, the variable name).
    mode : {"auto", "depth", "elevation"}
        ``auto`` decides from the attributes, then from the sign of the median.
    values : callable, optional
        Returns the grid; called only when neither ``mode`` nor the attributes decide.
    """
    if mode == "depth":
        return True, "bathymetry read as depth (positive down), as set by depth.bathymetry_sign"
    if mode == "elevation":
        return False, "bathymetry read as elevation (negative down), as set by depth.bathymetry_sign"
    positive = str(attrs.get("positive", "")).lower()
    if positive in ("down", "up"):
        is_depth = positive == "down"
        why = f"its 'positive' attribute is {positive!r}"
    else:
        words = " ".join(str(attrs.get(k, "")) for k in ("standard_name", "long_name", "variable")).lower()
        if any(w in words for w in ELEVATION_WORDS):
            is_depth, why = False, "its name/attributes say elevation"
        elif any(w in words for w in DEPTH_WORDS):
            is_depth, why = True, "its name/attributes say depth"
        else:
            median = float(np.nanmedian(values()))
            is_depth = median > 0
            why = f"no attribute says; the median value {median:.0f} is {'positive' if is_depth else 'negative'}"
    kind = "depth (positive down)" if is_depth else "elevation (negative down)"
    return is_depth, f"bathymetry read as {kind}: {why}"
