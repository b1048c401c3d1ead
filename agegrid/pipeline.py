"""The build: stages wired from inputs to outputs, timed, logged, written atomically.

Every stage is a function of its inputs; the layers stay lazy (dask) until one streaming pass computes
each block once and hands it to the NetCDF, the COG tiles and the samples the tables and the report
read, so nothing is computed twice.
"""
from __future__ import annotations

import contextlib
import csv
import io
import logging
import sys
import time
from datetime import datetime, timezone
from pathlib import Path

import dask.array as da
import numpy as np
import xarray as xr

from agegrid import __version__, thermal, timescale
from agegrid.age import LAYERS, Settings, age_planes, build_age_model
from agegrid.allocator import keep_freed_memory
from agegrid.bathymetry import depth_sign
from agegrid.blas import one_blas_thread
from agegrid.cache import KEPT_NETCDF, BlockCache, fingerprint, up_to_date
from agegrid.compartments import build_compartments, implied_fracture_zones
from agegrid.control import build_control
from agegrid.errors import BadInput
from agegrid.grid import GridSpec
from agegrid.io import atomic
from agegrid.io.geotiff import CogWriter
from agegrid.io.netcdf import dataset, encoding, limit_chunk_cache, open_netcdf, write_netcdf
from agegrid.io.points import read_picks
from agegrid.io.rasters import grid_blocks
from agegrid.io.vectors import read_lines, read_polygons
from agegrid.alignment import AlignmentSettings, check_profiles
from agegrid.control import date_picks
from agegrid.io.profiles import read_profiles
from agegrid.kinematics import RATE_LAYERS, rate_table
from agegrid.magnetic import MagneticSettings, anomaly_layer
from agegrid.lock import BuildLock
from agegrid.manifest import FileDescriptions, describe_file, peak_memory_mb, sha256, to_json, versions
from agegrid.notices import CAUTION
from agegrid.qa import check_picks
from agegrid.report import build_report
from agegrid.residual import AgeBins, fit_sqrt_age, residual
from agegrid.sediment import lithology_from_config
from agegrid.streaming import Plane, Samples
from agegrid.variables import attributes

log = logging.getLogger("agegrid")

#: Layers written as GeoTIFF (the bracket indices and fraction stay in the NetCDF, for retiming).
NOT_IN_GEOTIFF = ("age_bracket_young", "age_bracket_old", "age_fraction", "compartment")
#: float32 layers held at once at the peak of a build, for the size check.
LAYERS_IN_MEMORY = 6
#: About the largest number of cells the tables (depth statistics, rates) read (medians of a million cells
#: are exact to well within the noise); larger grids are read every k-th
#: row and column, and the counts scaled by k squared.
TABLE_CELLS = 1e6


class Stages:
    """Times and logs named stages."""

    def __init__(self):
        self.timings: dict[str, float] = {}

    @contextlib.contextmanager
    def __call__(self, name: str):
        log.info("stage %s ...", name)
        start = time.perf_counter()
        yield
        self.timings[name] = round(time.perf_counter() - start, 3)
        log.info("stage %s done in %.2f s", name, self.timings[name])


def read_inputs(config) -> dict:
    """Read every input named in the build file (no geophysics yet)."""
    inp = config.inputs
    return {
        "picks": read_picks(inp.picks),
        "ridges": read_lines(inp.ridges),
        "isochrons": read_lines(inp.isochrons) if inp.isochrons else [],
        "barriers": read_lines(inp.barriers) if inp.barriers else [],
        "domain": read_polygons(inp.domain) if inp.domain else None,
        "timescale": timescale.load(config.age.timescale),
        "profiles": read_profiles(inp.magnetic_profiles) if inp.magnetic_profiles else None,
    }


def magnetic_enabled(config) -> bool:
    """The magnetic check runs when a magnetic input is given or the build file has a [magnetic] table."""
    return bool(config.inputs.magnetic_grid or config.inputs.magnetic_profiles or "magnetic" in config.model_fields_set)


def _magnetic_settings(config) -> MagneticSettings:
    m = config.magnetic
    return MagneticSettings(m.layer_thickness_km * 1e3, m.magnetisation, m.epoch, m.field_inclination,
                            m.field_declination)


