"""Per-step levers of synthesis on this CPU, side by side; prints a table, tests nothing.

    python scripts/bench_levers.py                          # resnet18 layer3, 128 px, batch 8
    python scripts/bench_levers.py --arch resnet50 --layer layer2 --size 96 --batch 4
    python scripts/bench_levers.py --compile                # also torch.compile (inductor; slow to start)
    python scripts/bench_levers.py --arch resnet50 --layer layer1 --size 224 --batch 32   # where heap_reuse pays

Each lever runs a bare truncated forward+backward (as scripts/bench_synth.py) beside the default,
in alternating rounds (each lever: one step to warm up, one timed), so all see the same load; the
`heap_reuse` lever holds unitlens._memory.heap_reuse (freed memory kept for the next step) over its
two steps, as synthesis and mining hold it over a whole pass. The fastest of --reps is
printed with the median, and the input gradients of each lever are compared with the default's
(max relative difference: a lever is kept only within rounding). Random weights: costs do not
depend on them.
"""
from __future__ import annotations

import argparse
import contextlib
import os
import statistics
import sys
import time
from pathlib import Path

import torch

sys.path.insert(0, str(Path(__file__).parent))
from bench_synth import load

from unitlens._memory import heap_reuse


def grad_step(model, extract, layer, x, fmt=torch.contiguous_format):
    """Input gradient of the layer's summed channel means (the synthesis objective's backward)."""
    xi = x.detach().contiguous(memory_format=fmt).requires_grad_(True)
    with torch.enable_grad():
        out = extract(model.normalize(xi))[layer]  # (B, C, h, w)
        (g,) = torch.autograd.grad(out.mean((2, 3)).sum(), xi)
    return g


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--arch", default="resnet18")
    ap.add_argument("--layer", default="layer3")
    ap.add_argument("--size", type=int, default=128)
    ap.add_argument("--batch", type=int, default=8)
    ap.add_argument("--reps", type=int, default=5)
    ap.add_argument("--compile", action="store_true", help="add torch.compile of the truncated forward")
    a = ap.parse_args()
    print(f"{a.arch} {a.layer}, {a.size} px, batch {a.batch}; torch {torch.__version__}, "
          f"{torch.get_num_threads()} threads; load average {os.getloadavg()}")
    x = torch.rand(a.batch, 3, a.size, a.size)  # (B, 3, S, S)
    base = load(a.arch, a.size)
    ext = base.extractor([a.layer])
    cl = load(a.arch, a.size)
    cl.module.to(memory_format=torch.channels_last)
    ext_cl = cl.extractor([a.layer])
    levers = {"default": lambda: grad_step(base, ext, a.layer, x),
              "channels_last": lambda: grad_step(cl, ext_cl, a.layer, x, torch.channels_last),
              "heap_reuse": lambda: grad_step(base, ext, a.layer, x)}
    if a.compile:
        t = time.perf_counter()
        ext_c = torch.compile(base.extractor([a.layer]))
        levers["torch.compile"] = lambda: grad_step(base, ext_c, a.layer, x)
        levers["torch.compile"]()
        print(f"torch.compile: first call (compilation) {time.perf_counter() - t:.1f} s")
    ref = levers["default"]()
    diff = {k: float(((f() - ref).abs().max() / ref.abs().max())) for k, f in levers.items()}
    times = {k: [] for k in levers}
    for k in range(a.reps + 1):  # the first round warms up
        for name, f in levers.items():
            with heap_reuse() if name == "heap_reuse" else contextlib.nullcontext():
                f()  # warm (for heap_reuse: the memory the timed step reuses)
                t = time.perf_counter()
                f()
                if k:
                    times[name].append(time.perf_counter() - t)
    print(f"{'lever':<15} {'fastest s':>9} {'median s':>9} {'default/lever':>13} {'max rel grad diff':>17}")
    for name, ts in times.items():
        print(f"{name:<15} {min(ts):>9.3f} {statistics.median(ts):>9.3f} {min(times['default']) / min(ts):>13.2f} "
              f"{diff[name]:>17.2e}")
    print(f"load average at the end {os.getloadavg()}")


if __name__ == "__main__":
    main()
