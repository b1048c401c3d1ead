"""Synthetic spreading basins with exactly known ages, for tests, the demo and the benchmarks.

A basin is built in the frame of its Euler pole P: ridge segments lie on meridians of P (great
circles through P), fracture zones on parallels of P (small circles, the flow lines), and crust on
each flank moves away from its ridge at an angular rate that changes in stages and may be shared
unequally between the flanks. Every quantity (age, half-rate, spreading direction) is therefore known
in closed form at any point.
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from agegrid import sphere

#: Chron ends a synthetic survey picks by default (CK95 names; young ends of the usual anomalies).
DEFAULT_PICKED = [
    ("C1n", "old"), ("C2n", "young"), ("C2An.1n", "young"), ("C2An.3n", "old"), ("C3n.1n", "young"),
    ("C3n.4n", "old"), ("C3An.1n", "young"), ("C3An.2n", "old"), ("C4n.1n", "young"), ("C4n.2n", "old"),
    ("C4An", "young"), ("C5n.1n", "young"), ("C5n.2n", "old"), ("C5An.1n", "young"), ("C5ACn", "young"),
    ("C5Bn.1n", "young"), ("C5Cn.1n", "young"), ("C5Dn", "young"), ("C5En", "young"), ("C6n", "young"),
    ("C6An.1n", "young"), ("C6Bn.1n", "young"), ("C6Cn.1n", "young"), ("C7n.1n", "young"),
    ("C8n.1n", "young"), ("C9n", "young"), ("C10n.1n", "young"), ("C11n.1n", "young"), ("C12n", "young"),
    ("C13n", "young"), ("C15n", "young"), ("C16n.1n", "young"), ("C17n.1n", "young"), ("C18n.1n", "young"),
]


def _frame(pole_lon: float, pole_lat: float, spin_deg: float = 0.0) -> np.ndarray:
    """Rotation matrix taking geographic unit vectors to the pole frame (P on the +z axis).

    The frame's x axis (where the basin sits) starts on the geographic equator and is turned by
    ``spin_deg`` about P, which moves the basin along P's equator toward higher latitudes.
    """
    z = sphere.to_xyz(pole_lon, pole_lat)
    helper = np.array([0.0, 0.0, 1.0]) if abs(z[2]) < 0.9 else np.array([1.0, 0.0, 0.0])
    x = np.cross(helper, z)
    x /= np.linalg.norm(x)
    y = np.cross(z, x)
    b = np.radians(spin_deg)
    x, y = np.cos(b) * x + np.sin(b) * y, -np.sin(b) * x + np.cos(b) * y
    return np.stack([x, y, z])


@dataclass
class Stage:
    """A spreading stage ending at ``until_ma``: full rate (mm/yr on the pole's equator) and the
    share of it (percent) taken by the flank on the positive side of the ridge."""

    until_ma: float
    full_rate_mm_yr: float
    share_percent: float = 50.0


@dataclass
class SyntheticBasin:
    """A basin of ridge corridors between fracture zones, in the frame of its Euler pole.

    Parameters
    ----------
    pole : tuple
        Euler pole (lon, lat) in degrees.
    bands : list of float
        Pole-frame latitudes bounding the corridors (fracture zones inside, the basin's edges outside).
    ridge_lon : list of float
        Pole-frame longitude of each corridor's ridge.
    stages : list of Stage
        The spreading history, youngest first; the last stage's end is the basin's oldest age.
    """

    pole: tuple[float, float] = (-60.0, 40.0)
    bands: list[float] = field(default_factory=lambda: [-14.0, -5.0, 4.0, 14.0])
    ridge_lon: list[float] = field(default_factory=lambda: [0.0, 2.4, 0.9])
    stages: list[Stage] = field(default_factory=lambda: [
        Stage(10.0, 110.0, 55.0), Stage(24.0, 80.0, 45.0), Stage(40.0, 95.0, 52.0)])
    spin_deg: float = 0.0

    def __post_init__(self):
        self.rotation = _frame(*self.pole, self.spin_deg)
        ends = np.array([0.0] + [s.until_ma for s in self.stages])
        omega = np.array([s.full_rate_mm_yr for s in self.stages]) / sphere.EARTH_RADIUS_KM  # rad/Myr
        share = np.array([s.share_percent for s in self.stages]) / 100.0
        self._ends = ends
        self._omega = omega
        self._share = share
        steps = np.diff(ends)
        self._cum_pos = np.concatenate([[0.0], np.cumsum(omega * share * steps)])
        self._cum_neg = np.concatenate([[0.0], np.cumsum(omega * (1 - share) * steps)])

    @property
    def max_age(self) -> float:
        return float(self._ends[-1])

    # --- frame conversions -------------------------------------------------------------------
    def to_pole_frame(self, lon, lat) -> tuple[np.ndarray, np.ndarray]:
        """Geographic degrees to pole-frame (longitude, latitude) in degrees."""
        xyz = sphere.to_xyz(lon, lat) @ self.rotation.T
        return sphere.to_lonlat(xyz)

    def from_pole_frame(self, plon, plat) -> tuple[np.ndarray, np.ndarray]:
        xyz = sphere.to_xyz(plon, plat) @ self.rotation
        return sphere.to_lonlat(xyz)

    # --- the spreading history ---------------------------------------------------------------
    def offset_rad(self, age, flank: int) -> np.ndarray:
        """Angular distance from the ridge (radians) of the isochron of ``age`` on a flank (+1/-1)."""
        cum = self._cum_pos if flank > 0 else self._cum_neg
        return np.interp(age, self._ends, cum)

    def corridor(self, plat) -> np.ndarray:
        """Corridor index of pole-frame latitudes (-1 outside the basin)."""
        k = np.searchsorted(self.bands, plat, side="right") - 1
        return np.where((k >= 0) & (k < len(self.ridge_lon)), k, -1)

    def _locate(self, lon, lat):
        plon, plat = self.to_pole_frame(lon, lat)
        k = self.corridor(plat)
        ridge = np.asarray(self.ridge_lon)[np.maximum(k, 0)]
        d = np.radians((plon - ridge + 180.0) % 360.0 - 180.0)
        return plat, k, d

    def age(self, lon, lat) -> np.ndarray:
        """True age (Myr) at geographic points; NaN outside the basin."""
        plat, k, d = self._locate(lon, lat)
        pos = np.interp(d, self._cum_pos, self._ends, right=np.nan)
        neg = np.interp(-d, self._cum_neg, self._ends, right=np.nan)
        age = np.where(d >= 0, pos, neg)
        return np.where(k >= 0, age, np.nan)

    def flank(self, lon, lat) -> np.ndarray:
        """+1 or -1: the side of its ridge a point lies on (0 outside)."""
        plat, k, d = self._locate(lon, lat)
        return np.where(k >= 0, np.where(d >= 0, 1, -1), 0)

    def half_rate(self, lon, lat) -> np.ndarray:
        """True half-rate (mm/yr = km/Myr) at geographic points: the flank's rate at the point's age."""
        plat, k, d = self._locate(lon, lat)
        age = self.age(lon, lat)
        stage = np.clip(np.searchsorted(self._ends, age, side="right") - 1, 0, len(self.stages) - 1)
        share = np.where(d >= 0, self._share[stage], 1 - self._share[stage])
        rate = self._omega[stage] * share * sphere.EARTH_RADIUS_KM * np.cos(np.radians(plat))
        return np.where(np.isfinite(age), rate, np.nan)

    def share(self, lon, lat) -> np.ndarray:
        """True share (percent) of the full rate taken by the point's flank at its age."""
        age = self.age(lon, lat)
        stage = np.clip(np.searchsorted(self._ends, age, side="right") - 1, 0, len(self.stages) - 1)
        d = self._locate(lon, lat)[2]
        share = np.where(d >= 0, self._share[stage], 1 - self._share[stage]) * 100
        return np.where(np.isfinite(age), share, np.nan)

    def azimuth(self, lon, lat) -> np.ndarray:
        """True spreading azimuth (degrees clockwise from north, toward older crust)."""
        plat, k, d = self._locate(lon, lat)
        x = sphere.to_xyz(lon, lat)
        pole = self.rotation[2]
        east_p = np.cross(pole, x)  # direction of increasing pole-frame longitude
        east_p /= np.linalg.norm(east_p, axis=-1, keepdims=True)
        direction = east_p * np.where(d >= 0, 1, -1)[..., None]
        lam, phi = np.radians(lon), np.radians(lat)
        east = np.stack([-np.sin(lam), np.cos(lam), np.zeros_like(lam)], -1)
        north = np.stack([-np.sin(phi) * np.cos(lam), -np.sin(phi) * np.sin(lam), np.cos(phi)], -1)
        az = np.degrees(np.arctan2(np.sum(direction * east, -1), np.sum(direction * north, -1))) % 360
        return np.where(k >= 0, az, np.nan)

    # --- geometry ----------------------------------------------------------------------------
    def _edge(self, flank: int) -> float:
        return np.degrees(self.offset_rad(self.max_age, flank))

    def ridges(self, step_deg: float = 0.25) -> list[np.ndarray]:
        """Ridge segments as (lon, lat) vertex arrays."""
        out = []
        for k, rl in enumerate(self.ridge_lon):
            plat = np.arange(self.bands[k], self.bands[k + 1] + 1e-9, step_deg)
            out.append(np.stack(self.from_pole_frame(np.full_like(plat, rl), plat), -1))
        return out

    def fracture_zones(self, step_deg: float = 0.25, overshoot_deg: float = 0.5) -> list[np.ndarray]:
        """Fracture zones (and the transforms between the ridges) as (lon, lat) vertex arrays."""
        out = []
        for k in range(1, len(self.ridge_lon)):
            west = min(self.ridge_lon[k - 1], self.ridge_lon[k]) - self._edge(-1) - overshoot_deg
            east = max(self.ridge_lon[k - 1], self.ridge_lon[k]) + self._edge(1) + overshoot_deg
            plon = np.arange(west, east + 1e-9, step_deg)
            out.append(np.stack(self.from_pole_frame(plon, np.full_like(plon, self.bands[k])), -1))
        return out

    def isochron(self, age: float, flank: int, corridor: int, step_deg: float = 0.25) -> np.ndarray:
        """The isochron of ``age`` on one flank of one corridor, as a (lon, lat) vertex array."""
        plat = np.arange(self.bands[corridor], self.bands[corridor + 1] + 1e-9, step_deg)
        plon = self.ridge_lon[corridor] + flank * np.degrees(self.offset_rad(age, flank))
        return np.stack(self.from_pole_frame(np.full_like(plat, plon), plat), -1)

    def domain_polygon(self):
        """The basin (crust up to the oldest age) as a shapely polygon in (lon, lat)."""
        import shapely
        from shapely.geometry import Polygon, box
        from shapely.ops import unary_union

        parts = [box(rl - self._edge(-1), self.bands[k], rl + self._edge(1), self.bands[k + 1])
                 for k, rl in enumerate(self.ridge_lon)]
        outline = shapely.segmentize(unary_union(parts), max_segment_length=0.1)
        plon, plat = np.asarray(outline.exterior.coords).T
        lon, lat = self.from_pole_frame(plon, plat)
        lon = np.degrees(np.unwrap(np.radians(lon)))
        return Polygon(np.stack([lon, lat], -1))

    def region(self, margin_deg: float = 0.5) -> tuple[float, float, float, float]:
        """A geographic box around the basin (west, east, south, north)."""
        lon, lat = np.asarray(self.domain_polygon().exterior.coords).T
        lon = np.degrees(np.unwrap(np.radians(lon)))
        shift = 360.0 * np.floor((lon.min() + 180.0) / 360.0)
        west, east = lon.min() - shift, lon.max() - shift
        return (float(np.floor(west - margin_deg)), float(np.ceil(east + margin_deg)),
                float(max(-90.0, np.floor(lat.min() - margin_deg))), float(min(90.0, np.ceil(lat.max() + margin_deg))))

    # --- a survey ----------------------------------------------------------------------------
    def survey(self, timescale, tracks: int, noise_km: float = 1.5, seed: int = 0,
               picked=DEFAULT_PICKED, sample_km: float = 1.0, track_km: tuple = (1500.0, 4000.0),
               spread_deg: float = 35.0, start_box: tuple | None = None, prefix: str = "T",
               profile: list | None = None, profile_step: int = 2) -> list[dict]:
        """Picks where random survey tracks cross the isochrons of the picked chron ends.

        Tracks are great-circle lines through random points of the basin, heading within
        ``spread_deg`` of the local spreading direction; each crossing is moved by Gaussian noise of
        ``noise_km`` per axis; ``start_box`` (west, east, south, north) confines the tracks' centres.
        With ``profile`` (a list), every ``profile_step``-th track sample inside the basin is appended to it
        as {lon, lat, track}, for survey profiles.
        Returns one record per pick (lon, lat, chron, edge, age_ma, track, id,
        plus the true flank and corridor).
        """
        rng = np.random.default_rng(seed)
        boundaries = [(c, e, timescale.boundary(c, e)) for c, e in picked]
        boundaries = [b for b in boundaries if b[2] < self.max_age]
        targets = np.array([b[2] for b in boundaries])
        west, east, south, north = start_box or self.region(0.0)
        records = []
        made = 0
        while made < tracks:
            lon0, lat0 = rng.uniform(west, east), rng.uniform(south, north)
            if not np.isfinite(self.age(lon0, lat0)):
                continue
            az0 = self.azimuth(np.array(lon0), np.array(lat0)) + rng.uniform(-spread_deg, spread_deg)
            length = rng.uniform(*track_km)
            lon, lat = _great_circle(lon0, lat0, float(az0), length, sample_km)
            age = self.age(lon, lat)
            plat, k, d = self._locate(lon, lat)
            side = np.sign(d)
            made += 1
            if profile is not None:
                inside = np.flatnonzero(np.isfinite(age))[::profile_step]
                profile.extend({"lon": float((lon[i] + 180) % 360 - 180), "lat": float(lat[i]),
                                "track": f"{prefix}{made:03d}"} for i in inside)
            for i in range(len(lon) - 1):
                a0, a1 = age[i], age[i + 1]
                if not (np.isfinite(a0) and np.isfinite(a1)) or k[i] != k[i + 1] or side[i] != side[i + 1]:
                    continue
                lo, hi = min(a0, a1), max(a0, a1)
                for j in np.flatnonzero((targets > lo) & (targets <= hi)):
                    f = (targets[j] - a0) / (a1 - a0)
                    plon, pla = lon[i] + f * _dlon(lon[i + 1], lon[i]), lat[i] + f * (lat[i + 1] - lat[i])
                    e_km, n_km = rng.normal(0, noise_km, 2) if noise_km > 0 else (0.0, 0.0)
                    pla2 = pla + np.degrees(n_km / sphere.EARTH_RADIUS_KM)
                    plon2 = plon + np.degrees(e_km / (sphere.EARTH_RADIUS_KM * np.cos(np.radians(pla))))
                    chron, edge, t = boundaries[j]
                    records.append({"id": f"{prefix}{made:03d}-{len(records):05d}", "track": f"{prefix}{made:03d}",
                                    "lon": round(float((plon2 + 180) % 360 - 180), 6), "lat": round(float(pla2), 6),
                                    "chron": chron, "edge": edge, "age_ma": t,
                                    "true_flank": int(side[i]), "true_corridor": int(k[i])})
        return records


def _dlon(a, b):
    return (a - b + 180.0) % 360.0 - 180.0


def _great_circle(lon0, lat0, azimuth_deg, length_km, step_km):
    """Points along a great circle from (lon0, lat0) heading ``azimuth_deg`` (centred on the start)."""
    import pyproj

    geod = pyproj.Geod(a=sphere.EARTH_RADIUS_KM * 1e3, b=sphere.EARTH_RADIUS_KM * 1e3)
    n = int(length_km / step_km) + 1
    dist = (np.arange(n) - n // 2) * step_km * 1e3
    lon, lat, _ = geod.fwd(np.full(n, lon0), np.full(n, lat0), np.full(n, azimuth_deg), dist)
    return np.asarray(lon), np.asarray(lat)
