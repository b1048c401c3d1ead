"""Isochron lines as control, picks mixing age_ma and chron rows, and the suspect-pick policies."""
import json

import numpy as np
import xarray as xr

from agegrid import timescale
from agegrid.cli import main
from agegrid.synthetic import SyntheticBasin
from tests.helpers import basin_build, write_lines, write_picks


def test_isochron_lines_and_mixed_picks(tmp_path):
    """Sparse picks plus a few isochron lines (chron-labelled and age_ma) beat the sparse picks alone."""
    basin = SyntheticBasin()
    ck = timescale.load("CK95")
    records = basin.survey(ck, 12, noise_km=1.5, seed=21)
    for i, r in enumerate(records):  # every third row dated by age_ma alone
        if i % 3 == 0:
            r["chron"] = ""
    build = basin_build(tmp_path / "picks", basin, records=records, spacing=0.1)
    write_picks(tmp_path / "picks" / "picks.csv", records, columns=("id", "track", "lon", "lat", "chron", "edge",
                                                                     "age_ma"))
    assert main(["build", str(build), "--quiet"]) == 0
    lines, props = [], []
    for corridor in range(3):
        for flank in (-1, 1):
            for chron, edge in (("C6n", "young"), ("C13n", "young")):
                lines.append(basin.isochron(ck.boundary(chron, edge), flank, corridor))
                props.append({"chron": chron, "edge": edge})
            lines.append(basin.isochron(30.0, flank, corridor))
            props.append({"age_ma": 30.0})
    with_lines = basin_build(tmp_path / "lines", basin, records=records, spacing=0.1)
    write_picks(tmp_path / "lines" / "picks.csv", records, columns=("id", "track", "lon", "lat", "chron", "edge",
                                                                     "age_ma"))
    write_lines(tmp_path / "lines" / "isochrons.geojson", lines, props)
    text = with_lines.read_text().replace("[grid]", 'isochrons = "isochrons.geojson"\n[grid]')
    with_lines.write_text(text)
    assert main(["build", str(with_lines), "--quiet"]) == 0

    def rms(folder):
        with xr.open_dataset(folder / "out" / "basin.nc") as ds:
            lon, lat = np.meshgrid(ds["lon"].values, ds["lat"].values)
            err = ds["age"].values - basin.age(lon, lat)
        return float(np.sqrt(np.nanmean(err**2)))

    assert rms(tmp_path / "lines") < rms(tmp_path / "picks")
    assert rms(tmp_path / "lines") <= 0.15
    with xr.open_dataset(tmp_path / "lines" / "out" / "basin.nc") as ds:
        labels = ds["age_bracket_young"].attrs["boundary_labels"].split()
    assert "C6n:young" in labels and "age:30.000000" in labels


def test_suspect_policy_drop(tmp_path):
    basin = SyntheticBasin()
    records = basin.survey(timescale.load("CK95"), 20, noise_km=0.5, seed=2)
    far = dict(records[3], id="PLANT-INV", chron="C2n", edge="young")  # a young age far out: an inversion
    records.append(far)
    build = basin_build(tmp_path, records=records, spacing=0.2, extra='[picks]\nsuspect = "drop"\n')
    assert main(["build", str(build), "--quiet"]) == 0
    manifest = json.loads((tmp_path / "out" / "manifest.json").read_text())
    assert "PLANT-INV" in {f["id"] for f in manifest["qa"]["suspect_picks"]}
    assert "age model without suspect picks" in manifest["timings_s"]