def _elementwise(func, array, dtype=np.float32):
    return da.map_blocks(lambda block: func(block).astype(dtype, copy=False), array, dtype=dtype)


def _engine_settings(config) -> Settings:
    return Settings(max_extrapolation_myr=config.age.max_extrapolation_myr,
                    timescale_sigma_percent=config.age.timescale_sigma_percent,
                    min_half_rate=config.picks.min_half_rate_mm_yr, max_half_rate=config.picks.max_half_rate_mm_yr)


def _models(config) -> dict:
    return {name: thermal.get_model(name, config.depth.parameters.get(name)) for name in config.depth.models}


def cooling_planes(models: dict, age: Plane, corrected: da.Array | None = None) -> dict[str, Plane]:
    """Each model's ``depth_<model>`` and ``heat_flow_<model>`` layers, and ``residual_<model>`` against the
    ``corrected`` observed depth when given, as planes of one task per model and block that reads the age
    from the age engine's block (one task for the model's layers, not a task per layer and one for the age)."""
    kinds = ("depth", "heat_flow") + (("residual",) if corrected is not None else ())
    inputs = [age.stack, "kij"] + ([corrected, "ij"] if corrected is not None else [])
    planes = {}
    for name, model in models.items():
        stack = da.blockwise(_cooling_block, "mij", *inputs, new_axes={"m": len(kinds)}, concatenate=False,
                             dtype=np.float32, meta=np.empty((0, 0, 0), np.float32),
                             name=f"cooling-{name}-{age.stack.name}", model=model, index=age.index)
        planes.update({f"{kind}_{name}": Plane(f"{kind}_{name}", stack, k, np.dtype(np.float32))
                       for k, kind in enumerate(kinds)})
    return planes


def _cooling_block(stacks: list[np.ndarray], corrected: np.ndarray | None = None, *, model, index: int
                   ) -> np.ndarray:
    """Depth, heat flow and (with ``corrected``) residual of a block, from plane ``index`` of its age-engine
    block (given as the one-element list of its stacks)."""
    age = stacks[0][index]
    out = np.empty((2 if corrected is None else 3, *age.shape), np.float32)
    out[0] = model.depth(age)
    out[1] = model.heat_flow(age)
    if corrected is not None:
        out[2] = residual(out[0], corrected)
    return out


def plan(config) -> dict:
    """What a build would read and write, for ``agegrid validate``."""
    spec = GridSpec.from_config(config.grid)
    out = config.output.directory
    names = ["age", "age_uncertainty", "age_flag", "half_rate", "spreading_azimuth", "flank", "full_rate", "asymmetry"]
    names += [f"{k}_{m}" for m in config.depth.models for k in ("depth", "heat_flow")]
    if config.inputs.bathymetry:
        names += ["observed_depth"] + [f"residual_{m}" for m in config.depth.models]
        if config.inputs.sediment:
            names += ["sediment_correction"]
    writes = []
    if magnetic_enabled(config):
        names.append("magnetic_anomaly_predicted")
        if config.inputs.magnetic_grid:
            names.append("magnetic_residual")
        if config.inputs.magnetic_profiles:
            writes.append(out / f"{config.name}_tracks.csv")
    if "netcdf" in config.output.formats:
        writes.append(out / f"{config.name}.nc")
    if "geotiff" in config.output.formats:
        writes += [out / f"{config.name}_{n}.tif" for n in names]
    if "zarr" in config.output.formats:
        writes.append(out / f"{config.name}.zarr")
    if config.output.report:
        writes.append(out / "report.html")
    writes += [out / f"{config.name}_rates.csv", out / "manifest.json"]
    return {"grid": {"shape": list(spec.shape), "cells": spec.size, "crs": spec.crs, "chunks": list(spec.chunks)},
            "reads": [str(p) for _, p in config.inputs if p is not None],
            "writes": [str(p) for p in writes], "variables": names}


