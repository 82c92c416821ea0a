"""Train the demo network (unitlens/demo/net.py) on generated swatches and write its weights.

    python scripts/train_demo_model.py                 # a few minutes on 2 CPU cores
    python scripts/train_demo_model.py --out /tmp/w.pt # somewhere else than the package

Training images come from swatch seed 1 and the held-out check from seed 2, so neither overlaps
the corpus `unitlens demo` mines (seed 0). Everything is seeded; the same torch build and thread
count give the same weights (other thread counts differ in the last bits of float sums). Prints
the corpus' RGB statistics (the MEAN / STD constants in net.py come from here), the loss per
epoch and the held-out accuracy per class.
"""
from __future__ import annotations

import argparse
import time

import numpy as np
import torch
from torch import nn

from unitlens.demo.net import INPUT_SIZE, MEAN, STD, WEIGHTS, swatch_net
from unitlens.demo.swatches import CLASSES, render, sample


def images(count: int, seed: int) -> tuple[torch.Tensor, torch.Tensor]:
    """(count, 3, S, S) uint8 images and their class indices."""
    xs = np.empty((count, INPUT_SIZE, INPUT_SIZE, 3), np.uint8)
    ys = np.empty(count, np.int64)
    for i in range(count):
        s = sample(i, seed)
        xs[i] = np.asarray(render(s, INPUT_SIZE))
        ys[i] = CLASSES.index(s.kind)
    return torch.from_numpy(xs).permute(0, 3, 1, 2).contiguous(), torch.from_numpy(ys)


def normalise(x: torch.Tensor) -> torch.Tensor:
    mean = torch.tensor(MEAN).view(1, 3, 1, 1)
    std = torch.tensor(STD).view(1, 3, 1, 1)
    return (x.float() / 255 - mean) / std


def accuracy(net: nn.Module, x: torch.Tensor, y: torch.Tensor) -> tuple[float, list[float]]:
    net.eval()
    with torch.no_grad():
        pred = torch.cat([net(normalise(x[i:i + 256])).argmax(1) for i in range(0, len(x), 256)])
    per_class = [float((pred[y == c] == c).float().mean()) for c in range(len(CLASSES))]
    return float((pred == y).float().mean()), per_class


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--train", type=int, default=6000, help="training images (default 6000)")
    ap.add_argument("--test", type=int, default=1200, help="held-out images (default 1200)")
    ap.add_argument("--epochs", type=int, default=8)
    ap.add_argument("--threads", type=int, default=2)
    ap.add_argument("--out", default=str(WEIGHTS), help=f"weights file (default {WEIGHTS})")
    args = ap.parse_args()
    torch.set_num_threads(args.threads)
    torch.manual_seed(0)

    t0 = time.time()
    x, y = images(args.train, seed=1)
    xt, yt = images(args.test, seed=2)
    f = x.float() / 255
    print(f"{args.train} + {args.test} images in {time.time() - t0:.0f} s; RGB mean "
          f"{[round(v, 3) for v in f.mean((0, 2, 3)).tolist()]}, std {[round(v, 3) for v in f.std((0, 2, 3)).tolist()]}")
    del f

    net = swatch_net()
    opt = torch.optim.Adam(net.parameters(), lr=3e-3, weight_decay=1e-4)
    steps_per_epoch = (args.train + 63) // 64
    sched = torch.optim.lr_scheduler.OneCycleLR(opt, max_lr=3e-3, total_steps=args.epochs * steps_per_epoch)
    gen = torch.Generator().manual_seed(0)
    for epoch in range(args.epochs):
        net.train()
        order = torch.randperm(args.train, generator=gen)
        total = 0.0
        for i in range(0, args.train, 64):
            idx = order[i:i + 64]
            xb = x[idx]
            if torch.rand((), generator=gen) < 0.5:  # mirror: the kinds do not depend on handedness
                xb = xb.flip(3)
            loss = nn.functional.cross_entropy(net(normalise(xb)), y[idx])
            opt.zero_grad()
            loss.backward()
            opt.step()
            sched.step()
            total += float(loss.detach()) * len(idx)
        acc, _ = accuracy(net, xt, yt)
        print(f"epoch {epoch + 1}/{args.epochs}: loss {total / args.train:.4f}, held-out accuracy {acc:.3f} "
              f"({time.time() - t0:.0f} s)")
    acc, per_class = accuracy(net, xt, yt)
    print("held-out accuracy per class: " + ", ".join(f"{c} {a:.3f}" for c, a in zip(CLASSES, per_class)))
    state = {k: v.detach().clone() for k, v in net.state_dict().items()}
    torch.save(state, args.out)
    print(f"wrote {args.out} (accuracy {acc:.3f}, chance {1 / len(CLASSES):.3f})")


if __name__ == "__main__":
    main()
