"""Generate the Veyra Basin demo: an invented basin with three ridge segments offset by transforms.

Run ``python -m agegrid.demo_picks.make_demo`` to rewrite the files beside this script. Everything is
invented (a known spreading history, random survey tracks, a swell on the bathymetry) and seeded, so
the files are the same on every run.
"""
from __future__ import annotations

import csv
import json
from pathlib import Path

import numpy as np
import xarray as xr

from agegrid import thermal, timescale
from agegrid.sediment import LITHOLOGIES
from agegrid.synthetic import SyntheticBasin, Stage

HERE = Path(__file__).parent

BASIN = SyntheticBasin(
    pole=(-215.0, 52.0), bands=[-6.0, -1.8, 2.4, 6.5], ridge_lon=[0.0, 1.3, 0.5],
    stages=[Stage(5.0, 62.0, 54.0), Stage(11.0, 46.0, 47.0), Stage(16.0, 55.0, 50.0)])
SWELL = {"lon_offset": 0.45, "lat_offset": -0.25, "height_m": 700.0, "radius_km": 160.0}


def _lines(features: list[np.ndarray], props: list[dict]) -> dict:
    return {"type": "FeatureCollection", "features": [
        {"type": "Feature", "properties": p,
         "geometry": {"type": "LineString", "coordinates": np.round(f, 6).tolist()}} for f, p in zip(features, props)]}


def write_profiles(profile: list[dict], scale) -> None:
    """Survey profiles: the anomaly the true ages produce (agegrid's own forward model), with 8 nT noise."""
    import dask
    import dask.array as da

    from agegrid.alignment import sample
    from agegrid.grid import GridSpec
    from agegrid.magnetic import MagneticSettings, anomaly_layer

    spec = GridSpec(BASIN.region(0.5), 0.02, chunk=512)
    lon, lat = spec.lonlat()
    age = BASIN.age(lon, lat)
    top = thermal.MODELS["gdh1"].depth(age)
    with dask.config.set(scheduler="threads"):
        anomaly = anomaly_layer(spec, da.from_array(age, chunks=spec.chunks), da.from_array(top, chunks=spec.chunks),
                                scale, MagneticSettings(500.0, 5.0, 2020.0)).compute()
    rng = np.random.default_rng(11)
    plon = np.array([p["lon"] for p in profile])
    plat = np.array([p["lat"] for p in profile])
    values = sample(anomaly, spec, plon, plat) + rng.normal(0, 8.0, len(profile))
    with open(HERE / "tracks.csv", "w", newline="") as fh:
        fh.write("# Veyra Basin demo survey profiles (invented): total-field anomaly in nT\n")
        writer = csv.writer(fh, lineterminator="\n")
        writer.writerow(["lon", "lat", "anomaly_nt", "track"])
        for p, value in zip(profile, values):
            if np.isfinite(value):
                writer.writerow([round(p["lon"], 5), round(p["lat"], 5), round(float(value), 1), p["track"]])


def main() -> None:
    scale = timescale.load("CK95")
    profile = []
    picks = BASIN.survey(scale, tracks=28, noise_km=1.5, seed=20261201, profile=profile, profile_step=2)
    with open(HERE / "picks.csv", "w", newline="") as fh:
        fh.write("# Veyra Basin demo picks (invented): chron ends picked along 28 survey tracks\n")
        writer = csv.DictWriter(fh, ["id", "track", "lon", "lat", "chron", "edge", "sigma_km"], lineterminator="\n")
        writer.writeheader()
        for p in picks:
            writer.writerow({**{k: p[k] for k in ("id", "track", "lon", "lat", "chron", "edge")}, "sigma_km": 1.5})
    ridges = BASIN.ridges()
    (HERE / "ridges.geojson").write_text(json.dumps(_lines(ridges, [{"segment": f"VR{i + 1}"} for i in range(len(ridges))])))
    fzs = BASIN.fracture_zones()
    (HERE / "fracture_zones.geojson").write_text(json.dumps(_lines(fzs, [{"name": f"VFZ{i + 1}"} for i in range(len(fzs))])))
    outline = np.asarray(BASIN.domain_polygon().exterior.coords)
    (HERE / "ocean.geojson").write_text(json.dumps({"type": "FeatureCollection", "features": [
        {"type": "Feature", "properties": {"name": "Veyra Basin oceanic crust"},
         "geometry": {"type": "Polygon", "coordinates": [np.round(outline, 6).tolist()]}}]}))
    west, east, south, north = BASIN.region(0.5)
    step = 0.025
    lon = np.arange(west + step / 2, east, step)
    lat = np.arange(south + step / 2, north, step)
    glon, glat = np.meshgrid(lon, lat)
    age = BASIN.age(glon, glat)
    centre = BASIN.from_pole_frame(np.array(BASIN.ridge_lon[1] + SWELL["lon_offset"]), np.array(SWELL["lat_offset"]))
    from agegrid.sphere import distance_km

    r = distance_km(glon, glat, centre[0], centre[1])
    swell = SWELL["height_m"] * np.exp(-(r / SWELL["radius_km"]) ** 2)
    rng = np.random.default_rng(7)
    sediment = np.where(np.isfinite(age), 40.0 + 18.0 * np.nan_to_num(age), 600.0)
    unloaded = np.where(np.isfinite(age), thermal.MODELS["gdh1"].depth(np.nan_to_num(age)), 4200.0) - swell
    seafloor = np.round(unloaded - LITHOLOGIES["deep_sea"].correction(sediment) + rng.normal(0, 25.0, age.shape))
    coords = {"lat": ("lat", lat, {"units": "degrees_north", "standard_name": "latitude"}),
              "lon": ("lon", lon, {"units": "degrees_east", "standard_name": "longitude"})}
    xr.Dataset({"elevation": (("lat", "lon"), (-seafloor).astype(np.float32),
                              {"long_name": "sea-floor elevation (invented)", "units": "m",
                               "standard_name": "height_above_mean_sea_level"})}, coords=coords).to_netcdf(
        HERE / "bathymetry.nc", encoding={"elevation": {"zlib": True}})
    xr.Dataset({"thickness": (("lat", "lon"), sediment.astype(np.float32),
                              {"long_name": "sediment thickness (invented)", "units": "m"})}, coords=coords).to_netcdf(
        HERE / "sediment.nc", encoding={"thickness": {"zlib": True}})
    write_profiles(profile, scale)
    region = [float(v) for v in BASIN.region(0.5)]
    (HERE / "build.toml").write_text(f'''# Veyra Basin: the bundled demo of agegrid (an invented basin; see make_demo.py)
name = "veyra-basin"

[inputs]
picks = "picks.csv"
ridges = "ridges.geojson"
barriers = "fracture_zones.geojson"
domain = "ocean.geojson"
bathymetry = "bathymetry.nc"
sediment = "sediment.nc"
magnetic_profiles = "tracks.csv"

[grid]
region = {region}
spacing = 0.025
crs = "EPSG:4326"
chunk = 256

[age]
timescale = "CK95"
max_extrapolation_myr = 5.0

[depth]
models = ["gdh1", "ps77", "hsc", "plate"]
fit_age_range = [0.0, 16.0]

[magnetic]
layer_thickness_km = 0.5
magnetisation = 5.0
epoch = 2020.0

[output]
directory = "out"
formats = ["netcdf", "geotiff"]
''')


if __name__ == "__main__":
    main()
