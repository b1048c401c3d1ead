"""The allocator keeps freed block-sized memory for reuse (counted in page faults, by the kernel)."""
import subprocess
import sys

import pytest

CHURN = """
import resource, sys
import numpy as np
from agegrid.allocator import keep_freed_memory
if sys.argv[1] == "tuned":
    assert keep_freed_memory()
def churn():  # eight 4 MB arrays made and freed, as a window of blocks is
    arrays = [np.ones(1 << 20, np.float32) for _ in range(8)]
    del arrays
churn()
start = resource.getrusage(resource.RUSAGE_SELF).ru_minflt
for _ in range(5):
    churn()
print(resource.getrusage(resource.RUSAGE_SELF).ru_minflt - start)
"""


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="glibc's allocator")
def test_freed_arrays_are_reused_without_page_faults():
    faults = {mode: int(subprocess.run([sys.executable, "-c", CHURN, mode], capture_output=True, text=True,
                                       check=True).stdout) for mode in ("default", "tuned")}
    # the untuned count is the reference: by default freed arrays go back to the system and are faulted in again
    # (about 22,000 faults of 4 kB pages over the five rounds here)
    assert faults["default"] > 8000
    assert faults["tuned"] < faults["default"] / 10
