"""Grouped order statistics against numpy's own percentile and median, group by group."""
import numpy as np
import pytest

from agegrid.grouped import Groups
from agegrid.kinematics import rate_rows


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
@pytest.mark.parametrize("spread", [1, 10**7])  # dense codes, and codes sparse enough to be ranked first
def test_quantiles_match_numpy_per_group(dtype, spread):
    rng = np.random.default_rng(4)
    codes = rng.integers(0, 40, 20_000) * spread
    values = rng.normal(0, 100, codes.size).astype(dtype)
    values[rng.random(codes.size) < 0.1] = np.nan
    values[codes == 7 * spread] = np.nan  # a group without any finite value
    cells = np.flatnonzero(rng.random(codes.size) < 0.8)  # a subset of the cells, as the tables take
    groups = Groups(codes[cells], cells)
    counts, quartiles = groups.quantiles(values, (25, 50, 75))
    assert list(groups.codes) == sorted(set(codes[cells]))
    for code, count, row in zip(groups.codes, counts, quartiles):
        mine = values[cells][codes[cells] == code]
        finite = mine[np.isfinite(mine)]
        assert count == finite.size
        if finite.size:  # numpy's percentile, linear interpolation (its default), is the reference
            np.testing.assert_allclose(row, np.percentile(finite, [25, 50, 75]), rtol=1e-6, atol=1e-9)
        else:
            assert np.isnan(row).all()


def test_rate_rows_against_a_direct_computation():
    rng = np.random.default_rng(9)
    n = 30_000
    comp = rng.integers(1, 6, n)
    flank = rng.choice([-1, 0, 1], n)
    age = rng.uniform(0, 30, n)
    age[rng.random(n) < 0.05] = np.nan
    half = rng.uniform(10, 40, n).astype(np.float32)
    full = (2 * half + rng.normal(0, 2, n)).astype(np.float32)
    full[rng.random(n) < 0.2] = np.nan
    asym = 100 * half / full
    az = (rng.normal(0, 20, n) + 90 * flank) % 360
    rows = rate_rows(comp, flank, age, half, full, asym, az, 5.0)
    ok = np.isfinite(age) & (flank != 0)
    keys = sorted({(c, f, int(b)) for c, f, b in zip(comp[ok], flank[ok], np.floor(age[ok] / 5))})
    assert [(r["segment"], r["flank"], int(r["age_from_myr"] / 5)) for r in rows] == keys
    for row in rows:
        side = ok & (comp == row["segment"]) & (flank == row["flank"])
        sel = side & (np.floor(age / 5) == row["age_from_myr"] / 5)
        has_full = sel & np.isfinite(full)
        assert row["cells"] == sel.sum() and row["full_rate_cells"] == has_full.sum()
        assert row["half_rate_mm_yr"] == pytest.approx(np.median(half[sel]), abs=1e-3)
        assert row["full_rate_mm_yr"] == pytest.approx(np.median(full[has_full]), abs=1e-3)
        assert row["asymmetry_percent"] == pytest.approx(np.median(asym[has_full]), abs=1e-2)
        # the circular mean of the flank's azimuths, by its textbook definition (from memory)
        rad = np.radians(az[side])
        mean = np.degrees(np.arctan2(np.sin(rad).mean(), np.cos(rad).mean())) % 360
        assert abs((row["flank_azimuth_deg"] - mean + 180) % 360 - 180) <= 0.051