def compute_layers(config, inputs: dict, stages: Stages, opened: contextlib.ExitStack,
                   cache=None, in_process: bool = True) -> tuple[dict, dict, dict, dict]:
    """All output layers as lazy arrays, with their attributes, the facts for the manifest and the age
    engine's layers as :class:`~agegrid.streaming.Plane` (for the streaming pass); input grids read block by
    block stay open until ``opened`` closes. ``in_process``: the layers will be computed on this process's
    threads (not by distributed workers)."""
    spec = GridSpec.from_config(config.grid)
    spec.check_size(LAYERS_IN_MEMORY, config.source)
    facts: dict = {"notes": []}
    scale = inputs["timescale"]
    with stages("control"):
        step = (np.radians(spec.spacing) if spec.geographic else spec.spacing / 6.371e6) / 2
        control = build_control(inputs["picks"], scale, inputs["ridges"], step, inputs["isochrons"],
                                config.inputs.isochrons, config.age.pick_sigma_km)
    with stages("compartments"):
        barriers = [f.lonlat for f in inputs["barriers"]]
        if not barriers and config.age.implied_fracture_zones:
            barriers = implied_fracture_zones([f.lonlat for f in inputs["ridges"]])
            facts["notes"].append(f"no barriers given: {len(barriers)} fracture zones implied at the ridge "
                                  "segments' ends, normal to the ridge (age.implied_fracture_zones)")
            log.info(facts["notes"][-1])
        comps = build_compartments(spec, barriers, inputs["domain"], extend=config.age.extend_barriers)
        facts["compartments"] = comps.count
    with stages("age model"):
        model = build_age_model(spec, comps, control, _engine_settings(config))
    with stages("pick QA"):
        qa = check_picks(control, spec, config.picks, model)
        facts["qa"] = qa.summary()
        if qa.findings and config.picks.suspect == "fail":
            first = qa.findings[0]
            raise BadInput(f"suspect pick {first['id']}: {first['problem']} ({len(qa.findings)} findings; "
                           "picks.suspect = 'fail')", config.inputs.picks, first["where"])
    if qa.findings and config.picks.suspect == "drop":
        with stages("age model without suspect picks"):
            control = control.subset(~np.isin(control.source_index, qa.suspect_indices()) | (control.kind != 2))
            model = build_age_model(spec, comps, control, _engine_settings(config))
    outliers = control.source_index[model.outliers]
    facts["age_model"] = {"compartments_with_control": len(model.compartments), "dropped_traces": model.dropped,
                          "outlier_control_points": int(len(model.outliers)),
                          "picks_left_out_as_inconsistent": [inputs["picks"].ids[i] for i in outliers if i >= 0]}
    dtypes = {"age_flag": np.int8, "age_bracket_young": np.int16, "age_bracket_old": np.int16, "compartment": np.int32,
              "flank": np.int8}
    with stages("block keys" if cache is not None else "age layers"):
        planes = age_planes(spec, comps, model, cache, keys_in_tasks=in_process, dtypes=dtypes)
        layers = {name: plane.array() for name, plane in planes.items()}
    if cache is not None:
        facts["cache"] = cache.summary()
        log.info("%d of %d blocks unchanged, read from the cache; %d to compute", cache.reused, cache.blocks,
                 cache.blocks - cache.reused)
    attrs = {name: attributes(name) for name in layers}
    attrs["age_flag"]["flag_values"] = np.array(attrs["age_flag"]["flag_values"], dtype=np.int8)
    for name in ("age_bracket_young", "age_bracket_old"):
        attrs[name]["boundary_labels"] = " ".join(model.labels)
        attrs[name]["boundary_ages_ma"] = np.asarray(model.ages, dtype=np.float64)
    attrs["age"]["timescale"] = scale.name
    attrs["age"]["comment"] = ("distance-ratio interpolation between bracketing isochron traces within "
                               "compartments bounded by barriers; see age_flag")
    age = layers["age"]
    observed_layers, corrected = {}, None
    if config.inputs.bathymetry:
        with stages("observed depth"):
            # grids in the build's CRS are read block by block in the streaming pass (see grid_blocks)
            observed, source_attrs = grid_blocks(config.inputs.bathymetry, spec, opened)
            is_depth, statement = depth_sign(source_attrs, config.depth.bathymetry_sign, observed.compute)
            facts["notes"].append(statement)
            log.info(statement)
            observed_layers["observed_depth"] = corrected = observed if is_depth else -observed
            attrs["observed_depth"] = {**attributes("observed_depth"), "comment": statement}
            if config.inputs.sediment:
                thickness, _ = grid_blocks(config.inputs.sediment, spec, opened)
                lith = lithology_from_config(config.sediment)
                correction = _elementwise(lith.correction, thickness)
                corrected = corrected + da.where(da.isfinite(correction), correction, np.float32(0))
                observed_layers["sediment_correction"] = correction
                attrs["sediment_correction"] = {**attributes("sediment_correction"),
                                                "comment": f"Airy unloading, {lith.name}: {lith.reference}"}
                facts["sediment"] = {k: getattr(lith, k) for k in ("name", "surface_porosity", "compaction_per_km",
                                                                   "grain_density", "mantle_density",
                                                                   "water_density", "reference")}
    models = _models(config)
    cooling = cooling_planes(models, planes["age"], corrected)
    planes.update(cooling)
    for name, cooling_model in models.items():
        for kind in ("depth", "heat_flow"):
            layers[f"{kind}_{name}"] = cooling[f"{kind}_{name}"].array()
            attrs[f"{kind}_{name}"] = attributes(f"{kind}_{name}")
        if config.depth.isotherm_c is not None:
            t_iso = config.depth.isotherm_c
            layers[f"isotherm_depth_{name}"] = _elementwise(lambda a, m=cooling_model: m.isotherm_depth(a, t_iso),
                                                            age)
            attrs[f"isotherm_depth_{name}"] = {**attributes(f"isotherm_depth_{name}"), "isotherm_c": t_iso}
    layers.update(observed_layers)
    if corrected is not None:
        for name in models:
            layers[f"residual_{name}"] = cooling[f"residual_{name}"].array()
            attrs[f"residual_{name}"] = attributes(f"residual_{name}")
    if magnetic_enabled(config):
        with stages("magnetic model"):
            top_name = "observed_depth" if "observed_depth" in layers else f"depth_{config.depth.models[0]}"
            settings = _magnetic_settings(config)
            predicted = anomaly_layer(spec, layers["age"], layers[top_name], scale, settings)
            layers["magnetic_anomaly_predicted"] = predicted.astype(np.float32)
            attrs["magnetic_anomaly_predicted"] = {
                **attributes("magnetic_anomaly_predicted"),
                "comment": f"layer {settings.thickness_m:g} m thick, top at {top_name}, {settings.magnetisation:g} A/m; "
                           "remanence along a geocentric axial dipole at the present latitude; ambient field "
                           + ("from the build file" if settings.field_inclination is not None else
                              f"from the IGRF at epoch {settings.epoch:g}")}
            facts["magnetic"] = {"layer_thickness_m": settings.thickness_m, "magnetisation_a_m": settings.magnetisation,
                                 "top": top_name, "epoch": settings.epoch,
                                 "field_inclination": settings.field_inclination,
                                 "field_declination": settings.field_declination,
                                 "remanence": "geocentric axial dipole at the present latitude (tan I = 2 tan lat)"}
            if config.inputs.magnetic_grid:
                observed, _ = grid_blocks(config.inputs.magnetic_grid, spec, opened)
                layers["magnetic_residual"] = (observed - layers["magnetic_anomaly_predicted"]).astype(np.float32)
                attrs["magnetic_residual"] = attributes("magnetic_residual")
    facts["timescale"] = scale.describe()
    facts["models"] = {name: m.describe() for name, m in models.items()}
    facts["model_labels"] = model.labels
    return layers, attrs, facts, planes


