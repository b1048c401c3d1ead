"""Kinematic layers: half-rate, azimuth, flank, full rate and asymmetry against synthetic truth."""
import csv

import numpy as np
import pytest

from agegrid import sphere
from agegrid.kinematics import rate_rows
from agegrid.synthetic import Stage, SyntheticBasin
from tests.engine import run_engine


def away_from_stage_boundaries(run, margin=1.5):
    age = run.truth
    ends = [s.until_ma for s in run.basin.stages[:-1]]
    ok = np.isfinite(age) & (age > 1.0)
    for e in ends:
        ok &= np.abs(age - e) > margin
    return ok


def test_worked_figure_constant_rate(tmp_path):
    # common practice: crust 560 km from its ridge and 7 Myr old spread at 560 / 7 = 80 mm/yr half rate,
    # 160 mm/yr full rate when symmetric
    basin = SyntheticBasin(bands=[-1.5, 1.5], ridge_lon=[0.0], stages=[Stage(12.0, 160.0, 50.0)])
    run = run_engine(tmp_path, basin, tracks=30, seed=2, noise_km=0.0, spacing=0.05)
    pos = basin.offset_rad(7.0, 1) * sphere.EARTH_RADIUS_KM
    assert pos == pytest.approx(560.0, rel=1e-9)
    # cells about 560 km from the ridge along the flow, near the pole's equator
    plon, plat = basin.to_pole_frame(run.lon, run.lat)
    dist = np.abs(np.radians(plon - basin.ridge_lon[0])) * sphere.EARTH_RADIUS_KM * np.cos(np.radians(plat))
    near = (np.abs(dist - 560.0) < 3.0) & (np.abs(plat) < 0.5)
    assert near.sum() > 20
    assert np.nanmedian(run.layers["age"][near]) == pytest.approx(7.0, abs=0.05)
    assert np.nanmedian(run.layers["half_rate"][near]) == pytest.approx(80.0, rel=0.01)
    assert np.nanmedian(run.layers["full_rate"][near]) == pytest.approx(160.0, rel=0.01)
    assert np.nanmedian(run.layers["asymmetry"][near]) == pytest.approx(50.0, abs=0.5)


@pytest.mark.parametrize("tracks,seed,tolerance", [(60, 1, 0.05), (25, 2, 0.08)])
def test_stagewise_asymmetric_rates(tmp_path, tracks, seed, tolerance):
    run = run_engine(tmp_path, tracks=tracks, seed=seed)
    away = away_from_stage_boundaries(run)
    ok = away & np.isfinite(run.layers["half_rate"])
    assert ok.sum() > 0.8 * away.sum()
    rel = np.abs(run.layers["half_rate"][ok] / run.basin.half_rate(run.lon, run.lat)[ok] - 1)
    assert np.median(rel) <= tolerance
    asym = run.layers["asymmetry"]
    both = away & np.isfinite(asym)
    assert both.sum() > 0.8 * away.sum()
    assert np.median(np.abs(asym[both] - run.basin.share(run.lon, run.lat)[both])) <= 3.0
    # full rate: own half-rate plus the conjugate's (truth: the stage's full rate scaled by cos(pole latitude))
    _, plat = run.basin.to_pole_frame(run.lon, run.lat)
    stage = np.searchsorted([s.until_ma for s in run.basin.stages], run.truth)
    full = np.array([s.full_rate_mm_yr for s in run.basin.stages])[np.clip(stage, 0, 2)] * np.cos(np.radians(plat))
    assert np.median(np.abs(run.layers["full_rate"][both] / full[both] - 1)) <= tolerance
    daz = np.abs((run.layers["spreading_azimuth"] - run.basin.azimuth(run.lon, run.lat) + 180) % 360 - 180)
    assert np.nanmedian(daz[ok]) <= 5.0


def test_flank_assignment_is_consistent(tmp_path):
    run = run_engine(tmp_path, tracks=40, seed=3, spacing=0.1)
    flank, comp = run.layers["flank"], run.layers["compartment"]
    truth = run.basin.flank(run.lon, run.lat)
    for label in np.unique(comp[comp > 0]):
        sel = (comp == label) & (flank != 0) & (truth != 0)
        product = np.unique(flank[sel] * truth[sel])
        assert len(product) == 1, (label, product)  # one orientation per compartment, no mixed cells


def test_rate_rows_medians():
    comp = np.array([1, 1, 1, 1, 1, 1])
    flank = np.array([1, 1, 1, -1, -1, 0])
    age = np.array([0.5, 1.5, 2.5, 0.5, 1.0, 1.0])
    half = np.array([30.0, 34.0, 20.0, 20.0, 22.0, 99.0])
    full = half + np.array([20.0, 20.0, np.nan, 30.0, 30.0, 0.0])
    asym = 100 * half / full
    az = np.array([350.0, 10.0, 0.0, 170.0, 190.0, 0.0])
    rows = rate_rows(comp, flank, age, half, full, asym, az, 2.0)
    first = [r for r in rows if r["flank"] == 1 and r["age_from_myr"] == 0.0][0]
    assert first["cells"] == 2 and first["half_rate_mm_yr"] == 32.0 and first["full_rate_mm_yr"] == 52.0
    assert first["flank_azimuth_deg"] in (0.0, 360.0) or abs(first["flank_azimuth_deg"]) < 1e-6
    second = [r for r in rows if r["flank"] == 1 and r["age_from_myr"] == 2.0][0]
    assert second["full_rate_mm_yr"] == "" and second["full_rate_cells"] == 0
    assert {r["flank"] for r in rows} == {1, -1}  # cells without a flank are left out


def test_rates_csv_in_build(demo_build):
    rows = list(csv.DictReader(open(demo_build / "veyra-basin_rates.csv")))
    assert rows and {r["flank"] for r in rows} == {"1", "-1"}
    # the demo's youngest stage: 62 mm/yr full at the pole's equator (agegrid/demo_picks/make_demo.py)
    young = [float(r["full_rate_mm_yr"]) for r in rows if r["age_from_myr"] == "2.0" and r["full_rate_mm_yr"]]
    assert young and all(55 < v < 64 for v in young)
