"""Retiming a chron-dated grid equals a fresh build in the other timescale."""
import numpy as np
import xarray as xr

from agegrid import timescale
from agegrid.cli import main
from agegrid.synthetic import SyntheticBasin
from tests.helpers import basin_build


def test_retimed_grid_equals_fresh_build(tmp_path):
    basin = SyntheticBasin()
    records = basin.survey(timescale.load("CK95"), 40, noise_km=1.5, seed=7)
    ck = basin_build(tmp_path / "ck95", records=records, spacing=0.1, timescale_name="CK95")
    gts = basin_build(tmp_path / "gts", records=records, spacing=0.1, timescale_name="GTS2012")
    assert main(["build", str(ck), "--quiet"]) == 0
    assert main(["build", str(gts), "--quiet"]) == 0
    retimed = tmp_path / "retimed.nc"
    assert main(["retime", str(tmp_path / "ck95/out/basin.nc"), "--timescale", "GTS2012", "--output",
                 str(retimed), "--quiet"]) == 0
    with xr.open_dataset(retimed) as r, xr.open_dataset(tmp_path / "gts/out/basin.nc") as f, \
            xr.open_dataset(tmp_path / "ck95/out/basin.nc") as c:
        both = np.isfinite(r["age"].values) & np.isfinite(f["age"].values)
        assert both.mean() > 0.4
        # equal to within the float32 storage: a unit in the last place of the age (Myr) either way
        assert r["age"].dtype == f["age"].dtype == np.float32
        assert np.all(np.abs(r["age"].values[both] - f["age"].values[both]) <= np.spacing(f["age"].values[both]))
        assert r.attrs["timescale"] == "GTS2012"
        # the scales really differ here, so the test can fail
        assert np.nanmax(np.abs(c["age"].values - f["age"].values)) > 0.1
        rate_ok = both & np.isfinite(r["half_rate"].values) & np.isfinite(f["half_rate"].values)
        assert np.allclose(r["half_rate"].values[rate_ok], f["half_rate"].values[rate_ok], rtol=1e-4)


def test_retime_refuses_age_ma_grids(tmp_path, capsys):
    basin = SyntheticBasin()
    records = [{**r, "chron": "", "age_ma": r["age_ma"]} for r in basin.survey(timescale.load("CK95"), 15, seed=2)]
    build = basin_build(tmp_path, records=records, spacing=0.25)
    from tests.helpers import write_picks

    write_picks(tmp_path / "picks.csv", records, columns=("id", "track", "lon", "lat", "age_ma"))
    assert main(["build", str(build), "--quiet"]) == 0
    assert main(["retime", str(tmp_path / "out/basin.nc"), "--timescale", "GTS2012", "--output",
                 str(tmp_path / "r.nc"), "--quiet"]) == 2
    assert "cannot be retimed" in capsys.readouterr().err
    assert not (tmp_path / "r.nc").exists()


def test_labels_that_mean_other_boundaries_are_warned():
    """CK95's C1r.2r ends at C2n, GTS2012's at C1r.2n (shared/timescales/README.md caveats)."""
    from agegrid.retime import boundary_ages

    ages, warnings = boundary_ages(["ridge", "C1r.2r:old", "C5n.2n:old"], timescale.load("GTS2012"),
                                   named_in=timescale.load("CK95"))
    assert ages[1] == timescale.load("GTS2012").boundary("C1r.2r", "old")
    assert len(warnings) == 1 and "C1r.2r:old" in warnings[0] and "C2n" in warnings[0]
