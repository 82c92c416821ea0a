"""A small BatchNorm digit network for the comparison tests: trained on scikit-learn's digits,
fine-tuned in its last layers on a changed task, and relabelled without changing its function.

Loadable as user code (nothing is imported at module level but torch):
    load_model(f"{TESTS / 'digits_finetune.py'}:digits_bn_net", str(path), size=SIZE, mean=MEAN, std=STD)
Blocks "0".."3" are conv-BN-ReLU feature maps ((16|32|32|48) x (16|8|8|4)^2 at SIZE 16); "4" is
the (B, 10, 4, 4) map of 1x1 class scores before pooling.
"""
from __future__ import annotations

import torch
import torch.nn.functional as F
from torch import nn

BLOCKS = ("0", "1", "2", "3")


def digits_bn_net() -> nn.Module:
    def block(cin, cout, stride):
        return nn.Sequential(nn.Conv2d(cin, cout, 3, stride, 1, bias=False), nn.BatchNorm2d(cout), nn.ReLU())

    return nn.Sequential(block(3, 16, 1), block(16, 32, 2), block(32, 32, 1), block(32, 48, 2),
                         nn.Conv2d(48, 10, 1), nn.AdaptiveAvgPool2d(1), nn.Flatten())


def seeded_net(seed: int) -> nn.Module:
    """digits_bn_net with its initial weights drawn from `seed` (not from whatever ran before)."""
    torch.manual_seed(seed)
    return digits_bn_net()


def train(net: nn.Module, images: torch.Tensor, labels: torch.Tensor, *, epochs: int, seed: int,
          tune: tuple[str, ...] | None = None, lr: float = 3e-3) -> nn.Module:
    """Adam on (images uint8 (N,3,S,S), labels (N,)). `tune` names the top-level children to train;
    the others are frozen AND kept in eval mode, so their BatchNorm statistics do not move either."""
    from digits import normalize

    torch.manual_seed(seed)
    children = dict(net.named_children())
    tuned = [children[n] for n in (tune or children)]
    params = [p for m in tuned for p in m.parameters()]
    for p in net.parameters():
        p.requires_grad_(False)
    for p in params:
        p.requires_grad_(True)
    opt = torch.optim.Adam(params, lr=lr)
    for _ in range(epochs):
        net.eval()
        for m in tuned:
            m.train()
        for b in torch.randperm(len(images)).split(64):
            loss = F.cross_entropy(net(normalize(images[b])), labels[b])
            opt.zero_grad()
            loss.backward()
            opt.step()
    net.eval()
    return net


def accuracy(net: nn.Module, images: torch.Tensor, labels: torch.Tensor) -> float:
    from digits import normalize

    with torch.no_grad():
        return (net(normalize(images)).argmax(1) == labels).float().mean().item()


def permute_block(net: nn.Module, block: str, perm: torch.Tensor) -> None:
    """Relabel the output channels of conv-BN-ReLU block `block`: new channel j is old channel
    perm[j]. The conv's output rows, all BatchNorm parameters and buffers, and the next conv's
    input columns move together, so the network computes the same function."""
    conv, bn, _ = net.get_submodule(block)
    following = net[int(block) + 1]
    nxt = following[0] if isinstance(following, nn.Sequential) else following
    with torch.no_grad():
        conv.weight.copy_(conv.weight[perm])
        for t in (bn.weight, bn.bias, bn.running_mean, bn.running_var):
            t.copy_(t[perm])
        nxt.weight.copy_(nxt.weight[:, perm])


def silence_unit(net: nn.Module, block: str, channel: int) -> None:
    """Zero the conv filter of one channel: its conv output is 0, so the block's output for that
    channel is a constant (BatchNorm of 0, then ReLU) on every image."""
    with torch.no_grad():
        net.get_submodule(block)[0].weight[channel] = 0


def write_corpus(folder, images: torch.Tensor) -> None:
    """Each (3,S,S) uint8 image as folder/NNNN.png, in order (the corpus sorts by name)."""
    from PIL import Image

    folder.mkdir(parents=True, exist_ok=True)
    for i, img in enumerate(images):
        Image.fromarray(img.permute(1, 2, 0).numpy()).save(folder / f"{i:04d}.png")
