"""Benchmarks: the age stage and whole builds against scipy's linear griddata, measured in the same run.

For each grid size: a synthetic basin (agegrid.synthetic, exactly known ages), 60 survey tracks of picks; the
age stage (control, compartments, trace model, kernel) timed in process and scipy.interpolate.griddata
(linear) from the same picks and ridge points onto the same cells, run alternately `repeats` times each,
medians; accuracy of both against the true ages (all cells and cells within 0.5 degrees of a fracture zone);
then whole builds (`agegrid build`, three cooling models, bathymetry, NetCDF and a COG per layer) in a fresh
process each, with per-stage timings from the manifest and the peak memory of each stage and of the whole
process: the wall time of the command (module imports included) and the layers-and-files time (the manifest's
total: inputs read to every layer written as NetCDF and COG, with the tables; the report is timed apart), each
build followed by griddata in a fresh process, timed after its imports (the fresh-process baseline); and the
same builds run in this process after a warm-up, alternately with griddata, as the age stage is measured (the
like-for-like ratio: no imports, numba start-up or first allocations on either side).

    python bench/run_bench.py [--sizes 0.1,0.025] [--repeats 5] [--builds 3] [--large] [--magnetic]

Results are printed and written to bench/results/bench-<time>.json. The machine is noisy: read the
ratios and medians, not single timings.
"""
from __future__ import annotations

import argparse
import json
import os
import statistics
import subprocess
import sys
import tempfile
import time
from datetime import datetime, timezone
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from agegrid import thermal, timescale  # noqa: E402
from agegrid.age import Settings, age_layers, build_age_model  # noqa: E402
from agegrid.allocator import keep_freed_memory  # noqa: E402
from agegrid.compartments import build_compartments  # noqa: E402
from agegrid.control import build_control  # noqa: E402
from agegrid.grid import GridSpec  # noqa: E402
from agegrid.io.geotiff import CODECS  # noqa: E402
from agegrid.io.points import read_picks  # noqa: E402
from agegrid.io.vectors import LineFeature  # noqa: E402
from agegrid.synthetic import SyntheticBasin  # noqa: E402
from tests.helpers import basin_build, write_picks  # noqa: E402


#: agegrid's performance targets, checked against each run's own measurements (:func:`targets`): the age
#: stage and the whole build on about 3 million cells as multiples of griddata's time, the time of 16x the
#: cells as a multiple of the smaller grid's, and a build's peak memory at ~46 million cells or more.
AGE_STAGE_MAX, WHOLE_BUILD_MAX, SCALING_MAX, PEAK_MB_MAX = 2.0, 8.0, 20.0, 1500.0


def targets(results: list[dict]) -> list[dict]:
    """Each target this run measured: what, the measured values, the limit and whether every value is within it."""
    out = []
    for row in results:
        if 1e6 <= row["cells"] <= 1e7:
            steady, where = row["steady_build"], f"{row['cells']:,} cells"
            out.append({"target": f"age stage at {where}, x griddata", "limit": AGE_STAGE_MAX,
                        "values": {"alternated": row["age_over_griddata"]}})
            out.append({"target": f"whole build at {where}, x griddata", "limit": WHOLE_BUILD_MAX,
                        "values": {"warm, alternated": steady["over_griddata"],
                                   "warm, griddata alone": steady["over_griddata_alone"],
                                   "fresh processes, layers and files": row["build"][
                                       "layers_and_files_over_fresh_griddata"]}})
        if row["cells"] >= 4e7:
            out.append({"target": f"peak memory at {row['cells']:,} cells, MB", "limit": PEAK_MB_MAX,
                        "values": {"build process": row["build"]["peak_memory_mb"]}})
    for small, big in zip(results, results[1:]):
        if round(big["cells"] / small["cells"]) == 16:
            out.append({"target": f"16x the cells ({small['cells']:,} -> {big['cells']:,}), x the time",
                        "limit": SCALING_MAX, "values": {
                            "command": round(big["build"]["wall_s"] / small["build"]["wall_s"], 2),
                            "layers and files": round(big["build"]["layers_and_files_s"]
                                                      / small["build"]["layers_and_files_s"], 2)}})
    for target in out:
        target["met"] = all(v <= target["limit"] for v in target["values"].values())
    return out


