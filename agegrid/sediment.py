"""Sediment unloading: Airy isostasy with exponential porosity-depth compaction.

Porosity phi(z) = phi0 exp(-c z) (Athy's law as fitted by Sclater & Christie 1980, J. Geophys. Res.
85, 3711-3739). Over a column of thickness h the mean porosity is phi0 (1 - exp(-c h)) / (c h), so the
column-mean density is rho_s = phi_mean rho_w + (1 - phi_mean) rho_g, and the unloaded basement lies
deeper than the sea floor by

    correction = h (rho_m - rho_s) / (rho_m - rho_w)

which is added to the observed depth (positive down) to give the sediment-corrected depth.
"""
from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np


@dataclass(frozen=True)
class Lithology:
    """Compaction parameters of a sediment type and the densities used for unloading."""

    name: str
    surface_porosity: float
    compaction_per_km: float
    grain_density: float
    reference: str
    mantle_density: float = 3330.0
    water_density: float = 1030.0

    def mean_density(self, thickness_m) -> np.ndarray:
        """Column-mean bulk density (kg m-3) of a water-saturated column of the given thickness."""
        h = np.asarray(thickness_m, float) / 1e3
        ch = self.compaction_per_km * h
        with np.errstate(invalid="ignore", divide="ignore"):
            mean_phi = np.where(ch > 1e-9, self.surface_porosity * -np.expm1(-ch) / np.where(ch > 1e-9, ch, 1),
                                self.surface_porosity)
        return mean_phi * self.water_density + (1 - mean_phi) * self.grain_density

    def correction(self, thickness_m) -> np.ndarray:
        """Metres to add to the observed depth to unload the sediment (NaN where thickness is NaN)."""
        h = np.maximum(np.asarray(thickness_m, float), 0.0)
        return h * (self.mantle_density - self.mean_density(h)) / (self.mantle_density - self.water_density)


_SC80 = "Sclater, J.G. & Christie, P.A.F. (1980) J. Geophys. Res. 85, 3711-3739, table 2 (values from memory)"

#: Presets. ``deep_sea`` uses the shale parameters, the usual choice for fine pelagic sediment
#: (common practice).
LITHOLOGIES = {
    "deep_sea": Lithology("deep_sea", 0.63, 0.51, 2720.0, _SC80 + "; shale parameters, common practice for deep-sea sediment"),
    "shale": Lithology("shale", 0.63, 0.51, 2720.0, _SC80),
    "sandstone": Lithology("sandstone", 0.49, 0.27, 2650.0, _SC80),
    "chalk": Lithology("chalk", 0.70, 0.71, 2710.0, _SC80),
    "shaly_sandstone": Lithology("shaly_sandstone", 0.56, 0.39, 2680.0, _SC80),
}


def lithology_from_config(section) -> Lithology:
    """The preset named in ``[sediment]``, with any parameter it overrides."""
    base = LITHOLOGIES[section.lithology]
    overrides = {k: v for k, v in (("surface_porosity", section.surface_porosity),
                                   ("compaction_per_km", section.compaction_per_km),
                                   ("grain_density", section.grain_density)) if v is not None}
    return replace(base, **overrides) if overrides else base
