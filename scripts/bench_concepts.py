"""Wall time of `unitlens label` (both passes) for ResNet-18 layer3 (256 units, seeded random weights)
on a generated corpus with label maps; prints a table and the load average, tests nothing.

    python scripts/bench_concepts.py                  # 2,000 images of 256x192 at 224 px
    python scripts/bench_concepts.py --images 400     # fewer; the per-image time gives the projection

Mining (not timed) comes first. The threshold pass forwards every image once more; the overlap pass
forwards the annotated ones and brings 256 maps to each original's pixels.
"""
from __future__ import annotations

import argparse
import os
import tempfile
import time
from pathlib import Path

import numpy as np
from PIL import Image


def corpus(root: Path, n: int, seed: int = 0) -> tuple[Path, Path]:
    """n noise images 256x192, each with a few coloured rectangles, and label maps of them."""
    rng = np.random.default_rng(seed)
    images, masks = root / "images", root / "masks"
    images.mkdir(parents=True, exist_ok=True)
    masks.mkdir(exist_ok=True)
    for i in range(n):
        img = rng.integers(60, 190, (192, 256, 3)).astype(np.uint8)
        lab = np.zeros((192, 256), np.uint8)
        for v, colour in ((1, (230, 30, 30)), (2, (30, 200, 40)), (3, (40, 40, 220))):
            if rng.random() < 0.5:
                h, w = rng.integers(16, 80, 2)
                y, x = rng.integers(0, 192 - h), rng.integers(0, 256 - w)
                img[y:y + h, x:x + w], lab[y:y + h, x:x + w] = colour, v
        Image.fromarray(img).save(images / f"{i:05d}.jpg", quality=90)
        Image.fromarray(lab).save(masks / f"{i:05d}.png")
    (root / "legend.csv").write_text("value,name\n1,red box\n2,green box\n3,blue box\n")
    return images, masks


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--images", type=int, default=2000)
    ap.add_argument("--size", type=int, default=224)
    ap.add_argument("--threads", type=int, default=None)
    a = ap.parse_args()
    import torch
    import torchvision

    from unitlens import MineConfig, load_model, mine, open_corpus, parse_layers
    from unitlens.concepts import label, labels_text, read_annotations

    if a.threads:
        torch.set_num_threads(a.threads)
    root = Path(tempfile.mkdtemp(prefix="bench-concepts-"))
    images, masks = corpus(root, a.images)
    torch.manual_seed(0)
    torch.save(torchvision.models.resnet18().state_dict(), root / "r18.pth")
    model = load_model("torchvision:resnet18", str(root / "r18.pth"), size=a.size)
    c = open_corpus(images)
    t = time.perf_counter()
    run = mine(model, c, parse_layers(model, ["layer3"]), root / "run", MineConfig(top_k=8))
    t_mine = time.perf_counter() - t
    ann = read_annotations(c, masks=[masks], legends=[root / "legend.csv"])
    t = time.perf_counter()
    label(run, ann, model=model)
    t_label = time.perf_counter() - t
    load = os.getloadavg()
    print(f"images {a.images}, input {a.size} px, originals 256x192, ResNet-18 layer3 (256 units), "
          f"torch threads {torch.get_num_threads()}")
    print(f"{'stage':<28}{'seconds':>10}{'ms/image':>10}")
    for name, s in (("mine (for reference)", t_mine), ("label: both passes", t_label)):
        print(f"{name:<28}{s:>10.1f}{1000 * s / a.images:>10.1f}")
    print(f"projected for 2,000 images: label {t_label / a.images * 2000 / 60:.1f} min")
    print(f"load average (1, 5, 15 min): {load[0]:.2f} {load[1]:.2f} {load[2]:.2f}")
    print(labels_text(run))


if __name__ == "__main__":
    main()