def _global_attrs(config, facts) -> dict:
    now = datetime.now(timezone.utc).isoformat(timespec="seconds")
    refs = [facts["timescale"]["reference"]] + [m["reference"] for m in facts["models"].values()]
    return {
        "title": f"agegrid build {config.name}: seafloor age and derived layers",
        "institution": "produced with agegrid",
        "source": f"agegrid {__version__}; full provenance in manifest.json beside this file",
        "history": f"{now} agegrid {__version__} build {config.source} (see manifest.json)",
        "references": "; ".join(refs),
        "comment": CAUTION,
        "timescale": facts["timescale"]["name"],
    }


def _sampled_layers(config) -> tuple:
    """The layers the tables and the report read from the samples."""
    names = {"age", "age_uncertainty", "half_rate", "observed_depth", "sediment_correction",
             "magnetic_anomaly_predicted", *RATE_LAYERS}
    return tuple(sorted(names | {f"residual_{m}" for m in config.depth.models}))


def _cog_writer(config, ds: xr.Dataset, spec, attrs: dict, out_dir: Path) -> CogWriter:
    """The COG writer of every layer written as a GeoTIFF, with the NetCDF's types and fill values."""
    enc = encoding(ds, spec)
    names = [n for n in ds.data_vars if n not in NOT_IN_GEOTIFF and n != "crs"]
    return CogWriter(spec, {n: out_dir / f"{config.name}_{n}.tif" for n in names}, attrs,
                     {n: ds[n].dtype for n in names}, {n: enc[n]["_FillValue"] for n in names},
                     config.output.cog_compression, config.output.cog_predictor)


