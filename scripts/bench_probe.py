"""Wall time of `unitlens probe`, process start to exit, on this CPU; prints a table, tests nothing.

    python scripts/bench_probe.py            # a few minutes on 2 cores
    python scripts/bench_probe.py --repeat 3

1. ResNet-50 layer3 unit from an existing run (built first, not timed): load the model from the
   run, read the index, crops, integrated gradients + gradient x input on 3 exemplars at 224 px,
   the page. Target: under 30 s.
2. ResNet-18 layer3 unit from cold start over a 40-image corpus: mine the unit, cut crops,
   synthesise a quick image, the heat maps, the page. Target: under 60 s.
3. The reverse question on one image (ResNet-50 layer3, all 1024 units), for reference.

Networks have seeded random weights saved as state-dict files (nothing can be downloaded here),
so every command sees the same network; timings do not depend on the weights. Each timed command
is a fresh `python -m unitlens` process, so imports and model construction count.
"""
from __future__ import annotations

import argparse
import json
import os
import resource
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path


CPU = []  # CPU seconds (user + system) of each command, beside its wall time


def unitlens(*args) -> tuple[float, str]:
    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    t = time.perf_counter()
    r = subprocess.run([sys.executable, "-m", "unitlens", *map(str, args)], capture_output=True, text=True)
    seconds = time.perf_counter() - t
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    CPU.append(after.ru_utime + after.ru_stime - before.ru_utime - before.ru_stime)
    if r.returncode != 0:
        raise SystemExit(f"unitlens {' '.join(map(str, args))} failed:\n{r.stderr}")
    return seconds, r.stdout


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeat", type=int, default=1, help="timed runs of each case (the table shows each)")
    ap.add_argument("--keep", action="store_true", help="keep the temporary folder (printed)")
    a = ap.parse_args()
    import torch
    import torchvision

    from unitlens.demo.swatches import write_corpus

    d = Path(tempfile.mkdtemp(prefix="bench-probe-"))
    corpus = d / "corpus"
    write_corpus(corpus, count=40, size=160)
    weights = {}
    for arch in ("resnet50", "resnet18"):
        torch.manual_seed(0)
        weights[arch] = d / f"{arch}.pth"
        torch.save(getattr(torchvision.models, arch)().state_dict(), weights[arch])
    print(f"cores: {os.cpu_count()}, torch threads: {torch.get_num_threads()}, load: {os.getloadavg()[0]:.1f}")

    built, _ = unitlens("mine", "torchvision:resnet50", "--weights", weights["resnet50"], "--corpus", corpus,
                        "--layers", "layer3:0-15", "--top", "9", "--out", d / "r50")
    print(f"built the ResNet-50 run (16 units of layer3, 40 images, 224 px) in {built:.1f} s (not counted)")
    rows = []
    for k in range(a.repeat):
        t, out = unitlens("probe", d / "r50", "layer3:5", "--json")
        s = json.loads(out)
        steps = [e["attribution"]["integrated-gradients"]["steps"] for e in s["exemplars"]
                 if "integrated-gradients" in (e.get("attribution") or {})]
        rows.append(("ResNet-50 layer3:5, existing run", t, 30, CPU[-1], f"IG steps per exemplar {steps}"))
        fresh = d / f"r18-{k}"
        t, out = unitlens("probe", "torchvision:resnet18", "layer3:7", "--weights", weights["resnet18"],
                          "--corpus", corpus, "--out", fresh, "--json")
        s = json.loads(out)
        rows.append(("ResNet-18 layer3:7, cold, 40 images", t, 60, CPU[-1],
                     f"{len(s['exemplars'])} exemplars, {len(s['synth'])} synthesised"))
        image = s["exemplars"][0]["image"]
        t, _ = unitlens("probe", "torchvision:resnet50", "--weights", weights["resnet50"], "--image", image,
                        "--layer", "layer3", "--top", "10")
        rows.append(("ResNet-50 --image, layer3", t, None, CPU[-1], "1024 units ranked"))
    print(f"load average after: {os.getloadavg()[0]:.1f} (other work on the machine slows every figure)")
    print(f"\n{'case':<40} {'wall s':>7} {'CPU s':>6} {'target':>7}  met  notes")
    for name, t, target, cpu, note in rows:
        met = "-" if target is None else ("yes" if t < target else "NO")
        print(f"{name:<40} {t:>7.1f} {cpu:>6.1f} {target or '-':>7}  {met:<4} {note}")
    if a.keep:
        print(f"\nfiles: {d}")
    else:
        shutil.rmtree(d, ignore_errors=True)


if __name__ == "__main__":
    main()
