"""Compartments: the oceanic domain cut by barrier lines (fracture zones, transforms, pseudofaults).

Barriers are rasterised at grid resolution as 8-connected cell paths and the free cells labelled by
4-connectivity, so no label leaks diagonally through a barrier. Barrier lines are continued along
their end great circles to the grid's edge (or the next barrier), so a barrier that stops short of the
domain's edge does not leak either. Barrier cells, and points that fall in them, are given to the
neighbouring compartment on their own side of the line (a segment test against the barrier geometry).
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import shapely
from scipy import ndimage

from agegrid import sphere


@dataclass
class Compartments:
    """Compartment labels on the grid (0: outside the domain), the barrier cells and their geometry."""

    labels: np.ndarray
    count: int
    barrier: np.ndarray
    domain: np.ndarray
    barrier_paths: list[np.ndarray]
    _segment_cache: tuple | None = field(default=None, repr=False)

    def assign(self, spec, lon: np.ndarray, lat: np.ndarray) -> np.ndarray:
        """Compartment of each geographic point; 0 off the grid or outside the domain."""
        row, col, inside = spec.index(lon, lat)
        label = np.where(inside, self.labels[row, col], 0)
        on_barrier = inside & self.barrier[row, col]
        if on_barrier.any():
            x, y = spec.project(lon[on_barrier], lat[on_barrier])
            fx = (x - spec.region[0]) / spec.spacing - 0.5
            fy = (spec.region[3] - y) / spec.spacing - 0.5
            label[on_barrier] = self._side_labels(fx, fy)
        return label


    def _side_labels(self, fx: np.ndarray, fy: np.ndarray, radius: int = 3) -> np.ndarray:
        """Label of the nearest free cell on the same side of the nearest barrier segment as each point.

        Points are given in fractional (column ``fx``, row ``fy``) cell coordinates; the side of a point
        is the sign of the cross product of its nearest barrier segment's direction with the vector
        from the segment to the point.
        """
        ny, nx = self.labels.shape
        offsets = np.array([(dr, dc) for dr in range(-radius, radius + 1) for dc in range(-radius, radius + 1)
                            if (dr, dc) != (0, 0)])
        offsets = offsets[np.argsort(np.hypot(*offsets.T), kind="stable")]
        start, direction, tree = self._segments()
        q = np.stack([fx, fy], -1)
        _, seg = tree.query(q)
        a, d = start[seg], direction[seg]
        side = np.sign(d[:, 0] * (q[:, 1] - a[:, 1]) - d[:, 1] * (q[:, 0] - a[:, 0]))
        r0, c0 = np.rint(fy).astype(int), np.rint(fx).astype(int)
        result = np.zeros(len(fx), dtype=self.labels.dtype)
        todo = np.ones(len(fx), bool)
        for dr, dc in offsets:
            rr, cc = np.clip(r0 + dr, 0, ny - 1), np.clip(c0 + dc, 0, nx - 1)
            cand = np.where(self.barrier[rr, cc], 0, self.labels[rr, cc])
            cside = np.sign(d[:, 0] * (rr - a[:, 1]) - d[:, 1] * (cc - a[:, 0]))
            ok = todo & (cand > 0) & ((cside == side) | (side == 0))
            result[ok] = cand[ok]
            todo &= ~ok
            if not todo.any():
                break
        return result

    def _segments(self):
        """Start points and directions of every barrier path segment, with a KD-tree on their midpoints."""
        if self._segment_cache is None:
            from scipy.spatial import cKDTree

            starts, dirs = [], []
            for path in self.barrier_paths:
                if len(path) > 1:
                    starts.append(path[:-1])
                    dirs.append(np.diff(path, axis=0))
            start = np.concatenate(starts) if starts else np.zeros((1, 2))
            direction = np.concatenate(dirs) if dirs else np.ones((1, 2))
            self._segment_cache = (start, direction, cKDTree(start + direction / 2))
        return self._segment_cache


def _index_path(spec, lon: np.ndarray, lat: np.ndarray) -> np.ndarray:
    """A polyline in fractional (column, row) cell coordinates, consecutive points < 0.5 cell apart."""
    x, y = spec.project(lon, lat)
    pts = np.stack([(x - spec.region[0]) / spec.spacing - 0.5, (spec.region[3] - y) / spec.spacing - 0.5], -1)
    if spec.geographic:  # keep longitudes continuous along the line
        lon_c = np.unwrap(np.radians(lon))
        pts[:, 0] = (np.degrees(lon_c) - np.degrees(lon_c[0]) + spec.wrap_lon(lon[:1])[0] - spec.region[0]) \
            / spec.spacing - 0.5
    if len(pts) < 2:
        return pts
    steps = np.maximum(1, np.ceil(2.5 * np.abs(np.diff(pts, axis=0)).max(axis=1)).astype(int))
    start = np.repeat(np.arange(len(steps)), steps)
    frac = (np.arange(steps.sum()) - np.repeat(np.cumsum(steps) - steps, steps) + 1) / np.repeat(steps, steps)
    dense = pts[start] + frac[:, None] * (pts[start + 1] - pts[start])
    return np.concatenate([pts[:1], dense])


def _extension(xyz: np.ndarray, length_rad: float, step_rad: float) -> np.ndarray:
    """Points continuing a line beyond its last vertex along the great circle of its last segment."""
    a, b = xyz[-2], xyz[-1]
    axis = np.cross(a, b)
    norm = np.linalg.norm(axis)
    if norm < 1e-12:
        return np.empty((0, 3))
    axis /= norm
    tangent = np.cross(axis, b)
    t = np.arange(1, int(np.ceil(length_rad / step_rad)) + 1) * step_rad
    return np.cos(t)[:, None] * b + np.sin(t)[:, None] * tangent


def _mark(mask: np.ndarray, path: np.ndarray, value, stop: np.ndarray | None = None, skip: int = 0) -> np.ndarray:
    """Set the cells of a fractional-index path to ``value``; with ``stop``, end at the first stop cell
    after ``skip`` points, or where the path leaves the grid. Returns the part of the path marked."""
    ny, nx = mask.shape
    r, c = np.rint(path[:, 1]).astype(int), np.rint(path[:, 0]).astype(int)
    inside = (r >= 0) & (r < ny) & (c >= 0) & (c < nx)
    if stop is not None:
        hits = np.flatnonzero(inside & (np.arange(len(r)) >= skip) & stop[np.clip(r, 0, ny - 1), np.clip(c, 0, nx - 1)])
        end = hits[0] + 1 if len(hits) else len(r)
        first_out = np.flatnonzero(~inside[skip:])
        if len(first_out):
            end = min(end, skip + first_out[0])
        r, c, inside, path = r[:end], c[:end], inside[:end], path[:end]
    mask[r[inside], c[inside]] = value
    return path


def rasterise_domain(spec, polygon) -> np.ndarray:
    """Cells whose centre lies in the domain polygon (lon, lat); every cell when there is none."""
    if polygon is None:
        return np.ones(spec.shape, bool)
    from rasterio.features import rasterize
    from shapely import affinity, ops

    geoms = []
    for poly in getattr(polygon, "geoms", [polygon]):
        if spec.geographic:  # shift whole polygons by 360 degrees into the grid's longitude convention
            centre = poly.centroid.x
            dense = affinity.translate(poly, xoff=float(spec.wrap_lon(np.array([centre]))[0] - centre))
        else:
            dense = shapely.segmentize(poly, max_segment_length=0.1)
            dense = ops.transform(lambda x, y, z=None: spec.project(np.asarray(x), np.asarray(y)), dense)
        geoms.append(dense)
    return rasterize(geoms, out_shape=spec.shape, transform=spec.transform, fill=0, default_value=1,
                     dtype="uint8").astype(bool)


def implied_fracture_zones(ridges: list[np.ndarray], step_deg: float = 0.1) -> list[np.ndarray]:
    """Short lines through each ridge segment's ends, normal to the ridge there, as (lon, lat) arrays.

    With ``extend`` in :func:`build_compartments` they continue along their great circles across both
    flanks: the fracture zones a ridge offset implies, used when no barriers are given (spreading is
    taken as normal to the ridge at its ends).
    """
    lines = []
    step = np.radians(step_deg)
    for ridge in ridges:
        xyz = sphere.to_xyz(ridge[:, 0], ridge[:, 1])
        if len(xyz) < 2:
            continue
        for end, inner in ((xyz[0], xyz[1]), (xyz[-1], xyz[-2])):
            tangent = end - inner
            across = np.cross(end, tangent)
            norm = np.linalg.norm(across)
            if norm < 1e-15:
                continue
            across /= norm
            pts = np.stack([np.cos(step) * end - np.sin(step) * across, end, np.cos(step) * end + np.sin(step) * across])
            lon, lat = sphere.to_lonlat(pts)
            lines.append(np.stack([lon, lat], -1))
    return lines


def build_compartments(spec, barriers: list[np.ndarray], domain_polygon=None, extend: bool = True) -> Compartments:
    """Label the compartments of a grid.

    Parameters
    ----------
    spec : GridSpec
        The grid.
    barriers : list of numpy.ndarray
        Barrier polylines as (lon, lat) vertex arrays.
    domain_polygon : shapely geometry, optional
        The oceanic domain in (lon, lat); the whole grid when None.
    extend : bool
        Continue each barrier along its end great circles to the grid's edge or the next barrier.
    """
    domain = rasterise_domain(spec, domain_polygon)
    step = np.radians(spec.spacing) if spec.geographic else spec.spacing / (sphere.EARTH_RADIUS_KM * 1e3)
    step /= 2
    owner = np.zeros(spec.shape, np.int32)  # which barrier line marked each cell (1-based)
    paths = []
    for number, line in enumerate(barriers, 1):
        xyz = sphere.densify(sphere.to_xyz(line[:, 0], line[:, 1]), step)
        lon, lat = sphere.to_lonlat(xyz)
        path = _index_path(spec, lon, lat)
        _mark(owner, path, number)
        paths.append((number, xyz, path))
    final = owner > 0
    result_paths = []
    length = np.pi / 2
    for number, xyz, path in paths:
        result_paths.append(path)
        if not (extend and len(xyz) >= 2):
            continue
        for ends in (xyz, xyz[::-1]):
            ext = _extension(ends, length, step)
            if not len(ext):
                continue
            lon, lat = sphere.to_lonlat(np.concatenate([ends[-1:], ext]))
            ext_path = _index_path(spec, lon, lat)
            stop = (owner > 0) & (owner != number)
            result_paths.append(_mark(final, ext_path, True, stop=stop, skip=1))
    free = domain & ~final
    labels, count = ndimage.label(free, structure=ndimage.generate_binary_structure(2, 1))
    if spec.is_global:
        labels, count = _join_seam(labels)
    comp = Compartments(labels.astype(np.int32), int(count), final & domain, domain, result_paths)
    rows, cols = np.nonzero(comp.barrier)
    if len(rows):
        comp.labels[rows, cols] = comp._side_labels(cols.astype(float), rows.astype(float))
    return comp


def _join_seam(labels: np.ndarray) -> tuple[np.ndarray, int]:
    """Merge labels that meet across the longitude seam of a global grid."""
    left, right = labels[:, 0], labels[:, -1]
    parent = np.arange(labels.max() + 1)

    def find(a):
        while parent[a] != a:
            parent[a] = parent[parent[a]]
            a = parent[a]
        return a

    for a, b in zip(left, right):
        if a and b:
            ra, rb = find(a), find(b)
            if ra != rb:
                parent[max(ra, rb)] = min(ra, rb)
    roots = np.array([find(i) for i in range(len(parent))])
    unique, relabel = np.unique(roots, return_inverse=True)
    return relabel[labels].reshape(labels.shape), len(unique) - 1
