"""The age engine on synthetic basins with exactly known ages (the main truth for the engine).

Basins: three oblique ridge segments offset by transforms, fracture zones as barriers, asymmetric and
stage-wise changing rates (see agegrid.synthetic), picks where random survey tracks cross the
isochrons of CK95 chron ends, with 1.5 km Gaussian position noise per axis.
"""
import numpy as np
import pytest
from scipy.interpolate import griddata

from agegrid import age, sphere, timescale
from agegrid.grid import GridSpec
from agegrid.synthetic import Stage, SyntheticBasin
from tests.engine import run_engine
from tests.helpers import scores


@pytest.fixture(scope="module")
def dense(tmp_path_factory):
    return run_engine(tmp_path_factory.mktemp("dense"), tracks=60, seed=1)


def test_dense_picks_accuracy(dense):
    s = scores(dense.error)
    assert s["rms"] <= 0.15 and s["p95"] <= 0.3, s
    assert dense.empty_fraction() <= 0.01


def test_dense_near_fracture_zones_as_good_as_elsewhere(dense):
    near = dense.near_barrier(0.5)
    s_near = scores(np.where(near, dense.error, np.nan))
    s_far = scores(np.where(~near, dense.error, np.nan))
    assert s_near["rms"] <= 0.15 and s_near["p95"] <= 0.3, s_near
    assert s_near["rms"] <= 1.5 * s_far["rms"] + 0.02, (s_near, s_far)


def test_griddata_smears_across_fracture_zones(dense, tmp_path):
    """The generic gridder (scipy linear griddata over picks and ridge points) is far worse near FZs."""
    picks = [(r["lon"], r["lat"], r["age_ma"]) for r in dense.basin.survey(
        __import__("agegrid.timescale", fromlist=["load"]).load("CK95"), 60, seed=1)]
    ridge = np.concatenate(dense.basin.ridges())
    pts = np.concatenate([np.array([p[:2] for p in picks]), ridge])
    vals = np.concatenate([[p[2] for p in picks], np.zeros(len(ridge))])
    generic = griddata(pts, vals, (dense.lon, dense.lat), method="linear")
    near = dense.near_barrier(0.5) & np.isfinite(dense.truth)
    generic_rms = scores(np.where(near, generic - dense.truth, np.nan))["rms"]
    ours = scores(np.where(near, dense.error, np.nan))["rms"]
    assert generic_rms > 1.0 and ours < generic_rms / 5


@pytest.mark.parametrize("seed", range(1, 11))
def test_sparse_picks_accuracy(tmp_path, seed):
    # every seed counts: some leave a flank of a segment without old picks (seeds 3, 8, 9), which the same
    # flank of the other segments, or the conjugate flank, then dates
    run = run_engine(tmp_path, tracks=25, seed=seed, spacing=0.1)
    s = scores(run.error)
    assert s["rms"] <= 0.3 and s["p95"] <= 0.6, s
    near = scores(np.where(run.near_barrier(0.5), run.error, np.nan))
    assert near["rms"] <= 0.3 and near["p95"] <= 0.6, near
    assert run.empty_fraction() <= 0.01


