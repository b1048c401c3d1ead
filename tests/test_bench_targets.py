"""The benchmark's target check (bench/run_bench.py), on result rows of the shape it writes."""
import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "bench"))

import run_bench  # noqa: E402


def row(cells, age_ratio, warm, alone, fresh, wall, layers, peak):
    return {"cells": cells, "age_over_griddata": age_ratio,
            "steady_build": {"over_griddata": warm, "over_griddata_alone": alone},
            "build": {"wall_s": wall, "layers_and_files_s": layers, "peak_memory_mb": peak,
                      "layers_and_files_over_fresh_griddata": fresh}}


def test_targets_hold_every_measure_to_its_limit():
    # the limits are agegrid's performance goals (no outside source); the ratios below are typed in, so the
    # expected verdicts follow from them by hand
    results = [row(211_500, 3.1, 2.8, 9.2, 13.8, 3.8, 0.44, 480.0),  # too small for the ratio targets
               row(3_384_000, 1.35, 5.8, 8.3, 7.9, 5.1, 1.44, 683.0),
               row(54_144_000, 0.63, 3.8, 6.9, 4.2, 20.0, 14.7, 1600.0)]
    checked = {t["target"]: t for t in run_bench.targets(results)}
    assert set(checked) == {"age stage at 3,384,000 cells, x griddata", "whole build at 3,384,000 cells, x griddata",
                            "peak memory at 54,144,000 cells, MB",
                            "16x the cells (211,500 -> 3,384,000), x the time",
                            "16x the cells (3,384,000 -> 54,144,000), x the time"}
    assert checked["age stage at 3,384,000 cells, x griddata"]["met"]
    # one of the three whole-build measures over 8x: the target is not met
    whole = checked["whole build at 3,384,000 cells, x griddata"]
    assert whole["values"]["warm, griddata alone"] == 8.3 and not whole["met"]
    assert not checked["peak memory at 54,144,000 cells, MB"]["met"]
    scaling = checked["16x the cells (3,384,000 -> 54,144,000), x the time"]
    assert scaling["values"] == {"command": round(20.0 / 5.1, 2), "layers and files": round(14.7 / 1.44, 2)}
    assert scaling["met"]


def test_fresh_build_reports_each_stages_peak_memory(tmp_path):
    # The bench restarts the kernel's high-water mark (VmHWM and clear_refs, Linux's proc(5)) as each stage
    # starts; the whole run's peak it reports must still be the process's, checked against the mark of the
    # same build run without restarts.
    import json
    import os
    import subprocess

    from tests.helpers import basin_build

    build = basin_build(tmp_path, spacing=0.2, chunk=64, formats=("netcdf", "geotiff"))
    env = {**os.environ, "PYTHONPATH": str(run_bench.ROOT)}
    out = subprocess.run([sys.executable, "-c", run_bench.FRESH_BUILD, str(build)], capture_output=True, text=True,
                         env=env, timeout=300)
    assert out.returncode == 0, out.stderr
    run = json.loads(out.stdout.splitlines()[-1])
    stages = json.loads((tmp_path / "out" / "manifest.json").read_text())["timings_s"]
    assert run["rc"] == 0 and set(run["stage_peaks_mb"]) == set(stages) - {"total"}
    assert max(run["stage_peaks_mb"].values()) <= run["peak_mb"]
    assert run["stage_peaks_mb"]["read inputs"] < run["stage_peaks_mb"]["report"]  # the report's plotting
    plain = ("import sys; from agegrid.cli import main; from agegrid.manifest import peak_memory_mb; "
             "main(['build', sys.argv[1], '--force', '--quiet']); print(peak_memory_mb()['process'])")
    reference = float(subprocess.run([sys.executable, "-c", plain, str(build)], capture_output=True, text=True,
                                     env=env, timeout=300, check=True).stdout)
    assert abs(run["peak_mb"] - reference) < 0.1 * reference, (run["peak_mb"], reference)
