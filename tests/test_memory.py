"""heap_reuse: a large block freed inside it is reused without new page faults (counted by the
kernel, not timed); outside it glibc maps fresh pages for every large block (common practice:
glibc serves blocks above its mmap threshold with mmap and unmaps them on free).

The counts are taken in a fresh Python process: what an earlier test left in this process's heap
would decide where a block comes from."""
import json
import platform
import subprocess
import sys

import pytest

from conftest import ROOT

PROBE = """
import json, resource, torch
from unitlens._memory import heap_reuse

BLOCK = 64 << 20  # bytes: far above glibc's mmap threshold (at most 32 MB)

def faults():
    before = resource.getrusage(resource.RUSAGE_SELF).ru_minflt
    torch.empty(BLOCK // 4).fill_(1.0)  # allocated, every page touched, freed
    return resource.getrusage(resource.RUSAGE_SELF).ru_minflt - before

outside = [faults() for _ in range(12)]
with heap_reuse():
    with heap_reuse():  # nests
        inside = [faults() for _ in range(12)]
    again = faults()  # still held by the outer block
print(json.dumps({"pages": BLOCK // resource.getpagesize(), "outside": outside, "inside": inside,
                  "again": again}))
"""


@pytest.mark.skipif(platform.system() != "Linux" or platform.libc_ver()[0] != "glibc",
                    reason="heap_reuse changes nothing outside glibc")
def test_heap_reuse_keeps_freed_blocks_for_the_next_step():
    r = subprocess.run([sys.executable, "-c", PROBE], cwd=ROOT, capture_output=True, text=True, check=True)
    d = json.loads(r.stdout)
    pages = d["pages"]
    assert min(d["outside"][-3:]) > pages // 2, d  # a fresh mapping each time: every page faults in again
    # inside, the heap grows for the first few blocks (small allocations in between take pieces of
    # a freed block), then the same memory serves every later one
    assert max(d["inside"][-3:]) < pages // 20 and d["again"] < pages // 20, d
    # (Afterwards glibc's settings are back, but where the next block comes from then depends on
    # what the heap holds free: not a property to assert.)