def score(error: np.ndarray, mask: np.ndarray | None = None) -> dict:
    e = error if mask is None else np.where(mask, error, np.nan)
    e = np.abs(e[np.isfinite(e)])
    if not e.size:
        return {"rms": None, "p95": None}
    return {"rms": round(float(np.sqrt(np.mean(e**2))), 4), "p95": round(float(np.percentile(e, 95)), 4)}


def age_stage(spec, basin, picks, scale):
    """The whole age stage in process; returns the age grid."""
    import dask

    comps = build_compartments(spec, basin.fracture_zones(), basin.domain_polygon())
    ridges = [LineFeature(i, r, {}) for i, r in enumerate(basin.ridges())]
    step = np.radians(spec.spacing) / 2
    control = build_control(picks, scale, ridges, step, default_sigma_km=1.5)
    model = build_age_model(spec, comps, control, Settings())
    age = age_layers(spec, comps, model, names=("age",))["age"]  # the kernel's dating part alone
    with dask.config.set(scheduler="threads"):
        return age.compute()


def griddata_points(basin, records) -> tuple[np.ndarray, np.ndarray]:
    """griddata's control: the picks' positions and ages, and the ridge points at age zero."""
    ridge = np.concatenate(basin.ridges())
    points = np.concatenate([np.array([[r["lon"], r["lat"]] for r in records]), ridge])
    return points, np.concatenate([[r["age_ma"] for r in records], np.zeros(len(ridge))])


def generic(spec, basin, records):
    """scipy's linear griddata from the picks and ridge points (what users do today)."""
    from scipy.interpolate import griddata

    points, values = griddata_points(basin, records)
    lon, lat = np.meshgrid(spec.x, spec.y)
    return griddata(points, values, (lon, lat), method="linear")


def timed_pair(first, second, repeats):
    """Median wall times of two functions run alternately (on a noisy machine both see the same load)."""
    times, results = ([], []), [None, None]
    for _ in range(repeats):
        for k, func in enumerate((first, second)):
            start = time.perf_counter()
            results[k] = func()
            times[k].append(time.perf_counter() - start)
    return [(statistics.median(t), t, r) for t, r in zip(times, results)]


def write_bathymetry(path: Path, basin: SyntheticBasin, spec: GridSpec) -> None:
    import xarray as xr

    lon, lat = np.meshgrid(spec.x, spec.y)
    age = basin.age(lon, lat)
    depth = np.where(np.isfinite(age), thermal.MODELS["gdh1"].depth(np.nan_to_num(age)), 4500.0)
    xr.Dataset({"depth": (("lat", "lon"), depth.astype(np.float32), {"units": "m", "positive": "down"})},
               coords={"lat": spec.y, "lon": spec.x}).to_netcdf(path)


#: griddata in a fresh process, timed after its imports (as a build's layers-and-files time is): its inputs
#: from the .npz named first, the seconds printed.
FRESH_GRIDDATA = ("import sys, time; import numpy as np; from scipy.interpolate import griddata; "
                  "d = np.load(sys.argv[1]); t = time.perf_counter(); lon, lat = np.meshgrid(d['x'], d['y']); "
                  "griddata(d['points'], d['values'], (lon, lat), method='linear'); print(time.perf_counter() - t)")


def griddata_inputs(path: Path, spec, basin, records) -> Path:
    """Save :func:`generic`'s points, values and grid axes for :data:`FRESH_GRIDDATA`."""
    points, values = griddata_points(basin, records)
    np.savez(path, points=points, values=values, x=spec.x, y=spec.y)
    return path


