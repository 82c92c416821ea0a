"""`unitlens run --budget`: the planner's estimate beside the real time, stage by stage; prints a
table, tests nothing.

    python scripts/bench_budget.py                      # demo network, 240 swatches, block3+block4, 2m
    python scripts/bench_budget.py --budget 4m --images 240 --layers block3,block4
    python scripts/bench_budget.py --direct --steps 32   # in one process: calibrate, synthesise, calibrate
    python scripts/bench_budget.py --arch resnet18 --layers layer2,layer3 --images 500 --budget 15m
                                                         # torchvision ResNet-18, random weights, 224 px

One fresh `unitlens run` process on the shipped demo network (weights in the package) over a
generated swatch corpus. Its stderr lines are timestamped as they arrive, so each stage's real
time is the gap between the lines that open and close it; the estimates are the plan's own
(`estimate_parts` in the manifest). The plan is made after mining and a sample of units per layer
(see workflow.py), so the whole command is compared with the time spent before the plan plus its
estimate. Target: within 25% of the estimate, and within the budget (calibration and model
loading included: they come out of the budget first).

On a shared machine the load drifts during a long run, and the calibration only sees the load of
its moment. `--direct` checks the cost model itself: in one process it calibrates, synthesises
each layer with the steps given, and calibrates again, so the estimate before and after bracket
the real time at nearly the same load.
"""
from __future__ import annotations

import argparse
import json
import os
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--budget", default="2m", help="the --budget given to unitlens run (default 2m)")
    ap.add_argument("--images", type=int, default=240, help="generated swatches in the corpus (default 240)")
    ap.add_argument("--layers", default="block3,block4", help="layers (default the demo's block3,block4: 160 units)")
    ap.add_argument("--arch", default=None, help="a torchvision architecture with random weights instead of the "
                                                 "demo network (the corpus is generated at 224 px)")
    ap.add_argument("--threads", type=int, default=None, help="torch threads of the run (default: torch's)")
    ap.add_argument("--keep", action="store_true", help="keep the temporary folder (printed)")
    ap.add_argument("--direct", action="store_true", help="check the cost model in one process (see above)")
    ap.add_argument("--steps", type=int, default=32, help="synthesis steps of --direct (default 32)")
    a = ap.parse_args()
    if a.direct:
        return direct(a)

    from unitlens.demo import net, swatches

    d = Path(tempfile.mkdtemp(prefix="bench-budget-"))
    swatches.write_corpus(d / "corpus", count=a.images, size=224 if a.arch else net.INPUT_SIZE, seed=0)
    model = [f"torchvision:{a.arch}"] if a.arch else [net.spec(), "--weights", str(net.WEIGHTS)]
    cmd = [sys.executable, "-m", "unitlens", "run", *model, "--corpus",
           str(d / "corpus"), "--layers", a.layers, "--budget", a.budget, "--out", str(d / "run"), "--workers", "0"]
    if a.threads:
        cmd += ["--threads", str(a.threads)]
    t0 = time.monotonic()
    p = subprocess.Popen(cmd, stderr=subprocess.PIPE, stdout=subprocess.PIPE, text=True)
    lines = []  # (seconds since start, line)
    for line in p.stderr:
        lines.append((time.monotonic() - t0, line.rstrip()))
        print(f"{lines[-1][0]:7.1f}s  {lines[-1][1]}")
    p.wait()
    total = time.monotonic() - t0
    if p.returncode != 0:
        raise SystemExit(f"unitlens run failed ({p.returncode})")

    plan = json.loads((d / "run" / "manifest.json").read_text())["budget"]["plan"]
    est = plan["estimate_parts"]

    def at(prefix: str) -> float:
        return next(t for t, line in lines if line.startswith(prefix))

    mining_start, planned = at("[1/3]"), at(f"budget {a.budget}: synthesis")
    sampled = next((t for t, line in lines if line.startswith("[2/3] synthesis of")), None)
    rows = [("before mining (load, mining calibration)", None, mining_start)]
    rows.append(("mining, atlas, step calibration", None, (sampled or planned) - mining_start))
    if sampled is not None:
        rows.append(("sample (kept), plan", None, planned - sampled))
    layers = list(plan["units"])
    for k, layer in enumerate(layers):
        start = at(f"[2/3] synthesis, layer {k + 1}/")
        if not any(line.startswith(f"[3/3] atlas redrawn after {layer}") for _, line in lines):
            rows.append((f"synthesis {layer}: done by the sample", est[layer] or None, 0.0))
            continue
        end = at(f"[3/3] atlas redrawn after {layer}")
        after = next((t for t, line in lines if t > end and not line.startswith("[3/3]")), total)
        rows.append((f"synthesis {layer} ({plan['units'][layer]} units, "
                     f"{plan.get('image_steps', {}).get(layer, plan['steps']):.0f} steps/image)", est[layer], end - start))
        rows.append((f"atlas after {layer}", None, after - end))
    budget_s = plan.get("budget_s") or _seconds(a.budget)
    spent = plan.get("spent_s", 0.0)
    print(f"\nbudget {a.budget} ({budget_s:.0f} s); plan: cap {plan['steps']} steps, {plan['size']} px; "
          f"load average {os.getloadavg()}")
    for r in plan["reasons"]:
        print(f"  why: {r}")
    print(f"{'stage':<52} {'estimate s':>10} {'real s':>8} {'real/est':>8}")
    for name, e, r in rows:
        ratio = f"{r / e:.2f}" if e else "-"
        print(f"{name:<52} {'-' if e is None else f'{e:.1f}':>10} {r:>8.1f} {ratio:>8}")
    print(f"{'from the plan to the end':<52} {plan['estimate_s']:>10.1f} {total - planned:>8.1f} "
          f"{(total - planned) / max(plan['estimate_s'], 1e-9):>8.2f}")
    whole = spent + plan["estimate_s"]
    print(f"{'whole command (spent before the plan + estimate)':<52} {whole:>10.1f} {total:>8.1f} {total / whole:>8.2f}"
          f"   (budget used: {total / budget_s:.2f})")
    if a.keep:
        print(d)
    else:
        shutil.rmtree(d)