OTHER_BASINS = {
    # five segments, offsets of up to 5 degrees between neighbours
    "five-segments": SyntheticBasin(bands=[-20.0, -12.0, -6.0, 1.0, 8.0, 18.0], ridge_lon=[0.0, 3.5, -1.0, 4.0, 1.5]),
    # rates that halve and recover, with the asymmetry swinging 20 points between stages
    "changing-rates": SyntheticBasin(stages=[Stage(5.0, 150.0, 50.0), Stage(12.0, 60.0, 70.0), Stage(30.0, 120.0, 40.0)]),
    # five narrow segments (3 degrees): many picks lie within their noise of a fracture zone
    "narrow-segments": SyntheticBasin(bands=[-8.0, -5.0, -2.0, 1.0, 4.0, 7.0], ridge_lon=[0.0, 1.2, 0.3, 1.5, 0.5]),
    # Euler pole near the basin (isochrons converge along strike) and the basin turned to high latitude
    "near-pole": SyntheticBasin(pole=(20.0, 10.0), spin_deg=50.0),
    # fast spreading (150-180 mm/yr full rate): a basin twice as wide, sampled by the same number of tracks
    "fast-rates": SyntheticBasin(stages=[Stage(10.0, 180.0, 50.0), Stage(24.0, 150.0, 60.0), Stage(40.0, 170.0, 45.0)]),
    # one flank taking 70-80 % of the accretion, then the other 75 %
    "strong-asymmetry": SyntheticBasin(stages=[Stage(10.0, 100.0, 80.0), Stage(24.0, 80.0, 25.0),
                                               Stage(40.0, 95.0, 70.0)]),
    # ridge offsets of 8 and 11 degrees (about 900 and 1,200 km) across the fracture zones
    "wide-offsets": SyntheticBasin(ridge_lon=[0.0, 8.0, -3.0]),
}


@pytest.mark.parametrize("name", sorted(OTHER_BASINS))
@pytest.mark.parametrize("tracks, rms, p95", [(60, 0.15, 0.3), (25, 0.3, 0.6)])
def test_other_basin_shapes(tmp_path, name, tracks, rms, p95):
    # the goals of the default basin hold for other layouts, seeds 1 and 2
    for seed in (1, 2):
        run = run_engine(tmp_path, basin=OTHER_BASINS[name], tracks=tracks, seed=seed, spacing=0.1)
        for cells in (run.error, np.where(run.near_barrier(0.5), run.error, np.nan)):
            s = scores(cells)
            assert s["rms"] <= rms and s["p95"] <= p95, (seed, s)
        assert run.empty_fraction() <= 0.01


def test_slow_spreading_within_the_picks_own_dating_error(tmp_path):
    # at 18-25 mm/yr full rate the same 1.5 km of pick noise is worth 0.19 Myr of age on the slowest flank
    # (18 mm/yr x 45 % = 8.1 km/Myr): the grid is held to that one pick's error (RMS) and twice it (p95)
    basin = SyntheticBasin(stages=[Stage(10.0, 20.0, 50.0), Stage(24.0, 25.0, 40.0), Stage(40.0, 18.0, 55.0)])
    pick_error = 1.5 / (18.0 * 0.45)
    for seed in (1, 2):
        run = run_engine(tmp_path, basin=basin, seed=seed, spacing=0.1)
        for cells in (run.error, np.where(run.near_barrier(0.5), run.error, np.nan)):
            s = scores(cells)
            assert s["rms"] <= pick_error and s["p95"] <= 2 * pick_error, (seed, s)


def test_noisier_picks(tmp_path):
    # 4 km of position noise per axis (poorly navigated older surveys): the dense-survey goals still hold
    for seed in (1, 2):
        run = run_engine(tmp_path, seed=seed, spacing=0.1, noise_km=4.0)
        for cells in (run.error, np.where(run.near_barrier(0.5), run.error, np.nan)):
            s = scores(cells)
            assert s["rms"] <= 0.15 and s["p95"] <= 0.3, (seed, s)


def _mislabelled(records: list[dict], shifts: list[int], seed: int, fraction: float = 0.1) -> list[dict]:
    """The picks with about ``fraction`` of them given the chron end ``shifts`` boundaries away (one of them at
    random): a miscorrelated anomaly."""
    labels = {r["age_ma"]: (r["chron"], r["edge"]) for r in records}
    ages = sorted(labels)
    rng = np.random.default_rng(seed)
    wrong = []
    for r in records:
        r = dict(r)
        if rng.random() < fraction:
            k = int(np.clip(ages.index(r["age_ma"]) + rng.choice(shifts), 0, len(ages) - 1))
            r["age_ma"], (r["chron"], r["edge"]) = ages[k], labels[ages[k]]
        wrong.append(r)
    return wrong


