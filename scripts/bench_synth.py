"""Benchmark of pass 2 (synthesis) on this CPU; prints tables, tests nothing.

    python scripts/bench_synth.py            # about 5 minutes on 2 cores
    python scripts/bench_synth.py --quick    # a smaller version of every table

1. overhead: image-steps/s of the synthesis loop against a bare forward+backward through the same
   truncated network, at the same batch and size (the loop adds the image basis, warps,
   goal and Adam; target ratio >= 0.9)
2. units/hour for ResNet-18 layer3 and ResNet-50 layer3 at 128 px and 256 steps, estimated from a
   short timed run (no early stop, robustness checks not counted)
3. wall time of whole runs against steps, image size and layer depth
4. spectral vs pixel image basis: steps each needs to reach the same activation

All networks have random weights (nothing can be downloaded here), so the images mean nothing;
timings do not depend on the weights.
"""
from __future__ import annotations

import argparse
import os
import statistics
import time

import numpy as np
import torch

from unitlens import load_model
from unitlens.synth import Goal, SynthConfig, optimise_units
from unitlens.synth.loop import _Batch, _Engine, _Unit


def load(arch: str, size: int):
    torch.manual_seed(0)
    return load_model(f"torchvision:{arch}", size=size)


def bare_step(model, extract, layer, x):
    xi = x.detach().requires_grad_(True)
    with torch.enable_grad():
        out = extract(model.normalize(xi))[layer]
        torch.autograd.grad(out.mean((2, 3)).sum(), xi)


def overhead(arch: str, layer: str, size: int, batch: int, reps: int) -> dict:
    """Alternating single steps; the fastest of `reps` is the estimate least disturbed by other work
    on the machine. Also times the loop with the network replaced by the identity: what the loop
    itself adds (image basis, warps, normalisation, goal, their backward, Adam)."""
    model = load(arch, size)
    extract = model.extractor([layer])
    x = torch.rand(batch, 3, size, size)
    cfg = SynthConfig(steps=10**6, stop_gain=None, batch_size=batch)
    engine = _Engine(model, layer, list(range(batch)), cfg, None, None)
    b = _Batch([_Unit(i, i, engine) for i in range(batch)], 1)
    alone = _Engine(model, layer, [i % 3 for i in range(batch)], cfg, None, None)
    h = model.layer(layer).height  # no network: channel i % 3 of the input, pooled to the layer's size
    alone.extract = lambda x: {layer: torch.nn.functional.adaptive_avg_pool2d(x, h)}
    a = _Batch([_Unit(i, i % 3, alone) for i in range(batch)], 1)
    tb, ts, ta = [], [], []
    for k in range(reps + 1):  # the first round warms up
        for times, run in ((tb, lambda: bare_step(model, extract, layer, x)), (ts, lambda: engine.step(b)),
                           (ta, lambda: alone.step(a))):
            t = time.perf_counter()
            run()
            if k:
                times.append(time.perf_counter() - t)
    return {"bare": batch / min(tb), "synth": batch / min(ts), "ratio": min(tb) / min(ts),
            "median_ratio": statistics.median(tb) / statistics.median(ts), "loop_alone": min(ta),
            "implied_ratio": min(tb) / (min(tb) + min(ta))}


def units_per_hour(arch: str, layer: str, size: int, batch: int, steps: int, timed: int) -> dict:
    """From the fastest of `timed` single steps (after a warm-up step)."""
    model = load(arch, size)
    engine = _Engine(model, layer, list(range(batch)), SynthConfig(steps=10**6, stop_gain=None, batch_size=batch),
                     None, None)
    b = _Batch([_Unit(i, i, engine) for i in range(batch)], 1)
    times = []
    for k in range(timed + 1):
        t = time.perf_counter()
        engine.step(b)
        if k:
            times.append(time.perf_counter() - t)
    per_image_step = min(times) / batch
    return {"s_per_image_step": per_image_step, "units_per_hour": 3600 / (steps * per_image_step)}


def wall(model, layer, units, steps) -> float:
    t = time.perf_counter()
    optimise_units(model, Goal(f"{layer}:0-{units - 1}"), SynthConfig(steps=steps, stop_gain=None, checks=0))
    return time.perf_counter() - t


def steps_to_reach(trace: np.ndarray, target: float, window: int = 4) -> int | None:
    """First step at which the running mean over `window` steps reaches `target` (traces are noisy)."""
    smooth = np.convolve(trace, np.ones(window) / window, mode="valid")
    hit = np.nonzero(smooth >= target)[0]
    return int(hit[0]) + window if len(hit) else None


def spectral_vs_pixel(arch, layer, size, units, steps) -> list[tuple]:
    model = load(arch, size)
    runs = {p: optimise_units(model, Goal(f"{layer}:0-{units - 1}"), SynthConfig(steps=steps, basis=p, stop_gain=None,
                                                                                checks=0, whiten_colour=p == "spectral"))
            for p in ("spectral", "pixel")}
    rows = []
    for u in range(units):
        s, p = runs["spectral"][u].traces[0], runs["pixel"][u].traces[0]
        k = 4
        target = 0.9 * min(np.convolve(s, np.ones(k) / k, "valid").max(), np.convolve(p, np.ones(k) / k, "valid").max())
        rows.append((u, target, steps_to_reach(s, target, k), steps_to_reach(p, target, k), float(s[-k:].mean()),
                     float(p[-k:].mean())))
    return rows