#: `agegrid build --force` in a fresh process, the build file named first; prints as JSON its wall time (from
#: before the command's start-up), the peak resident memory of each stage and of the whole run, and the exit
#: code. Peaks are the kernel's high-water mark (VmHWM, which starts afresh at exec; ru_maxrss would carry the
#: bench's own size into the child), restarted from the current size as each stage starts (writing 5 to
#: /proc/self/clear_refs, Linux 4.0 and later) and read as it ends; the whole run's is the largest of those
#: and of the marks read between stages. Where the mark cannot be restarted, each stage shows the run's peak
#: so far.
FRESH_BUILD = """
import contextlib, json, sys, time
from pathlib import Path

def high_water_mb():
    from agegrid.manifest import peak_memory_mb
    return peak_memory_mb()["process"]

def restart_high_water():
    try:
        Path("/proc/self/clear_refs").write_text("5")
    except OSError:
        pass

start = time.perf_counter()
from agegrid.startup import ready_to_build  # what the command does first (then a no-op when it does it)
ready_to_build()
from agegrid import pipeline
from agegrid.cli import main

stage_peaks, run_peak, timed = {}, [0.0], pipeline.Stages.__call__

@contextlib.contextmanager
def measured(self, name):
    run_peak[0] = max(run_peak[0], high_water_mb())
    restart_high_water()
    with timed(self, name):
        yield
    stage_peaks[name] = round(high_water_mb(), 1)
    run_peak[0] = max(run_peak[0], stage_peaks[name])

pipeline.Stages.__call__ = measured
rc = main(["build", sys.argv[1], "--force", "--quiet"])
wall = time.perf_counter() - start
print(json.dumps({"wall_s": wall, "peak_mb": round(max(run_peak[0], high_water_mb()), 1),
                  "stage_peaks_mb": stage_peaks, "rc": rc}))
"""


def whole_build(folder: Path, runs: int, griddata_npz: Path) -> dict:
    """`agegrid build --force` in fresh processes (:data:`FRESH_BUILD`), each followed by griddata in a fresh
    process (the like-for-like baseline of the layers-and-files time); median wall time, stage timings, peak
    memory of the whole run and of each stage (the largest over the runs)."""
    walls, peaks, stages, grids, stage_peaks = [], [], [], [], []
    for _ in range(runs):
        out = subprocess.run([sys.executable, "-c", FRESH_BUILD, str(folder / "build.toml")], capture_output=True,
                             text=True, check=True, env={**os.environ, "PYTHONPATH": str(ROOT)})
        run = json.loads(out.stdout.splitlines()[-1])
        assert run["rc"] == 0, out.stderr
        walls.append(run["wall_s"])
        peaks.append(run["peak_mb"])
        stage_peaks.append(run["stage_peaks_mb"])
        stages.append(json.loads((folder / "out" / "manifest.json").read_text())["timings_s"])
        grids.append(float(subprocess.run([sys.executable, "-c", FRESH_GRIDDATA, str(griddata_npz)],
                                          capture_output=True, text=True, check=True).stdout))
    median_stages = {k: round(statistics.median(s[k] for s in stages), 3) for k in stages[0]}
    noop = []
    for _ in range(runs):  # reruns with nothing changed, from the command line
        start = time.perf_counter()
        subprocess.run([sys.executable, "-m", "agegrid", "build", str(folder / "build.toml"), "--quiet"], check=True,
                       env={**os.environ, "PYTHONPATH": str(ROOT)})
        noop.append(time.perf_counter() - start)
    wall = statistics.median(walls)
    fresh_griddata = statistics.median(grids)
    return {"wall_s": round(wall, 3), "walls_s": [round(w, 3) for w in walls],
            "layers_and_files_s": median_stages["total"],
            "fresh_griddata_s": round(fresh_griddata, 3), "fresh_griddata_runs_s": [round(t, 3) for t in grids],
            "layers_and_files_over_fresh_griddata": round(median_stages["total"] / fresh_griddata, 2),
            "peak_memory_mb": round(max(peaks), 1), "stages_s": median_stages,
            "stage_peak_memory_mb": {k: max(p[k] for p in stage_peaks) for k in stage_peaks[0]},
            "noop_rerun_s": round(statistics.median(noop), 3), "noop_over_build": round(statistics.median(noop) / wall, 3)}