def test_mislabelled_picks_barely_move_the_grid(tmp_path):
    # one pick in ten two or three boundaries off: the grid stays within the dense-survey goals and close to
    # the grid from the clean picks. Seed 1 lays a 36.6 Ma pick, labelled 38.4 Ma, alone along strike of three
    # true 38.4 Ma picks: a robust line through the four bends to it, and without the half-rate rule
    # (age._steady_rate) 746 cells went empty and the RMS was 0.10 Myr
    basin = SyntheticBasin()
    for seed in (1, 2):
        records = basin.survey(timescale.load("CK95"), 60, noise_km=1.5, seed=seed)
        clean = scores(run_engine(tmp_path, records=records, spacing=0.1, seed=seed).error)
        s = scores(run_engine(tmp_path, records=_mislabelled(records, [-3, -2, 2, 3], seed), spacing=0.1,
                              seed=seed).error)
        assert s["rms"] <= 0.15 and s["p95"] <= 0.3, (seed, s)
        assert s["rms"] <= clean["rms"] + 0.02, (seed, s, clean)


def test_a_flanks_lone_mislabelled_pick_is_checked_against_the_other_segments(tmp_path):
    # 25 tracks, one pick in ten one or two boundaries off. With survey seed 3, one track crosses segment 0's
    # negative flank beyond 10 Ma, so each of its isochrons there rests on one pick; its 22.59 Ma pick, given
    # 24.73 Ma, became the flank's oldest control, and the isochrons borrowed beyond it from the other
    # segments came out 2.4 Myr too old over the flank (RMS 0.77 Myr, p95 2.5) until lone picks were held to
    # the other segments' rate (age._drop_lone_picks_off_rate). The sparse-survey goals; the clean picks give
    # 0.048 Myr. (Other seeds put wrong picks among two or three of an isochron, which no rule can sort: the
    # README's known limit.)
    basin = SyntheticBasin()
    records = basin.survey(timescale.load("CK95"), 25, noise_km=1.5, seed=3)
    run = run_engine(tmp_path, records=_mislabelled(records, [-2, -1, 1, 2], 103), spacing=0.1, seed=3)
    s = scores(run.error)
    assert s["rms"] <= 0.3 and s["p95"] <= 0.6, s
    assert run.empty_fraction() <= 0.01
    assert [d["age_ma"] for d in run.model.dropped if d["reason"] == "a lone pick off the other segments' rate"] == [
        pytest.approx(24.73)], run.model.dropped


def test_a_lone_pick_is_judged_by_the_other_segments_step():
    # profiles (ages, boundaries, widths; ridge first): the other segments widen by 10 a Myr, one of them
    # twice as fast (nearer the Euler pole's equator: its steps are scaled by the width ratio, 2)
    ages = np.array([0.0, 1.0, 2.0, 3.0])
    steady = (ages, None, np.array([0.0, 10.0, 20.0, 30.0]))
    doubled = (ages, None, np.array([0.0, 20.0, 40.0, 60.0]))
    slowed = np.array([0.0, 10.0, 20.0, 22.0])  # the last isochron only 2 beyond the one before
    assert age._off_rate(ages, slowed, 3, 2, 1.0, [steady, doubled])
    assert not age._off_rate(ages, slowed, 3, 2, 1.0, [steady])  # one other segment is no majority
    assert not age._off_rate(ages, slowed, 3, 2, 9.0, [steady, doubled])  # within the noise
    assert not age._off_rate(ages, np.array([0.0, 10.0, 20.0, 27.0]), 3, 2, 1.0, [steady, doubled])  # 0.7 of 10
    # the step from the ridge to the first isochron, judged against the flank's other isochrons' scale
    assert age._off_rate(ages, np.array([0.0, 2.0, 20.0, 30.0]), 1, 0, 1.0, [steady, doubled])


