"""heap_reuse: a large block freed inside it is reused without new page faults (counted by the
kernel, not timed); outside it glibc maps fresh pages for every large block (common practice:
glibc serves blocks above its mmap threshold with mmap and unmaps them on free)."""
import platform
import resource

import pytest
import torch

from unitlens._memory import heap_reuse

BLOCK = 64 << 20  # bytes: far above glibc's mmap threshold (at most 32 MB)


def _faults_of_a_fresh_block() -> int:
    before = resource.getrusage(resource.RUSAGE_SELF).ru_minflt
    torch.empty(BLOCK // 4).fill_(1.0)  # allocated, every page touched, freed
    return resource.getrusage(resource.RUSAGE_SELF).ru_minflt - before


@pytest.mark.skipif(platform.system() != "Linux" or platform.libc_ver()[0] != "glibc",
                    reason="heap_reuse changes nothing outside glibc")
def test_heap_reuse_keeps_freed_blocks_for_the_next_step():
    pages = BLOCK // resource.getpagesize()
    outside = [_faults_of_a_fresh_block() for _ in range(12)]
    assert min(outside[-3:]) > pages // 2, outside  # a fresh mapping each time: every page faults in again
    with heap_reuse():
        with heap_reuse():  # nests
            # the heap grows for the first few blocks (small allocations in between take pieces of a
            # freed block), then the same memory serves every later one
            inside = [_faults_of_a_fresh_block() for _ in range(12)]
        again = _faults_of_a_fresh_block()  # still held by the outer block
    assert max(inside[-3:]) < pages // 20 and again < pages // 20, (inside, again)
    # afterwards glibc's defaults are back: a large block is a fresh mapping again
    assert min(_faults_of_a_fresh_block() for _ in range(3)) > pages // 2
