"""Geometry on the unit sphere: unit vectors, great-circle distances, densified lines."""
from __future__ import annotations

import numpy as np

#: Mean Earth radius R1 of the IUGG (6371.0088 km; value from memory of Moritz 2000, Geodetic Reference
#: System 1980), used to turn angles into kilometres.
EARTH_RADIUS_KM = 6371.0088


def to_xyz(lon, lat) -> np.ndarray:
    """Geographic degrees to unit vectors, stacked on the last axis."""
    lon = np.radians(np.asarray(lon, dtype=float))
    lat = np.radians(np.asarray(lat, dtype=float))
    cos_lat = np.cos(lat)
    return np.stack([cos_lat * np.cos(lon), cos_lat * np.sin(lon), np.sin(lat)], axis=-1)


def to_lonlat(xyz) -> tuple[np.ndarray, np.ndarray]:
    """Unit vectors to geographic degrees."""
    xyz = np.asarray(xyz, dtype=float)
    lon = np.degrees(np.arctan2(xyz[..., 1], xyz[..., 0]))
    lat = np.degrees(np.arcsin(np.clip(xyz[..., 2] / np.linalg.norm(xyz, axis=-1), -1, 1)))
    return lon, lat


def angle(a, b) -> np.ndarray:
    """Great-circle angle (radians) between unit vectors, accurate at small and large angles."""
    a, b = np.asarray(a, float), np.asarray(b, float)
    return np.arctan2(np.linalg.norm(np.cross(a, b), axis=-1), np.sum(a * b, axis=-1))


def distance_km(lon1, lat1, lon2, lat2) -> np.ndarray:
    """Great-circle distance (km) on the sphere of radius :data:`EARTH_RADIUS_KM`."""
    return EARTH_RADIUS_KM * angle(to_xyz(lon1, lat1), to_xyz(lon2, lat2))


def densify(xyz: np.ndarray, step_rad: float) -> np.ndarray:
    """Points along a polyline of unit vectors, no two consecutive more than ``step_rad`` apart.

    The vertices are kept; points between them follow the great circle (spherical linear
    interpolation).
    """
    xyz = np.asarray(xyz, dtype=float)
    if len(xyz) < 2:
        return xyz.copy()
    a, b = xyz[:-1], xyz[1:]
    theta = angle(a, b)
    n = np.maximum(1, np.ceil(theta / step_rad)).astype(int)
    seg = np.repeat(np.arange(len(n)), n)
    t = ((np.arange(n.sum()) - np.repeat(np.cumsum(n) - n, n) + 1) / np.repeat(n, n))[:, None]
    th = theta[seg][:, None]
    small = th < 1e-12
    safe = np.where(small, 1.0, th)
    wa = np.where(small, 1 - t, np.sin((1 - t) * safe) / np.sin(safe))
    wb = np.where(small, t, np.sin(t * safe) / np.sin(safe))
    return np.concatenate([xyz[:1], wa * a[seg] + wb * b[seg]])
