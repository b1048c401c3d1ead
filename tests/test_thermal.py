"""Cooling models against their published formulas and coefficients."""
import math

import numpy as np
import pytest
from scipy.special import erf

from agegrid.thermal import MODELS, SECONDS_PER_MYR, HalfSpace, PlateSeries

AGES = np.array([0.0, 0.5, 2.0, 10.0, 19.99, 20.0, 35.0, 55.0, 56.0, 80.0, 120.0, 180.0])


def test_gdh1_against_stein_and_stein_1992():
    # Stein & Stein (1992), Nature 359, 123-129: the GDH1 fits, evaluated by hand here
    g = MODELS["gdh1"]
    assert g.depth(np.array([10.0]))[0] == pytest.approx(2600 + 365 * math.sqrt(10), abs=1e-6)
    assert g.depth(np.array([50.0]))[0] == pytest.approx(5651 - 2473 * math.exp(-0.0278 * 50), abs=1e-6)
    assert g.depth(np.array([0.0]))[0] == pytest.approx(2600.0)
    assert g.heat_flow(np.array([25.0]))[0] == pytest.approx(510 / 5.0)
    assert g.heat_flow(np.array([100.0]))[0] == pytest.approx(48 + 96 * math.exp(-0.0278 * 100))
    # the two depth branches meet at 20 Myr to within a metre (published fit continuity)
    assert abs((2600 + 365 * math.sqrt(20)) - (5651 - 2473 * math.exp(-0.0278 * 20))) < 1.0


def test_plate_series_reproduces_gdh1_fits():
    # Stein & Stein (1992): GDH1 is the plate model with a = 95 km, Tm = 1450 C, alpha = 3.1e-5,
    # k = 3.138, rho_m = 3330, rho_w = 1000, ridge 2600 m; the fits hold to 3 m and 0.25 % over 0-180 Myr
    plate, gdh1 = PlateSeries(), MODELS["gdh1"]
    t = np.linspace(0.0, 180.0, 3601)
    assert np.max(np.abs(plate.depth(t) - gdh1.depth(t))) < 3.0
    q = np.linspace(0.1, 180.0, 3600)
    assert np.max(np.abs(plate.heat_flow(q) / gdh1.heat_flow(q) - 1)) < 0.0025


def test_plate_series_limits():
    plate = PlateSeries()
    # old limit: d_r + rho_m alpha Tm a / (2 (rho_m - rho_w)) (McKenzie 1967), evaluated by hand
    limit = 2600 + 3330 * 3.1e-5 * 1450 * 95e3 / (2 * 2330)
    assert plate.depth(np.array([2000.0]))[0] == pytest.approx(limit, abs=0.01)
    assert plate.heat_flow(np.array([2000.0]))[0] == pytest.approx(1e3 * 3.138 * 1450 / 95e3, rel=1e-6)
    # young limit: the half-space law with the same parameters
    kappa = 3.138 / (3330 * 1171)
    hsc = 2 * 3330 * 3.1e-5 * 1450 / 2330 * math.sqrt(kappa * 1.0 * SECONDS_PER_MYR / math.pi)
    assert plate.depth(np.array([1.0]))[0] - 2600 == pytest.approx(hsc, rel=1e-4)
    # steady-state temperature is linear (Turcotte & Schubert eq. 4.130 as t -> infinity)
    assert plate.temperature(np.array([47.5e3]), np.array([5000.0]))[0] == pytest.approx(725.0, abs=0.5)


def test_half_space_against_turcotte_schubert():
    # Turcotte & Schubert, Geodynamics (eqs. 4.125, 4.209) with their parameters: rho_m 3300, rho_w 1000,
    # alpha 3e-5 /K, Tm - T0 = 1300 K, kappa 1 mm2/s, k 3.3 W/m/K
    h = HalfSpace()
    coefficient = 2 * 3300 * 3e-5 * 1300 / 2300 * math.sqrt(1e-6 * SECONDS_PER_MYR / math.pi)
    assert h.depth(np.array([64.0]))[0] == pytest.approx(2500 + coefficient * 8.0)
    # the figure they quote, about 350 m per sqrt(Myr) below a 2500 m ridge (typed from memory)
    assert coefficient == pytest.approx(350.0, rel=0.02)
    q100 = 3.3 * 1300 / math.sqrt(math.pi * 1e-6 * 100 * SECONDS_PER_MYR) * 1e3
    assert h.heat_flow(np.array([100.0]))[0] == pytest.approx(q100)
    # about 43 mW m-2 at 100 Myr (typed from memory)
    assert q100 == pytest.approx(43.0, abs=0.5)
    # isotherm: T(z) = T0 + (Tm - T0) erf(z / (2 sqrt(kappa t))) inverted (eq. 4.113), checked with scipy's erf
    z = h.isotherm_depth(np.array([30.0]), 1000.0)[0]
    assert 1300 * erf(z / (2 * math.sqrt(1e-6 * 30 * SECONDS_PER_MYR))) == pytest.approx(1000.0, abs=1e-6)


