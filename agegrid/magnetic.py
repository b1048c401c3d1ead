"""Magnetic check: the anomaly the dated crust should produce, and how it lines up with surveys.

Magnetisation: a layer of thickness ``h`` whose top is the sea floor, magnetised along the remanent
direction with intensity ``M`` and the sign of the polarity of the cell's age in the build's timescale.
The remanent direction is that of a geocentric axial dipole at the present latitude
(tan I = 2 tan(latitude), declination 0): the assumption that the plate has not moved in latitude
since the crust formed. The ambient field direction comes from the IGRF at the survey epoch (ppigrf)
or from the build file.

Anomaly: Parker's (1973) Fourier series for a layer with an uneven top, observed at the sea surface
(z positive down, x north, y east; Blakely 1995, Potential Theory in Gravity and Magnetic
Applications, eq. 11.37 for the layer form)::

    F[dT] = 2 pi C_m Theta_m Theta_f exp(-|k| z0) sum_{n>=1} (-|k|)^n / n! F[M ((z1 - z0)^n - (z2 - z0)^n)]
    Theta = d_z + i (d_x k_x + d_y k_y) / |k|,   C_m = mu0 / 4 pi = 1e-7

with z1 the top, z2 = z1 + h and z0 the mean top. Terms are added until the last one changes the
spectrum by less than :data:`SERIES_TOLERANCE` of its largest value. The grid is processed in
overlapping tiles (dask ``map_overlap``); each tile is padded with zero magnetisation to twice its
size and its halo tapered, so no wrap-around reaches the cells it keeps.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from agegrid import sphere

C_M = 1e-7
SERIES_TOLERANCE = 1e-6
MAX_TERMS = 60
#: Default magnetised-layer thickness (km): the extrusive layer 2A, common practice.
DEFAULT_THICKNESS_KM = 0.5
#: Default magnetisation (A/m) of young oceanic basalt, common practice.
DEFAULT_MAGNETISATION = 5.0


def direction(inclination_deg: float, declination_deg: float) -> np.ndarray:
    """Unit vector (north, east, down) of a direction given by inclination and declination."""
    i, d = np.radians(inclination_deg), np.radians(declination_deg)
    return np.array([np.cos(i) * np.cos(d), np.cos(i) * np.sin(d), np.sin(i)])


def dipole_inclination(latitude_deg) -> np.ndarray:
    """Inclination of a geocentric axial dipole field: tan I = 2 tan(latitude)."""
    return np.degrees(np.arctan(2 * np.tan(np.radians(latitude_deg))))


def igrf_direction(lon: float, lat: float, epoch: float) -> tuple[float, float]:
    """Inclination and declination (degrees) of the IGRF main field at the sea surface."""
    import datetime

    import ppigrf

    year = int(epoch)
    when = datetime.datetime(year, 1, 1) + datetime.timedelta(days=365.25 * (epoch - year))
    be, bn, bu = (float(np.ravel(c)[0]) for c in ppigrf.igrf(lon, lat, 0.0, when))
    return math.degrees(math.atan2(-bu, math.hypot(be, bn))), math.degrees(math.atan2(be, bn))


def parker_anomaly(magnetisation: np.ndarray, top: np.ndarray, thickness: float, dx: float, dy: float,
                   remanence: np.ndarray, field: np.ndarray) -> tuple[np.ndarray, int]:
    """Total-field anomaly (nT) at z = 0 of a layer on a grid whose rows run north to south.

    Parameters
    ----------
    magnetisation : numpy.ndarray
        Signed magnetisation (A/m) per cell; 0 where there is none.
    top : numpy.ndarray
        Depth of the layer's top below the observation level (m, positive down), finite everywhere.
    thickness : float
        Layer thickness (m).
    dx, dy : float
        Cell size east-west and north-south (m).
    remanence, field : numpy.ndarray
        Unit vectors (north, east, down) of the magnetisation and of the ambient field.

    Returns
    -------
    anomaly : numpy.ndarray
        nT, same shape.
    terms : int
        Series terms used.
    """
    from scipy import fft

    # real input and output: half the spectrum (scipy's real FFTs), the other half is its conjugate
    ny, nx = magnetisation.shape
    kn = 2 * np.pi * fft.fftfreq(ny, d=dy)[:, None] * -1.0  # rows run southward
    ke = 2 * np.pi * fft.rfftfreq(nx, d=dx)[None, :]
    k = np.hypot(kn, ke)
    k[0, 0] = 1.0

    def theta(d):
        return d[2] + 1j * (d[0] * kn + d[1] * ke) / k

    z0 = float(np.mean(top))
    z1, z2 = top - z0, top + thickness - z0
    power1, power2 = np.ones_like(z1), np.ones_like(z2)
    decay = np.exp(-k * z0)
    total = np.zeros(k.shape, dtype=complex)
    factor = np.ones_like(k)
    terms = 0
    for n in range(1, MAX_TERMS + 1):
        power1, power2 = power1 * z1, power2 * z2
        factor = factor * (-k) / n
        term = factor * fft.rfft2(magnetisation * (power1 - power2))
        total += term
        terms = n
        if n > 2 and np.abs(term * decay).max() <= SERIES_TOLERANCE * max(np.abs(total * decay).max(), 1e-300):
            break
    spectrum = 2 * np.pi * C_M * theta(remanence) * theta(field) * decay * total
    spectrum[0, 0] = 0.0
    return fft.irfft2(spectrum, s=(ny, nx)) * 1e9, terms


@dataclass
class MagneticSettings:
    """``[magnetic]``: layer, magnetisation and field."""

    thickness_m: float = DEFAULT_THICKNESS_KM * 1e3
    magnetisation: float = DEFAULT_MAGNETISATION
    epoch: float | None = 2020.0
    field_inclination: float | None = None
    field_declination: float | None = None


def tile_directions(settings: MagneticSettings, lon: float, lat: float) -> tuple[np.ndarray, np.ndarray]:
    """Remanent (dipole at the present latitude) and ambient field directions for a tile's centre."""
    remanence = direction(float(dipole_inclination(lat)), 0.0)
    if settings.field_inclination is not None:
        field = direction(settings.field_inclination, settings.field_declination or 0.0)
    else:
        field = direction(*igrf_direction(lon, lat, settings.epoch))
    return remanence, field