def _depth_tables(config, sample: xr.Dataset, stride: int) -> tuple[str, dict]:
    """The age-binned residual statistics CSV and the sqrt(age) fit of corrected depth, from the samples."""
    names = ["age", "observed_depth", "sediment_correction"] + [f"residual_{m}" for m in config.depth.models]
    layers = {n: sample[n].values.ravel() for n in names if n in sample}
    age = layers["age"]
    rows = []
    bins = AgeBins(age, config.depth.age_bin_myr)
    for name in config.depth.models:
        if f"residual_{name}" in layers:
            for row in bins.statistics(layers[f"residual_{name}"]):
                rows.append({"model": name, **row, "cells": row["cells"] * stride**2, "sampled_every": stride})
    buffer = io.StringIO()
    writer = csv.DictWriter(buffer, ["model", "age_from_myr", "age_to_myr", "cells", "median_m", "iqr_m",
                                     "sampled_every"], lineterminator="\n")
    writer.writeheader()
    writer.writerows(rows)
    fit = None
    if "observed_depth" in layers:
        corrected = layers["observed_depth"] + layers.get("sediment_correction", 0.0)
        fit = fit_sqrt_age(age, np.asarray(corrected), tuple(config.depth.fit_age_range))
        if fit is not None:
            fit["sampled_every"] = stride
        if fit is not None:
            fit["models"] = {}
            for name, model in _models(config).items():
                t = np.linspace(max(config.depth.fit_age_range[0], 0.01), config.depth.fit_age_range[1], 200)
                model_fit = fit_sqrt_age(t, model.depth(t), tuple(config.depth.fit_age_range))
                fit["models"][name] = {k: model_fit[k] for k in ("ridge_depth_m", "sqrt_coefficient_m")}
    return buffer.getvalue(), fit


def _tables(config, sample: xr.Dataset, stride: int, stages: Stages) -> tuple[str, dict, str]:
    """The depth statistics CSV, the sqrt(age) fit and the rates CSV, from the samples."""
    with stages("depth statistics"):
        table, fit = _depth_tables(config, sample, stride)
    with stages("rate table"):
        flat = {n: sample[n].values.ravel() for n in RATE_LAYERS}
        rates = rate_table(flat, stride, config.kinematics.age_band_myr)
    return table, fit, rates


@contextlib.contextmanager
def scheduler(address: str | None = None, workers: int | None = None):
    """The dask scheduler for a build: a cluster at ``address``, N local processes, or threads."""
    if address or workers:
        from distributed import Client, LocalCluster

        if address:
            client, cluster = Client(address), None
        else:
            cluster = LocalCluster(n_workers=workers, threads_per_worker=1, processes=True, host="127.0.0.1",
                                   dashboard_address="127.0.0.1:0")
            client = Client(cluster)
        try:
            yield {"kind": "distributed", "address": client.scheduler.address}
        finally:
            client.close()
            if cluster is not None:
                cluster.close()
    else:
        import dask.threaded

        # the threaded scheduler itself rather than its name: naming it makes dask import distributed to
        # look for a client
        with dask.config.set(scheduler=dask.threaded.get):
            yield {"kind": "threads"}