def test_a_pick_far_from_its_traces_half_rate_is_left_out():
    # distances from the younger trace (km): three at the trace's rate, one on the younger isochron itself; a
    # spread of three along strike (an Euler pole near the segment) is kept whole
    km = 1 / sphere.EARTH_RADIUS_KM
    sigma = np.full(4, 1.5)
    keep = np.ones(4, bool)
    assert age._steady_rate(np.array([79.6, 79.2, 1.8, 79.1]) * km, sigma, keep).tolist() == [True, True, False, True]
    assert age._steady_rate(np.array([40.0, 70.0, 95.0, 120.0]) * km, sigma, keep).all()
    # points already left out stay out and do not set the median
    prior = np.array([True, True, True, False])
    kept = age._steady_rate(np.array([79.6, 79.2, 78.0, 900.0]) * km, sigma, prior)
    assert kept.tolist() == [True, True, True, False]


def _without_picks(tmp_path, basin, corridors=(1,), ages=(20.0, np.inf), region_ages=(26.0, np.inf)):
    """The dense survey with every pick of an age within ``ages`` removed from the positive flank of the given
    segments; returns the run and the cells of true age within ``region_ages`` on that flank of the first."""
    records = basin.survey(timescale.load("CK95"), 60, noise_km=1.5, seed=1)
    lon, lat = (np.array([r[k] for r in records]) for k in ("lon", "lat"))
    _, plat = basin.to_pole_frame(lon, lat)
    pick_age = np.array([r["age_ma"] for r in records])
    cut = (np.isin(basin.corridor(plat), corridors) & (basin.flank(lon, lat) == 1)
           & (pick_age > ages[0]) & (pick_age < ages[1]))
    run = run_engine(tmp_path, basin=basin, records=[r for r, c in zip(records, cut) if not c], spacing=0.1)
    _, cell_plat = basin.to_pole_frame(run.lon, run.lat)
    region = ((basin.corridor(cell_plat) == corridors[0]) & (basin.flank(run.lon, run.lat) == 1)
              & (run.truth > region_ages[0]) & (run.truth < region_ages[1]))
    assert region.sum() > 500
    return run, region


def test_flank_without_old_picks_borrows_the_conjugate_isochrons(tmp_path):
    # symmetric spreading: the conjugate flank's isochrons, carried over, are the truth; the positive flank
    # of every segment lacks old picks, so no other segment's same flank can stand in
    basin = SyntheticBasin(stages=[Stage(10.0, 110.0, 50.0), Stage(24.0, 80.0, 50.0), Stage(40.0, 95.0, 50.0)])
    run, region = _without_picks(tmp_path, basin, corridors=(1, 0, 2))
    assert run.empty_fraction() <= 0.01
    assert scores(run.error[region])["rms"] <= 0.2
    assert np.all(run.layers["age_flag"][region] == 2)  # extrapolated beyond the flank's own control
    assert not np.isfinite(run.layers["asymmetry"][region]).any()  # no measured conjugate pair there


def test_flank_without_old_picks_follows_its_plate_in_the_other_segments(tmp_path):
    # the default basin's asymmetry changes from stage to stage (55, 45, 52 % to the positive flank), so the
    # conjugate flank's spacing misplaces the missing isochrons by about 1 Myr; the same flank of the other
    # two segments (the same plate, one Euler pole) grows alike, and carries them to within the pick noise
    run, region = _without_picks(tmp_path, SyntheticBasin())
    assert scores(run.error[region])["rms"] <= 0.15
    assert np.all(run.layers["age_flag"][region] == 2)  # still beyond the flank's own control
    assert not np.isfinite(run.layers["asymmetry"][region]).any()


def test_isochrons_missing_between_a_flanks_picks_follow_the_other_segments(tmp_path):
    # no picks between 8 and 24 Myr on the positive flank of the middle segment: across that gap the
    # flank's half-rate drops from 60.5 to 36 mm/yr at 10 Myr (default basin), which distance alone
    # (one rate across the gap) misplaces; the other segments' same flank places the missing isochrons
    run, region = _without_picks(tmp_path, SyntheticBasin(), ages=(8.0, 24.0), region_ages=(8.5, 23.5))
    assert scores(run.error[region])["rms"] <= 0.15
    assert np.all(run.layers["age_flag"][region] == 1)  # between the flank's own picks: interpolated


