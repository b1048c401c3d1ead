"""Pick QA finds planted duplicates, inversions, impossible rates and picks off the domain; nothing on clean picks."""
import json

import numpy as np
import pytest

from agegrid import sphere, timescale
from agegrid.cli import main
from agegrid.synthetic import SyntheticBasin
from tests.helpers import basin_build


def validate(build_file, capsys) -> dict:
    assert main(["validate", str(build_file), "--quiet"]) == 0
    return json.loads(capsys.readouterr().out)


@pytest.mark.parametrize("noise", [0.0, 1.5])
def test_clean_picks_report_nothing(tmp_path, capsys, noise):
    report = validate(basin_build(tmp_path, tracks=40, seed=3, noise_km=noise, spacing=0.1), capsys)
    assert report["qa"]["findings"] == 0, report["qa"]["suspect_picks"][:5]


def test_planted_problems_are_found(tmp_path, capsys):
    basin = SyntheticBasin()
    ck = timescale.load("CK95")
    records = basin.survey(ck, 40, noise_km=0.5, seed=3)
    # a track with several picks on one flank of one corridor, ordered outward from the ridge
    by_key = {}
    for r in records:
        by_key.setdefault((r["track"], r["true_corridor"], r["true_flank"]), []).append(r)
    group = max(by_key.values(), key=len)
    group.sort(key=lambda r: r["age_ma"])
    far = group[-1]
    assert len(group) >= 5
    planted = {}
    dup = dict(group[2], id="PLANT-DUP")
    planted["duplicate"] = dup["id"]
    young = dict(group[-2], id="PLANT-INV", chron="C2n", edge="young")  # a young age far out on the flank
    planted["age_inversion"] = young["id"]
    # 0.3 km outward of a pick but half-way in age to the next one out: well under 2 mm/yr
    base, nxt = group[2], group[3]
    lon, lat = np.array([base["lon"]]), np.array([base["lat"]])
    az = basin.azimuth(lon, lat)[0]
    import pyproj

    geod = pyproj.Geod(a=sphere.EARTH_RADIUS_KM * 1e3, b=sphere.EARTH_RADIUS_KM * 1e3)
    lon2, lat2, _ = geod.fwd(lon, lat, [az], [300.0])
    between = [c for c in ck.chrons if base["age_ma"] < ck.boundary(c, "young") < nxt["age_ma"]]
    assert between, "no chron between two picks of the chosen track"
    fast = dict(base, id="PLANT-SLOW", lon=float(lon2[0]), lat=float(lat2[0]), chron=between[0], edge="young")
    planted["implausible_rate"] = fast["id"]
    west, east, south, north = basin.region(0.5)
    off = dict(far, id="PLANT-OFF", track="", lon=west + 0.2, lat=north - 0.2)
    planted["outside_domain"] = off["id"]
    build = basin_build(tmp_path, records=records + [dup, young, fast, off], spacing=0.1)
    report = validate(build, capsys)
    found = {(f["id"], f["kind"]) for f in report["qa"]["suspect_picks"]}
    for kind, pid in planted.items():
        assert (pid, kind) in found, (kind, pid, sorted(found))
    for f in report["qa"]["suspect_picks"]:
        assert f["where"].startswith("line ")
    assert len(found) <= len(planted) + 3  # little besides the planted picks


def test_suspect_policy_fail_exits_2(tmp_path, capsys):
    basin = SyntheticBasin()
    records = basin.survey(timescale.load("CK95"), 20, noise_km=0.5, seed=2)
    records.append(dict(records[5], id="PLANT-DUP"))
    build = basin_build(tmp_path, records=records, spacing=0.2, extra='[picks]\nsuspect = "fail"\n')
    assert main(["build", str(build), "--quiet"]) == 2
    err = capsys.readouterr().err
    assert "suspect pick" in err and "picks.csv: line " in err and "picks.suspect" in err
