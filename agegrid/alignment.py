"""Picks checked against survey profiles: how far the observed anomaly says each pick is off.

For every pick on a surveyed track, a window of the track around it is cross-correlated with the
anomaly predicted from the age grid; the best lag ``L`` says how far along the track the observed
pattern lies from the predicted one. Where the grid itself puts the pick's isochron on the track
(``s_grid``) follows from the age grid sampled along the track. The pick's position error is then

    error = (s_pick - s_grid) - L

in km along the track (the observed boundary lies at s_grid + L), and its age offset is error / half-rate.
A pick is flagged when |error| exceeds the tolerance, when the best correlation is below the minimum
(a polarity mismatch or no match), or when the grid has no isochron of the pick's age near it.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from agegrid import sphere


@dataclass
class AlignmentSettings:
    """Tolerances of the check (``[magnetic]``)."""

    tolerance_km: float = 5.0
    window_km: float = 40.0
    max_lag_km: float = 25.0
    min_correlation: float = 0.5
    max_distance_km: float = 5.0


def sample(values: np.ndarray, spec, lon, lat) -> np.ndarray:
    """Bilinear samples of a grid at geographic points (NaN off the grid)."""
    x, y = spec.project(np.asarray(lon), np.asarray(lat))
    fc = (x - spec.region[0]) / spec.spacing - 0.5
    fr = (spec.region[3] - y) / spec.spacing - 0.5
    ny, nx = values.shape
    c0 = np.clip(np.floor(fc).astype(int), 0, nx - 2)
    r0 = np.clip(np.floor(fr).astype(int), 0, ny - 2)
    tc, tr = fc - c0, fr - r0
    out = (values[r0, c0] * (1 - tc) * (1 - tr) + values[r0, c0 + 1] * tc * (1 - tr)
           + values[r0 + 1, c0] * (1 - tc) * tr + values[r0 + 1, c0 + 1] * tc * tr)
    inside = (fc >= -0.5) & (fc <= nx - 0.5) & (fr >= -0.5) & (fr <= ny - 0.5)
    return np.where(inside, out, np.nan)


def nearest_cell(values: np.ndarray, spec, lon, lat) -> np.ndarray:
    row, col, inside = spec.index(np.asarray(lon), np.asarray(lat))
    return np.where(inside, values[row, col], np.nan)


def best_lag(obs: np.ndarray, pred: np.ndarray, step_km: float, max_lag_km: float) -> tuple[float, float]:
    """Lag (km) and correlation that best align ``obs`` with ``pred`` (obs(s) ~ pred(s - lag)).

    Both are sampled at the same along-track positions. Of the correlation peaks within 0.8 of the best,
    the one nearest zero lag is taken (the stripes repeat); the lag is refined by a parabola through it.
    """
    n = len(obs)
    max_shift = int(max_lag_km / step_km)
    best, corr = np.nan, np.full(2 * max_shift + 1, np.nan)
    for i, shift in enumerate(range(-max_shift, max_shift + 1)):
        a = obs[max(shift, 0):n + min(shift, 0)]
        b = pred[max(-shift, 0):n - max(shift, 0)]
        ok = np.isfinite(a) & np.isfinite(b)
        if ok.sum() < max(5, n // 4):
            continue
        a, b = a[ok] - a[ok].mean(), b[ok] - b[ok].mean()
        denom = np.sqrt((a @ a) * (b @ b))
        corr[i] = (a @ b) / denom if denom > 0 else np.nan
    if not np.isfinite(corr).any():
        return best, np.nan
    # the stripes repeat, so several lags correlate well: take the interior peak nearest zero lag among
    # those within 0.8 of the best (a pick misplaced by less than half a stripe spacing is recovered)
    filled = np.where(np.isfinite(corr), corr, -np.inf)
    peaks = [j for j in range(1, len(corr) - 1) if filled[j] >= filled[j - 1] and filled[j] >= filled[j + 1]
             and filled[j] >= 0.8 * np.nanmax(corr)]
    lags = np.arange(-max_shift, max_shift + 1)
    i = min(peaks, key=lambda j: abs(lags[j])) if peaks else int(np.nanargmax(corr))
    offset = 0.0
    if 0 < i < len(corr) - 1 and np.isfinite(corr[i - 1]) and np.isfinite(corr[i + 1]):
        denom = corr[i - 1] - 2 * corr[i] + corr[i + 1]
        offset = 0.5 * (corr[i - 1] - corr[i + 1]) / denom if denom < 0 else 0.0
    return (i - max_shift + offset) * step_km, float(corr[i])


def check_profiles(profiles, spec, predicted, age, half_rate, pick_table, pick_ages, settings: AlignmentSettings):
    """Per-track figures and per-pick findings.

    Returns
    -------
    tracks : list of dict
        Per track: points, length, picks checked, whole-track lag and correlation, median pick error
        (km) and age offset (Myr), flagged picks.
    picks : list of dict
        Per checked pick: id, where, track, error_km, age_offset_myr, lag_km, correlation, flagged, reason.
    """
    step = min(1.0, spec.spacing * (111.19 if spec.geographic else 1e-3) / 2)
    by_track = {}
    for i, t in enumerate(pick_table.track):
        by_track.setdefault(t, []).append(i)
    track_rows, pick_rows = [], []
    for name, idx in profiles.tracks():
        lon, lat, obs = profiles.lon[idx], profiles.lat[idx], profiles.anomaly[idx]
        if len(idx) < 4:
            continue
        seg = sphere.distance_km(lon[:-1], lat[:-1], lon[1:], lat[1:])
        s = np.concatenate([[0.0], np.cumsum(seg)])
        grid = np.arange(0.0, s[-1], step)
        glon = np.interp(grid, s, np.degrees(np.unwrap(np.radians(lon))))
        glat = np.interp(grid, s, lat)
        g_obs = np.interp(grid, s, obs)
        g_pred = sample(predicted, spec, glon, glat)
        g_age = nearest_cell(age, spec, glon, glat)
        whole_lag, whole_corr = best_lag(g_obs, g_pred, step, settings.max_lag_km)
        errors, offsets, corrs, flagged = [], [], [], 0
        for p in by_track.get(name, []):
            d = sphere.distance_km(pick_table.lon[p], pick_table.lat[p], glon, glat)
            k = int(np.argmin(d))
            if d[k] > settings.max_distance_km:
                continue
            s_pick = grid[k]
            window = np.abs(grid - s_pick) <= settings.window_km / 2 + settings.max_lag_km
            lag, corr = best_lag(np.where(np.abs(grid - s_pick) <= settings.window_km / 2, g_obs, np.nan)[window],
                                 g_pred[window], step, settings.max_lag_km)
            diff = g_age - pick_ages[p]
            cross = np.flatnonzero(np.isfinite(diff[:-1]) & np.isfinite(diff[1:]) & (np.sign(diff[:-1]) != np.sign(diff[1:])))
            s_cross = grid[cross] + step * diff[cross] / (diff[cross] - diff[cross + 1]) if len(cross) else np.array([])
            near = s_cross[np.abs(s_cross - s_pick) <= settings.window_km] if len(s_cross) else s_cross
            s_grid = near[np.argmin(np.abs(near - s_pick))] if len(near) else np.nan
            error = (s_pick - s_grid) - lag if np.isfinite(lag) else np.nan
            rate = float(nearest_cell(half_rate, spec, np.array([pick_table.lon[p]]), np.array([pick_table.lat[p]]))[0])
            age_offset = error / rate if np.isfinite(rate) and rate > 0 else np.nan
            reason = ""
            if not np.isfinite(s_grid):
                reason = "no isochron of the pick's age near it on the grid"
            elif not np.isfinite(corr) or corr < settings.min_correlation:
                reason = f"observed and predicted anomalies do not match (correlation {corr:.2f}): polarity mismatch?"
            elif abs(error) > settings.tolerance_km:
                reason = f"the observed anomaly puts it {error:+.1f} km along the track from where it is"
            pick_rows.append({"id": pick_table.ids[p], "where": pick_table.where[p], "track": name,
                              "error_km": round(float(error), 2) if np.isfinite(error) else None,
                              "age_offset_myr": round(float(age_offset), 3) if np.isfinite(age_offset) else None,
                              "lag_km": round(float(lag), 2) if np.isfinite(lag) else None,
                              "correlation": round(float(corr), 3) if np.isfinite(corr) else None,
                              "flagged": bool(reason), "reason": reason})
            flagged += bool(reason)
            if np.isfinite(error):
                errors.append(error)
                offsets.append(age_offset)
            if np.isfinite(corr):
                corrs.append(corr)
        track_rows.append({
            "track": name, "points": int(len(idx)), "length_km": round(float(s[-1]), 1),
            "lag_km": round(float(whole_lag), 2) if np.isfinite(whole_lag) else "",
            "correlation": round(float(whole_corr), 3) if np.isfinite(whole_corr) else "",
            "picks_checked": len([r for r in pick_rows if r["track"] == name]),
            "median_pick_error_km": round(float(np.median(errors)), 2) if errors else "",
            "median_age_offset_myr": round(float(np.nanmedian(offsets)), 3) if offsets and np.isfinite(offsets).any() else "",
            "median_pick_correlation": round(float(np.median(corrs)), 3) if corrs else "",
            "flagged": flagged})
    return track_rows, pick_rows
