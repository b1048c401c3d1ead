"""The build report: one self-contained HTML page (plots embedded as PNG) for looking at a build.

Plots use perceptually uniform colour maps (cividis, viridis, magma) and a diverging map centred on zero
for residuals; maps carry axis labels with units, a scale bar in km, and a north arrow when projected.
"""
from __future__ import annotations

import base64
import csv
import html
import io
import json
from pathlib import Path

import numpy as np

from agegrid import sphere
from agegrid.notices import CAUTION

MAX_PIXELS = 900  # map rasters are decimated to at most this many cells a side
MAX_POINTS = 1e6  # the age-depth plot reads at most about this many cells


def _matplotlib():
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    return plt


def _png(fig) -> str:
    buffer = io.BytesIO()
    fig.savefig(buffer, format="png", dpi=110)  # the figures' own layout: a tight box would draw them twice
    _matplotlib().close(fig)
    return base64.b64encode(buffer.getvalue()).decode("ascii")


def _coords(ds):
    if "lon" in ds.dims:
        return ds["lon"].values, ds["lat"].values, True
    return ds["x"].values, ds["y"].values, False


def _decimate(ds, name):
    x, y, geographic = _coords(ds)
    step = max(1, int(np.ceil(max(len(x), len(y)) / MAX_PIXELS)))
    values = np.asarray(ds[name][::step, ::step].values, dtype=float)
    return x[::step], y[::step], values, geographic


def _scale_bar(ax, x, y, geographic):
    """A scale bar of a round length in km, about a fifth of the map's width, bottom left."""
    width = float(x.max() - x.min())
    centre_lat = float(np.mean(y)) if geographic else 0.0
    km_per_unit = (np.radians(1) * sphere.EARTH_RADIUS_KM * np.cos(np.radians(centre_lat))) if geographic else 1e-3
    target = width * km_per_unit / 5
    length = min((v for v in (1, 2, 5, 10, 20, 50, 100, 200, 500, 1000, 2000) if v >= target * 0.5), default=2000)
    units = length / km_per_unit
    x0 = x.min() + 0.05 * width
    y0 = y.min() + 0.05 * float(y.max() - y.min())
    ax.plot([x0, x0 + units], [y0, y0], color="black", linewidth=3, solid_capstyle="butt")
    ax.text(x0 + units / 2, y0, f"{length} km", ha="center", va="bottom", fontsize=8,
            bbox={"facecolor": "white", "alpha": 0.7, "edgecolor": "none", "pad": 1})


def _north_arrow(ax, ds, x, y):
    """An arrow toward true north at the map's centre (grid north differs on polar and conic grids)."""
    import pyproj

    crs = pyproj.CRS.from_wkt(ds["crs"].attrs["crs_wkt"])
    to_geo = pyproj.Transformer.from_crs(crs, "EPSG:4326", always_xy=True)
    to_map = pyproj.Transformer.from_crs("EPSG:4326", crs, always_xy=True)
    cx, cy = float(np.mean(x)), float(np.mean(y))
    lon, lat = to_geo.transform(cx, cy)
    nx, ny = to_map.transform(lon, min(lat + 0.1, 89.999))
    angle = np.arctan2(nx - cx, ny - cy)
    dx, dy = 0.08 * np.sin(angle), 0.08 * np.cos(angle)
    ax.annotate("N", xy=(0.93 + dx / 2, 0.9 + dy / 2), xytext=(0.93 - dx / 2, 0.9 - dy / 2),
                xycoords="axes fraction", ha="center", va="center",
                arrowprops={"arrowstyle": "-|>", "color": "black"}, fontsize=10)


