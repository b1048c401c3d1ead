"""The build report renders in headless Chromium, every image loads, and the plots are not blank."""
import base64
import io
import json
import os
import re
import shutil
import subprocess

import numpy as np
import pytest
from PIL import Image

from agegrid.cli import main

CHROMIUM = shutil.which("chromium") or shutil.which("chromium-browser")
FLAGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking", "--disable-component-update",
         "--disable-sync", "--no-first-run", "--disable-quic"]


def chromium(tmp_path, *args):
    if CHROMIUM is None:
        if os.environ.get("CI"):
            pytest.fail("chromium is not installed (.ci/run installs Debian's chromium)")
        pytest.skip("chromium is not installed")
    result = subprocess.run([CHROMIUM, *FLAGS, f"--user-data-dir={tmp_path / 'profile'}", *args],
                            capture_output=True, text=True, timeout=120)
    return result.stdout


def test_every_image_loads_in_chromium(demo_build, tmp_path):
    page = (demo_build / "report.html").read_text()
    assert page.count("<img") >= 6
    probe = tmp_path / "probe.html"
    probe.write_text(page.replace("</body>", "<script>window.addEventListener('load', () => {"
                                  "const i = [...document.images];"
                                  "document.title = 'loaded ' + i.filter(x => x.complete && x.naturalWidth > 0).length"
                                  " + ' of ' + i.length;});</script></body>"))
    dom = chromium(tmp_path, "--virtual-time-budget=10000", "--dump-dom", probe.as_uri())
    loaded = re.search(r"<title>loaded (\d+) of (\d+)</title>", dom)
    assert loaded, dom[:500]
    assert loaded.group(1) == loaded.group(2) and int(loaded.group(2)) == page.count("<img")
    shot = tmp_path / "shot.png"
    chromium(tmp_path, "--window-size=1200,2400", f"--screenshot={shot}", (demo_build / "report.html").as_uri())
    pixels = np.asarray(Image.open(shot).convert("RGB"))
    assert len(np.unique(pixels.reshape(-1, 3), axis=0)) > 500  # a rendered page with plots, not a blank one


def test_age_map_uses_its_colour_range(demo_build):
    page = (demo_build / "report.html").read_text()
    first = re.search(r"data:image/png;base64,([A-Za-z0-9+/=]+)", page).group(1)
    image = np.asarray(Image.open(io.BytesIO(base64.b64decode(first))).convert("RGB")).astype(float)
    assert image.shape[0] > 300 and image.shape[1] > 300
    # cividis runs from dark blue to yellow: both ends appear in the age map
    blue = (image[..., 2] > 80) & (image[..., 0] < 60) & (image[..., 1] < 80)
    yellow = (image[..., 0] > 200) & (image[..., 1] > 180) & (image[..., 2] < 120)
    assert blue.mean() > 0.005 and yellow.mean() > 0.005
    assert image.std() > 30


def test_report_regenerates_without_rebuilding(demo_build, tmp_path, capsys):
    folder = tmp_path / "copy"
    shutil.copytree(demo_build, folder)
    (folder / "report.html").unlink()
    nc_before = (folder / "veyra-basin.nc").stat().st_mtime_ns
    assert main(["report", str(folder)]) == 0
    assert (folder / "report.html").is_file()
    assert (folder / "veyra-basin.nc").stat().st_mtime_ns == nc_before
    assert "Caution" in (folder / "report.html").read_text()
    assert main(["report", str(tmp_path)]) == 2


def test_report_can_be_switched_off(tmp_path):
    from tests.helpers import basin_build

    build = basin_build(tmp_path, tracks=15, spacing=0.3, extra="report = false\n")
    text = build.read_text().replace('formats = ["netcdf"]\nreport = false', 'formats = ["netcdf"]\nreport = false')
    build.write_text(text)
    assert main(["build", str(build), "--quiet"]) == 0
    assert not (tmp_path / "out" / "report.html").exists()


def test_report_lists_the_control_the_engine_left_out(tmp_path):
    # the sparse survey whose lone mislabelled pick the engine drops (tests.test_age_engine): the report names the
    # dropped trace and the left-out picks, as the manifest records them
    from agegrid import timescale
    from agegrid.synthetic import SyntheticBasin
    from tests.helpers import basin_build
    from tests.test_age_engine import _mislabelled

    records = SyntheticBasin().survey(timescale.load("CK95"), 25, noise_km=1.5, seed=3)
    build = basin_build(tmp_path, records=_mislabelled(records, [-2, -1, 1, 2], 103), spacing=0.1)
    assert main(["build", str(build), "--quiet"]) == 0
    manifest = json.loads((tmp_path / "out" / "manifest.json").read_text())
    engine = manifest["age_model"]
    page = (tmp_path / "out" / "report.html").read_text()
    section = page[page.index("<h2>Control the age engine left out</h2>"):]
    assert f"{engine['outlier_control_points']} control points disagree" in section
    assert all(pick in section for pick in engine["picks_left_out_as_inconsistent"][:50])
    lone = [d for d in engine["dropped_traces"] if d["reason"] == "a lone pick off the other segments' rate"]
    assert lone and f"<td>{lone[0]['age_ma']}</td>" in section
