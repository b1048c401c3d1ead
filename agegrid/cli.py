"""The ``agegrid`` command line: thin wrappers over the pipeline; errors become exit codes."""
from __future__ import annotations

import argparse
import contextlib
import json
import logging
import sys
import traceback
from pathlib import Path

from agegrid import __version__
from agegrid.errors import AgegridError, BadInput

log = logging.getLogger("agegrid")

DEMO = Path(__file__).parent / "demo_picks" / "build.toml"


def _setup_logging(quiet: bool) -> None:
    handler = logging.StreamHandler(sys.stderr)
    handler.setFormatter(logging.Formatter("agegrid: %(message)s"))
    log.handlers[:] = [handler]
    log.setLevel(logging.WARNING if quiet else logging.INFO)
    log.propagate = False


def cmd_build(args) -> int:
    from agegrid.cache import fingerprint, input_hashes, up_to_date
    from agegrid.config import load_build_file

    config = load_build_file(args.config)
    if not args.force:  # checked before the heavy imports, so a no-op rerun is quick
        previous = up_to_date(config.output.directory, fingerprint(config, input_hashes(config)))
        if previous is not None:
            log.info("nothing changed since the build of %s: outputs in %s are up to date, nothing written",
                     previous.get("built"), config.output.directory)
            return 0
    from agegrid.startup import ready_to_build

    ready_to_build()
    from agegrid.pipeline import build

    build(config, force=args.force, address=args.scheduler, workers=args.workers, progress=not args.quiet)
    return 0


def cmd_validate(args) -> int:
    from agegrid.config import load_build_file
    from agegrid.pipeline import compute_layers, plan, read_inputs, Stages

    config = load_build_file(args.config)
    inputs = read_inputs(config)
    with contextlib.ExitStack() as opened:
        layers, _, facts, _ = compute_layers(config, inputs, Stages(), opened)
        if inputs["profiles"] is not None:  # the magnetic check needs the grids: computed in memory, not written
            import dask
            import xarray as xr

            from agegrid.grid import GridSpec
            from agegrid.pipeline import magnetic_check

            names = ("age", "half_rate", "magnetic_anomaly_predicted")
            with dask.config.set(scheduler="threads"):
                values = dask.compute(*[layers[n] for n in names])
            ds = xr.Dataset({n: (("y", "x"), v) for n, v in zip(names, values)})
            magnetic_check(config, inputs, ds, facts, None, None, GridSpec.from_config(config.grid))
    summary = {"plan": plan(config), "qa": facts["qa"], "notes": facts["notes"],
               "age_model": facts["age_model"], "magnetic": facts.get("magnetic")}
    print(json.dumps(summary, indent=2, default=str))
    return 0


def cmd_demo(args) -> int:
    from agegrid.startup import ready_to_build

    ready_to_build()
    from agegrid.config import load_build_file
    from agegrid.pipeline import build

    config = load_build_file(DEMO)
    output = config.output.model_copy(update={"directory": Path(args.output).resolve()})
    build(config.model_copy(update={"output": output}), progress=not args.quiet)
    print(Path(args.output).resolve())
    return 0


def cmd_date(args) -> int:
    from agegrid import timescale
    from agegrid.control import date_picks
    from agegrid.io.points import read_picks, write_picks

    scale = timescale.load(args.timescale)
    table = read_picks(args.picks)
    ages, _ = date_picks(table, scale)
    if args.output:
        write_picks(table, ages, Path(args.output))
    else:
        import tempfile

        with tempfile.TemporaryDirectory() as tmp:
            target = Path(tmp) / ("picks.geojson" if table.geojson else "picks.csv")
            write_picks(table, ages, target)
            sys.stdout.write(target.read_text())
    return 0


def cmd_retime(args) -> int:
    from agegrid import timescale
    from agegrid.io.atomic import replace
    from agegrid.io.netcdf import open_netcdf, write_netcdf
    from agegrid.grid import GridSpec
    from agegrid.retime import retime_dataset

    scale = timescale.load(args.timescale)
    try:
        ds = open_netcdf(args.grid, mask_and_scale=True)
    except (OSError, ValueError) as exc:
        raise BadInput(f"not a readable NetCDF file ({exc})", args.grid) from None
    with ds:
        out, warnings = retime_dataset(ds.load(), scale, args.grid)
    for w in warnings:
        log.warning(w)
    spec = GridSpec.from_dataset(out)
    target = Path(args.output)
    replace(write_netcdf(out, target, spec), target)
    log.info("retimed %s to %s: %s", args.grid, scale.name, target)
    return 0


def cmd_report(args) -> int:
    from agegrid.report import report_from_directory

    print(report_from_directory(Path(args.directory)))
    return 0


