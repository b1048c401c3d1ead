"""The manifest's file digests and package versions, against the standard library's own readings."""
import hashlib
import subprocess
import sys
from importlib.metadata import PackageNotFoundError, version
from pathlib import Path

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


HASH_PEAK = """
import sys
from pathlib import Path
from agegrid import manifest

def peak_mb():
    for line in Path("/proc/self/status").read_text().splitlines():
        if line.startswith("VmHWM:"):
            return int(line.split()[1]) / 1024

manifest.HASH_WINDOW_BYTES = int(sys.argv[2])
before = peak_mb()
manifest.sha256(Path(sys.argv[1]))
print(peak_mb() - before)
"""


@pytest.mark.skipif(not Path("/proc/self/status").exists(), reason="reads the kernel's VmHWM")
def test_hashing_a_large_file_keeps_the_peak_memory_bounded(tmp_path):
    """Mapped pages count in a process's resident memory: hashing 256 MB window by window raises the peak
    by little, where mapping the whole file at once raises it by the file's size (the check that the
    measure sees mapped pages)."""
    path = tmp_path / "large.bin"
    with open(path, "wb") as fh:
        fh.truncate(256 * 2**20)  # a file of holes: its pages are made as they are read
    grown = {}
    for window in (16 * 2**20, 2**30):
        out = subprocess.run([sys.executable, "-c", HASH_PEAK, str(path), str(window)], capture_output=True,
                             text=True, check=True)
        grown[window] = float(out.stdout)
    assert grown[2**30] > 200
    assert grown[16 * 2**20] < 64


def test_sha256_reads_a_file_that_cannot_be_mapped(tmp_path, monkeypatch):
    """Some file systems refuse memory maps: the file is then read."""
    import mmap

    def refuse(*args, **kwargs):
        raise OSError(19, "No such device")

    path = tmp_path / "unmappable.bin"
    data = b"seafloor" * 100_000
    path.write_bytes(data)
    monkeypatch.setattr(mmap, "mmap", refuse)
    assert sha256(path) == hashlib.sha256(data).hexdigest()
