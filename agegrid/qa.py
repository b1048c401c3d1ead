"""Pick QA: duplicates, picks off the grid or the domain, age inversions and implausible rates.

Rates are judged against bounds from ``[picks]``: by default 2 to 100 mm/yr half rate. The fastest
present-day spreading is roughly 75-80 mm/yr half rate (common practice), so 100 leaves room for
noise; 2 mm/yr is slower than the slowest ridges (common practice).
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from scipy.spatial import cKDTree

from agegrid import sphere
from agegrid.grouped import Groups

R = sphere.EARTH_RADIUS_KM


@dataclass
class QAReport:
    """Findings, one per suspect pick and problem."""

    findings: list[dict] = field(default_factory=list)
    checked: int = 0

    def add(self, table, index: int, kind: str, problem: str) -> None:
        self.findings.append({"id": table.ids[index], "where": table.where[index], "kind": kind,
                              "problem": problem, "index": int(index)})

    def suspect_indices(self) -> np.ndarray:
        return np.unique([f["index"] for f in self.findings]).astype(np.int64)

    def summary(self) -> dict:
        kinds = {}
        for f in self.findings:
            kinds[f["kind"]] = kinds.get(f["kind"], 0) + 1
        return {"picks_checked": self.checked, "findings": len(self.findings), "by_kind": kinds,
                "suspect_picks": [{k: f[k] for k in ("id", "where", "kind", "problem")} for f in self.findings]}


def ridge_offsets(model, xyz: np.ndarray, label: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Across-strike distance (km) from the ridge and flank (+1/-1) of points, in the engine's frames."""
    dist = np.full(len(xyz), np.nan)
    side = np.zeros(len(xyz), int)
    for lab, m in model.compartments.items():
        ridge = np.flatnonzero((m.ages == 0) & (m.bounds == 0))
        sel = np.flatnonzero(label == lab)
        if not len(ridge) or not len(sel):
            continue
        w, s = m.frame.ws(xyz[sel])
        col = np.clip(np.nan_to_num((w - m.u0) / m.du), 0, m.ncol - 1)
        offset = s - np.interp(col, np.arange(m.ncol), m.V[ridge[0]])
        dist[sel] = np.abs(offset) / np.sqrt(np.maximum(1 - s**2, 1e-12)) * R
        side[sel] = np.sign(offset).astype(int)
    return dist, side


def check_picks(control, spec, settings, model) -> QAReport:
    """Run every pick check; ``settings`` is the ``[picks]`` section, ``model`` the age model fitted to ``control``."""
    table = control.picks
    report = QAReport(checked=len(table))
    is_pick = control.kind == 2
    idx = control.source_index[is_pick]
    lon, lat, age = control.lon[is_pick], control.lat[is_pick], control.age[is_pick]
    label = model.control_compartments[is_pick]  # each pick's compartment, as the model placed it
    _, _, on_grid = spec.index(lon, lat)
    for i in np.flatnonzero(~on_grid):
        report.add(table, idx[i], "outside_grid", "lies outside the grid region")
    for i in np.flatnonzero(on_grid & (label == 0)):
        report.add(table, idx[i], "outside_domain", "lies outside the oceanic domain")
    xyz = sphere.to_xyz(lon, lat)
    # duplicates: same boundary within duplicate_km
    tree = cKDTree(xyz)
    bounds = control.boundary[is_pick]
    tracks = np.array(table.track, dtype=object)[idx]
    for i, j in sorted(tree.query_pairs(settings.duplicate_km / R)):
        if bounds[i] == bounds[j] and (tracks[i] == tracks[j] or not tracks[i] or not tracks[j]):
            report.add(table, idx[j], "duplicate", f"duplicates pick {table.ids[idx[i]]} "
                       f"({table.where[idx[i]]}) within {settings.duplicate_km:g} km")
    dist, side = ridge_offsets(model, xyz, label)
    tol_km = 3 * np.nanmedian(control.sigma_km[is_pick]) if is_pick.any() else 6.0
    track_code = np.unique(tracks.astype(str), return_inverse=True)[1].reshape(-1)
    usable = np.flatnonzero(tracks.astype(bool) & (label != 0) & (side != 0) & np.isfinite(dist))
    keys = np.stack([track_code, label, side], -1)[usable]  # picks of one track, compartment and flank
    groups = Groups(np.unique(keys, axis=0, return_inverse=True)[1].reshape(-1), usable)
    for start, stop in zip(groups.starts, groups.stops):
        members = groups.cells[start:stop]
        if len(members) < 2:
            continue
        order = members[np.argsort(dist[members], kind="stable")]
        d, a = dist[order], age[order]
        # the picks nearer the ridge than pick n by more than tol_km are a prefix of the order: the oldest of
        # them (the first, on a tie) is what an inversion is judged against
        oldest = np.maximum.accumulate(a)
        rises = np.flatnonzero(np.r_[True, oldest[1:] > oldest[:-1]])
        first_oldest = rises[np.searchsorted(rises, np.arange(len(a)), side="right") - 1]
        nearer = np.searchsorted(d, d - tol_km, side="left")  # how many picks are that much nearer
        for n in np.flatnonzero((nearer > 0) & (a < oldest[np.maximum(nearer - 1, 0)] - 0.05)):
            m = order[first_oldest[nearer[n] - 1]]
            report.add(table, idx[order[n]], "age_inversion",
                       f"age {a[n]:.3f} Ma lies {d[n]:.1f} km from the ridge, farther than pick "
                       f"{table.ids[idx[m]]} of {age[m]:.3f} Ma on the same track and flank")
        dt = np.diff(a)
        checked = (dt > 0.05) & (a[1:] > 0)  # neighbours whose ages differ enough to imply a rate
        rates = np.divide(np.diff(d), dt, out=np.full(len(dt), np.nan), where=checked)
        outside = (rates > settings.max_half_rate_mm_yr) | (rates < settings.min_half_rate_mm_yr)
        for n in 1 + np.flatnonzero(outside):
            rate = rates[n - 1]
            own = d[n] / a[n]
            prev = d[n - 1] / a[n - 1] if a[n - 1] > 0 else own
            typical = np.median(d[a > 0] / a[a > 0])
            culprit = n if abs(own - typical) >= abs(prev - typical) else n - 1
            report.add(table, idx[order[culprit]], "implausible_rate",
                       f"implies a half-rate of {rate:.1f} mm/yr against its neighbour on the same "
                       f"track (bounds {settings.min_half_rate_mm_yr:g}-{settings.max_half_rate_mm_yr:g})")
    seen, unique = set(), []
    for f in report.findings:
        key = (f["index"], f["kind"])
        if key not in seen:
            seen.add(key)
            unique.append(f)
    report.findings = unique
    return report