def map_plot(ds, name, title, cmap, label, overlays=None, diverging=False) -> str:
    """One layer as a map, with optional overlays (lines and points)."""
    plt = _matplotlib()
    from matplotlib.colors import TwoSlopeNorm

    x, y, values, geographic = _decimate(ds, name)
    fig, ax = plt.subplots(figsize=(7.5, 6))
    norm = None
    if diverging and np.isfinite(values).any():
        span = float(np.nanpercentile(np.abs(values), 98)) or 1.0
        norm = TwoSlopeNorm(vcenter=0.0, vmin=-span, vmax=span)
    dx = float(x[1] - x[0]) if len(x) > 1 else 1.0
    dy = float(y[1] - y[0]) if len(y) > 1 else 1.0
    extent = (x[0] - dx / 2, x[-1] + dx / 2, y[-1] + dy / 2, y[0] - dy / 2)  # cell edges, first row on top
    mesh = ax.imshow(np.ma.masked_invalid(values), cmap=cmap, norm=norm, extent=extent, origin="upper",
                     interpolation="nearest")
    fig.colorbar(mesh, ax=ax, label=label, shrink=0.85)
    for overlay in overlays or []:
        overlay(ax)
    ax.set_xlim(x.min(), x.max())
    ax.set_ylim(y.min(), y.max())
    ax.set_xlabel("longitude (degrees east)" if geographic else "x (m)")
    ax.set_ylabel("latitude (degrees north)" if geographic else "y (m)")
    ax.set_title(title)
    if geographic:
        ax.set_aspect(1 / np.cos(np.radians(np.mean(y))))
    else:
        ax.set_aspect("equal")
        _north_arrow(ax, ds, x, y)
    _scale_bar(ax, x, y, geographic)
    return _png(fig)


def age_depth_plot(ds, models: dict, fit: dict | None) -> str:
    """Density-shaded corrected depth against age, each model's curve, and the fitted sqrt-age law."""
    plt = _matplotlib()
    from agegrid.thermal import get_model

    step = max(1, int(np.ceil(np.sqrt(ds["age"].size / MAX_POINTS))))
    layers = {n: np.asarray(ds[n][::step, ::step].values, dtype=float).ravel()
              for n in ("age", "observed_depth", "sediment_correction") if n in ds}
    age, depth = layers["age"], layers["observed_depth"] + np.nan_to_num(layers.get("sediment_correction", 0.0))
    ok = np.isfinite(age) & np.isfinite(depth)
    fig, ax = plt.subplots(figsize=(7.5, 5))
    if ok.any():
        hb = ax.hexbin(age[ok], depth[ok], gridsize=80, bins="log", cmap="Greys", mincnt=1)
        fig.colorbar(hb, ax=ax, label="cells (log scale)")
        t = np.linspace(0.01, max(float(np.nanmax(age[ok])), 1.0), 300)
        styles = ["-", "--", "-.", ":"]
        for i, (name, info) in enumerate(models.items()):
            model = get_model(name, {k: v for k, v in info["parameters"].items()})
            ax.plot(t, model.depth(t), styles[i % 4], color=f"C{i}", label=f"{name}")
        if fit:
            ax.plot(t, fit["ridge_depth_m"] + fit["sqrt_coefficient_m"] * np.sqrt(t), color="black", linewidth=2,
                    label=f"fit: {fit['ridge_depth_m']:.0f} + {fit['sqrt_coefficient_m']:.0f} sqrt(t)")
        ax.legend(loc="lower left", fontsize=8)
    ax.invert_yaxis()
    ax.set_xlabel("age (Myr)")
    ax.set_ylabel("sediment-corrected depth (m, positive down)")
    ax.set_title("Depth against age, with the cooling models")
    return _png(fig)


