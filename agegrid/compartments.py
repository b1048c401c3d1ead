"""Compartments: the oceanic domain cut by barrier lines (fracture zones, transforms, pseudofaults).

Barriers are rasterised at grid resolution as 8-connected cell paths and the free cells labelled by
4-connectivity, so no label leaks diagonally through a barrier. Barrier lines are continued along
their end great circles to the grid's edge (or the next barrier), so a barrier that stops short of the
domain's edge does not leak either. Barrier cells, and points that fall in them, are given to the
neighbouring compartment on their own side of the line (a segment test against the barrier geometry).
"""
from __future__ import annotations

import os
import threading
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field

import numpy as np
import shapely
from numba import njit
from scipy import ndimage

from agegrid import sphere

#: Kilometres in a degree of latitude on the sphere of :data:`agegrid.sphere.EARTH_RADIUS_KM`.
KM_PER_DEGREE = sphere.EARTH_RADIUS_KM * np.pi / 180.0
#: The first stretch of a barrier's continuation, in cells (see :func:`_continuation`).
FIRST_CONTINUATION_CELLS = 512


@dataclass
class Compartments:
    """Compartment labels (0: outside the domain), held block by block, and the barrier geometry.

    Each block of the grid (``spec.chunks``) keeps its local connected-component labels compressed,
    with a table from local to global labels; the barrier cells and the labels next to them are kept
    as sparse lists. Memory grows with the barrier length and the block count, not with the cells.
    """

    spec: object
    count: int
    barrier_paths: list[np.ndarray]
    _blocks: dict = field(repr=False)
    _tables: dict = field(repr=False)
    _barrier_cells: np.ndarray = field(repr=False)
    _barrier_labels: np.ndarray = field(repr=False)
    _near_cells: np.ndarray = field(repr=False)
    _near_labels: np.ndarray = field(repr=False)
    #: A decimated sub-grid of the labels: (row indices, column indices, labels), about SAMPLE_CELLS cells.
    sample: tuple = field(default=None, repr=False)
    _segment_cache: tuple | None = field(default=None, repr=False)

    def window(self, rows: slice, cols: slice) -> tuple[np.ndarray, np.ndarray]:
        """Labels (int32) and domain mask of a window of the grid."""
        ny, nx = self.spec.shape
        r0, r1, _ = rows.indices(ny)
        c0, c1, _ = cols.indices(nx)
        labels = np.zeros((r1 - r0, c1 - c0), np.int32)
        br, bc = self.spec.chunks
        for i in range(r0 // br, -(-r1 // br)):
            for j in range(c0 // bc, -(-c1 // bc)):
                block = self._block(i, j)
                a0, a1 = max(r0, i * br), min(r1, (i + 1) * br)
                b0, b1 = max(c0, j * bc), min(c1, (j + 1) * bc)
                labels[a0 - r0:a1 - r0, b0 - c0:b1 - c0] = block[a0 - i * br:a1 - i * br, b0 - j * bc:b1 - j * bc]
        domain = labels != 0
        cells = _cells_in(self._barrier_cells, nx, r0, r1, c0, c1)
        rr, cc = np.divmod(self._barrier_cells[cells], nx)
        labels[rr - r0, cc - c0] = self._barrier_labels[cells]
        domain[rr - r0, cc - c0] = True
        return labels, domain

    def _block(self, i: int, j: int) -> np.ndarray:
        """Global labels of the free cells of block (i, j), 0 elsewhere."""
        return self._tables[i, j][self._local(i, j)]

    def _local(self, i: int, j: int) -> np.ndarray:
        """Block (i, j)'s local labels."""
        from isal import isal_zlib

        data, shape = self._blocks[i, j]
        return np.frombuffer(isal_zlib.decompress(data), dtype=np.int32).reshape(shape)

    def labels_at(self, rows: np.ndarray, cols: np.ndarray) -> np.ndarray:
        """Labels at grid cells given by index arrays (any shape)."""
        ny, nx = self.spec.shape
        rows, cols = np.broadcast_arrays(np.asarray(rows, np.int64), np.asarray(cols, np.int64))
        out = np.zeros(rows.shape, np.int32)
        br, bc = self.spec.chunks
        block = (rows // br) * (-(-nx // bc)) + cols // bc
        for b in np.unique(block):
            sel = block == b
            i, j = divmod(int(b), -(-nx // bc))
            out[sel] = self._tables[i, j][self._local(i, j)[rows[sel] - i * br, cols[sel] - j * bc]]
        flat = rows * nx + cols
        hit, where = _lookup(self._barrier_cells, flat)
        out[hit] = self._barrier_labels[where[hit]]
        return out

    def assign(self, spec, lon: np.ndarray, lat: np.ndarray) -> np.ndarray:
        """Compartment of each geographic point; 0 off the grid or outside the domain."""
        row, col, inside = spec.index(lon, lat)
        label = np.zeros(np.shape(lon), np.int32)
        label[inside] = self.labels_at(row[inside], col[inside])
        on_barrier = inside & _lookup(self._barrier_cells, row.astype(np.int64) * spec.shape[1] + col)[0]
        if on_barrier.any():
            x, y = spec.project(lon[on_barrier], lat[on_barrier])
            fx = (x - spec.region[0]) / spec.spacing - 0.5
            fy = (spec.region[3] - y) / spec.spacing - 0.5
            label[on_barrier] = self._side_labels(fx, fy)
        return label

    def near_barrier(self, spec, lon: np.ndarray, lat: np.ndarray, km: float) -> np.ndarray:
        """Whether each geographic point lies within about ``km`` of a barrier (its cell within that many
        cells, counted in the grid's north-south spacing, of a barrier cell)."""
        row, col, inside = spec.index(lon, lat)
        cell_km = spec.spacing * (KM_PER_DEGREE if spec.geographic else 1e-3)
        k = int(np.ceil(km / cell_km))
        ny, nx = spec.shape
        near = np.zeros(np.shape(lon), bool)
        row, col = row[inside].astype(np.int64)[:, None], col[inside].astype(np.int64)[:, None]
        columns = np.arange(-k, k + 1)
        found = np.zeros(len(row), bool)
        for dr in range(-k, k + 1):  # a row of offsets at a time: memory grows with the points times 2k + 1
            r, c = row + dr, col + columns
            ok = (r >= 0) & (r < ny) & (c >= 0) & (c < nx)
            found |= (_lookup(self._barrier_cells, np.where(ok, r * nx + c, -1))[0] & ok).any(axis=1)
        near[inside] = found
        return near

    def _side_labels(self, fx: np.ndarray, fy: np.ndarray) -> np.ndarray:
        """Label of the nearest free cell on the same side of the nearest barrier segment as each point.

        Points are given in fractional (column ``fx``, row ``fy``) cell coordinates; the side of a point
        is the sign of the cross product of its nearest barrier segment's direction with the vector
        from the segment to the point.
        """
        ny, nx = self.spec.shape
        start, direction, tree = self._segments()
        q = np.stack([fx, fy], -1)
        _, seg = tree.query(q)
        a, d = start[seg], direction[seg]
        side = np.sign(d[:, 0] * (q[:, 1] - a[:, 1]) - d[:, 1] * (q[:, 0] - a[:, 0]))
        r0, c0 = np.rint(fy).astype(np.int64), np.rint(fx).astype(np.int64)
        result = np.zeros(len(fx), dtype=np.int32)
        todo = np.arange(len(fx))  # the points still without a label: each offset looks at these only
        for dr, dc in SIDE_OFFSETS:
            rr, cc = np.clip(r0[todo] + dr, 0, ny - 1), np.clip(c0[todo] + dc, 0, nx - 1)
            hit, where = _lookup(self._near_cells, rr * nx + cc)
            cand = np.where(hit, self._near_labels[where], 0)
            dt, at = d[todo], a[todo]
            cside = np.sign(dt[:, 0] * (rr - at[:, 1]) - dt[:, 1] * (cc - at[:, 0]))
            ok = (cand > 0) & ((cside == side[todo]) | (side[todo] == 0))
            result[todo[ok]] = cand[ok]
            todo = todo[~ok]
            if not len(todo):
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


#: Neighbour offsets searched (nearest first) for a barrier cell's label on its own side.
SIDE_RADIUS = 3
SIDE_OFFSETS = sorted(((dr, dc) for dr in range(-SIDE_RADIUS, SIDE_RADIUS + 1)
                       for dc in range(-SIDE_RADIUS, SIDE_RADIUS + 1) if (dr, dc) != (0, 0)),
                      key=lambda o: np.hypot(*o))


def _lookup(sorted_cells: np.ndarray, flat: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Which flat cell indices are in a sorted array, and where."""
    where = np.searchsorted(sorted_cells, flat)
    where = np.minimum(where, max(len(sorted_cells) - 1, 0))
    hit = (sorted_cells[where] == flat) if len(sorted_cells) else np.zeros(np.shape(flat), bool)
    return hit, where


def _cells_in(sorted_cells: np.ndarray, nx: int, r0: int, r1: int, c0: int, c1: int) -> np.ndarray:
    """Positions in a sorted flat-index array of the cells inside rows [r0, r1) and columns [c0, c1)."""
    lo, hi = np.searchsorted(sorted_cells, [r0 * nx, r1 * nx])
    cols = sorted_cells[lo:hi] % nx
    return lo + np.flatnonzero((cols >= c0) & (cols < c1))


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


def _path_cells(shape, path: np.ndarray, stop_cells: np.ndarray | None = None,
                skip: int = 0) -> tuple[np.ndarray, np.ndarray]:
    """Flat indices of the cells a fractional-index path crosses, and the part of the path used.

    With ``stop_cells`` (sorted flat indices) the path ends at the first stop cell after ``skip``
    points, or where it leaves the grid.
    """
    ny, nx = shape
    r, c = np.rint(path[:, 1]).astype(np.int64), np.rint(path[:, 0]).astype(np.int64)
    inside = (r >= 0) & (r < ny) & (c >= 0) & (c < nx)
    if stop_cells is not None:
        flat = np.clip(r, 0, ny - 1) * nx + np.clip(c, 0, nx - 1)
        hits = np.flatnonzero(inside & (np.arange(len(r)) >= skip) & _lookup(stop_cells, flat)[0])
        end = hits[0] + 1 if len(hits) else len(r)
        first_out = np.flatnonzero(~inside[skip:])
        if len(first_out):
            end = min(end, skip + first_out[0])
        r, c, inside, path = r[:end], c[:end], inside[:end], path[:end]
    return r[inside] * nx + c[inside], path


def _domain_shapes(spec, polygon) -> list | None:
    """The domain polygon(s) in the grid's coordinates as GeoJSON-like mappings, for rasterising block by
    block; None: everywhere."""
    if polygon is None:
        return None
    from shapely import affinity, ops

    geoms = []
    for poly in getattr(polygon, "geoms", [polygon]):
        if spec.geographic:  # shift whole polygons by 360 degrees into the grid's longitude convention
            centre = poly.centroid.x
            dense = affinity.translate(poly, xoff=float(spec.wrap_lon(np.array([centre]))[0] - centre))
        else:
            dense = shapely.segmentize(poly, max_segment_length=0.1)
            dense = ops.transform(lambda x, y, z=None: spec.project(np.asarray(x), np.asarray(y)), dense)
        geoms.append(shapely.geometry.mapping(dense))  # as GeoJSON once, not again for every block row
    return geoms


_RASTERIZE_LOCK = threading.Lock()


def _domain_block(spec, shapes, rows: slice, cols: slice) -> np.ndarray:
    """Cells of a window whose centre lies in the domain."""
    shape = (rows.stop - rows.start, cols.stop - cols.start)
    if shapes is None:
        return np.ones(shape, bool)
    from affine import Affine
    from rasterio.features import rasterize

    transform = spec.transform @ Affine.translation(cols.start, rows.start)
    with _RASTERIZE_LOCK:  # rasterio's in-memory datasets toggle warning filters, which is not thread-safe
        return rasterize(shapes, out_shape=shape, transform=transform, fill=0, default_value=1, dtype="uint8").astype(bool)


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
    """Label the compartments of a grid, block by block.

    Parameters
    ----------
    spec : GridSpec
        The grid; its blocks (``spec.chunks``) are labelled one at a time.
    barriers : list of numpy.ndarray
        Barrier polylines as (lon, lat) vertex arrays.
    domain_polygon : shapely geometry, optional
        The oceanic domain in (lon, lat); the whole grid when None.
    extend : bool
        Continue each barrier along its end great circles to the grid's edge or the next barrier.
    """
    barrier_cells, paths = _barrier_cells(spec, barriers, extend)
    near = _near_cells(spec.shape, barrier_cells)
    labelling = _BlockLabelling(spec, _domain_shapes(spec, domain_polygon), barrier_cells, near)
    count, tables = labelling.resolve()
    in_domain = labelling.barrier_in_domain
    comp = Compartments(spec, count, paths, labelling.blocks, tables, barrier_cells[in_domain],
                        np.zeros(int(in_domain.sum()), np.int32), near, labelling.near_labels())
    rows, cols = labelling.sample_rows, labelling.sample_cols
    sample = labelling.sample_labels()
    if len(comp._barrier_cells):
        br, bc = np.divmod(comp._barrier_cells, spec.shape[1])
        comp._barrier_labels = comp._side_labels(bc.astype(float), br.astype(float))
        on = np.isin(br, rows) & np.isin(bc, cols)
        sample[np.searchsorted(rows, br[on]), np.searchsorted(cols, bc[on])] = comp._barrier_labels[on]
    comp.sample = rows, cols, sample
    return comp


def _barrier_cells(spec, barriers, extend) -> tuple[np.ndarray, list[np.ndarray]]:
    """Sorted flat indices of the barrier cells (lines and their extensions), and the paths drawn."""
    step = np.radians(spec.spacing) if spec.geographic else spec.spacing / (sphere.EARTH_RADIUS_KM * 1e3)
    step /= 2
    cells, owners, lines = [], [], []
    for number, line in enumerate(barriers, 1):
        xyz = sphere.densify(sphere.to_xyz(line[:, 0], line[:, 1]), step)
        lon, lat = sphere.to_lonlat(xyz)
        path = _index_path(spec, lon, lat)
        flat, _ = _path_cells(spec.shape, path)
        cells.append(flat)
        owners.append(np.full(len(flat), number))
        lines.append((number, xyz, path))
    flat = np.concatenate(cells) if cells else np.zeros(0, np.int64)
    owner = np.concatenate(owners) if owners else np.zeros(0, int)
    # a cell crossed by several lines belongs to the last one drawn
    order = np.argsort(flat, kind="stable")
    ordered = flat[order]
    last = order[np.r_[ordered[1:] != ordered[:-1], True]] if len(flat) else order
    marked, owner = flat[last], owner[last]
    all_cells, paths = [marked], []
    for number, xyz, path in lines:
        paths.append(path)
        if not (extend and len(xyz) >= 2):
            continue
        stop = marked[owner != number]
        for ends in (xyz, xyz[::-1]):
            continued = _continuation(spec, ends, step, stop)
            if continued is not None:
                all_cells.append(continued[0])
                paths.append(continued[1])
    return _unique(np.concatenate(all_cells)), paths


def _continuation(spec, ends: np.ndarray, step: float, stop: np.ndarray) -> tuple[np.ndarray, np.ndarray] | None:
    """Cells of a line's continuation beyond its last vertex along its end great circle, for up to a quarter
    circle, ended by the first ``stop`` cell or the grid's edge; and the path used (None for a degenerate end).

    The continuation is drawn in stretches of doubling length from :data:`FIRST_CONTINUATION_CELLS`, until a
    stretch is cut short: the points of a shorter stretch are the first points of a longer one, so the cells
    are those of the whole quarter circle, at a fraction of the cost (most continuations leave the grid within
    a few hundred cells).
    """
    length = FIRST_CONTINUATION_CELLS * 2 * step
    while True:
        length = min(length, np.pi / 2)
        ext = _extension(ends, length, step)
        if not len(ext):
            return None
        lon, lat = sphere.to_lonlat(np.concatenate([ends[-1:], ext]))
        path = _index_path(spec, lon, lat)
        cells, used = _path_cells(spec.shape, path, stop_cells=stop, skip=1)
        if len(used) < len(path) or length >= np.pi / 2:
            return cells, used
        length *= 2


def _near_cells(shape, barrier_cells: np.ndarray) -> np.ndarray:
    """Sorted flat indices of every cell within SIDE_RADIUS cells (square) of a barrier cell."""
    ny, nx = shape
    rows, cols = np.divmod(barrier_cells, nx)
    near = [np.clip(rows + dr, 0, ny - 1) * nx + np.clip(cols + dc, 0, nx - 1) for dr, dc in SIDE_OFFSETS]
    return _unique(np.concatenate(near)) if len(barrier_cells) else np.zeros(0, np.int64)


def _unique(values: np.ndarray) -> np.ndarray:
    """Sorted unique values by sorting (numpy's hash-based ``unique`` is much slower on many distinct integers)."""
    ordered = np.sort(values)
    return ordered[np.r_[True, ordered[1:] != ordered[:-1]]] if len(ordered) else ordered


class _BlockLabelling:
    """Connected free cells labelled block by block and joined across block edges.

    Each block's free cells (in the domain, not barrier) get local labels by 4-connectivity; labels
    touching across block edges (and across the longitude seam of a global grid) are joined as edges
    of a graph whose connected components are the compartments, numbered in raster order of their
    first cell, so the labels do not depend on the block size.
    """

    def __init__(self, spec, shapes, barrier_cells: np.ndarray, near: np.ndarray):
        self.spec = spec
        ny, nx = spec.shape
        self.blocks, self.offsets, self.counts = {}, {}, {}
        first_cells, pairs = [], []
        bottom = np.zeros(nx, np.int64)  # provisional ids along the last row of the previous block row
        west, east = np.zeros(ny, np.int64), np.zeros(ny, np.int64)
        self.barrier_in_domain = np.zeros(len(barrier_cells), bool)
        self._near_ids = np.zeros(len(near), np.int64)
        step = max(1, int(np.sqrt(ny * nx / SAMPLE_CELLS)))
        self.sample_rows = np.unique(np.r_[np.arange(0, ny, step), ny - 1])
        self.sample_cols = np.unique(np.r_[np.arange(0, nx, step), nx - 1])
        self._sample_ids = np.zeros((len(self.sample_rows), len(self.sample_cols)), np.int64)
        total = 0
        for band in _in_order(lambda i: _label_band(spec, shapes, barrier_cells, near, self.sample_rows,
                                                    self.sample_cols, i), -(-ny // spec.chunks[0])):
            right = None
            for block in band:
                rows, cols = block.rows, block.cols
                self.blocks[block.key] = block.compressed
                self.offsets[block.key], self.counts[block.key] = total, block.count
                self.barrier_in_domain[block.barriers] = block.barriers_in_domain
                first_cells.append(block.first_cells)
                def lift(local, offset=total):  # local labels to provisional ids (0 stays 0)
                    return np.where(local > 0, local + offset, 0)

                edges = {side: lift(e) for side, e in block.edges.items()}
                if rows.start > 0:
                    pairs.append(np.stack([bottom[cols], edges["top"]], -1))
                if right is not None:
                    pairs.append(np.stack([right, edges["left"]], -1))
                right = edges["right"]
                bottom[cols] = edges["bottom"]
                if cols.start == 0:
                    west[rows] = edges["left"]
                east[rows] = edges["right"]
                self._near_ids[block.near] = lift(block.near_local)
                self._sample_ids[np.ix_(*block.sampled)] = lift(block.sample_local)
                total += block.count
        if spec.is_global:
            pairs.append(np.stack([west, east], -1))
        self.total = total
        self.first = np.concatenate([[-1]] + first_cells)
        pairs = np.concatenate(pairs) if pairs else np.zeros((0, 2), np.int64)
        self.pairs = pairs[(pairs[:, 0] > 0) & (pairs[:, 1] > 0)]

    def resolve(self) -> tuple[int, dict]:
        """The number of compartments and each block's table from local to global labels."""
        from scipy.sparse import coo_matrix
        from scipy.sparse.csgraph import connected_components

        n = self.total + 1
        graph = coo_matrix((np.ones(len(self.pairs)), (self.pairs[:, 0], self.pairs[:, 1])), shape=(n, n))
        _, component = connected_components(graph, directed=False)
        first = np.full(component.max() + 1, np.iinfo(np.int64).max)
        np.minimum.at(first, component[1:], self.first[1:])
        used = np.unique(component[1:])
        order = used[np.argsort(first[used], kind="stable")]
        rank = np.zeros(component.max() + 1, np.int32)
        rank[order] = np.arange(1, len(order) + 1)
        self.global_of = np.concatenate([[0], rank[component[1:]]]).astype(np.int32)
        tables = {key: np.concatenate([[0], self.global_of[off + 1:off + 1 + self.counts[key]]]).astype(np.int32)
                  for key, off in self.offsets.items()}
        return len(order), tables

    def near_labels(self) -> np.ndarray:
        """Global labels of the cells near barriers (0 where not free)."""
        return self.global_of[self._near_ids]

    def sample_labels(self) -> np.ndarray:
        """Global labels of the free cells of the sampled sub-grid (0 elsewhere)."""
        return self.global_of[self._sample_ids]


FOUR_CONNECTED = ndimage.generate_binary_structure(2, 1)
#: About how many cells the decimated sample of the labels holds (:attr:`Compartments.sample`).
SAMPLE_CELLS = 100_000


@dataclass
class _LabelledBlock:
    """One block's local labelling: what joining the blocks needs, with the labels compressed."""

    key: tuple[int, int]
    rows: slice
    cols: slice
    count: int
    compressed: tuple[bytes, tuple[int, int]]
    first_cells: np.ndarray
    barriers: np.ndarray
    barriers_in_domain: np.ndarray
    edges: dict[str, np.ndarray]
    near: np.ndarray
    near_local: np.ndarray
    sampled: tuple[np.ndarray, np.ndarray]
    sample_local: np.ndarray


def _label_band(spec, shapes, barrier_cells: np.ndarray, near: np.ndarray, sample_rows: np.ndarray,
                sample_cols: np.ndarray, i: int) -> list[_LabelledBlock]:
    """Label the free cells of each block of block row ``i`` by 4-connectivity (local labels 1..n)."""
    from isal import isal_zlib

    ny, nx = spec.shape
    br, bc = spec.chunks
    rows = slice(i * br, min((i + 1) * br, ny))
    band = _domain_block(spec, shapes, rows, slice(0, nx))
    in_rows = np.flatnonzero((sample_rows >= rows.start) & (sample_rows < rows.stop))
    blocks = []
    for j in range(-(-nx // bc)):
        cols = slice(j * bc, min((j + 1) * bc, nx))
        domain = band[:, cols].copy()
        sel = _cells_in(barrier_cells, nx, rows.start, rows.stop, cols.start, cols.stop)
        rr, cc = np.divmod(barrier_cells[sel], nx)
        in_domain = domain[rr - rows.start, cc - cols.start]
        domain[rr - rows.start, cc - cols.start] = False
        local, n = ndimage.label(domain, structure=FOUR_CONNECTED)
        local = local.astype(np.int32, copy=False)
        q = _cells_in(near, nx, rows.start, rows.stop, cols.start, cols.stop)
        qr, qc = np.divmod(near[q], nx)
        edges = {"top": local[0].copy(), "bottom": local[-1].copy(), "left": local[:, 0].copy(),
                 "right": local[:, -1].copy()}
        in_cols = np.flatnonzero((sample_cols >= cols.start) & (sample_cols < cols.stop))
        sampled = local[np.ix_(sample_rows[in_rows] - rows.start, sample_cols[in_cols] - cols.start)]
        blocks.append(_LabelledBlock((i, j), rows, cols, n, (isal_zlib.compress(local.tobytes(), 1), local.shape),
                                     _first_cells(local, n, rows.start, cols.start, nx), sel, in_domain, edges, q,
                                     local[qr - rows.start, qc - cols.start], (in_rows, in_cols), sampled))
    return blocks


def _in_order(work, count: int, ahead: int = 2):
    """Results of ``work(0) .. work(count - 1)`` in order, computed on threads at most ``ahead`` in advance."""
    with ThreadPoolExecutor(min(ahead, os.cpu_count() or 1)) as pool:
        pending = [pool.submit(work, k) for k in range(min(ahead, count))]
        for k in range(count):
            result = pending.pop(0).result()
            if k + ahead < count:
                pending.append(pool.submit(work, k + ahead))
            yield result


@njit(cache=True, nogil=True)
def _first_positions(flat: np.ndarray, n: int) -> np.ndarray:
    """Position of the first occurrence of each label 1..n in a flat label array."""
    first = np.full(n, -1, np.int64)
    found = 0
    for p in range(flat.size):
        label = flat[p]
        if label > 0 and first[label - 1] < 0:
            first[label - 1] = p
            found += 1
            if found == n:
                break
    return first


def _first_cells(local: np.ndarray, n: int, r0: int, c0: int, nx: int) -> np.ndarray:
    """Global flat index of the first cell (raster order) of each local label 1..n."""
    rows, cols = np.divmod(_first_positions(local.ravel(), n), local.shape[1])
    return (rows + r0) * nx + cols + c0
