"""What `unitlens link` costs: seconds per unit (its exemplars x path points, forward and backward from the
earlier layer's activations), measured on a few units and projected to the whole layer. Random weights
(seeded, saved as a file so the run and the links see the same ones); tests nothing.

    python scripts/bench_links.py                       # ResNet-18 layer3 <- layer2, ResNet-50 layer4 <- layer3
    python scripts/bench_links.py --units 2 --exemplars 4 --threads 2

The cost per unit is exemplars x (steps + 1) rows for integrated gradients, exemplars rows for gradient x
activation; the part of the network before the earlier layer is not run again.
"""
from __future__ import annotations

import argparse
import os
import tempfile
import time
import warnings
from pathlib import Path

import numpy as np

PAIRS = (("resnet18", "layer3", "layer2", 256), ("resnet50", "layer4", "layer3", 2048))


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--units", type=int, default=2, help="units measured per layer pair")
    ap.add_argument("--exemplars", type=int, default=4, help="exemplars per unit measured (a run keeps 16 by default)")
    ap.add_argument("--steps", type=int, default=16, help="integrated-gradients steps")
    ap.add_argument("--images", type=int, default=8, help="images mined (only the exemplars matter)")
    ap.add_argument("--threads", type=int, default=None)
    a = ap.parse_args()
    import torch
    import torchvision
    from PIL import Image

    from unitlens import MineConfig, load_model, mine, open_corpus, parse_layers
    from unitlens.links import LinkConfig, link

    if a.threads:
        torch.set_num_threads(a.threads)
    warnings.simplefilter("ignore")
    tmp = Path(tempfile.mkdtemp(prefix="bench-links-"))
    rng = np.random.default_rng(0)
    (tmp / "images").mkdir()
    for i in range(a.images):
        Image.fromarray((rng.random((8, 8, 3)) * 255).astype(np.uint8)).resize((256, 256), Image.BICUBIC).save(
            tmp / "images" / f"{i:03d}.png")
    print(f"torch threads {torch.get_num_threads()}, load average {os.getloadavg()[0]:.1f} "
          f"{os.getloadavg()[1]:.1f} {os.getloadavg()[2]:.1f}, {a.exemplars} exemplars per unit measured")
    print(f"{'pair':<28} {'method':<6} {'rows/unit':>9} {'s/unit':>8} {'s/row':>7}  whole layer, 16 exemplars")
    for arch, target, source, channels in PAIRS:
        torch.manual_seed(0)
        w = tmp / f"{arch}.pth"
        torch.save(getattr(torchvision.models, arch)().state_dict(), w)
        model = load_model(f"torchvision:{arch}", str(w))
        run = tmp / arch
        mine(model, open_corpus(tmp / "images"), parse_layers(model, [f"{source}:0", f"{target}:0-{a.units - 1}"]), run,
             MineConfig(top_k=a.exemplars, workers=0))
        for method in ("ig", "gxa"):
            config = LinkConfig(method=method, steps=a.steps, exemplars=a.exemplars)
            t = time.perf_counter()
            link(run, target, source, config=config, model=model, force=True)
            s = (time.perf_counter() - t) / a.units
            rows = a.exemplars * (a.steps + 1 if method == "ig" else 1)
            per_row = s / rows
            whole = per_row * 16 * (a.steps + 1 if method == "ig" else 1) * channels
            print(f"{arch + ' ' + target + ' <- ' + source:<28} {method:<6} {rows:>9} {s:>8.2f} {per_row:>7.3f}  "
                  f"{whole / 3600:.1f} h ({channels} units)")
    print(f"load average after: {' '.join(f'{v:.1f}' for v in os.getloadavg())}")


if __name__ == "__main__":
    main()
