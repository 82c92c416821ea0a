"""Tests for unitlens.geometry: published values, a gradient-support oracle, worked examples."""
import pytest
import torch
import torch.nn as nn
import torch.nn.functional as F
import torchvision

from unitlens.errors import UnitlensError
from unitlens.geometry import Field, receptive_fields


# --- published and analytic values for torchvision models --------------------------------

# (arch, constructor kwargs, input size, layer, r, S, P); P None where no source gives one.
PUBLISHED = [
    # Araujo, Norris & Sim (2019), "Computing Receptive Fields of Convolutional Neural
    # Networks", Distill, doi:10.23915/distill.00021, the table published with the article.
    ("alexnet", {}, 224, "features.10", 163, 16, None),   # conv5
    ("alexnet", {}, 224, "features.12", 195, 32, None),   # pool5
    ("vgg16", {}, 224, "features.21", 92, 8, None),       # conv4_3
    ("vgg16", {}, 224, "features.29", 196, 16, None),     # conv5_3
    ("vgg16", {}, 224, "features.30", 212, 32, 90),       # pool5
    ("inception_v3", dict(aux_logits=True, init_weights=False), 299, "Mixed_7c", 1311, 32, 618),
    # Analytic for torchvision's variants, no paper: AlexNet's first conv pads 2 (the table's
    # slim AlexNet gives P=64); VGG16 P from the same recurrence. ResNet-50 puts the stride in
    # the 3x3 conv (the table's slim resnet_v1_50 strides at the block end and gets 483 px);
    # these values agree with public notes on torchvision's model.
    ("alexnet", {}, 224, "features.10", 163, 16, 66),
    ("alexnet", {}, 224, "features.12", 195, 32, 66),
    ("vgg16", {}, 224, "features.21", 92, 8, 42),
    ("vgg16", {}, 224, "features.29", 196, 16, 90),
    ("resnet50", {}, 224, "layer3", 267, 16, 133),
    ("resnet50", {}, 224, "layer4", 427, 32, 213),
]


@pytest.fixture(scope="module")
def zoo_fields():
    cache = {}

    def get(arch, kwargs, size):
        if arch not in cache:
            with torch.device("meta"):  # weights are irrelevant to fields: skip allocating them
                model = getattr(torchvision.models, arch)(weights=None, **kwargs)
            cache[arch] = receptive_fields(model, size)
        return cache[arch]
    return get


def test_published_values(zoo_fields):
    for arch, kwargs, size, layer, r, S, P in PUBLISHED:
        f = zoo_fields(arch, kwargs, size)[layer]
        assert f.size == (r, r) and f.stride == (S, S), (arch, layer, f)
        assert P is None or f.padding == (P, P), (arch, layer, f)
        assert f.exact


def test_adaptive_pool_to_same_size_is_identity(zoo_fields):
    # AlexNet's pool5 is already 6x6 and VGG16's 7x7 at 224 px: AdaptiveAvgPool2d is a no-op.
    assert zoo_fields("alexnet", {}, 224)["avgpool"] == zoo_fields("alexnet", {}, 224)["features.12"]
    assert zoo_fields("vgg16", {}, 224)["avgpool"] == zoo_fields("vgg16", {}, 224)["features.30"]


# --- independent oracle: gradient support ------------------------------------------------

class _Stop(Exception):
    pass