def test_parsons_sclater_1977():
    # Parsons & Sclater (1977), J. Geophys. Res. 82, 803-827, evaluated by hand
    p = MODELS["ps77"]
    assert p.depth(np.array([40.0]))[0] == pytest.approx(2500 + 350 * math.sqrt(40))
    assert p.depth(np.array([100.0]))[0] == pytest.approx(6400 - 3200 * math.exp(-100 / 62.8))
    assert p.heat_flow(np.array([16.0]))[0] == pytest.approx(11.3 / 4 * 41.84)
    assert 11.3 * 41.84 == pytest.approx(472.8, abs=0.05)  # the conversion to mW m-2
    # the switch age is a parameter
    q = p.with_parameters(switch_age_myr=60.0)
    assert q.depth(np.array([65.0]))[0] == pytest.approx(6400 - 3200 * math.exp(-65 / 62.8))
    # agegrid's continuation of heat flow is continuous at the switch
    assert p.heat_flow(np.array([119.999]))[0] == pytest.approx(p.heat_flow(np.array([120.0]))[0], rel=1e-4)


@pytest.mark.parametrize("name", sorted(MODELS))
def test_models_are_nan_safe_and_finite(name):
    m = MODELS[name]
    age = np.array([np.nan, -1.0, 0.0, 1e-9, 1.0])
    d, q = m.depth(age), m.heat_flow(age)
    assert np.isnan(d[:2]).all() and np.isnan(q[:2]).all()
    assert np.isfinite(d[2:]).all() and np.isfinite(q[2:]).all()
    # depth grows with age and heat flow falls, on each branch of a piecewise fit (the PS77 depth fits
    # themselves step down by about 78 m at 70 Myr: 2500 + 350 sqrt(70) against 6400 - 3200 exp(-70/62.8))
    switch = m.parameters.get("switch_age_myr", 1e9)
    for t in (np.linspace(0.5, min(switch, 150) - 1e-6, 150), np.linspace(min(switch, 150), 150, 150)):
        assert np.all(np.diff(m.depth(t)) >= -1e-9)
        assert np.all(np.diff(m.heat_flow(t)) <= 1e-9)


@pytest.mark.parametrize("name", sorted(MODELS))
def test_float32_ages_give_the_float64_values_rounded_once(name):
    """A build's float32 age layer: each model's depth and heat flow are the float64 results (the reference,
    from the same ages widened exactly) rounded to float32, without float64 copies of the block."""
    m = MODELS[name]
    age = np.concatenate([AGES, [np.nan, -1.0, 0.05, 250.0]]).astype(np.float32)
    for law in (m.depth, m.heat_flow):
        got, reference = law(age), law(age.astype(np.float64))
        assert got.dtype == np.float32 or name == "plate"
        np.testing.assert_array_equal(got.astype(np.float32), reference.astype(np.float32))


def test_unknown_parameter_refused():
    with pytest.raises(ValueError, match="no parameter"):
        MODELS["plate"].with_parameters(thickness=100)


@pytest.mark.parametrize("with_observed", [True, False])
def test_cooling_planes_of_a_grid_are_the_models_on_its_ages(with_observed):
    # the build's depth, heat-flow and residual layers, one task per model and block reading the age from the
    # age engine's stacked blocks, equal each model evaluated on the whole age grid (the published formulas
    # are checked above) and depth minus the observed depth (numpy); dask's record of the tasks it ran shows
    # one task per model and block
    import dask.array as da
    from dask.callbacks import Callback

    from agegrid.pipeline import cooling_planes
    from agegrid.streaming import Plane

    rng = np.random.default_rng(5)
    stack = rng.uniform(-1.0, 190.0, size=(3, 23, 31)).astype(np.float32)
    stack[1, 4:9, 2:6] = np.nan
    chunks = ((3,), (10, 10, 3), (16, 15))
    age = Plane("age", da.from_array(stack, chunks=chunks), 1, np.dtype(np.float32))
    observed = rng.uniform(2000.0, 6000.0, size=(23, 31)).astype(np.float32)
    models = {name: MODELS[name] for name in ("gdh1", "ps77", "hsc")}
    planes = cooling_planes(models, age, da.from_array(observed, chunks=chunks[1:]) if with_observed else None)
    assert set(planes) == {f"{kind}_{m}" for m in models
                           for kind in ("depth", "heat_flow") + (("residual",) if with_observed else ())}
    ran = []

    class Executed(Callback):
        def _pretask(self, key, dsk, state):
            ran.append(key)

    with Executed():
        stacks = {m: planes[f"depth_{m}"].stack.compute() for m in models}
    assert sum(1 for key in ran if key[0].startswith("cooling-")) == 3 * 3 * 2
    for name, model in models.items():
        for kind, expected in (("depth", model.depth(stack[1])), ("heat_flow", model.heat_flow(stack[1]))):
            plane = planes[f"{kind}_{name}"]
            np.testing.assert_array_equal(plane.of(stacks[name]), expected)
            np.testing.assert_array_equal(plane.array().compute(), expected)
            assert plane.array().dtype == np.float32
        if with_observed:
            np.testing.assert_array_equal(planes[f"residual_{name}"].array().compute(),
                                          model.depth(stack[1]) - observed)