def build(config, force: bool = False, address: str | None = None, workers: int | None = None,
          progress: bool = True) -> dict:
    """Run a whole build; returns the manifest. Outputs are replaced only when everything succeeded."""
    out_dir = Path(config.output.directory)
    out_dir.mkdir(parents=True, exist_ok=True)
    limit_chunk_cache()
    keep_freed_memory()
    # opened: the input grids read block by block
    with BuildLock(out_dir), one_blas_thread(), contextlib.ExitStack() as opened:
        removed = atomic.clean_stale(out_dir)
        if removed:
            log.info("removed %d temporary file(s) left by an interrupted build", len(removed))
        stages = Stages()
        started = time.perf_counter()
        input_files = {k: describe_file(Path(p)) for k, p in config.inputs if p is not None}
        build_fingerprint = fingerprint(config, {k: v["sha256"] for k, v in input_files.items()})
        previous = up_to_date(out_dir, build_fingerprint) if not force else None
        if previous is not None:
            log.info("nothing changed since the build of %s: outputs are up to date, nothing written",
                     previous.get("built"))
            return previous
        cache = BlockCache(out_dir, enabled=not force)
        with stages("read inputs"):
            inputs = read_inputs(config)
        layers, attrs, facts, planes = compute_layers(config, inputs, stages, opened, cache,
                                                      in_process=not (address or workers))
        spec = GridSpec.from_config(config.grid)
        ds = dataset(spec, layers, attrs, _global_attrs(config, facts))
        samples = Samples(spec, _sampled_layers(config), TABLE_CELLS)
        staged: dict[Path, Path] = {}
        cogs, staged_nc = None, None
        hashes = FileDescriptions()
        try:
            with scheduler(address, workers) as sched:
                nc_target = out_dir / f"{config.name}.nc"
                sinks = [samples]
                if "geotiff" in config.output.formats:
                    cogs = _cog_writer(config, ds, spec, attrs, out_dir)
                    sinks.append(cogs.write)
                with stages("compute and write layers"), _progress(progress and sched["kind"] == "threads"):
                    staged_nc = write_netcdf(ds, nc_target, spec, sinks,
                                             tiles=cogs if config.output.netcdf_shares_cog_tiles else None,
                                             planes=planes)
                if "netcdf" in config.output.formats:
                    staged[nc_target] = staged_nc
                    hashes.start(staged_nc)  # while the COGs are assembled and the tables made
                if cogs is not None:
                    with stages("assemble geotiff"):
                        staged.update(cogs.finish(hashes.start))  # each COG hashed as soon as it is complete
                sample = samples.dataset(ds)
                table, facts["depth_fit"], rates_text = _tables(config, sample, samples.stride, stages)
                target = out_dir / f"{config.name}_rates.csv"
                staged[target] = _stage_text(target, rates_text)
                if "zarr" in config.output.formats or magnetic_enabled(config):
                    with open_netcdf(staged_nc, chunks={}, mask_and_scale=True) as written:
                        if "zarr" in config.output.formats:
                            from agegrid.io.zarr import write_zarr

                            with stages("write zarr"):
                                target = out_dir / f"{config.name}.zarr"
                                staged[target] = write_zarr(written, target, spec)
                        if magnetic_enabled(config):
                            with stages("magnetic check"):
                                magnetic_check(config, inputs, written, facts, staged, out_dir, spec)
                if config.inputs.bathymetry:
                    target = out_dir / f"{config.name}_depth_stats.csv"
                    staged[target] = _stage_text(target, table)
            outputs = hashes.describe(staged)
            manifest = {
                "agegrid": __version__, "name": config.name,
                "built": datetime.now(timezone.utc).isoformat(timespec="seconds"),
                "build_file": describe_file(Path(config.source)),
                "config": config.model_dump(mode="json"),
                "inputs": input_files, "fingerprint": build_fingerprint,
                "grid": plan(config)["grid"], "scheduler": sched, "versions": versions(),
                **{k: v for k, v in facts.items() if k != "model_labels"},
                "timings_s": {**stages.timings, "total": round(time.perf_counter() - started, 3)},
                "peak_memory_mb": peak_memory_mb(), "outputs": outputs, "caution": CAUTION,
            }
            if config.output.report:
                with stages("report"):
                    target = out_dir / "report.html"
                    page = build_report(sample, manifest, rates_text, table if config.inputs.bathymetry else None)
                    staged[target] = _stage_text(target, page)
                manifest["outputs"].append({"path": str(target), **{k: v for k, v in describe_file(
                    staged[target]).items() if k != "path"}})
                manifest["timings_s"]["report"] = stages.timings["report"]
            staged[out_dir / "manifest.json"] = _stage_text(out_dir / "manifest.json", to_json(manifest))
            # the NetCDF holds this build's blocks for the next one: kept in the cache when it is not an output
            blocks_nc = nc_target if "netcdf" in config.output.formats else cache.root / KEPT_NETCDF
            staged[blocks_nc] = staged_nc
            atomic.replace_all(staged)
            staged.clear()
            cache.write_index(blocks_nc, spec.chunks)
            cache.prune(keep=blocks_nc)
        finally:
            hashes.close()
            if cogs is not None:
                cogs.close()
            if staged_nc is not None:
                staged_nc.unlink(missing_ok=True)
            for source in staged.values():
                if source.is_dir():
                    import shutil

                    shutil.rmtree(source, ignore_errors=True)
                else:
                    source.unlink(missing_ok=True)
        log.info("build %s done in %.1f s: %d outputs in %s", config.name, manifest["timings_s"]["total"],
                 len(outputs) + 1, out_dir)
        return manifest