def cmd_timescales(args) -> int:
    from agegrid import timescale

    for name in timescale.BUNDLED:
        d = timescale.load(name).describe()
        print(f"{d['name']}: {d['intervals']} intervals, {d['youngest_chron']}-{d['oldest_chron']}, "
              f"{d['covers_ma'][0]:g}-{d['covers_ma'][1]:g} Ma")
        print(f"    {d['reference']}")
        if d["composite"]:
            print(f"    composite: {d['composite']}")
        if d["caveat"]:
            print(f"    caveat: {d['caveat']}")
    return 0


def cmd_models(args) -> int:
    from agegrid.thermal import MIN_HEAT_FLOW_AGE_MYR, MODELS, SECONDS_PER_MYR

    print(f"1 Myr = {SECONDS_PER_MYR:.6e} s (Julian years of 365.25 days); heat flow below "
          f"{MIN_HEAT_FLOW_AGE_MYR} Myr is clamped to its value there")
    for name, model in MODELS.items():
        print(f"{name}: {model.description}")
        print(f"    {model.reference}")
        for key, value in model.parameters.items():
            print(f"    {key} = {value}")
    return 0


def parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="agegrid", description="Seafloor-age, spreading-rate, depth-check and "
                                "magnetic-check grids from magnetic-anomaly isochron picks.")
    p.add_argument("--version", action="version", version=f"agegrid {__version__}")
    p.add_argument("--debug", action="store_true", help="show tracebacks of errors")
    sub = p.add_subparsers(dest="command", required=True)

    b = sub.add_parser("build", help="build the grids a build file describes")
    b.add_argument("config", help="the TOML build file")
    b.add_argument("--force", action="store_true", help="recompute everything, ignoring the cache")
    b.add_argument("--scheduler", metavar="ADDRESS", help="dask.distributed scheduler, e.g. tcp://host:8786")
    b.add_argument("--workers", type=int, metavar="N", help="run on N local worker processes")
    b.add_argument("--quiet", action="store_true", help="no stage log or progress bar")
    b.set_defaults(func=cmd_build)

    v = sub.add_parser("validate", help="check every input and the build file; build nothing")
    v.add_argument("config")
    v.add_argument("--quiet", action="store_true")
    v.set_defaults(func=cmd_validate)

    d = sub.add_parser("demo", help="build the bundled demo scenario")
    d.add_argument("--output", default="build/demo", metavar="DIR", help="output folder (default build/demo)")
    d.add_argument("--quiet", action="store_true")
    d.set_defaults(func=cmd_demo)

    dt = sub.add_parser("date", help="ages for chron-labelled picks")
    dt.add_argument("picks", help="pick table (CSV or GeoJSON)")
    dt.add_argument("--timescale", required=True, help="bundled name (see 'agegrid timescales') or CSV path")
    dt.add_argument("--output", metavar="FILE", help="write here instead of standard output")
    dt.add_argument("--quiet", action="store_true")
    dt.set_defaults(func=cmd_date)

    r = sub.add_parser("retime", help="an age grid under another timescale, without regridding")
    r.add_argument("grid", help="a NetCDF written by agegrid build")
    r.add_argument("--timescale", required=True)
    r.add_argument("--output", required=True, metavar="FILE")
    r.add_argument("--quiet", action="store_true")
    r.set_defaults(func=cmd_retime)

    rp = sub.add_parser("report", help="regenerate report.html of an output directory without rebuilding")
    rp.add_argument("directory", help="an output directory written by agegrid build")
    rp.add_argument("--quiet", action="store_true")
    rp.set_defaults(func=cmd_report)

    t = sub.add_parser("timescales", help="list the bundled polarity timescales with their sources")
    t.set_defaults(func=cmd_timescales, quiet=True)
    m = sub.add_parser("models", help="list the cooling models with their sources and parameters")
    m.set_defaults(func=cmd_models, quiet=True)
    return p


def main(argv: list[str] | None = None) -> int:
    args = parser().parse_args(argv)
    _setup_logging(getattr(args, "quiet", False))
    try:
        return args.func(args)
    except AgegridError as exc:
        if args.debug:
            traceback.print_exc()
        print(f"agegrid: error: {exc}", file=sys.stderr)
        return exc.exit_code
    except KeyboardInterrupt:
        print("agegrid: interrupted", file=sys.stderr)
        return 1
    except Exception as exc:  # anything unforeseen: exit 1 with the reason, traceback on --debug
        if args.debug:
            traceback.print_exc()
        print(f"agegrid: internal error: {type(exc).__name__}: {exc} (run with --debug for the traceback)",
              file=sys.stderr)
        return 1
