"""Metadata of every output variable (CF attributes), in one place.

Units follow UDUNITS: ages in ``Myr`` (never ``Ma``, which UDUNITS reads as mega-are), rates in
``mm yr-1`` (= km/Myr), heat flow in ``mW m-2``. CF has no standard name for crustal age, spreading
rate, sediment thickness or residual depth: those carry ``long_name`` and ``units`` only.
"""
from __future__ import annotations

from agegrid.age import FLAG_MEANINGS

STATIC = {
    "age": {"long_name": "age of the oceanic crust", "units": "Myr"},
    "age_uncertainty": {"long_name": "age of the oceanic crust, 1-sigma uncertainty", "units": "Myr"},
    "age_flag": {"long_name": "how the age of each cell was obtained", "standard_name": "status_flag",
                 "flag_values": (1, 2, 3, 4, 5), "flag_meanings": FLAG_MEANINGS},
    "age_bracket_young": {"long_name": "index of the younger bracketing dated boundary (see boundary_labels)",
                          "units": "1"},
    "age_bracket_old": {"long_name": "index of the older bracketing dated boundary (see boundary_labels)",
                        "units": "1"},
    "age_fraction": {"long_name": "fraction of the distance from the younger to the older bracketing boundary",
                     "units": "1"},
    "half_rate": {"long_name": "half spreading rate", "units": "mm yr-1"},
    "spreading_azimuth": {"long_name": "spreading direction, clockwise from north, toward older crust",
                          "units": "degree"},
    "flank": {"long_name": "side of its ridge segment the cell lies on (+1 or -1 in the compartment's frame, "
                        "0 without a ridge)", "units": "1"},
    "full_rate": {"long_name": "full spreading rate: this flank's half-rate plus the conjugate flank's at the same age",
                  "units": "mm yr-1"},
    "asymmetry": {"long_name": "share of the full spreading rate taken by this cell's flank (50 is symmetric)",
                  "units": "percent"},
    "magnetic_anomaly_predicted": {"long_name": "total-field magnetic anomaly predicted at the sea surface from "
                                   "the age grid and the timescale (Parker 1973)", "units": "nT"},
    "magnetic_residual": {"long_name": "observed minus predicted total-field magnetic anomaly", "units": "nT"},
    "compartment": {"long_name": "compartment of the domain between barriers (0 outside the domain)", "units": "1"},
    "observed_depth": {"long_name": "observed sea-floor depth, positive down",
                       "standard_name": "sea_floor_depth_below_mean_sea_level", "units": "m"},
    "sediment_correction": {"long_name": "sediment unloading correction added to the observed depth",
                            "units": "m"},
    "corrected_depth": {"long_name": "sediment-corrected (unloaded) depth, positive down", "units": "m"},
}


def attributes(name: str) -> dict:
    """CF attributes of an output variable, including the per-model families."""
    if name in STATIC:
        return dict(STATIC[name])
    if name.startswith("depth_"):
        return {"long_name": f"depth predicted by cooling model {name[6:]}, positive down", "units": "m"}
    if name.startswith("heat_flow_"):
        return {"long_name": f"surface heat flow predicted by cooling model {name[10:]}",
                "standard_name": "upward_geothermal_heat_flux_at_sea_floor", "units": "mW m-2"}
    if name.startswith("residual_"):
        return {"long_name": f"residual depth against cooling model {name[9:]}: predicted minus "
                "sediment-corrected observed depth, positive where the sea floor is shallower than the model",
                "units": "m"}
    if name.startswith("isotherm_depth_"):
        return {"long_name": f"depth below the sea floor of the chosen isotherm, cooling model {name[15:]}",
                "units": "m"}
    raise KeyError(f"no metadata for output variable {name!r}")
