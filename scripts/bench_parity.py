"""Steps to parity and parity rate of synthesis settings on a trained network; prints tables, tests nothing.

    python scripts/bench_parity.py                 # the swatch network's block3 and block4, every 2nd unit
    python scripts/bench_parity.py --every 1       # all 160 units of block3 and block4
    python scripts/bench_parity.py --quick         # a smoke run: 8 units, two settings

Parity: a unit's objective (channel mean) on the finished 8-bit image, as the mean over 32 fresh
random warps, is at least the same quantity on its best natural exemplar (evidence.py). The
exemplars come from mining the demo corpus (2,000 generated swatches, as `unitlens demo` does)
into a folder kept between runs (--cache). Every setting runs on the same units in one process,
one after another, so the ratios are measured side by side; the load average is printed with them.

Per setting: parity rate (final check), median first step at parity seen by the loop (units that
reached it), median and total image-steps spent (what the time is), and wall seconds.
"""
from __future__ import annotations

import argparse
import json
import os
import statistics
import time
from dataclasses import replace
from pathlib import Path

import numpy as np
import torch

from unitlens.corpus import open_corpus
from unitlens.demo.build import demo_corpus, demo_model
from unitlens.mining import MineConfig, mine
from unitlens.synth import Goal, SynthConfig
from unitlens.synth.bases import ColourBasis
from unitlens.synth.evidence import exemplar_references, warped_values
from unitlens.synth.loop import iter_layer
from unitlens.synth.pipeline import exemplar_images
from unitlens.units import parse_layers

LAYERS = ("block3", "block4")
TODAY = SynthConfig()  # the library's defaults: 256 steps, early stop on a 1% gain over 32-step windows


def settings(quick: bool) -> list[tuple[str, SynthConfig]]:
    stop = replace(TODAY, stop_at_parity=0.1)
    rows = [("today's defaults", TODAY), ("stop at parity +10%", stop)]
    if quick:
        return rows
    return rows + [
        ("stop +10%, lr 0.1", replace(stop, lr=0.1)),
        ("stop +10%, lr 0.2", replace(stop, lr=0.2)),
        ("stop +10%, lr 0.1, falloff 1.5", replace(stop, lr=0.1, falloff=1.5)),
        ("stop +10%, lr 0.1, falloff 0.75", replace(stop, lr=0.1, falloff=0.75)),
        ("stop +10%, lr 0.1, cap 512 no gain stop", replace(stop, lr=0.1, steps=512, stop_gain=None)),
    ]


def mined_run(cache: Path, model):
    corpus = open_corpus(demo_corpus(cache / "corpus"), labels="folders")
    return mine(model, corpus, parse_layers(model, list(LAYERS)), cache / "run", MineConfig(top_k=4, thumb=32))


def measure(model, run, layer, units, cfg, colour) -> dict:
    goal = Goal(layer)
    scorer = goal.scorer(layer)
    size = model.preprocess.side
    spec = cfg.warps.at(size)
    extract = model.extractor([layer])
    images, have = exemplar_images(run, model, layer, units, size)
    refs = exemplar_references(model, layer, images, have, scorer, spec, colour.mean, cfg.seed, 32, extract)
    t = time.perf_counter()
    batches = iter_layer(model, layer, have, replace(cfg, checks=0), goal, colour, references=refs)
    results = [r for b in batches for r in b]
    wall = time.perf_counter() - t
    u8 = torch.from_numpy(np.stack([np.clip(np.round(r.images[0] * 255), 0, 255).astype(np.uint8)
                                    for r in results])).permute(0, 3, 1, 2)
    fin = warped_values(model, layer, u8.float() / 255, [r.target for r in results], scorer, spec, colour.mean,
                        cfg.seed, [0] * len(results), 32, extract).mean(1)
    reached = [float(v) >= refs[r.target] for v, r in zip(fin, results)]
    return {"n": len(results), "reached": sum(reached), "first": [r.parity_steps[0] for r in results],
            "steps": [r.steps[0] for r in results], "wall": wall}


def main():
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--every", type=int, default=2, help="take every n-th unit of each layer (1: all)")
    ap.add_argument("--quick", action="store_true", help="8 units, two settings")
    ap.add_argument("--cache", type=Path, default=Path("/tmp/unitlens-bench-parity"), help="corpus and mined run")
    ap.add_argument("--save", type=Path, default=None,
                    help="write each setting's per-unit steps here (JSON; default CACHE/steps.json), for bench_overnight.py")
    ap.add_argument("--only", default=None, help="setting names to run, separated by ; (default: all)")
    a = ap.parse_args()
    save = a.save or a.cache / "steps.json"
    saved = {}
    model = demo_model()
    torch.manual_seed(0)
    print(f"unitlens parity benchmark: swatch network, {', '.join(LAYERS)}; torch {torch.__version__}, "
          f"{torch.get_num_threads()} threads, load average {os.getloadavg()[0]:.1f} at start")
    t0 = time.perf_counter()
    run = mined_run(a.cache, model)
    print(f"mined the demo corpus in {time.perf_counter() - t0:.0f} s (or read it from {a.cache})")
    colour = ColourBasis.from_run(run.manifest())
    units = {lu.layer: lu.units[::a.every][:4 if a.quick else None] for lu in parse_layers(model, list(LAYERS))}
    print(f"units: {', '.join(f'{k} {len(v)}' for k, v in units.items())} "
          f"({'every unit' if a.every == 1 else f'every {a.every}th unit'}{', quick' if a.quick else ''})\n")
    head = (f"{'setting':<40} {'units':>5} {'parity':>7} {'first@parity':>12} {'steps/unit':>10} "
            f"{'image-steps':>11} {'vs today':>8} {'wall s':>7} {'ms/img-step':>11} {'load':>5}")
    print(head)
    base = None
    only = None if a.only is None else {s.strip() for s in a.only.split(";")}
    for name, cfg in settings(a.quick):
        if only is not None and name not in only:
            continue
        got = [measure(model, run, layer, us, cfg, colour) for layer, us in units.items()]
        n = sum(g["n"] for g in got)
        reached = sum(g["reached"] for g in got)
        first = [s for g in got for s in g["first"] if s is not None]
        steps = [s for g in got for s in g["steps"]]
        total = sum(steps)
        base = base or total
        saved[name] = {"steps": steps, "first": [s for g in got for s in g["first"]], "parity_rate": reached / n}
        save.write_text(json.dumps(saved))
        print(f"{name:<40} {n:>5} {reached / n:>7.2f} {statistics.median(first) if first else '-':>12} "
              f"{statistics.median(steps):>10} {total:>11} {base / total:>7.2f}x {sum(g['wall'] for g in got):>7.0f} "
              f"{1000 * sum(g['wall'] for g in got) / total:>11.1f} {os.getloadavg()[0]:>5.1f}", flush=True)
    print("\nparity: share of units whose finished image reaches its best exemplar's objective (32 warps each);")
    print("first@parity: median first step the loop saw parity (running mean of 8 steps); steps/unit: median")
    print("steps run; vs today: today's total image-steps / this setting's (the time ratio at a fixed cost per step).")
    print(f"Per-unit steps written to {save}.")
    print(f"Total {time.perf_counter() - t0:.0f} s; load average {os.getloadavg()[0]:.1f} at the end.")


if __name__ == "__main__":
    main()
