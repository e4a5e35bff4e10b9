"""bonft.trainer.memory: freed large tensors are reused, not page-faulted in again.

Reference: glibc's mallopt(3) (M_MMAP_THRESHOLD: blocks at least this large are served by mmap
and unmapped when freed; glibc raises it by itself only up to 32 MiB on 64-bit systems;
M_TRIM_THRESHOLD: free memory kept at the top of the heap). A fresh mmap costs one minor page
fault per 4 KiB page touched: 12,288 for a 48 MiB tensor (measured: 12,289 per block with the
default, 0 once reused from the heap). Measured in fresh subprocesses, so this test process keeps
glibc's defaults.
"""
import subprocess
import sys

import pytest

SCRIPT = """
import resource, sys, torch
from bonft.trainer.memory import keep_freed_memory
kept = keep_freed_memory() if sys.argv[1] == "kept" else None

def blocks(count):
    for _ in range(count):
        x = torch.empty(12 * 1024 * 1024)  # 48 MiB, above glibc's largest automatic threshold
        x.fill_(1.0)  # touch every page
        del x

blocks(20)  # warm-up: the heap grows to hold the block (in a few steps)
before = resource.getrusage(resource.RUSAGE_SELF).ru_minflt
blocks(10)
print(kept, (resource.getrusage(resource.RUSAGE_SELF).ru_minflt - before) / 10)
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
    assert default >= 12288 * 0.9  # a fresh mmap every time: one fault per 4 KiB page
    assert with_kept < 16  # the same heap block again: (almost) no faults
