"""Wall time of `unitlens show`, process start to exit, beside a bare Python start and `import torch`;
prints a table, tests nothing.

    python scripts/bench_show.py                 # builds a small demo run first (not timed), ~30 s
    python scripts/bench_show.py --run RUN --unit layer3:37 --repeat 10

Reading a run needs no torch, so `show` should cost a Python start plus reading a few files;
target: under 1 s on a quiet machine. The `import torch` row says what it would cost otherwise.
"""
from __future__ import annotations

import argparse
import os
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path


def timed(argv: list[str]) -> float:
    t = time.perf_counter()
    r = subprocess.run(argv, capture_output=True, text=True, check=False)
    seconds = time.perf_counter() - t
    if r.returncode != 0:
        raise SystemExit(f"{' '.join(argv)} failed:\n{r.stderr}")
    return seconds


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--run", type=Path, help="an existing run folder (default: build a small demo run)")
    ap.add_argument("--unit", default="block3:5", help="LAYER:CHANNEL to show (default block3:5)")
    ap.add_argument("--repeat", type=int, default=5, help="timed runs of each row (the median is shown)")
    a = ap.parse_args()

    tmp = None
    run = a.run
    if run is None:
        tmp = Path(tempfile.mkdtemp(prefix="bench-show-"))
        run = tmp / "demo"
        subprocess.run([sys.executable, "-m", "unitlens", "demo", "--out", str(run), "--count", "60", "--units", "8",
                        "--steps", "8"], check=True, capture_output=True)
    rows = [
        ("python -c pass", [sys.executable, "-c", "pass"]),
        ("python -c 'import torch'", [sys.executable, "-c", "import torch"]),
        (f"unitlens show {a.unit}", [sys.executable, "-m", "unitlens", "show", str(run), a.unit]),
        (f"unitlens show {a.unit} --json", [sys.executable, "-m", "unitlens", "show", str(run), a.unit, "--json"]),
    ]
    print(f"{'command':<36} {'median s':>9} {'min s':>7}   ({a.repeat} runs each; load {os.getloadavg()[0]:.2f})")
    for name, argv in rows:
        times = [timed(argv) for _ in range(a.repeat)]
        print(f"{name:<36} {statistics.median(times):>9.3f} {min(times):>7.3f}")
    if tmp is not None:
        shutil.rmtree(tmp)


if __name__ == "__main__":
    main()
