"""The streaming pass: windows of blocks, layers taken from stacked blocks, table samples."""
import dask.array as da
import numpy as np
import pytest
import xarray as xr
from dask.callbacks import Callback

from agegrid.grid import GridSpec
from agegrid.streaming import Plane, Samples, stream, windows


def _grid(values: np.ndarray) -> tuple[GridSpec, tuple]:
    spec = GridSpec((0.0, values.shape[-1] * 0.1, 0.0, values.shape[-2] * 0.1), 0.1, chunk=7)
    return spec, spec.block_sizes


class _Executed(Callback):
    """The keys of the tasks dask runs."""

    def __init__(self):
        super().__init__()
        self.keys = []

    def _pretask(self, key, dsk, state):
        self.keys.append(key)


def _collect(ds, names, **kwargs) -> dict:
    got = {}

    def sink(name, r0, c0, block):
        got[name, r0, c0] = block

    stream(ds, names, [sink], **kwargs)
    return got


@pytest.mark.parametrize("window_mb", [1e-4, 128.0])  # a block per window; one window per block row
def test_planes_are_taken_from_the_stack_blocks_without_tasks_of_their_own(window_mb):
    # the same blocks reach the sinks whether the layers are computed as dask arrays of their own or taken
    # from the stack's blocks; the second way runs no task of the layers' arrays (reference: the blocks of
    # the stack sliced by numpy, and dask's own record of the tasks it ran)
    values = np.random.default_rng(3).normal(size=(3, 20, 30)).astype(np.float32) * 10
    spec, sizes = _grid(values)
    stack = da.from_array(values, chunks=((3,),) + sizes)
    planes = {"a": Plane("a", stack, 0, np.dtype(np.float32)), "b": Plane("b", stack, 2, np.dtype(np.int16))}
    other = (stack[1] * 2).rechunk(sizes)
    ds = xr.Dataset({name: (("y", "x"), p.array()) for name, p in planes.items()} | {"c": (("y", "x"), other)})
    names = ["a", "b", "c"]
    with _Executed() as as_arrays:
        reference = _collect(ds, names, window_mb=window_mb)
    with _Executed() as from_stack:
        taken = _collect(ds, names, window_mb=window_mb, planes=planes)
    assert reference.keys() == taken.keys() and len(taken) == 3 * len(sizes[0]) * len(sizes[1])
    for (name, r0, c0), block in taken.items():
        np.testing.assert_array_equal(block, reference[name, r0, c0])
        expected = {"a": values[0], "b": values[2].astype(np.int16), "c": values[1] * 2}[name]
        h, w = block.shape
        np.testing.assert_array_equal(block, expected[r0:r0 + h, c0:c0 + w])
        assert block.dtype == expected.dtype
    plane_names = {p.array().name for p in planes.values()}
    assert {k[0] for k in as_arrays.keys if isinstance(k, tuple)} & plane_names == plane_names
    assert not {k[0] for k in from_stack.keys if isinstance(k, tuple)} & plane_names


def test_windows_cover_every_block_once_within_their_memory():
    # agegrid's own rule (no outside reference): runs of whole blocks along a block row, row-major, each within
    # the window's memory unless one block alone exceeds it
    sizes = ((7, 7, 6), (7, 7, 7, 2))
    per_cell = 40
    for window_mb in (1e-9, 7 * 14 * per_cell / 2**20, 1.0):
        seen = []
        for i, columns in windows(sizes, per_cell, window_mb):
            assert columns == list(range(columns[0], columns[-1] + 1))
            width = sum(sizes[1][j] for j in columns)
            assert len(columns) == 1 or sizes[0][i] * width * per_cell <= window_mb * 2**20
            seen += [(i, j) for j in columns]
        assert seen == [(i, j) for i in range(3) for j in range(4)]


def test_samples_are_every_stride_th_row_and_column():
    # reference: numpy's strided slice of the whole layer, whatever the blocks' edges
    values = np.arange(23 * 31, dtype=np.float32).reshape(23, 31)
    spec, sizes = _grid(values)
    samples = Samples(spec, ("v",), max_cells=50)
    assert samples.stride == int(np.ceil(np.sqrt(values.size / 50)))
    ds = xr.Dataset({"v": (("y", "x"), da.from_array(values, chunks=sizes))})
    stream(ds, ["v"], [samples])
    np.testing.assert_array_equal(samples.values["v"], values[::samples.stride, ::samples.stride])
