"""bonft.trainer.memory: freed large tensors are reused, not page-faulted in again.

Reference: glibc's mallopt(3) (M_MMAP_THRESHOLD: blocks at least this large are served by mmap
and unmapped when freed; M_TRIM_THRESHOLD: free memory kept at the top of the heap). A fresh
mmap of 8 MiB costs up to one minor page fault per 4 KiB page touched (2048 pages; 818 faults measured
here), a reused heap block none.
Measured in fresh subprocesses, so this test process keeps glibc's defaults.
"""
import subprocess
import sys

import pytest

SCRIPT = """
import resource, sys, torch
from bonft.trainer.memory import keep_freed_memory
kept = keep_freed_memory() if sys.argv[1] == "kept" else None
x = torch.empty(2 * 1024 * 1024); x.fill_(1.0); del x  # one 8 MiB block, freed
before = resource.getrusage(resource.RUSAGE_SELF).ru_minflt
for _ in range(20):
    x = torch.empty(2 * 1024 * 1024)  # 8 MiB, as a step's activations come and go
    x.fill_(1.0)
    del x
print(kept, (resource.getrusage(resource.RUSAGE_SELF).ru_minflt - before) / 20)
"""


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="glibc's allocator")
def test_freed_blocks_are_reused_instead_of_faulted_in_again():
    def faults(mode):
        out = subprocess.run([sys.executable, "-c", SCRIPT, mode], capture_output=True, text=True, check=True)
        kept, per_block = out.stdout.split()
        return kept, float(per_block)

    kept, with_kept = faults("kept")
    _, default = faults("default")
    assert kept == "True"
    assert default >= 256  # above the default threshold: a fresh mmap each time, hundreds of faults (818 measured)
    assert with_kept < 16  # served from the heap: (almost) no page faults