def track_plot(ds, manifest: dict, limit: int = 3) -> str | None:
    """Observed against predicted anomaly along the surveyed tracks that match worst."""
    from agegrid.alignment import sample
    from agegrid.grid import GridSpec
    from agegrid.io.profiles import read_profiles

    tracks = manifest.get("magnetic", {}).get("tracks", [])
    path = manifest.get("inputs", {}).get("magnetic_profiles", {}).get("path")
    if not tracks or not path or not Path(path).is_file():
        return None
    profiles = read_profiles(path)
    spec = GridSpec.from_dataset(ds)
    predicted = ds["magnetic_anomaly_predicted"].values
    worst = sorted(tracks, key=lambda t: (-int(t["flagged"]), t["correlation"] if t["correlation"] != "" else -2))
    worst = worst[:limit]
    plt = _matplotlib()
    fig, axes = plt.subplots(len(worst), 1, figsize=(8, 2.6 * len(worst)), squeeze=False)
    by_name = dict(profiles.tracks())
    for ax, row in zip(axes[:, 0], worst):
        idx = by_name[row["track"]]
        lon, lat = profiles.lon[idx], profiles.lat[idx]
        s = np.concatenate([[0.0], np.cumsum(sphere.distance_km(lon[:-1], lat[:-1], lon[1:], lat[1:]))])
        ax.plot(s, profiles.anomaly[idx], color="black", linewidth=1, label="observed")
        ax.plot(s, sample(predicted, spec, lon, lat), color="#d95f02", linewidth=1, label="predicted")
        ax.set_title(f"track {row['track']}: correlation {row['correlation']}, lag {row['lag_km']} km, "
                     f"{row['flagged']} flagged pick(s)", fontsize=9)
        ax.set_ylabel("anomaly (nT)")
        ax.legend(fontsize=7, loc="upper right")
    axes[-1, 0].set_xlabel("distance along track (km)")
    fig.tight_layout()
    return _png(fig)


def _line_overlay(lines, color, width):
    def draw(ax):
        for line in lines:
            ax.plot(line[:, 0], line[:, 1], color=color, linewidth=width)

    return draw


def _points_overlay(x, y, **style):
    def draw(ax):
        if len(x):
            ax.scatter(x, y, **style)

    return draw


def _table(rows: list[dict], limit: int = 80) -> str:
    if not rows:
        return "<p>none</p>"
    head = "".join(f"<th>{html.escape(str(k))}</th>" for k in rows[0])
    body = "".join("<tr>" + "".join(f"<td>{html.escape(str(v))}</td>" for v in r.values()) + "</tr>"
                   for r in rows[:limit])
    more = f"<p>{len(rows) - limit} more rows in the CSV file.</p>" if len(rows) > limit else ""
    return f"<table><tr>{head}</tr>{body}</table>{more}"


def _read_csv(text: str | None) -> list[dict]:
    return list(csv.DictReader(io.StringIO(text))) if text else []


def _inputs_geometry(manifest: dict, ds):
    """Ridges, barriers (as grid coordinates) and pick positions, read from the build's inputs if present."""
    from agegrid.io.points import read_picks
    from agegrid.io.vectors import read_lines

    inputs = manifest.get("inputs", {})
    x, y, geographic = _coords(ds)
    transform = None
    if not geographic:
        import pyproj

        transform = pyproj.Transformer.from_crs("EPSG:4326", pyproj.CRS.from_wkt(ds["crs"].attrs["crs_wkt"]),
                                                always_xy=True)
    centre = 0.5 * (float(x.min()) + float(x.max()))

    def project(lon, lat):
        if transform is not None:
            return np.stack(transform.transform(lon, lat), -1)
        return np.stack([(np.asarray(lon) - centre + 180) % 360 + centre - 180, lat], -1)

    def lines(key):
        path = inputs.get(key, {}).get("path")
        if not path or not Path(path).is_file():
            return []
        return [project(f.lonlat[:, 0], f.lonlat[:, 1]) for f in read_lines(path)]

    picks = None
    path = inputs.get("picks", {}).get("path")
    if path and Path(path).is_file():
        picks = read_picks(path)
    return lines("ridges"), lines("barriers"), picks, project