def gradient_box(model, layer, size, pos=None):
    """(x0, y0, x1, y1) of input pixels with nonzero gradient of one feature position of
    `layer` (summed over channels), by backprop in float64 from a positive input."""
    x = (torch.rand(1, 3, *size, dtype=torch.float64) + 0.5).requires_grad_()
    got = {}

    def hook(_m, _i, out):
        got["y"] = out
        raise _Stop  # nothing after the layer is needed

    handle = dict(model.named_modules())[layer].register_forward_hook(hook)
    try:
        model(x)
    except _Stop:
        pass
    finally:
        handle.remove()
    y = got["y"]                                                    # (1, C, h, w)
    cy, cx = pos or (y.shape[2] // 2, y.shape[3] // 2)
    y[0, :, cy, cx].sum().backward()
    g = x.grad[0].abs().sum(0)                                      # (H, W)
    rows, cols = g.sum(1).nonzero()[:, 0], g.sum(0).nonzero()[:, 0]
    return (cy, cx), (int(cols.min()), int(rows.min()), int(cols.max()) + 1, int(rows.max()) + 1)


def positive_(model):
    """Positive weights, so no ReLU is ever off and no gradient cancels."""
    torch.manual_seed(0)
    for p in model.parameters():
        with torch.no_grad():
            p.copy_((torch.rand_like(p) + 0.5) / (p[0].numel() if p.ndim > 1 else 1))
    return model.double().eval()


class TwoBranch(nn.Module):
    """Branches with different, asymmetric kernels, joined by add and cat, then shuffled."""

    def __init__(self):
        super().__init__()
        self.a = nn.Conv2d(3, 4, 3, padding=1)
        self.b = nn.Sequential(nn.Conv2d(3, 4, (7, 1), padding=(3, 0)), nn.ReLU(),
                               nn.Conv2d(4, 4, (1, 3), padding=(0, 2)))
        self.head = nn.Conv2d(8, 4, 3, stride=2)

    def forward(self, x):
        a, b = self.a(x), self.b(x)[..., 1:-1]           # b: crop the 2 extra columns
        y = torch.cat([a + b, F.avg_pool2d(b, 3, 1, 1)], 1)            # (1, 8, H, W)
        y = y.view(1, 2, 4, *y.shape[2:]).transpose(1, 2).reshape(y.shape)  # channel shuffle
        return self.head(y)


class ChannelsLast(nn.Module):
    """ConvNeXt-style block: depthwise conv, then LayerNorm and Linear on (B, H, W, C)."""

    def __init__(self):
        super().__init__()
        self.dw = nn.Conv2d(3, 3, 7, padding=3, groups=3)
        self.norm, self.fc = nn.LayerNorm(3), nn.Linear(3, 6)
        self.out = nn.Conv2d(6, 4, 3, stride=2, padding=1)

    def forward(self, x):
        y = self.fc(self.norm(self.dw(x).permute(0, 2, 3, 1)))         # (B, H, W, 6)
        return self.out(F.gelu(y).permute(0, 3, 1, 2))


class Gate(nn.Module):
    """Squeeze-excitation: every position is scaled by a function of the whole map."""

    def __init__(self):
        super().__init__()
        self.conv, self.fc = nn.Conv2d(3, 4, 3, padding=1), nn.Conv2d(4, 4, 1)

    def forward(self, x):
        y = self.conv(x)
        return y * torch.sigmoid(self.fc(y.mean((2, 3), keepdim=True)))


def resnet18(relu: bool):
    m = torchvision.models.resnet18(weights=None)
    m.maxpool = nn.AvgPool2d(3, 2, 1)      # max-pool gradients reach one pixel per window
    if not relu:
        for name, mod in list(m.named_modules()):
            if isinstance(mod, nn.ReLU):
                parent = m.get_submodule(name.rpartition(".")[0])
                setattr(parent, name.rpartition(".")[2], nn.Identity())
    return m


# (name, model factory, input size, layer)
ORACLE = [
    ("conv stack", lambda: nn.Sequential(
        nn.Conv2d(3, 4, 5, stride=2, padding=2), nn.ReLU(), nn.Conv2d(4, 4, 3),
        nn.AvgPool2d(3, 2, 1, ceil_mode=True), nn.Conv2d(4, 4, 3, stride=2, padding=1)),
     (64, 64), "4"),
    ("dilated", lambda: nn.Sequential(
        nn.Conv2d(3, 4, 3, dilation=2, padding=2), nn.Conv2d(4, 4, 3, stride=2, dilation=3),
        nn.Conv2d(4, 4, (1, 5), padding=(0, 2))), (48, 40), "2"),
    ("two branches", TwoBranch, (40, 40), ""),
    ("channels last", ChannelsLast, (32, 32), ""),
    ("asymmetric padding", lambda: nn.Sequential(
        nn.ZeroPad2d((1, 3, 0, 2)), nn.Conv2d(3, 4, 3, stride=2)), (32, 32), "1"),
    ("resnet18 with relu", lambda: resnet18(True), (128, 128), "layer2"),
    ("resnet18 without relu", lambda: resnet18(False), (128, 128), "layer2"),
]


def test_fields_match_gradient_support():
    torch.manual_seed(0)
    for name, make, size, layer in ORACLE:
        model = positive_(make())
        f = receptive_fields(model, size)[layer]
        (cy, cx), support = gradient_box(model, layer, size)
        box = f.box(cy, cx)
        # the field must lie inside the image, or clipping would hide a wrong box
        assert box[0] >= 0 and box[1] >= 0 and box[2] <= size[1] and box[3] <= size[0], (name, box)
        assert box == support and f.exact, (name, f, box, support)


def test_resampling_boxes_contain_gradient_support():
    # Adaptive pooling to a size that does not divide, bilinear upsampling and a transposed
    # conv have irregular spans: the box must contain the true one, and say if it is wider.
    class Resample(nn.Module):
        def __init__(self):
            super().__init__()
            self.c1 = nn.Conv2d(3, 4, 3, stride=4, padding=1)
            self.up = nn.Upsample(scale_factor=2, mode="bilinear")
            self.c2 = nn.ConvTranspose2d(4, 4, 3, stride=2, padding=1)
            self.pool = nn.AdaptiveAvgPool2d(7)

        def forward(self, x):
            return self.pool(self.c2(self.up(self.c1(x))))

    model = positive_(Resample())
    fields = receptive_fields(model, 96)
    for layer, n in [("c1", 24), ("up", 48), ("c2", 95), ("pool", 7)]:
        f, widest = fields[layer], 0
        for x in sorted({*range(n // 2 - 4, n // 2 + 5), 0, n - 1} & {*range(n)}):
            # enough positions of the middle row to see every phase of the strides, and borders
            _, (x0, y0, x1, y1) = gradient_box(model, layer, (96, 96), (n // 2, x))
            b = f.box(n // 2, x)
            assert b[0] <= x0 and b[1] <= y0 and b[2] >= x1 and b[3] >= y1, (layer, x, b)
            clipped = tuple(min(max(v, 0), 96) for v in b)
            assert not f.exact or clipped == (x0, y0, x1, y1), (layer, x, b)
            widest = max(widest, x1 - x0)
        # a covering is at most one stride wider than the widest exact span
        assert f.size[1] <= widest + f.stride[1], (layer, f, widest)
    assert fields["c1"].exact and not fields["pool"].exact


def test_global_gate_sees_whole_image():
    model = positive_(Gate())
    f = receptive_fields(model, 24)[""]
    assert f.stride == (0, 0)
    box = tuple(max(0, min(v, 24)) for v in f.box(5, 7))   # clipped to the image
    assert box == gradient_box(model, "", (24, 24), (5, 7))[1] == (0, 0, 24, 24)
    # asked to, the gate counts as a constant and the field is the conv's own
    local = receptive_fields(model, 24, global_context=False)[""]
    assert local == receptive_fields(model, 24)["conv"] == Field((3, 3), (1, 1), (1, 1))


# --- worked examples ---------------------------------------------------------------------

def test_single_conv_by_hand():
    # k=3, s=2, p=1: position y reads input rows 2y-1 .. 2y+1; r=3, S=2, P=1.
    f = receptive_fields(nn.Conv2d(3, 1, 3, stride=2, padding=1), 16)[""]
    assert f == Field(size=(3, 3), stride=(2, 2), padding=(1, 1))
    assert f.box(0, 0) == (-1, -1, 2, 2)          # rows and cols [-1, 1], end exclusive
    assert f.box(1, 2) == (3, 1, 6, 4)            # rows [1, 3], cols [3, 5]
    assert f.offset == (0.0, 0.0)                 # centre of position 0: (3-1)/2 - 1


def test_non_square_field():
    f = receptive_fields(nn.Conv2d(3, 1, (1, 7), padding=(0, 3)), (10, 20))[""]
    assert f.size == (1, 7) and f.padding == (0, 3) and f.offset == (0.0, 0.0)


# --- errors and side effects -------------------------------------------------------------

class Wrap(nn.Module):
    """conv, then `op`, then conv: the first conv stays computable, the last does not."""

    def __init__(self, op):
        super().__init__()
        self.first, self.last, self.op = nn.Conv2d(4, 4, 3), nn.Conv2d(4, 4, 3), op

    def forward(self, x):
        return self.last(self.op(self.first(x)))


UNKNOWN_OPS = [  # (op, a word the message must contain)
    (lambda y: F.pixel_shuffle(y.repeat(1, 4, 1, 1), 2), "pixel_shuffle"),
    (lambda y: F.grid_sample(y, torch.zeros(1, *y.shape[2:], 2), align_corners=False), "grid_sampler"),
    (lambda y: torch.flip(y, [3]), "flip"),
    (lambda y: torch.cat([y, y], 3), "cat"),
    (lambda y: y[:, :, torch.arange(y.shape[2] - 1, -1, -1)], "index"),
    (lambda y: F.interpolate(y, scale_factor=2), "finer than one input pixel"),
]


def test_unknown_spatial_ops_raise():
    for op, word in UNKNOWN_OPS:
        model = Wrap(op)
        with pytest.raises(UnitlensError, match=word):
            receptive_fields(model, 16, layers=["last"])
        assert receptive_fields(model, 16, layers=["first"])["first"].size == (3, 3)
        table = receptive_fields(model, 16)  # the whole table leaves out what it cannot model
        assert "first" in table and "last" not in table


def test_bad_arguments_raise():
    model = nn.Sequential(nn.Conv2d(3, 4, 3), nn.Flatten())
    for call, word in [(lambda: receptive_fields(model, 0), "input_size"),
                       (lambda: receptive_fields(model, 8, layers=["2"]), "Unknown layer"),
                       (lambda: receptive_fields(model, 8, layers=["1"]), "4-D"),
                       (lambda: receptive_fields(model, 2), "failed")]:
        with pytest.raises(UnitlensError, match=word):
            call()


def test_model_state_untouched():
    model = nn.Sequential(nn.Conv2d(3, 4, 3), nn.BatchNorm2d(4)).train()
    before = model[1].running_mean.clone()
    receptive_fields(model, 8)
    assert model.training and model[1].training and torch.equal(model[1].running_mean, before)


@pytest.mark.filterwarnings("ignore:`torch.jit.script` is deprecated")
def test_torchscript_module():
    eager = nn.Sequential(nn.Conv2d(3, 4, 3, stride=2), nn.ReLU(), nn.MaxPool2d(2))
    scripted = torch.jit.script(eager)
    assert receptive_fields(scripted, 32) == {"": receptive_fields(eager, 32)[""]}
    # a Python Sequential of scripted children: each child's output is still observed
    children = nn.Sequential(*(torch.jit.script(m) for m in eager))
    assert receptive_fields(children, 32) == receptive_fields(eager, 32)


def test_docstring_examples_run():
    import doctest

    import unitlens.geometry
    assert doctest.testmod(unitlens.geometry).failed == 0