def direct(a) -> None:
    import torch

    from unitlens import parse_layers
    from unitlens.demo.build import demo_model
    from unitlens.synth import Goal, SynthConfig, synthesize
    from unitlens.workflow import calibrate, plan

    if a.threads:
        torch.set_num_threads(a.threads)
    model = demo_model()
    layers = parse_layers(model, [a.layers])
    config = SynthConfig(steps=a.steps, stop_gain=None)  # every image runs all steps, as the plan assumes
    size = model.preprocess.side
    d = Path(tempfile.mkdtemp(prefix="bench-budget-"))
    print(f"{'layer':<10} {'units':>5} {'estimate before':>15} {'real s':>7} {'estimate after':>14} {'real/mean est':>13}")
    for lu in layers:
        before = plan(1e9, 0, (lu,), a.steps, size, calibrate(model, (lu,), config, size)).parts[lu.layer]
        t = time.monotonic()
        synthesize(model, Goal(lu), d / "run", config)
        real = time.monotonic() - t
        after = plan(1e9, 0, (lu,), a.steps, size, calibrate(model, (lu,), config, size)).parts[lu.layer]
        print(f"{lu.layer:<10} {len(lu.units):>5} {before:>15.1f} {real:>7.1f} {after:>14.1f} "
              f"{real / ((before + after) / 2):>13.2f}")
    print(f"load average {os.getloadavg()[0]:.2f}")
    shutil.rmtree(d)


def _seconds(text: str) -> float:
    from unitlens.workflow import parse_budget

    return parse_budget(text)


if __name__ == "__main__":
    main()
