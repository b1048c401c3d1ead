"""Run the age engine on a synthetic basin in process and score it against the exact ages."""
from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np

from agegrid import timescale
from agegrid.age import Settings, age_layers, build_age_model
from agegrid.compartments import build_compartments
from agegrid.control import build_control
from agegrid.grid import GridSpec
from agegrid.io.points import read_picks
from agegrid.io.vectors import LineFeature
from agegrid.synthetic import SyntheticBasin

from tests.helpers import write_picks


@dataclass
class EngineRun:
    basin: SyntheticBasin
    spec: GridSpec
    layers: dict
    truth: np.ndarray
    lon: np.ndarray
    lat: np.ndarray
    domain: np.ndarray
    model: object

    @property
    def error(self) -> np.ndarray:
        return self.layers["age"] - self.truth

    def near_barrier(self, degrees: float = 0.5) -> np.ndarray:
        """Cells within ``degrees`` (great-circle) of a fracture zone, from the pole-frame latitude."""
        _, plat = self.basin.to_pole_frame(self.lon, self.lat)
        inner = np.array(self.basin.bands[1:-1])
        return np.min(np.abs(plat[..., None] - inner), axis=-1) < degrees

    def empty_fraction(self) -> float:
        inside = np.isfinite(self.truth)
        return float((inside & ~np.isfinite(self.layers["age"])).sum() / inside.sum())


def run_engine(tmp: Path, basin: SyntheticBasin | None = None, tracks: int = 60, seed: int = 1,
               spacing: float = 0.05, chunk: int = 512, noise_km: float = 1.5, scale: str = "CK95",
               region=None, records=None, barriers=True, implied=False) -> EngineRun:
    basin = basin or SyntheticBasin()
    ts = timescale.load(scale)
    if records is None:
        records = basin.survey(ts, tracks, noise_km=noise_km, seed=seed)
    picks = read_picks(write_picks(tmp / f"picks-{seed}-{tracks}.csv", records))
    spec = GridSpec(tuple(region or basin.region(0.5)), spacing, chunk=chunk)
    from agegrid.compartments import implied_fracture_zones

    lines = basin.fracture_zones() if barriers else (implied_fracture_zones(basin.ridges()) if implied else [])
    comps = build_compartments(spec, lines, basin.domain_polygon())
    ridges = [LineFeature(i, r, {}) for i, r in enumerate(basin.ridges())]
    control = build_control(picks, ts, ridges, np.radians(spacing) / 2, default_sigma_km=max(noise_km, 0.5))
    model = build_age_model(spec, comps, control, Settings())
    lazy = age_layers(spec, comps, model)
    import dask

    with dask.config.set(scheduler="threads"):
        values = dask.compute(*lazy.values())
    layers = dict(zip(lazy, values))
    lon, lat = spec.lonlat()
    return EngineRun(basin, spec, layers, basin.age(lon, lat), lon, lat,
                     comps.window(slice(None), slice(None))[1], model)
