"""Run unitlens with one function made to stop for good on its n-th call, so that a test's SIGKILL
lands at a chosen moment however fast the machine is.

    python tests/pause.py MODULE:ATTR N MARKER -- unitlens arguments...

ATTR may be `Class.method`. On the n-th call the marker file is created and the process sleeps.
"""
import importlib
import runpy
import sys
import time
from pathlib import Path


def main() -> None:
    target, n, marker = sys.argv[1], int(sys.argv[2]), Path(sys.argv[3])
    assert sys.argv[4] == "--"
    module, attr = target.split(":")
    owner = importlib.import_module(module)
    *path, name = attr.split(".")
    for p in path:
        owner = getattr(owner, p)
    original = getattr(owner, name)
    calls = 0

    def wrapper(*args, **kwargs):
        nonlocal calls
        calls += 1
        if calls == n:
            marker.write_text("paused")
            while True:
                time.sleep(60)
        return original(*args, **kwargs)

    setattr(owner, name, wrapper)
    sys.argv = ["unitlens", *sys.argv[5:]]
    runpy.run_module("unitlens", run_name="__main__", alter_sys=True)


if __name__ == "__main__":
    main()
