"""How much memory this process may still allocate (Linux: /proc and the cgroup; elsewhere a guess)."""
from __future__ import annotations


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
