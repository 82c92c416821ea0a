"""Networks for the links tests (loadable as tests/linked.py:function)."""
import torch
from torch import nn

# unit 3 of layer '3' = ReLU(A * unit 1 - B * unit 5 of layer '1' + C), everything else of it near zero
A, B, C = 2.0, 0.5, 0.25
SMALL = 0.01  # the weight of every other channel of layer '1' on unit 3


def planted_links() -> nn.Module:
    """conv 3x3 (seeded; units 1 and 5 share one filter, so they are equal everywhere) -> ReLU (layer '1')
    -> conv 1x1 with unit 3 set by hand -> ReLU (layer '3')."""
    g = torch.Generator().manual_seed(3)
    net = nn.Sequential(nn.Conv2d(3, 6, 3, padding=1), nn.ReLU(), nn.Conv2d(6, 4, 1), nn.ReLU())
    with torch.no_grad():
        net[0].weight.copy_(torch.randn(net[0].weight.shape, generator=g) * 0.5)
        net[0].bias.copy_(torch.randn(6, generator=g) * 0.1)
        net[0].weight[5] = net[0].weight[1]
        net[0].bias[5] = net[0].bias[1]
        net[2].weight.copy_(torch.randn(net[2].weight.shape, generator=g) * 0.5)
        net[2].bias.zero_()
        net[2].weight[3] = SMALL
        net[2].weight[3, 1] = A
        net[2].weight[3, 5] = -B
        net[2].bias[3] = C
    return net


def small_random() -> nn.Module:
    """Seeded random layers: '1' (ReLU) -> conv 3x3 -> '3' (ReLU) -> conv 3x3 -> '5' (ReLU)."""
    torch.manual_seed(11)
    return nn.Sequential(nn.Conv2d(3, 8, 3, padding=1), nn.ReLU(), nn.Conv2d(8, 8, 3, padding=1), nn.ReLU(),
                         nn.Conv2d(8, 6, 3, padding=1), nn.ReLU())
