"""A corpus of coloured shapes with label maps, and a network with units planted on them
(loadable as tests/shapes.py:shape_net)."""
from pathlib import Path

import numpy as np
import torch
from PIL import Image
from torch import nn

LEGEND = "value,name\n1,red square\n2,green disc\n"


class ShapeNet(nn.Module):
    """On inputs in [0, 1] (mean 0, std 1): unit 0 of 'act' is relu(R - G - B - 0.5), positive only on
    pure red; unit 1 the same for green; unit 2 a seeded random filter. 'pool' halves the map."""

    def __init__(self):
        super().__init__()
        self.conv = nn.Conv2d(3, 3, 3, padding=1)
        with torch.no_grad():
            g = torch.Generator().manual_seed(3)
            self.conv.weight.copy_(torch.randn(self.conv.weight.shape, generator=g) * 0.2)
            self.conv.bias.fill_(0.0)
            for u, colour in enumerate(([1.0, -1.0, -1.0], [-1.0, 1.0, -1.0])):
                self.conv.weight[u] = 0
                self.conv.weight[u, :, 1, 1] = torch.tensor(colour)
                self.conv.bias[u] = -0.5
        self.act = nn.ReLU()
        self.pool = nn.AvgPool2d(2)

    def forward(self, x):
        return self.pool(self.act(self.conv(x)))


def shape_net() -> nn.Module:
    return ShapeNet()


def write_corpus(root: Path, n: int = 24, seed: int = 0) -> tuple[Path, Path, Path]:
    """n images of assorted sizes on grey noise; every fourth holds a red square, every fourth
    (offset by two) a green disc. Returns (image folder, label-map folder, legend CSV)."""
    rng = np.random.default_rng(seed)
    images, masks = root / "images", root / "masks"
    for d in (images / "a", masks / "a"):
        d.mkdir(parents=True, exist_ok=True)
    for i in range(n):
        h, w = int(rng.integers(64, 100)), int(rng.integers(64, 100))
        img = rng.integers(80, 170, (h, w, 3)).astype(np.uint8)
        label = np.zeros((h, w), np.uint8)
        yy, xx = np.mgrid[:h, :w]
        if i % 4 == 0:
            s = int(rng.integers(8, 12))
            y, x = int(rng.integers(h // 4, h - h // 4 - s)), int(rng.integers(w // 4, w - w // 4 - s))
            inside = (yy >= y) & (yy < y + s) & (xx >= x) & (xx < x + s)
            img[inside], label[inside] = (255, 0, 0), 1
        if i % 4 == 2:
            r = float(rng.uniform(4, 6))
            cy, cx = rng.uniform(h / 3, 2 * h / 3), rng.uniform(w / 3, 2 * w / 3)
            inside = (yy + 0.5 - cy) ** 2 + (xx + 0.5 - cx) ** 2 <= r * r
            img[inside], label[inside] = (0, 255, 0), 2
        sub = "a/" if i % 3 == 0 else ""
        Image.fromarray(img).save(images / f"{sub}img{i:02d}.png")
        Image.fromarray(label).save(masks / f"{sub}img{i:02d}.png")
    (root / "legend.csv").write_text(LEGEND)
    return images, masks, root / "legend.csv"