def test_borrowed_isochrons_carry_their_uncertainty(tmp_path):
    # with no segment's positive flank controlled past 20 Myr, what the flank lacks cannot be known in the
    # default basin, whose asymmetry changes from stage to stage; the stated uncertainty (25 % of the age
    # beyond the flank's oldest control, see agegrid.age) covers the error
    run, region = _without_picks(tmp_path, SyntheticBasin(), corridors=(1, 0, 2))
    sigma, error = run.layers["age_uncertainty"][region], run.error[region]
    assert scores(error)["rms"] > 0.3  # the conjugate's spacing is off here: the check below is not idle
    assert np.all(sigma >= 0.25 * (run.layers["age"][region] - 20))
    assert np.mean(np.abs(error) <= 2 * sigma) >= 0.95


def test_half_rate_and_azimuth(dense):
    ok = np.isfinite(dense.layers["half_rate"]) & np.isfinite(dense.truth)
    rel = np.abs(dense.layers["half_rate"][ok] / dense.basin.half_rate(dense.lon, dense.lat)[ok] - 1)
    assert np.median(rel) <= 0.05
    daz = np.abs((dense.layers["spreading_azimuth"] - dense.basin.azimuth(dense.lon, dense.lat) + 180) % 360 - 180)
    assert np.nanmedian(daz[ok]) <= 5
    assert not np.isinf(dense.layers["half_rate"]).any()


def test_dating_and_motion_parts_agree_cell_by_cell(dense):
    """The age stage (dating part) and the kinematic layers (motion part) run as separate passes; they must
    find the same bracketing pair in every cell."""
    dated = np.isfinite(dense.layers["age"])
    assert np.array_equal(dated, np.isfinite(dense.layers["spreading_azimuth"]))
    # both need the pair's half-rate: the uncertainty through 1 / r^2, the rate layer directly
    assert np.array_equal(np.isfinite(dense.layers["age_uncertainty"]), np.isfinite(dense.layers["half_rate"]))
    assert np.array_equal(dated & (dense.layers["compartment"] > 0), dated & (dense.layers["flank"] != 0))


def test_age_stage_computes_only_the_dating_part(dense):
    from agegrid.age import LAYERS, age_layers
    from agegrid.compartments import build_compartments

    comps = build_compartments(dense.spec, dense.basin.fracture_zones(), dense.basin.domain_polygon())
    ages = age_layers(dense.spec, comps, dense.model, names=("age", "age_uncertainty", "age_flag"))
    for name, layer in ages.items():
        keys = [str(k) for k in dict(layer.__dask_graph__())]
        assert any("dating" in k for k in keys) and not any("motion" in k or "both" in k for k in keys), name
    # every layer at once: one pass per block for both parts, giving what the separate parts give
    every = age_layers(dense.spec, comps, dense.model)
    assert set(every) == set(LAYERS)
    assert all(any("engine-both" in str(k) for k in dict(every[name].__dask_graph__())) for name in LAYERS)
    for name, alone in {**ages, **age_layers(dense.spec, comps, dense.model, names=("half_rate", "asymmetry"))}.items():
        np.testing.assert_array_equal(alone.compute(scheduler="threads"), dense.layers[name], err_msg=name)


def test_keys_recorded_by_the_block_tasks_equal_the_planned_ones(dense, tmp_path):
    # a build with no last file to read from records each block's key in the task that computes the block;
    # the next build plans with keys computed beforehand: both must agree, or no block is ever reused
    from agegrid.age import age_layers
    from agegrid.cache import BlockCache
    from agegrid.compartments import build_compartments

    comps = build_compartments(dense.spec, dense.basin.fracture_zones(), dense.basin.domain_polygon())
    recorded, planned = BlockCache(tmp_path / "a"), BlockCache(tmp_path / "b")
    lazy = age_layers(dense.spec, comps, dense.model, recorded, keys_in_tasks=True)
    assert recorded.keys == {} and recorded.blocks > 1  # nothing hashed before the blocks are computed
    lazy["age"].compute(scheduler="threads")
    age_layers(dense.spec, comps, dense.model, planned)
    assert len(planned.keys) == planned.blocks == recorded.blocks
    assert recorded.keys == planned.keys