def steady_builds(folder: Path, griddata, repeats: int) -> dict:
    """Whole builds in this process after one warm-up, alternated with griddata as the age stage is: the
    like-for-like ratio (both warm, both under the same load); then griddata alone, back to back, for its
    undisturbed time (a build leaves the machine's caches and the allocator's free memory to the run after it).
    The layers-and-files time is the manifest's total; the report is left out."""
    from agegrid.config import load_build_file
    from agegrid.pipeline import build

    config = load_build_file(folder / "build.toml")
    config = config.model_copy(update={"output": config.output.model_copy(update={"report": False})})
    build(config, force=True, progress=False)  # imports, numba's start-up, first allocations
    builds, grids = [], []
    for _ in range(repeats):
        builds.append(build(config, force=True, progress=False)["timings_s"]["total"])
        start = time.perf_counter()
        griddata()
        grids.append(time.perf_counter() - start)
    alone = []  # griddata back to back, with no build in between: its undisturbed time
    for _ in range(repeats):
        start = time.perf_counter()
        griddata()
        alone.append(time.perf_counter() - start)
    t_build, t_grid, t_alone = statistics.median(builds), statistics.median(grids), statistics.median(alone)
    return {"layers_and_files_s": round(t_build, 3), "runs_s": [round(t, 3) for t in builds],
            "griddata_s": round(t_grid, 3), "griddata_runs_s": [round(t, 3) for t in grids],
            "over_griddata": round(t_build / t_grid, 2), "griddata_alone_s": round(t_alone, 3),
            "over_griddata_alone": round(t_build / t_alone, 2)}


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--sizes", default="0.1,0.025", help="grid spacings in degrees")
    parser.add_argument("--repeats", type=int, default=5)
    parser.add_argument("--builds", type=int, default=3)
    parser.add_argument("--large", action="store_true", help="add a grid of 16x the cells of the last size")
    parser.add_argument("--magnetic", action="store_true", help="include the magnetic model in the builds")
    parser.add_argument("--cog-compression", choices=tuple(CODECS), default="deflate",
                        help="the builds' [output] cog_compression")
    args = parser.parse_args(argv)
    keep_freed_memory()  # as a build sets the process's allocator: the age stage and griddata run under it too
    spacings = [float(s) for s in args.sizes.split(",")]
    if args.large:
        spacings.append(spacings[-1] / 4)
    basin = SyntheticBasin()
    scale = timescale.load("CK95")
    records = basin.survey(scale, 60, noise_km=1.5, seed=1)
    results = []
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        picks = read_picks(write_picks(tmp / "picks.csv", records))
        for spacing in spacings:
            spec = GridSpec(basin.region(0.5), spacing, chunk=512)
            age_stage(GridSpec(basin.region(0.5), 0.5), basin, picks, scale)  # compile and import once
            (t_age, all_age, age), (t_gen, all_gen, gen) = timed_pair(
                lambda: age_stage(spec, basin, picks, scale), lambda: generic(spec, basin, records), args.repeats)
            lon, lat = np.meshgrid(spec.x, spec.y)
            truth = basin.age(lon, lat)
            _, plat = basin.to_pole_frame(lon, lat)
            near = np.min(np.abs(plat[..., None] - np.array(basin.bands[1:-1])), axis=-1) < 0.5
            folder = tmp / f"build-{spacing}"
            extra = '[depth]\nmodels = ["gdh1", "ps77", "hsc"]\n'
            if args.magnetic:
                extra += "[magnetic]\nfield_inclination = 30.0\nfield_declination = 5.0\n"
            basin_build(folder, basin, records=records, spacing=spacing, chunk=512, formats=("netcdf", "geotiff"),
                        extra=f'cog_compression = "{args.cog_compression}"\n' + extra)
            text = (folder / "build.toml").read_text().replace('[grid]', 'bathymetry = "bathymetry.nc"\n[grid]')
            (folder / "build.toml").write_text(text)
            write_bathymetry(folder / "bathymetry.nc", basin, spec)
            build = whole_build(folder, args.builds, griddata_inputs(tmp / f"griddata-{spacing}.npz", spec, basin,
                                                                     records))
            steady = steady_builds(folder, lambda: generic(spec, basin, records), args.repeats)
            row = {
                "spacing_deg": spacing, "cells": spec.size, "picks": len(records),
                "cog_compression": args.cog_compression,
                "age_stage_s": round(t_age, 3), "age_stage_runs_s": [round(t, 3) for t in all_age],
                "griddata_s": round(t_gen, 3), "griddata_runs_s": [round(t, 3) for t in all_gen],
                "age_over_griddata": round(t_age / t_gen, 2),
                "build": build, "build_over_griddata": round(build["wall_s"] / t_gen, 2),
                "layers_and_files_over_griddata": round(build["layers_and_files_s"] / t_gen, 2),
                "steady_build": steady,
                "accuracy_agegrid": {"all": score(age - truth), "near_fz": score(age - truth, near),
                                     "empty_percent": round(100 * float((np.isfinite(truth) & ~np.isfinite(age)).sum()
                                                                         / np.isfinite(truth).sum()), 3)},
                "accuracy_griddata": {"all": score(gen - truth), "near_fz": score(gen - truth, near)},
            }
            results.append(row)
            print(f"{spec.size:>10,} cells  age stage {t_age:6.2f} s  griddata {t_gen:6.2f} s  "
                  f"ratio {row['age_over_griddata']:5.2f}  |  build {build['wall_s']:6.2f} s "
                  f"(x{row['build_over_griddata']:.1f} griddata), peak {build['peak_memory_mb']:.0f} MB")
            print(f"{'':>16}RMS/p95 Myr  agegrid {row['accuracy_agegrid']['all']}  near FZ "
                  f"{row['accuracy_agegrid']['near_fz']}  |  griddata {row['accuracy_griddata']['all']}  "
                  f"near FZ {row['accuracy_griddata']['near_fz']}")
            print(f"{'':>16}layers and files (inputs to every layer in NetCDF and COG, tables; no report, no "
                  f"start-up) {build['layers_and_files_s']:.2f} s (x{row['layers_and_files_over_griddata']:.1f} "
                  f"griddata; x{build['layers_and_files_over_fresh_griddata']:.1f} griddata in a fresh process after "
                  f"its imports, {build['fresh_griddata_s']:.3f} s)")
            print(f"{'':>16}the same in one process, warm, alternated with griddata: "
                  f"{steady['layers_and_files_s']:.2f} s against {steady['griddata_s']:.3f} s "
                  f"(x{steady['over_griddata']:.1f} griddata; griddata alone {steady['griddata_alone_s']:.3f} s, "
                  f"x{steady['over_griddata_alone']:.1f})")
            print(f"{'':>16}build stages (median s): {build['stages_s']}")
            print(f"{'':>16}build stages' peak memory (MB): {build['stage_peak_memory_mb']}")
            print(f"{'':>16}no-op rerun {build['noop_rerun_s']:.2f} s = {build['noop_over_build']:.2f} of a build")
        for small, big in zip(results, results[1:]):
            print(f"scaling: {big['cells'] / small['cells']:.1f}x the cells took "
                  f"{big['build']['wall_s'] / small['build']['wall_s']:.1f}x the build time "
                  f"({big['build']['layers_and_files_s'] / small['build']['layers_and_files_s']:.1f}x for the layers "
                  f"and files)")
    checked = targets(results)
    for target in checked:
        values = "; ".join(f"{k} {v}" for k, v in target["values"].items())
        print(f"target: {target['target']}: {values} (at most {target['limit']}): "
              f"{'met' if target['met'] else 'NOT met'}")
    out_dir = ROOT / "bench" / "results"
    out_dir.mkdir(parents=True, exist_ok=True)
    stamp = datetime.now(timezone.utc).strftime("%Y%m%dT%H%M%SZ")
    (out_dir / f"bench-{stamp}.json").write_text(json.dumps({"when": stamp, "results": results, "targets": checked},
                                                            indent=2))
    print(f"results: bench/results/bench-{stamp}.json")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
