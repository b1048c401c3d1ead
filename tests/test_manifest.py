"""The manifest's file digests and package versions, against the standard library's own readings."""
import hashlib
from importlib.metadata import PackageNotFoundError, version

import numpy as np
import pytest

from agegrid.manifest import PACKAGES, installed_version, sha256


@pytest.mark.parametrize("size", [0, 1, 4096, 3 * 2**20 + 7])
def test_sha256_of_a_file_is_hashlib_over_its_bytes(tmp_path, size):
    path = tmp_path / f"file{size}.bin"
    data = np.random.default_rng(size).integers(0, 256, size, dtype=np.uint8).tobytes()
    path.write_bytes(data)
    assert sha256(path) == hashlib.sha256(data).hexdigest()


def test_installed_versions_are_importlib_metadata_versions():
    """The Version field read from the core metadata equals importlib.metadata's parse of the whole file."""
    checked = 0
    for name in PACKAGES:
        try:
            expected = version(name)
        except PackageNotFoundError:
            continue
        assert installed_version(name) == expected
        checked += 1
    assert checked >= 10