def test_uncertainty_is_sane(dense):
    sigma = dense.layers["age_uncertainty"]
    ok = np.isfinite(dense.layers["age"])
    assert np.isfinite(sigma[ok]).mean() > 0.99 and (sigma[ok & np.isfinite(sigma)] > 0).all()
    # about one sigma: the observed errors are of the order of the stated uncertainty
    ratio = np.nanmedian(np.abs(dense.error[ok]) / sigma[ok])
    assert 0.1 < ratio < 3.0


def test_chunk_size_does_not_change_results(tmp_path):
    basin = SyntheticBasin()
    a = run_engine(tmp_path, basin, tracks=30, seed=5, spacing=0.1, chunk=64)
    b = run_engine(tmp_path, basin, tracks=30, seed=5, spacing=0.1, chunk=512)
    for name in a.layers:
        assert np.array_equal(a.layers[name], b.layers[name], equal_nan=True), name


@pytest.mark.parametrize("spacing, chunk", [(0.1, 64), (0.1, 7), (0.5, 512), (0.025, 512)])
def test_grid_block_sizes_are_the_chunks_dask_makes(spacing, chunk):
    # reference: dask's own normalisation of the block side over the grid's shape (ragged last blocks)
    from dask.array.core import normalize_chunks

    spec = GridSpec(SyntheticBasin().region(0.5), spacing, chunk=chunk)
    assert spec.block_sizes == normalize_chunks(spec.chunks, spec.shape)


def test_antimeridian_region_is_seamless(tmp_path):
    basin = SyntheticBasin(pole=(90.0, 40.0))
    region = basin.region(0.5)
    assert region[0] < 180 < region[1]
    run = run_engine(tmp_path, basin, tracks=60, seed=2, spacing=0.1, region=region)
    s = scores(run.error)
    assert s["rms"] <= 0.15 and s["p95"] <= 0.3, s
    seam = np.abs(run.lon - 180) < 1.0
    assert scores(np.where(seam, run.error, np.nan))["rms"] <= 0.15


def test_high_latitude_region(tmp_path):
    basin = SyntheticBasin(pole=(-60.0, 25.0), spin_deg=90.0)
    region = basin.region(0.5)
    assert region[3] > 75
    run = run_engine(tmp_path, basin, tracks=60, seed=3, spacing=0.1, region=region)
    s = scores(run.error)
    assert s["rms"] <= 0.15 and s["p95"] <= 0.3, s
    assert run.empty_fraction() <= 0.01


def test_polar_cap_across_the_pole(tmp_path):
    basin = SyntheticBasin(pole=(-60.0, 12.0), spin_deg=90.0, bands=[-6.0, 0.0, 6.0], ridge_lon=[0.0, 1.5],
                           stages=[__import__("agegrid.synthetic", fromlist=["Stage"]).Stage(12.0, 90.0, 50.0)])
    run = run_engine(tmp_path, basin, tracks=50, seed=4, spacing=0.2, region=(-180.0, 180.0, 66.0, 90.0))
    s = scores(run.error)
    assert s["rms"] <= 0.3, s
    assert run.empty_fraction() <= 0.01