def build_report(ds, manifest: dict, rates_csv: str | None = None, depth_csv: str | None = None) -> str:
    """The report page's HTML for a built dataset and its manifest."""
    ridges, barriers, picks, project = _inputs_geometry(manifest, ds)
    overlays = [_line_overlay(barriers, "black", 1.2), _line_overlay(ridges, "crimson", 1.5)]
    figures = []
    pick_xy = project(picks.lon, picks.lat) if picks is not None else np.zeros((0, 2))
    figures.append(("Seafloor age, with picks (dots), ridges (red) and barriers (black)", map_plot(
        ds, "age", "Age of the oceanic crust", "cividis", "age (Myr)",
        overlays + [_points_overlay(pick_xy[:, 0], pick_xy[:, 1], s=2, c="white", edgecolors="none")])))
    figures.append(("Age uncertainty (1 sigma)", map_plot(ds, "age_uncertainty", "Age uncertainty (1 sigma)",
                                                          "viridis", "age uncertainty (Myr)", overlays)))
    figures.append(("Half spreading rate", map_plot(ds, "half_rate", "Half spreading rate", "magma",
                                                    "half-rate (mm/yr)", overlays)))
    flagged = {f["id"] for f in manifest.get("qa", {}).get("suspect_picks", [])}
    left_out = set(manifest.get("age_model", {}).get("picks_left_out_as_inconsistent", []))
    if picks is not None:
        ids = np.array(picks.ids)
        bad = np.isin(ids, list(flagged))
        out = np.isin(ids, list(left_out)) & ~bad
        good = ~bad & ~out
        qa_overlays = overlays + [
            _points_overlay(pick_xy[good, 0], pick_xy[good, 1], s=3, c="#2b83ba", label="pick"),
            _points_overlay(pick_xy[out, 0], pick_xy[out, 1], s=25, c="#fdae61", marker="s",
                            label="left out by the engine"),
            _points_overlay(pick_xy[bad, 0], pick_xy[bad, 1], s=40, c="#d7191c", marker="x", label="flagged by QA")]
        figures.append((f"Pick QA: {int(bad.sum())} flagged (red crosses), {int(out.sum())} left out by the engine "
                        "as inconsistent with their isochron (orange squares)",
                        map_plot(ds, "age", "Pick QA", "Greys", "age (Myr)", qa_overlays)))
    if "observed_depth" in ds:
        figures.append(("Depth against age", age_depth_plot(ds, manifest.get("models", {}),
                                                             manifest.get("depth_fit"))))
        for name in manifest.get("models", {}):
            if f"residual_{name}" in ds:
                figures.append((f"Residual depth against {name} (positive: shallower than the model)", map_plot(
                    ds, f"residual_{name}", f"Residual depth, {name}", "RdBu_r", "residual (m)", overlays,
                    diverging=True)))
                break
    if "magnetic_anomaly_predicted" in ds:
        figures.append(("Predicted magnetic anomaly at the sea surface", map_plot(
            ds, "magnetic_anomaly_predicted", "Predicted magnetic anomaly", "RdBu_r", "anomaly (nT)", overlays,
            diverging=True)))
        along = track_plot(ds, manifest)
        if along:
            figures.append(("Observed and predicted anomaly along the surveyed tracks that match worst", along))
    facts = [
        ("build", manifest.get("name")), ("built", manifest.get("built")), ("agegrid", manifest.get("agegrid")),
        ("timescale", f"{manifest.get('timescale', {}).get('name')}: {manifest.get('timescale', {}).get('reference')}"),
        ("grid", json.dumps(manifest.get("grid"))),
        ("models", ", ".join(f"{k} ({v['reference']})" for k, v in manifest.get("models", {}).items())),
        ("notes", "; ".join(manifest.get("notes", []))),
    ]
    inputs = [{"input": k, "path": v["path"], "bytes": v["bytes"], "sha256": v["sha256"][:16] + "..."}
              for k, v in manifest.get("inputs", {}).items()]
    timings = [{"stage": k, "seconds": v} for k, v in manifest.get("timings_s", {}).items()]
    qa = manifest.get("qa", {})
    engine = manifest.get("age_model", {})
    dropped = [{"compartment": d["compartment"], "age (Ma)": d["age_ma"], "flank": d["flank"], "picks": d["points"],
                "implied half-rate (mm/yr)": round(d["implied_half_rate_mm_yr"], 1), "reason": d.get("reason", "")}
               for d in engine.get("dropped_traces", [])]
    fit = manifest.get("depth_fit")
    fit_rows = []
    if fit:
        fit_rows.append({"curve": "fit to this build", "ridge depth (m)": f"{fit['ridge_depth_m']:.0f} +- "
                         f"{fit['ridge_depth_sigma_m']:.0f}", "sqrt coefficient (m/sqrt(Myr))":
                         f"{fit['sqrt_coefficient_m']:.1f} +- {fit['sqrt_coefficient_sigma_m']:.1f}",
                         "cells": fit["cells"]})
        for name, coef in fit.get("models", {}).items():
            fit_rows.append({"curve": name, "ridge depth (m)": f"{coef['ridge_depth_m']:.0f}",
                             "sqrt coefficient (m/sqrt(Myr))": f"{coef['sqrt_coefficient_m']:.1f}", "cells": ""})
    parts = [
        "<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'>",
        f"<title>agegrid report: {html.escape(str(manifest.get('name')))}</title>",
        "<style>body{font-family:sans-serif;max-width:1100px;margin:2em auto;color:#222}"
        "table{border-collapse:collapse;font-size:90%;margin:0.5em 0}td,th{border:1px solid #bbb;padding:2px 6px}"
        "th{background:#eee}.caution{border:2px solid #b35806;padding:0.6em;background:#fee0b6}"
        "figure{margin:1.5em 0}img{max-width:100%}</style></head><body>",
        f"<h1>agegrid build report: {html.escape(str(manifest.get('name')))}</h1>",
        f"<p class='caution'><strong>Caution.</strong> {html.escape(CAUTION)}</p>",
        "<h2>Key facts</h2>", _table([{"item": k, "value": v} for k, v in facts]),
        "<h2>Inputs</h2>", _table(inputs), "<h2>Timings</h2>", _table(timings),
    ]
    for caption, data in figures:
        parts.append(f"<figure><img alt='{html.escape(caption)}' src='data:image/png;base64,{data}'>"
                     f"<figcaption>{html.escape(caption)}</figcaption></figure>")
    parts += [
        f"<h2>Pick QA</h2><p>{qa.get('picks_checked', 0)} picks checked, {qa.get('findings', 0)} findings: "
        f"{html.escape(json.dumps(qa.get('by_kind', {})))}</p>",
        _table([dict(f) for f in qa.get("suspect_picks", [])], 50),
        "<h2>Control the age engine left out</h2>"
        f"<p>{engine.get('outlier_control_points', 0)} control points disagree with their isochron trace (off a "
        f"robust line through it, or far from its half-rate) and were left out"
        + (f"; the picks among them: {html.escape(', '.join(map(str, sorted(left_out)[:50])))}"
           + (f" and {len(left_out) - 50} more" if len(left_out) > 50 else "") if left_out else "")
        + ". Isochron traces dropped whole:</p>",
        _table(dropped, 50),
        "<h2>Magnetic check along survey tracks</h2>",
        _table([{k: v for k, v in t.items()} for t in manifest.get("magnetic", {}).get("tracks", [])]),
        "<h2>Rates per segment, flank and age band</h2>", _table(_read_csv(rates_csv)),
        "<h2>Residual depth by age bin</h2>", _table(_read_csv(depth_csv)),
        "<h2>Depth fit against the models</h2>", _table(fit_rows),
        "</body></html>",
    ]
    return "\n".join(parts)


def report_from_directory(directory: Path) -> Path:
    """Regenerate ``report.html`` from an existing output directory, without rebuilding."""
    from agegrid.errors import BadInput
    from agegrid.io.atomic import atomic_write_text
    from agegrid.io.netcdf import open_netcdf

    directory = Path(directory)
    manifest_path = directory / "manifest.json"
    if not manifest_path.is_file():
        raise BadInput("no manifest.json: not an agegrid output directory", directory)
    manifest = json.loads(manifest_path.read_text())
    name = manifest["name"]
    nc = directory / f"{name}.nc"
    if not nc.is_file():
        raise BadInput(f"{nc.name} is missing (the report needs the NetCDF output)", directory)
    texts = {}
    for key in ("rates", "depth_stats"):
        path = directory / f"{name}_{key}.csv"
        texts[key] = path.read_text() if path.is_file() else None
    with open_netcdf(nc) as ds:
        page = build_report(ds, manifest, texts["rates"], texts["depth_stats"])
    target = directory / "report.html"
    atomic_write_text(target, page)
    return target