def anomaly_layer(spec, age, top, timescale, settings: MagneticSettings, halo: int | None = None):
    """``magnetic_anomaly_predicted`` (nT) as a lazy dask array, computed per padded tile."""
    import dask.array as da

    spacing_m = spec.spacing * (np.radians(1) * sphere.EARTH_RADIUS_KM * 1e3 if spec.geographic else 1.0)
    if halo is None:
        halo = int(min(max(32, np.ceil(20e3 / spacing_m)), min(spec.chunks) // 2))
    polarity_m = da.map_blocks(lambda a: (timescale.polarity_at(a) * settings.magnetisation).astype(np.float64),
                               age, dtype=np.float64)
    depth = da.where(da.isfinite(top), top, np.nan)

    def tile(m, z, block_info=None):
        # the location is in the halo-padded array: shift back and clip to find the tile's centre cell
        (r0, r1), (c0, c1) = block_info[0]["array-location"]
        row = int(np.clip((r0 + r1) // 2 - halo, 0, spec.shape[0] - 1))
        col = int(np.clip((c0 + c1) // 2 - halo, 0, spec.shape[1] - 1))
        lon, lat = spec.lonlat(slice(row, row + 1), slice(col, col + 1))
        lon, lat = float(lon[0, 0]), float(lat[0, 0])
        remanence, field = tile_directions(settings, lon, lat)
        z = np.where(np.isfinite(z), z, np.nanmean(z) if np.isfinite(z).any() else 4000.0)
        m = np.nan_to_num(m)
        dx = spacing_m * (np.cos(np.radians(lat)) if spec.geographic else 1.0)
        anomaly, _ = padded_anomaly(m, z, settings.thickness_m, dx, spacing_m, remanence, field)
        return anomaly

    return da.map_overlap(tile, polarity_m, depth, depth=halo, boundary=np.nan, trim=True, dtype=np.float64,
                          align_arrays=False)


def padded_anomaly(m, z, thickness, dx, dy, remanence, field):
    """Parker's anomaly of one tile, zero-padded to twice its size so no wrap-around reaches it.

    The magnetisation is zero in the pad; the top's departure from its mean is tapered to zero across
    the pad (cosine), so the series sees no step at the tile's edge.
    """
    ny, nx = m.shape
    z0 = float(np.mean(z))
    padded_m = np.zeros((2 * ny, 2 * nx))
    padded_m[:ny, :nx] = m
    dz = np.zeros((2 * ny, 2 * nx))
    dz[:ny, :nx] = z - z0
    rows = np.arange(2 * ny)
    cols = np.arange(2 * nx)
    ramp_r = np.where(rows < ny, 1.0, 0.5 * (1 + np.cos(np.pi * np.minimum(rows - ny + 1, ny) / ny)))
    ramp_c = np.where(cols < nx, 1.0, 0.5 * (1 + np.cos(np.pi * np.minimum(cols - nx + 1, nx) / nx)))
    edge = np.zeros_like(dz)  # continue the tile's edge values into the pad, then taper them
    edge[:ny, :nx] = dz[:ny, :nx]
    edge[ny:, :nx] = dz[ny - 1, :nx][None, :]
    edge[:, nx:] = edge[:, nx - 1][:, None]
    dz = edge * ramp_r[:, None] * ramp_c[None, :]
    anomaly, terms = parker_anomaly(padded_m, dz + z0, thickness, dx, dy, remanence, field)
    return anomaly[:ny, :nx], terms
