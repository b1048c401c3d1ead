"""Dated control: picks, ridges (age 0) and isochron lines, as unit vectors with boundary labels.

Each dated point carries the index of a *boundary*: a chron end (``"C5n.2n:old"``) when the input
named a chron, or a bare age (``"age:10.949"``) otherwise. Grids keep these indices, which is what
lets :mod:`agegrid.retime` re-express an age grid in another timescale.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from agegrid import sphere
from agegrid.errors import BadInput
from agegrid.io.points import PickTable
from agegrid.io.vectors import LineFeature

RIDGE_LABEL = "ridge"


def boundary_label(chron: str | None, edge: str, age: float) -> str:
    """The label of a dated boundary: ``"C5n.2n:old"`` for a chron end, ``"age:10.949"`` otherwise."""
    return f"{chron}:{edge}" if chron else f"age:{age:.6f}"


@dataclass
class Boundaries:
    """The dated boundaries used by a build: label -> age (Ma), index 0 is the ridge."""

    labels: list[str] = field(default_factory=lambda: [RIDGE_LABEL])
    ages: list[float] = field(default_factory=lambda: [0.0])
    _where: dict = field(default_factory=lambda: {RIDGE_LABEL: 0}, repr=False)

    def index(self, label: str, age: float) -> int:
        if label not in self._where:
            self._where[label] = len(self.labels)
            self.labels.append(label)
            self.ages.append(float(age))
        return self._where[label]


@dataclass
class ControlSet:
    """All dated control of a build, in geographic degrees and unit vectors.

    ``kind`` is 0 for ridge points, 1 for isochron-line points, 2 for picks; ``source_index`` points
    back into the pick table for picks (-1 otherwise).
    """

    lon: np.ndarray
    lat: np.ndarray
    age: np.ndarray
    boundary: np.ndarray
    kind: np.ndarray
    sigma_km: np.ndarray
    source_index: np.ndarray
    boundaries: Boundaries
    picks: PickTable | None = None

    @property
    def xyz(self) -> np.ndarray:
        return sphere.to_xyz(self.lon, self.lat)

    def __len__(self) -> int:
        return len(self.lon)

    def subset(self, keep: np.ndarray) -> "ControlSet":
        return ControlSet(self.lon[keep], self.lat[keep], self.age[keep], self.boundary[keep],
                          self.kind[keep], self.sigma_km[keep], self.source_index[keep], self.boundaries,
                          self.picks)


def date_picks(table: PickTable, timescale) -> tuple[np.ndarray, list[str]]:
    """Ages (Ma) and boundary labels of every pick; a chron takes precedence over ``age_ma``.

    Raises
    ------
    BadInput
        A chron that is malformed or absent from the timescale, naming file, line and label.
    """
    ages, labels, known = np.empty(len(table)), [], {}
    for i, (chron, edge, age) in enumerate(zip(table.chron, table.edge, table.age)):
        if chron:
            if (chron, edge) not in known:
                try:
                    canonical = timescale.resolve(chron)
                    value = timescale.boundary(canonical, edge)
                except KeyError as exc:
                    raise BadInput(str(exc.args[0]), table.path, table.where[i]) from None
                known[chron, edge] = (value, boundary_label(canonical, edge, value))
            ages[i] = known[chron, edge][0]
            labels.append(known[chron, edge][1])
        else:
            ages[i] = age
            labels.append(boundary_label(None, edge, age) if age > 0 else RIDGE_LABEL)
    return ages, labels


def _line_age(feature: LineFeature, timescale, path) -> tuple[float, str]:
    props, where = feature.properties, f"feature {feature.index}"
    chron = str(props.get("chron") or "").strip()
    edge = str(props.get("edge") or "young").strip().lower()
    if edge not in ("young", "old"):
        raise BadInput(f"edge must be 'young' or 'old', got {props.get('edge')!r}", path, where)
    if chron:
        try:
            canonical = timescale.resolve(chron)
            age = timescale.boundary(canonical, edge)
        except KeyError as exc:
            raise BadInput(str(exc.args[0]), path, where) from None
        return age, boundary_label(canonical, edge, age)
    try:
        age = float(props["age_ma"])
    except (KeyError, TypeError, ValueError):
        raise BadInput("an isochron needs a numeric 'age_ma' or a 'chron' property", path, where) from None
    if not 0 <= age <= 250:
        raise BadInput(f"age_ma {age} is impossible (must lie in 0..250 Ma)", path, where)
    return age, boundary_label(None, edge, age) if age > 0 else RIDGE_LABEL


def densify_lonlat(lonlat: np.ndarray, step_rad: float) -> tuple[np.ndarray, np.ndarray]:
    """Densify a (lon, lat) polyline along great circles; returns lon, lat arrays."""
    return sphere.to_lonlat(sphere.densify(sphere.to_xyz(lonlat[:, 0], lonlat[:, 1]), step_rad))


def build_control(picks: PickTable, timescale, ridges: list[LineFeature], step_rad: float,
                  isochrons: list[LineFeature] | None = None, isochron_path: Path | None = None,
                  default_sigma_km: float = 2.0) -> ControlSet:
    """Assemble dated control: picks, ridges densified at ``step_rad``, and isochron lines.

    Parameters
    ----------
    picks : PickTable
        The picks as read.
    timescale : Timescale
        The build's timescale, for chron labels.
    ridges, isochrons : list of LineFeature
        Ridge axes (age 0) and dated isochron lines.
    step_rad : float
        Largest gap (radians) between consecutive points on a densified line.
    default_sigma_km : float
        Position uncertainty of picks without ``sigma_km``, and of line points.
    """
    boundaries = Boundaries()
    ages, labels = date_picks(picks, timescale)
    parts = {"lon": [picks.lon], "lat": [picks.lat], "age": [ages],
             "boundary": [np.array([boundaries.index(lab, a) for lab, a in zip(labels, ages)], dtype=np.int32)],
             "kind": [np.full(len(picks), 2, np.int8)],
             "sigma_km": [np.where(np.isnan(picks.sigma_km), default_sigma_km, picks.sigma_km)],
             "source_index": [np.arange(len(picks))]}

    def add_line(lonlat, age, label, kind):
        lon, lat = densify_lonlat(lonlat, step_rad)
        n = len(lon)
        parts["lon"].append(lon)
        parts["lat"].append(lat)
        parts["age"].append(np.full(n, age))
        parts["boundary"].append(np.full(n, boundaries.index(label, age), np.int32))
        parts["kind"].append(np.full(n, kind, np.int8))
        parts["sigma_km"].append(np.full(n, default_sigma_km))
        parts["source_index"].append(np.full(n, -1))

    for ridge in ridges:
        add_line(ridge.lonlat, 0.0, RIDGE_LABEL, 0)
    for line in isochrons or []:
        age, label = _line_age(line, timescale, isochron_path)
        add_line(line.lonlat, age, label, 1 if age > 0 else 0)
    joined = {k: np.concatenate(v) for k, v in parts.items()}
    return ControlSet(**joined, boundaries=boundaries, picks=picks)
