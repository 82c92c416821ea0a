"""Projected wall time of a whole-network run on this CPU; prints every term of the sum, tests nothing.

    python scripts/bench_overnight.py                       # resnet50, layer1-4 (3,840 units), 224 px
    python scripts/bench_overnight.py --size 128            # the same at 128 px synthesis
    python scripts/bench_overnight.py --arch resnet18       # 960 units
    python scripts/bench_overnight.py --quick               # smaller batches and fewer repetitions

The projection of `unitlens run torchvision:ARCH --layers layer1,layer2,layer3,layer4` on a corpus
of --images images is

    mining:     images / (images per second of `mine` on a small generated corpus, measured here)
  + synthesis:  sum over stages of units x steps per unit x seconds per image-step (measured here)
  + per unit:   sum over stages of units x the time of the real evidence code for one unit (the
                robustness check of its image and the reference on its best exemplar, 32 warped
                forwards each, plus the 8-bit rounding, ranks and an in-memory PNG of the image)

Seconds per image-step are the fastest of a few single synthesis steps at a full batch (32, the
loop's default; --quick 4), with freed memory kept for reuse as a run keeps it, beside a
bare truncated forward+backward of the same batch and size (their ratio is printed: the loop's
overhead). Steps per unit come from scripts/bench_parity.py on the trained swatch network (its
--save file): the mean over units of the steps each spent under a setting, since a unit's cost is
what it ran, not its first step at parity. Random weights: costs do not depend on weights.
"""
from __future__ import annotations

import argparse
import json
import os
import statistics
import sys
import tempfile
import time
from pathlib import Path

import torch

sys.path.insert(0, str(Path(__file__).parent))
from bench_synth import bare_step, load

from unitlens._memory import heap_reuse
from unitlens.synth import SynthConfig
from unitlens.synth.loop import _Batch, _Engine, _Unit

STAGES = ("layer1", "layer2", "layer3", "layer4")


def step_costs(model, layer: str, batch: int, reps: int) -> dict:
    """Fastest of `reps` alternating single steps (after a warm-up): synthesis step, bare
    forward+backward, and a forward alone (what a check costs), each per image."""
    size = model.preprocess.side
    extract = model.extractor([layer])
    x = torch.rand(batch, 3, size, size)
    cfg = SynthConfig(steps=10**6, stop_gain=None, batch_size=batch)
    engine = _Engine(model, layer, list(range(batch)), cfg, None, None)
    b = _Batch([_Unit(i, i, engine) for i in range(batch)], 1)

    def forward():
        with torch.no_grad():
            extract(model.normalize(x))

    tb, ts, tf = [], [], []
    for k in range(reps + 1):
        for times, run in ((tb, lambda: bare_step(model, extract, layer, x)), (ts, lambda: engine.step(b)),
                           (tf, forward)):
            t = time.perf_counter()
            run()
            if k:
                times.append(time.perf_counter() - t)
    return {"synth": min(ts) / batch, "bare": min(tb) / batch, "forward": min(tf) / batch,
            "ratio": min(tb) / min(ts)}


def unit_cost(model, layer: str, reps: int) -> float:
    """Seconds of one unit's work beside the loop, timed on the real code (fastest of `reps`):
    evidence.assess on its 8-bit image, exemplar_references on one exemplar, a PNG encoding."""
    import io

    import numpy as np
    from PIL import Image

    from unitlens.synth import Goal
    from unitlens.synth.bases import ColourBasis
    from unitlens.synth.evidence import assess, exemplar_references

    size = model.preprocess.side
    scorer = Goal(layer).scorer(layer)
    spec = SynthConfig().warps.at(size)
    fill = ColourBasis.default(3).mean
    extract = model.extractor([layer])
    u8 = torch.randint(0, 256, (1, 3, size, size), dtype=torch.uint8)
    times = []
    for k in range(reps + 1):
        t = time.perf_counter()
        assess(model, layer, u8, [0], scorer, spec, fill, 0, [0], 32, extract)
        exemplar_references(model, layer, u8, [0], scorer, spec, fill, 0, 32, extract)
        Image.fromarray(np.ascontiguousarray(u8[0].permute(1, 2, 0).numpy())).save(io.BytesIO(), format="PNG")
        if k:
            times.append(time.perf_counter() - t)
    return min(times)


def mining_rate(arch: str, size: int, images: int) -> float:
    """Images per second of `mine` (all four stages, every unit) on `images` generated swatches."""
    from unitlens.corpus import open_corpus
    from unitlens.demo.swatches import write_corpus
    from unitlens.mining import MineConfig, mine
    from unitlens.units import parse_layers

    model = load(arch, size)
    with tempfile.TemporaryDirectory() as d:
        write_corpus(Path(d) / "corpus", count=images, size=size)
        corpus = open_corpus(Path(d) / "corpus")
        t = time.perf_counter()
        mine(model, corpus, parse_layers(model, list(STAGES)), Path(d) / "run", MineConfig())
        return images / (time.perf_counter() - t)


