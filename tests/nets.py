"""Small networks for the tests, loadable as user code (tests/nets.py:function)."""
import torch
from torch import nn


def digits_net() -> nn.Module:
    """A fully convolutional digit classifier: 'logits' is a (B, 10, 1, 1) feature map."""
    return nn.Sequential(
        nn.Conv2d(3, 16, 3, padding=1), nn.ReLU(),
        nn.Conv2d(16, 32, 3, padding=1, stride=2), nn.ReLU(),
        nn.Conv2d(32, 32, 3, padding=1, stride=2), nn.ReLU(),
        nn.Conv2d(32, 10, 1),
        nn.AdaptiveAvgPool2d(1),
        nn.Flatten(),
    )


class RedDetector(nn.Module):
    """Fires where the image is red: a hand-set 1x1 colour filter, ReLU, then 5x5 box filters
    that widen its receptive field. Weights are set here, so no training is needed."""

    def __init__(self):
        super().__init__()
        self.colour = nn.Conv2d(3, 1, 1)
        self.spread = nn.Sequential(nn.AvgPool2d(5, stride=2, padding=2), nn.AvgPool2d(5, stride=2, padding=2))
        with torch.no_grad():
            # inputs are normalised with ImageNet statistics; undo the std so the filter sees R - (G+B)/2
            mean, std = torch.tensor([0.485, 0.456, 0.406]), torch.tensor([0.229, 0.224, 0.225])
            c = torch.tensor([1.0, -0.5, -0.5])
            self.colour.weight.copy_((c * std).view(1, 3, 1, 1))
            self.colour.bias.fill_(float((c * mean).sum()))
        self.relu = nn.ReLU()

    def forward(self, x):
        return self.spread(self.relu(self.colour(x)))


def red_detector() -> nn.Module:
    return RedDetector()


def extreme_net() -> nn.Module:
    """Layer '1' reaches about 1e6 (far above float16's largest value, 65504) and layer '2' about 1e-8
    (below float16's smallest subnormal, 6e-8). Positive weights after the ReLU: no cancellation."""
    torch.manual_seed(0)
    net = nn.Sequential(nn.Conv2d(3, 4, 3, padding=1), nn.ReLU(), nn.Conv2d(4, 3, 1, bias=False))
    with torch.no_grad():
        net[0].weight.mul_(1e6)
        net[0].bias.fill_(0.0)
        net[2].weight.uniform_(0.5, 1.0).mul_(1e-14)
    return net


def grey_net() -> nn.Module:
    """A seeded random network on one input channel, as for X-ray, microscopy or document images."""
    torch.manual_seed(0)
    return nn.Sequential(nn.Conv2d(1, 8, 3, padding=1), nn.ReLU(), nn.Conv2d(8, 6, 3, stride=2, padding=1), nn.ReLU())


class Carried(nn.Sequential):
    """A network that carries its own data configuration, as timm models do (`pretrained_cfg`)."""

    def __init__(self):
        super().__init__(nn.Conv2d(3, 4, 3), nn.ReLU())
        self.pretrained_cfg = {"input_size": (3, 40, 56), "mean": (0.5, 0.4, 0.3), "std": (0.2, 0.25, 0.3),
                               "interpolation": "bicubic", "crop_pct": 0.9}


def carried() -> nn.Module:
    return Carried()


def field5_net() -> nn.Module:
    """One 5x5 convolution, stride 1, padding 2: layer '0' has a 5-px receptive field."""
    return nn.Sequential(nn.Conv2d(3, 4, 5, padding=2), nn.ReLU())
