"""`unitlens demo`: each stage line's ETA beside the time that was really left; prints a table,
tests nothing.

    python scripts/bench_demo_eta.py                 # the whole demo (2000 swatches, 208 units)
    python scripts/bench_demo_eta.py --count 400     # a smaller corpus (mining shorter, synthesis the same)

One fresh `unitlens demo` process in a temporary folder. Its stderr lines are timestamped as they
arrive; a line that says "about X left" is compared with the time from that line to the end of
the run (its "done in" line; the demo's labelling after it is timed apart). Target: within 25% at every stage line after the first layer.
"""
from __future__ import annotations

import argparse
import os
import re
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

LEFT = re.compile(r"about (\d+(?:\.\d+)?) (s|min) left")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--count", type=int, default=None, help="swatches to generate (default: the demo's 2000)")
    ap.add_argument("--units", type=int, default=None, help="only the first N units per layer")
    ap.add_argument("--threads", type=int, default=None)
    ap.add_argument("--keep", action="store_true", help="keep the temporary folder (printed)")
    a = ap.parse_args()
    d = Path(tempfile.mkdtemp(prefix="bench-demo-eta-"))
    cmd = [sys.executable, "-m", "unitlens", "demo", "--out", str(d / "demo")]
    for flag, v in (("--count", a.count), ("--units", a.units), ("--threads", a.threads)):
        if v is not None:
            cmd += [flag, str(v)]
    print(f"load average at start {os.getloadavg()}")
    t0 = time.monotonic()
    p = subprocess.Popen(cmd, stderr=subprocess.PIPE, stdout=subprocess.DEVNULL, text=True)
    lines = []  # (seconds since start, line, load average then)
    for line in p.stderr:
        lines.append((time.monotonic() - t0, line.rstrip(), os.getloadavg()[0]))
        print(f"{lines[-1][0]:7.1f}s  load {lines[-1][2]:5.2f}  {lines[-1][1]}", flush=True)
    p.wait()
    total = time.monotonic() - t0
    if p.returncode != 0:
        raise SystemExit(f"unitlens demo failed ({p.returncode})")
    print(f"\nend to end {total:.1f} s; load average at the end {os.getloadavg()}")
    # The ETA lines speak of the run (mining, synthesis, atlas), which ends at its "done in" line;
    # what the demo does after it (naming units from its label maps) is timed apart.
    end = next((t for t, line, _ in lines if line.startswith("done in")), total)
    print(f"run ends at {end:.1f} s; after it (labelling, last redraw) {total - end:.1f} s")
    print(f"{'at s':>7} {'ETA s':>7} {'real left s':>11} {'real/ETA':>8}  line")
    for t, line, _ in lines:
        m = LEFT.search(line)
        if m and t <= end:
            eta = float(m.group(1)) * (60 if m.group(2) == "min" else 1)
            print(f"{t:7.1f} {eta:7.0f} {end - t:11.1f} {(end - t) / eta:8.2f}  {line[:70]}")
    if a.keep:
        print(d)
    else:
        shutil.rmtree(d)


if __name__ == "__main__":
    main()
