"""How much memory this process may still allocate (Linux: /proc and the cgroup; elsewhere a guess),
and how it allocates while synthesising and mining (heap_reuse)."""
from __future__ import annotations

import contextlib
import functools


def available_memory() -> int:
    """Bytes this process may still allocate: MemAvailable, capped by a cgroup limit if there is one."""
    avail = 4 << 30
    try:
        with open("/proc/meminfo") as f:
            for line in f:
                if line.startswith("MemAvailable:"):
                    avail = int(line.split()[1]) * 1024
    except OSError:
        pass
    try:
        limit = _read("/sys/fs/cgroup/memory.max")
        if limit != "max":
            avail = min(avail, int(limit) - int(_read("/sys/fs/cgroup/memory.current")))
    except (OSError, ValueError):
        pass
    return max(avail, 256 << 20)


def _read(path: str) -> str:
    with open(path) as f:
        return f.read().strip()


# glibc's malloc serves each large block (a batch's activations, from a few MB up) with its own
# mmap and returns it on free, so every step of a big batch pays the kernel for fresh zeroed pages:
# ResNet-50 layer1 at 224 px cost 48-53 ms an image-step at 16-32 images against 29 ms at 8, and
# the same 29-30 ms at any batch once freed memory was kept for reuse (scripts/bench_levers.py).
_M_TRIM_THRESHOLD, _M_MMAP_MAX = -1, -4  # mallopt parameters (malloc.h)
_DEFAULT_TRIM, _DEFAULT_MMAP_MAX = 128 * 1024, 65536
_depth = 0


@contextlib.contextmanager
def heap_reuse():
    """While the block runs, large allocations come from the heap and freed memory stays there
    for the next step, instead of a fresh mmap per tensor; afterwards glibc's defaults return and
    the unused memory goes back to the system. Nests; on other C libraries it changes nothing.
    Also a decorator (@heap_reuse())."""
    global _depth
    libc = _glibc()
    if libc is None:
        yield
        return
    if _depth == 0:
        libc.mallopt(_M_MMAP_MAX, 0)
        libc.mallopt(_M_TRIM_THRESHOLD, 2**31 - 1)
    _depth += 1
    try:
        yield
    finally:
        _depth -= 1
        if _depth == 0:
            libc.mallopt(_M_MMAP_MAX, _DEFAULT_MMAP_MAX)
            libc.mallopt(_M_TRIM_THRESHOLD, _DEFAULT_TRIM)
            libc.malloc_trim(0)


@functools.lru_cache(maxsize=1)
def _glibc():
    import ctypes
    import platform

    if platform.system() != "Linux" or platform.libc_ver()[0] != "glibc":
        return None
    try:
        libc = ctypes.CDLL(None)
        libc.mallopt, libc.malloc_trim  # noqa: B018 (both present)
    except (OSError, AttributeError):
        return None
    return libc
