"""A building command's one-time start-up in a fresh process, done before the build's clock starts.

- The build's modules are imported with the garbage collector paused: imports make about 180,000 objects
  that live as long as the process, and the full collections they set off (three, 0.15-0.2 s on the
  reference machine) find almost nothing to free.
- numba's typing and lowering registries are loaded: the first call of any compiled function in a process,
  even one read from numba's on-disk cache, imports and installs them (about 70 modules, 0.3-0.4 s,
  measured with cProfile: ``numba.core.base.BaseContext.refresh``). They used to land in the
  ``compartments`` stage.
- The libraries a build imports where it first uses them (:data:`BUILD_LIBRARIES`) are imported too, so
  that the build's clock starts after its imports, as griddata's does in the bench (50 ms in a fresh
  process at 3.4 million cells).
- Everything made so far is frozen (:func:`gc.freeze`): moved out of the collector's reach, so that the
  build's own full collections do not walk it again (one at the build's start took 0.13 s).

Measured in fresh processes at 3.4 million cells in the README's performance section.
"""
from __future__ import annotations

import gc
import importlib

from numba import njit

#: Modules every build imports at their first use: the HDF5 and netCDF-C writers, scipy's graph routines (the
#: compartments' joins across blocks) and KD-tree, ISA-L, GDAL's rasteriser, shapely's operations, and the
#: cooling laws (left out of plain imports so that a no-op rerun does not load the compiler).
BUILD_LIBRARIES = ("h5py", "netCDF4", "scipy.sparse.csgraph", "scipy.spatial", "isal.isal_zlib", "rasterio.features",
                   "shapely.ops", "shapely.prepared", "agegrid.cooling_law")


@njit(cache=True)
def _one(x: float) -> float:
    return x + 1.0


def ready_to_build() -> None:
    """Import the build's modules and libraries, load numba's registries and freeze the objects made so far."""
    enabled = gc.isenabled()
    gc.disable()
    try:
        import agegrid.pipeline  # noqa: F401  (the import is the point)

        for name in BUILD_LIBRARIES:
            importlib.import_module(name)
        _one(0.0)
    finally:
        gc.freeze()
        if enabled:
            gc.enable()
