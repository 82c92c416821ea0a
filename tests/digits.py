"""scikit-learn's bundled handwritten digits as small RGB images, and a digits_net trained on them.

A trained network whose units mean something known (the logit of each digit), in seconds on a CPU:
load the saved weights with
    load_model(f"{TESTS / 'nets.py'}:digits_net", str(path), size=SIZE, mean=MEAN, std=STD)
and layer "7" (the AdaptiveAvgPool2d) is the (B, 10, 1, 1) logits map.
"""
from __future__ import annotations

import numpy as np
import torch
import torch.nn.functional as F

SIZE = 16
MEAN = (0.25, 0.25, 0.25)
STD = (0.35, 0.35, 0.35)


def digit_images(size: int = SIZE) -> tuple[torch.Tensor, torch.Tensor]:
    """(N, 3, size, size) uint8 white-on-black digits, bilinearly upsampled from 8x8; (N,) labels."""
    from sklearn.datasets import load_digits

    d = load_digits()
    x = torch.from_numpy(d.images.astype(np.float32) / 16.0).unsqueeze(1)  # (N, 1, 8, 8) in [0, 1]
    x = F.interpolate(x, size=(size, size), mode="bilinear", align_corners=False)
    x = (x.clamp(0, 1) * 255).round().to(torch.uint8).expand(-1, 3, -1, -1).contiguous()
    return x, torch.from_numpy(d.target).long()


def normalize(images: torch.Tensor) -> torch.Tensor:
    x = images.float() / 255.0
    return (x - torch.tensor(MEAN).view(1, 3, 1, 1)) / torch.tensor(STD).view(1, 3, 1, 1)


def train_digits_net(path, size: int = SIZE, epochs: int = 6, seed: int = 0) -> float:
    """Train tests/nets.py:digits_net on 80% of the digits, save its state dict to `path`, return
    the accuracy on the held-out 20%."""
    from nets import digits_net

    torch.manual_seed(seed)
    images, labels = digit_images(size)
    order = torch.randperm(len(images), generator=torch.Generator().manual_seed(seed))
    cut = int(0.8 * len(order))
    train, test = order[:cut], order[cut:]
    net = digits_net()
    opt = torch.optim.Adam(net.parameters(), lr=1e-2)
    for _ in range(epochs):
        for b in torch.randperm(len(train)).split(64):
            i = train[b]
            x = normalize(images[i])
            x = x + 0.05 * torch.randn_like(x)  # a little noise keeps the logits from being brittle
            loss = F.cross_entropy(net(x), labels[i])
            opt.zero_grad()
            loss.backward()
            opt.step()
    net.eval()
    with torch.no_grad():
        acc = (net(normalize(images[test])).argmax(1) == labels[test]).float().mean().item()
    torch.save(net.state_dict(), path)
    return acc