def test_great_circle_metric_against_pyproj():
    """The engine's distances are great-circle distances (checked against pyproj's geodesic on a sphere)."""
    import pyproj

    geod = pyproj.Geod(a=sphere.EARTH_RADIUS_KM * 1e3, b=sphere.EARTH_RADIUS_KM * 1e3)
    lon1, lat1, lon2, lat2 = np.array([10.0, 170.0, -30.0]), np.array([5.0, -40.0, 80.0]), \
        np.array([12.0, -175.0, 150.0]), np.array([6.5, -41.0, 85.0])
    _, _, dist = geod.inv(lon1, lat1, lon2, lat2)
    assert np.allclose(sphere.distance_km(lon1, lat1, lon2, lat2), dist / 1e3, rtol=1e-9)


def test_region_without_the_ridge(tmp_path):
    """Old crust only (the ridge lies outside the grid): ages still follow the isochron traces."""
    basin = SyntheticBasin()
    west, east, south, north = basin.region(0.5)
    run = run_engine(tmp_path, basin, tracks=60, seed=1, spacing=0.1, region=(west, west + 0.35 * (east - west),
                                                                              south, north))
    s = scores(run.error)
    assert s["rms"] <= 0.3 and s["p95"] <= 0.3, s
    assert run.empty_fraction() <= 0.01


def test_no_barriers_given_uses_implied_fracture_zones(tmp_path):
    """Without barriers, fracture zones implied at the ridge segments' ends keep ages apart
    (here spreading is normal to the ridges, so the implied lines are the true flow lines)."""
    basin = SyntheticBasin()
    implied = run_engine(tmp_path, basin, tracks=60, seed=1, spacing=0.1, barriers=False, implied=True)
    none = run_engine(tmp_path, basin, tracks=60, seed=1, spacing=0.1, barriers=False, implied=False)
    s = scores(implied.error)
    assert s["p95"] <= 0.3 and s["rms"] <= 0.4, s
    assert s["rms"] < 0.5 * scores(none.error)["rms"]


def test_compiled_trace_helpers_match_numpy():
    # the compiled helpers against numpy's own: binned means (unique + bincount), end slopes (polyfit),
    # medians
    from agegrid.age import _binned, _end_fit, _median

    rng = np.random.default_rng(7)
    col = rng.uniform(0, 60, 400)
    v = 0.01 * col + rng.normal(0, 1e-4, 400)
    xp, vp = _binned(col, v)
    key = np.rint(col)
    _, inverse = np.unique(key, return_inverse=True)
    count = np.bincount(inverse)
    assert np.allclose(xp, np.bincount(inverse, col) / count) and np.allclose(vp, np.bincount(inverse, v) / count)
    for end in (-1, 1):
        span = max(3.0, 0.1 * (xp[-1] - xp[0]))
        sel = (xp >= xp[-1] - span) if end > 0 else (xp <= xp[0] + span)
        slope, anchor = _end_fit(xp, vp, end)
        assert slope == pytest.approx(np.polyfit(xp[sel], vp[sel], 1)[0], rel=1e-9)
        assert anchor == (vp[-1] if end > 0 else vp[0])
    assert _median(v) == np.median(v)


def test_left_out_picks_are_named_by_their_own_index():
    # a point 80 degrees or more from the compartment's frame is set aside before the traces are drawn; the
    # picks left out after it must still be reported by their index among the compartment's control
    lon = np.concatenate([[120.0], np.linspace(-5, 5, 11), np.linspace(-4, 4, 9), [0.5]])
    lat = np.concatenate([[0.0], np.zeros(11), np.full(9, 1.0), [0.1]])  # ridge on the equator, 5 Ma at 1 degree
    kind = np.concatenate([[2], np.zeros(11, int), np.full(10, 2)])
    age_ma = np.concatenate([[5.0], np.zeros(11), np.full(10, 5.0)])
    bound = np.concatenate([[1], np.zeros(11, int), np.ones(10, int)])
    outliers = []
    traces = age._compartment_traces(1, sphere.to_xyz(lon, lat), age_ma, bound, kind, np.full(22, 1.5),
                                     np.zeros(22, bool), None, np.radians(0.05), age.Settings(), [], outliers)
    assert traces is not None and outliers == [21]  # the pick at 0.1 degrees, not its neighbour