def steps_per_unit(path: Path, setting: str) -> tuple[float, float, int]:
    """(mean, median, units) of the steps each unit ran under `setting` in a bench_parity --save file."""
    d = json.loads(path.read_text())
    if setting not in d:
        raise SystemExit(f"{path} has no setting '{setting}'; it has: {', '.join(d)}")
    s = d[setting]["steps"]
    return statistics.fmean(s), statistics.median(s), len(s)


def hours(s: float) -> str:
    return f"{s / 3600:6.2f} h"


def main():
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--arch", default="resnet50")
    ap.add_argument("--size", type=int, default=224, help="synthesis size (the run's default is the input size, 224)")
    ap.add_argument("--images", type=int, default=10_000, help="corpus size to project mining for")
    ap.add_argument("--parity", type=Path, default=Path("/tmp/unitlens-bench-parity/steps.json"),
                    help="steps per unit from scripts/bench_parity.py --save")
    ap.add_argument("--settings", default="today's defaults;stop +10%, lr 0.1",
                    help="setting names of the --parity file to project, separated by ;")
    ap.add_argument("--mean-steps", default=None,
                    help="instead of --parity: NAME=STEPS pairs separated by ; (mean steps per unit, e.g. from a printed table)")
    ap.add_argument("--quick", action="store_true")
    a = ap.parse_args()
    t0 = time.perf_counter()
    print(f"unitlens overnight projection: torchvision {a.arch} (random weights), {', '.join(STAGES)}, synthesis at "
          f"{a.size} px, corpus of {a.images:,} images; torch {torch.__version__}, {torch.get_num_threads()} threads, "
          f"load average {os.getloadavg()[0]:.1f} at start\n")
    model = load(a.arch, a.size)
    batch, reps = (4, 2) if a.quick else (32, 3)
    print(f"1. Per image-step, batch {batch}, fastest of {reps} alternating single steps")
    print(f"   {'stage':<7} {'units':>5} {'synth s':>8} {'bare s':>8} {'ratio':>6} {'forward s':>9} {'unit s':>7} "
          f"{'load':>5}")
    costs = {}
    for layer in STAGES:
        with heap_reuse():  # as synthesize() runs
            c = step_costs(model, layer, batch, reps)
            c["unit"] = unit_cost(model, layer, reps)
        c["units"] = model.layer(layer).channels
        costs[layer] = c
        print(f"   {layer:<7} {c['units']:>5} {c['synth']:>8.3f} {c['bare']:>8.3f} {c['ratio']:>6.2f} "
              f"{c['forward']:>9.3f} {c['unit']:>7.3f} {os.getloadavg()[0]:>5.1f}", flush=True)
    print("   (synth, bare, forward: seconds per image; unit: seconds per unit beside the loop)")
    units = sum(c["units"] for c in costs.values())

    n_mine = 16 if a.quick else 64
    rate = mining_rate(a.arch, 224, n_mine)
    mining = a.images / rate
    print(f"\n2. Mining at 224 px (start-up included, so low for few images): {rate:.2f} images/s over {n_mine} "
          f"generated images -> {a.images:,} images in "
          f"{hours(mining)} (load {os.getloadavg()[0]:.1f})")

    print(f"\n3. Projection for {units:,} units (steps per unit {'as given' if a.mean_steps else 'from ' + str(a.parity)})")
    given = dict((k.strip(), float(v)) for k, v in (p.rsplit("=", 1) for p in a.mean_steps.split(";"))) \
        if a.mean_steps else None
    for name in (list(given) if given else [s.strip() for s in a.settings.split(";") if s.strip()]):
        if given:
            mean = given[name]
            print(f"   setting '{name}': {mean:.1f} steps per unit on average (given)")
        elif not a.parity.is_file():
            print(f"   no {a.parity}: run scripts/bench_parity.py --save {a.parity} first")
            break
        else:
            mean, median, n = steps_per_unit(a.parity, name)
            print(f"   setting '{name}': {mean:.1f} steps per unit on average (median {median}; {n} swatch units)")
        total = mining
        print(f"     {'mining':<22} {hours(mining)}")
        for layer, c in costs.items():
            syn = c["units"] * mean * c["synth"]
            chk = c["units"] * c["unit"]
            total += syn + chk
            print(f"     {layer + ' synthesis':<22} {hours(syn)}   ({c['units']} x {mean:.1f} x {c['synth']:.3f} s)"
                  f"   per unit {hours(chk)}   ({c['units']} x {c['unit']:.3f} s)")
        print(f"     {'total':<22} {hours(total)}   (goal <= 10 h: {'met' if total <= 36000 else 'NOT met'})")
        per_stage = ", ".join(f"{layer} {3600 / (mean * c['synth'] + c['unit']):.0f}"
                              for layer, c in costs.items())
        print(f"     units/hour per stage: {per_stage}")
    print(f"\nTotal {time.perf_counter() - t0:.0f} s; load average {os.getloadavg()[0]:.1f} at the end.")


if __name__ == "__main__":
    main()
