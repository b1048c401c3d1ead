"""Compartments labelled block by block equal one global labelling, do not leak, and stay small."""
import numpy as np
import pytest
from scipy import ndimage
from shapely.geometry import box

from agegrid.compartments import build_compartments
from agegrid.grid import GridSpec
from agegrid.synthetic import SyntheticBasin


def _whole(comps):
    return comps.window(slice(None), slice(None))


@pytest.mark.parametrize("chunk", [37, 64, 512])
def test_block_labels_equal_one_global_labelling(chunk):
    basin = SyntheticBasin()
    spec = GridSpec(basin.region(0.5), 0.1, chunk=chunk)
    comps = build_compartments(spec, basin.fracture_zones(), basin.domain_polygon())
    labels, domain = _whole(comps)
    barrier = np.zeros(spec.size, bool)
    barrier[comps._barrier_cells] = True
    barrier = barrier.reshape(spec.shape)
    # reference: scipy's connected components of the whole free raster at once (raster-order numbering)
    reference, count = ndimage.label(domain & ~barrier, structure=ndimage.generate_binary_structure(2, 1))
    free = domain & ~barrier
    assert comps.count == count
    assert np.array_equal(labels[free], reference[free])
    assert (labels[barrier & domain] > 0).mean() > 0.99  # barrier cells join a neighbouring compartment
    assert not labels[~domain].any()
    rows, cols, sample = comps.sample  # the decimated sample kept while labelling
    assert np.array_equal(sample, labels[np.ix_(rows, cols)])
    assert rows[-1] == spec.shape[0] - 1 and cols[-1] == spec.shape[1] - 1


def test_a_barrier_stopping_short_of_the_edge_does_not_leak():
    spec = GridSpec((0.0, 10.0, 0.0, 10.0), 0.05, chunk=64)
    domain = box(0.5, 0.5, 9.5, 9.5)
    line = np.array([[2.0, 5.0], [8.0, 5.2]])  # stops 1.5 degrees short of the domain on both ends
    assert build_compartments(spec, [line], domain, extend=True).count == 2
    assert build_compartments(spec, [line], domain, extend=False).count == 1


def test_global_grid_joins_across_the_longitude_seam():
    spec = GridSpec((0.0, 360.0, -60.0, 60.0), 0.5, chunk=64)
    meridians = [np.array([[lon, -70.0], [lon, 70.0]]) for lon in (100.0, 250.0)]
    comps = build_compartments(spec, meridians, None, extend=False)
    labels, _ = _whole(comps)
    assert comps.count == 2
    assert labels[100, 0] == labels[100, -1]  # both sides of the seam: one compartment


def test_memory_grows_with_barriers_not_cells():
    basin = SyntheticBasin()
    spec = GridSpec(basin.region(0.5), 0.02, chunk=512)
    comps = build_compartments(spec, basin.fracture_zones(), basin.domain_polygon())
    held = sum(len(data) for data, _ in comps._blocks.values()) + comps._barrier_cells.nbytes \
        + comps._near_cells.nbytes + comps._near_labels.nbytes
    assert held < 0.05 * spec.size * 4, (held, spec.size)  # a global int32 raster would be spec.size * 4


@pytest.mark.parametrize("spec", [
    GridSpec((-20.0, 40.0, -35.0, 30.0), 0.02, chunk=512),  # long continuations: 3,000+ cells to an edge
    GridSpec((-2.0e6, 2.0e6, -2.0e6, 2.0e6), 5.0e3, crs="EPSG:3031", chunk=256),  # polar stereographic
])
def test_continuations_drawn_in_stretches_equal_the_whole_quarter_circle(spec, monkeypatch):
    from agegrid import compartments

    basin = SyntheticBasin()
    lines = basin.fracture_zones() + [np.array([[2.0, 5.0], [8.0, 5.2]]), np.array([[-5.0, -20.0], [-4.0, 10.0]]),
                                      np.array([[30.0, -80.0], [150.0, -75.0]])]
    stretched = compartments._barrier_cells(spec, lines, True)
    # reference: each continuation drawn in one piece over the whole quarter circle, as before stretches
    monkeypatch.setattr(compartments, "FIRST_CONTINUATION_CELLS", 10**9)
    whole = compartments._barrier_cells(spec, lines, True)
    assert np.array_equal(stretched[0], whole[0])
    assert len(stretched[1]) == len(whole[1]) > len(lines)
    assert all(np.array_equal(a, b) for a, b in zip(stretched[1], whole[1]))
    assert len(stretched[0]) > len(compartments._barrier_cells(spec, lines, False)[0])  # continuations drawn


@pytest.mark.parametrize("km", [0.0, 3.0, 25.0])
def test_near_barrier_is_a_chebyshev_reach_of_barrier_cells(km):
    basin = SyntheticBasin()
    spec = GridSpec(basin.region(0.5), 0.05, chunk=128)
    comps = build_compartments(spec, basin.fracture_zones(), basin.domain_polygon())
    rng = np.random.default_rng(3)
    west, east, south, north = spec.region
    lon, lat = rng.uniform(west - 2, east + 2, 3000), rng.uniform(south - 2, north + 2, 3000)
    near = comps.near_barrier(spec, lon, lat, km)
    # reference: brute force over every barrier cell, within k cells in rows and columns (the docstring's rule)
    row, col, inside = spec.index(lon, lat)
    k = int(np.ceil(km / (spec.spacing * 111.19)))  # km per degree on the 6371 km sphere, to the 2nd decimal
    br, bc = np.divmod(comps._barrier_cells, spec.shape[1])
    reach = np.maximum(np.abs(row[:, None] - br[None, :]), np.abs(col[:, None] - bc[None, :])) <= k
    assert np.array_equal(near, inside & reach.any(axis=1))
    assert near.sum() > (10 if km else 0)