def magnetic_check(config, inputs, ds, facts, staged, out_dir, spec) -> None:
    """Correlation per compartment against an observed grid; picks checked along survey profiles.

    Findings go into ``facts`` (and the QA's suspect picks); with ``staged`` the tracks CSV is staged too.
    """
    predicted = ds["magnetic_anomaly_predicted"].values
    if "magnetic_residual" in ds:
        observed = ds["magnetic_residual"].values + predicted
        comp = ds["compartment"].values
        corr = {}
        for label in np.unique(comp[comp > 0]):
            ok = (comp == label) & np.isfinite(observed) & np.isfinite(predicted)
            if ok.sum() > 10:
                corr[int(label)] = round(float(np.corrcoef(observed[ok], predicted[ok])[0, 1]), 3)
        facts["magnetic"]["grid_correlation_by_compartment"] = corr
    profiles = inputs["profiles"]
    if profiles is None:
        return
    m = config.magnetic
    ages, _ = date_picks(inputs["picks"], inputs["timescale"])
    cell_km = spec.spacing * (111.19 if spec.geographic else 1e-3)
    tolerance = max(m.tolerance_km, 1.5 * cell_km)  # the grid cannot place a boundary more finely
    facts["magnetic"]["tolerance_km_used"] = round(tolerance, 3)
    tracks, picks = check_profiles(profiles, spec, predicted, ds["age"].values, ds["half_rate"].values,
                                   inputs["picks"], ages, AlignmentSettings(tolerance, m.window_km,
                                                                            m.max_lag_km, m.min_correlation))
    buffer = io.StringIO()
    writer = csv.DictWriter(buffer, list(tracks[0]) if tracks else ["track"], lineterminator="\n")
    writer.writeheader()
    writer.writerows(tracks)
    if staged is not None:
        target = out_dir / f"{config.name}_tracks.csv"
        staged[target] = _stage_text(target, buffer.getvalue())
    flagged = [p for p in picks if p["flagged"]]
    facts["magnetic"]["picks_checked"] = len(picks)
    facts["magnetic"]["flagged_picks"] = flagged
    facts["magnetic"]["tracks"] = tracks
    qa = facts["qa"]
    for p in flagged:
        qa["suspect_picks"].append({"id": p["id"], "where": p["where"], "kind": "magnetic_mismatch",
                                    "problem": p["reason"]})
    qa["findings"] = len(qa["suspect_picks"])
    qa["by_kind"]["magnetic_mismatch"] = len(flagged)
    log.info("magnetic check: %d picks on %d surveyed tracks, %d flagged", len(picks), len(tracks), len(flagged))


def _stage_text(target: Path, text: str) -> Path:
    staged = atomic.staging_path(target)
    staged.write_text(text, encoding="utf-8")
    return staged


@contextlib.contextmanager
def _progress(show: bool):
    if show and sys.stderr.isatty():
        from dask.diagnostics import ProgressBar

        with ProgressBar(minimum=2.0, out=sys.stderr):
            yield
    else:
        yield


__all__ = ["build", "plan", "compute_layers", "read_inputs", "LAYERS", "sha256"]