def main():
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--quick", action="store_true", help="smaller sizes and fewer steps everywhere")
    ap.add_argument("--threads", type=int, default=None, help="torch threads (default: torch's choice)")
    a = ap.parse_args()
    if a.threads:
        torch.set_num_threads(a.threads)
    q = a.quick
    t0 = time.perf_counter()
    print(f"unitlens synthesis benchmark: torch {torch.__version__}, {torch.get_num_threads()} threads, "
          f"{os.cpu_count()} CPUs, load average {os.getloadavg()[0]:.1f} at start")
    print("All networks have RANDOM weights (no downloads possible): timings only, the images mean nothing.\n")

    size, batch = (64, 8) if q else (128, 16)
    reps = 3 if q else 6
    r = overhead("resnet18", "layer3", size, batch, reps)
    print(f"1. Loop overhead, resnet18 layer3, {size} px, batch {batch}: fastest of {reps} alternating single steps")
    print(f"   bare forward+backward  {r['bare']:7.2f} image-steps/s")
    print(f"   synthesis loop         {r['synth']:7.2f} image-steps/s   ratio {r['ratio']:.2f} (target >= 0.9; "
          f"ratio of medians {r['median_ratio']:.2f})")
    print(f"   the loop with the network replaced by a pooling takes {1000 * r['loop_alone']:.0f} ms a step: "
          f"implied ratio {r['implied_ratio']:.2f}\n")

    print("2. Units per hour at 128 px and 256 steps, one image per unit, ESTIMATED from the fastest of a few timed steps")
    print("   (every image runs all 256 steps: no early stop; the 32-transform robustness check and start-up")
    print("   are not counted)")
    print(f"   {'network':<18} {'batch':>5} {'timed steps':>11} {'s / image-step':>15} {'units / hour':>13}")
    for arch, b in (("resnet18", 16), ("resnet50", 8)):
        b = b // 2 if q else b
        timed = 2 if q else 3
        r = units_per_hour(arch, "layer3", 64 if q else 128, b, 256, timed)
        print(f"   {arch + ' layer3':<18} {b:>5} {timed:>11} {r['s_per_image_step']:>15.3f} {r['units_per_hour']:>13.1f}")
    if q:
        print("   (--quick: measured at 64 px, not 128)")
    print()

    print("3. Wall time of whole runs (resnet18, 4 units, start-up included, no early stop; one run each, so")
    print("   on a shared machine single rows can be off by the load of the moment):")
    print(f"   {'varied':<8} {'layer':<7} {'size':>5} {'steps':>5} {'seconds':>8} {'s / unit-step':>14}")
    m = {s: load("resnet18", s) for s in ((32, 64) if q else (32, 64, 128))}
    base_size, base_steps = 64, (4 if q else 8)
    rows = [("steps", "layer2", base_size, s) for s in ((2, 4, 8) if q else (4, 8, 16))]
    rows += [("size", "layer2", s, base_steps) for s in m if s != base_size]
    rows += [("depth", name, base_size, base_steps) for name in ("layer1", "layer3", "layer4")]
    rows.insert(len(rows) - 3, ("depth", "layer2", base_size, base_steps))
    cache = {}
    for what, layer, s, steps in rows:
        key = (layer, s, steps)
        if key not in cache:
            cache[key] = wall(m[s], layer, 4, steps)
        sec = cache[key]
        print(f"   {what:<8} {layer:<7} {s:>5} {steps:>5} {sec:>8.2f} {sec / (4 * steps):>14.3f}")
    print()

    units, steps = (3, 24) if q else (4, 48)
    print(f"4. Spectral (1/f, whitened colour) vs pixel image basis, resnet18 layer2, 64 px, {steps} steps:")
    print("   steps until the running mean (4 steps) of the objective reaches 90% of the lower of the two maxima")
    print(f"   {'unit':>4} {'target':>8} {'spectral':>9} {'pixel':>7} {'final spectral':>15} {'final pixel':>12}")
    rows = spectral_vs_pixel("resnet18", "layer2", 64, units, steps)
    for u, target, s, p, fs, fp in rows:
        print(f"   {u:>4} {target:>8.3f} {str(s):>9} {str(p):>7} {fs:>15.3f} {fp:>12.3f}")
    got = [(s, p) for _, _, s, p, _, _ in rows if s and p]
    if got:
        print(f"   median steps: spectral {statistics.median(s for s, _ in got)}, pixel {statistics.median(p for _, p in got)}")
    print(f"\nTotal {time.perf_counter() - t0:.0f} s; load average {os.getloadavg()[0]:.1f} at the end.")


if __name__ == "__main__":
    main()
