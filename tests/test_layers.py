"""What a layer is, for every architecture: one call of a module, read channels-first.

Oracles: plain-torch forward hooks recording every call of every module (cloned at the call),
and the gradient support of one feature position of that call (positive weights and input so
nothing cancels or switches off, max pooling swapped for average pooling of the same window so the gradient
reaches the whole window). The extractor under test is the one mining, synthesis, probe and
comparison all use (LoadedModel.extractor), and the boxes are the layer table's fields.
"""
import random

import numpy as np
import pytest
import torch
import torchvision
from conftest import run_cli
from test_geometry import positive_
from torch import nn

from unitlens import load_model
from unitlens.errors import UnitlensError
from unitlens.model import LoadedModel, Preprocess


class _Stop(Exception):
    pass


def expected_name(module: str, k: int, modules) -> str:
    """The documented naming: call 0 keeps the name, call k is name_k, or name_callk where a
    module is named name_<digits>."""
    if k == 0:
        return module
    taken = any(n.startswith(module + "_") and n[len(module) + 1:].isdigit() for n in modules)
    return f"{module}_call{k}" if taken else f"{module}_{k}"


def every_call(module: nn.Module, x: torch.Tensor) -> dict[str, torch.Tensor]:
    """{layer name: output} of every call of every submodule, cloned when it was made."""
    modules = {n for n, _ in module.named_modules()}
    got, count, handles = {}, {}, []
    for name, m in module.named_modules():
        if not name:
            continue

        def hook(_m, _i, out, name=name):
            k = count.get(name, 0)
            count[name] = k + 1
            if isinstance(out, torch.Tensor):
                got[expected_name(name, k, modules)] = out.detach().clone()

        handles.append(m.register_forward_hook(hook))
    try:
        with torch.no_grad():
            module(x)
    finally:
        for h in handles:
            h.remove()
    return got


def call_output(module: nn.Module, name: str, k: int, x: torch.Tensor) -> torch.Tensor:
    """Output of call k of submodule `name`, with its graph (the forward stops there)."""
    got, count = {}, [0]

    def hook(_m, _i, out):
        if count[0] == k:
            got["y"] = out
            raise _Stop
        count[0] += 1

    handle = module.get_submodule(name).register_forward_hook(hook)
    try:
        module(x)
    except _Stop:
        pass
    finally:
        handle.remove()
    return got["y"]


def gradient_support(module, info, size: int, pos) -> tuple[int, int, int, int]:
    """(x0, y0, x1, y1) of the input pixels with nonzero gradient at one position of a layer."""
    dtype = next(module.parameters()).dtype
    x = (torch.rand(1, 3, size, size, dtype=dtype) + 0.5).requires_grad_()
    y = call_output(module, info.module, info.call, x)
    y = y.permute(0, 3, 1, 2) if info.layout == "NHWC" else y                # (1, C, H, W)
    y[0, :, pos[0], pos[1]].sum().backward()
    g = x.grad[0].abs().sum(0)                                              # (H, W)
    rows, cols = g.sum(1).nonzero()[:, 0], g.sum(0).nonzero()[:, 0]
    return int(cols.min()), int(rows.min()), int(cols.max()) + 1, int(rows.max()) + 1


def positive(module: nn.Module) -> nn.Module:
    """test_geometry's positive weights, in float32: CPU kernels for float64 convolutions
    (ConvNeXt's depthwise 7x7) are many times slower, and nonzero gradients stay nonzero."""
    return positive_(module).float()


def wrap(module: nn.Module, size: int, spec: str) -> LoadedModel:
    module.eval()
    for p in module.parameters():
        p.requires_grad_(False)
    return LoadedModel(spec, module, Preprocess(size, (0.0,) * 3, (1.0,) * 3, "test"), {"kind": "none"})


def avg_pools(module: nn.Module) -> nn.Module:
    """Max pooling -> average pooling over the same window (same field, gradient to every pixel)."""
    for name, m in list(module.named_modules()):
        if isinstance(m, nn.MaxPool2d):
            parent = module.get_submodule(name.rpartition(".")[0])
            setattr(parent, name.rpartition(".")[2],
                    nn.AvgPool2d(m.kernel_size, m.stride, m.padding, ceil_mode=m.ceil_mode))
    return module


class Reuse(nn.Module):
    """One ReLU run three times, and a module named like a repeated call ('act_1')."""

    def __init__(self, dynamic: bool = False):
        super().__init__()
        self.dynamic = dynamic
        self.c1, self.c2 = nn.Conv2d(3, 6, 3, padding=1), nn.Conv2d(6, 6, 3, stride=2, padding=1)
        self.c3 = nn.Conv2d(6, 6, 5, padding=2)
        self.act, self.act_1 = nn.ReLU(), nn.ReLU()

    def forward(self, x):
        y = self.act(self.c1(x))
        if self.dynamic and y.sum() > -1e9:  # data-dependent control flow: does not trace
            y = y * 1.0
        z = self.act(self.c2(y))
        return self.act_1(self.act(self.c3(z)) + z)


def check_layers(model: LoadedModel, names, size: int, fields=None):
    """Recorded maps equal plain torch's call outputs; boxes equal gradient supports (of the
    layers in `fields`; all of them when None)."""
    table = model.layers()
    x = torch.randn(2, 3, size, size, dtype=next(model.module.parameters()).dtype)
    want = every_call(model.module, x)
    got = model.extractor(names)(x)
    for n in names:
        info = table[n]
        ref = want[n].permute(0, 3, 1, 2) if info.layout == "NHWC" else want[n]    # (B, C, H, W)
        assert got[n].shape == (2, info.channels, info.height, info.width), (n, got[n].shape)
        torch.testing.assert_close(got[n], ref, rtol=1e-5, atol=1e-5, msg=lambda m, n=n: f"{n}: {m}")
        f = info.field
        if fields is not None and n not in fields or f is None:
            continue
        for pos in {(info.height // 2, info.width // 2), (0, info.width - 1)}:
            box = f.box(*pos)
            clipped = (max(box[0], 0), max(box[1], 0), min(box[2], size), min(box[3], size))
            assert clipped == gradient_support(model.module, info, size, pos), (n, pos, f)


def test_reused_module_gives_one_layer_per_call():
    for dynamic in (False, True):
        torch.manual_seed(0)
        model = wrap(positive(Reuse(dynamic)), 24, "reuse")
        table = model.layers()
        assert [n for n in table if "act" in n] == ["act", "act_call1", "act_call2", "act_1"]
        assert (table["act"].field.size, table["act_call1"].field.size, table["act_call2"].field.size) \
            == ((3, 3), (5, 5), (13, 13))  # r + (k - 1) * S: 3; 3 + 2*1; 5 + 4*2
        assert (table["act_call2"].module, table["act_call2"].call) == ("act", 2)
        assert model.extractor(["act_call1"]).strategy == ("hooks" if dynamic else "fx")
        check_layers(model, list(table), 24)


def boxes_to_check(table, n_reused: int, n_other: int) -> list[str]:
    """Every few reused calls and a seeded sample of the other layers (gradients cost a pass each)."""
    reused = [n for n, i in table.items() if i.call]
    other = sorted(set(table) - set(reused))
    return reused[:: max(1, len(reused) // n_reused)] + random.Random(0).sample(other, min(n_other, len(other)))


def test_resnet18_every_layer():
    torch.manual_seed(0)
    model = wrap(positive(avg_pools(torchvision.models.resnet18())), 64, "resnet18")
    table = model.layers()
    # the block's second ReLU call is the block output, and its field is the block's
    assert table["layer1.0.relu_1"].field == table["layer1.0"].field != table["layer1.0.relu"].field
    assert table["layer1.0.relu"].field == table["layer1.0.bn1"].field
    assert sum(i.call > 0 for i in table.values()) == 8  # one per BasicBlock
    check_layers(model, list(table), 64, fields=boxes_to_check(table, 4, 4))


def test_inplace_relu_does_not_change_earlier_layers():
    # ResNet's ReLU(inplace=True) overwrites bn1's output after bn1 returned it
    model = load_model("torchvision:resnet18", size=64)
    x = torch.randn(2, 3, 64, 64)
    for names in (["layer1.0.bn1", "layer1.0.relu"], ["layer1.0.bn1"]):
        got = model.extractor(names)(x)
        assert (got["layer1.0.bn1"] < 0).any()
        torch.testing.assert_close(got["layer1.0.bn1"], every_call(model.module, x)["layer1.0.bn1"])


@pytest.mark.slow
@pytest.mark.parametrize("arch", ["resnet50", "googlenet"])
def test_zoo_sampled_layers(arch):
    torch.manual_seed(0)
    kw = dict(init_weights=False, aux_logits=False) if arch == "googlenet" else {}
    model = wrap(positive(avg_pools(getattr(torchvision.models, arch)(**kw))), 64, arch)
    table = model.layers()
    # Bottleneck runs its ReLU three times; GoogLeNet reuses nothing
    assert sum(i.call > 0 for i in table.values()) == (32 if arch == "resnet50" else 0)
    check_layers(model, list(table), 64, fields=boxes_to_check(table, 4, 4))


def module_channels(m: nn.Module) -> int | None:
    for attr in ("out_channels", "out_features", "num_features"):
        if isinstance(getattr(m, attr, None), int):
            return getattr(m, attr)
    if isinstance(m, nn.LayerNorm):
        return m.normalized_shape[-1]
    return None


@pytest.mark.parametrize("arch", ["convnext_tiny", "swin_t"])
def test_channels_last_layers(arch):
    torch.manual_seed(0)
    model = load_model(f"torchvision:{arch}", size=64)
    table = model.layers()
    last = [n for n, i in table.items() if i.layout == "NHWC"]
    assert len(last) > 20 and "?" not in {i.layout for i in table.values()}
    checked = 0
    for n, info in table.items():
        c = module_channels(model.module.get_submodule(info.module))
        if c is not None:
            assert info.channels == c, (n, info.channels, c)
            checked += 1
    assert checked > 20
    x = torch.randn(2, 3, 64, 64)
    want, got = every_call(model.module, x), model.extractor(last)(x)
    for n in last:
        for u in (0, table[n].channels - 1):
            torch.testing.assert_close(got[n][:, u], want[n][..., u])
    if arch == "convnext_tiny":  # fields known through the permutes: check a few against gradients
        early = [n for n in last if n.startswith(("features.1.", "features.3."))]
        check_layers(wrap(positive(model.module), 64, arch), random.Random(1).sample(early, 3), 64)
    else:  # after window attention no field is known: crops fall back, but units stay channels
        assert table["features.1.0.attn"].field is None and table["features.1.0.attn"].layout == "NHWC"


def test_token_layers_are_named_and_refused():
    model = load_model("torchvision:vit_b_16", size=224)
    assert list(model.layers()) == ["conv_proj"]
    tokens = model.token_layers()
    assert tokens["encoder.layers.encoder_layer_0"] == (197, 768)
    with pytest.raises(UnitlensError, match=r"token sequence \(N x 197 x 768\).*N x C x H x W or N x H x W x C"):
        model.layer("encoder.layers.encoder_layer_0")
    from unitlens.model import layer_notes

    note = layer_notes(model)[-1]  # what `unitlens layers` prints under the table
    assert note.startswith("Not listed: 124 layers output token sequences (N x T x C") \
        and "N x C x H x W or N x H x W x C" in note


# --- a model with a fixed input size --------------------------------------------------------

FIXED = """import torch
from torch import nn
PREPROCESS = {"size": 32}
class Fixed(nn.Module):
    def __init__(self):
        super().__init__()
        self.conv = nn.Conv2d(3, 4, 3, padding=1)
    def forward(self, x):
        torch._assert(x.shape[-1] == 32, f"Wrong image width! Expected 32 but got {x.shape[-1]}!")
        return self.conv(x)
def build():
    return Fixed()
"""


def test_synthesis_checks_the_input_size_first(tmp_path, monkeypatch):
    import unitlens.synth.pipeline as pipeline
    from unitlens import synthesize
    from unitlens.synth import Goal, SynthConfig

    code = tmp_path / "fixed.py"
    code.write_text(FIXED)
    model = load_model(f"{code}:build")
    chosen = Goal("conv:0-1")
    out = tmp_path / "run"
    with pytest.raises(UnitlensError, match=r"does not take 48x48 images.*Wrong image width.*--synth-size 32"):
        synthesize(model, chosen, out, SynthConfig(size=48, steps=2, checks=0))
    assert not out.exists()  # nothing written, so nothing for the next attempt to trip on
    r = run_cli("synth", f"{code}:build", "--layers", "conv:0", "--synth-size", "48", "--out", out, check=False)
    assert r.returncode == 1 and r.stderr.strip().splitlines()[-1].startswith("Error: ") \
        and "Traceback" not in r.stderr, r.stderr

    # a start that stops before its first unit leaves settings behind; other settings need no --force
    def dies(*_a, **_k):
        raise RuntimeError("stopped in the first batch")

    monkeypatch.setattr(pipeline, "iter_layer", dies)
    with pytest.raises(RuntimeError):
        synthesize(model, chosen, out, SynthConfig(steps=3, checks=0))
    monkeypatch.undo()
    synthesize(model, chosen, out, SynthConfig(steps=2, checks=0))
    assert sorted(p.name for p in out.glob("synth/*/unit-*.png")) == ["unit-0000-0.png", "unit-0001-0.png"]
    with pytest.raises(UnitlensError, match="--force"):  # finished units are still protected
        synthesize(model, chosen, out, SynthConfig(steps=3, checks=0))


# --- mining reads the same layers ----------------------------------------------------------

@pytest.mark.parametrize("arch,layer,units", [("resnet18", "layer1.0.relu_1", [0, 5, 63]),
                                              ("convnext_tiny", "features.1.0.block.3", [0, 300, 383])])
def test_mining_reads_the_call_and_the_channel(arch, layer, units, tmp_path, smooth_corpus):
    from unitlens import MineConfig, mine, open_corpus, parse_layers
    from unitlens.corpus import batches

    torch.manual_seed(0)
    model = load_model(f"torchvision:{arch}", size=64)
    listing = tmp_path / "four.txt"
    listing.write_text("".join(f"{p}\n" for p in sorted(smooth_corpus.iterdir())[:4]))
    corpus = open_corpus(listing)
    run = mine(model, corpus, parse_layers(model, [f"{layer}:{','.join(map(str, units))}"]), tmp_path / "run",
               MineConfig(top_k=4, batch_size=4, workers=0))
    idx = run.index(layer)
    b = next(iter(batches(corpus, 64, batch_size=4, workers=0)))
    out = every_call(model.module, model.normalize(b.images))[layer]
    # the oracle reads channel u where the module put it: dim 1, or the last dim when channels-last
    maps = out[..., units].permute(0, 3, 1, 2) if model.layer(layer).layout == "NHWC" else out[:, units]
    assert maps.shape[1:] == (len(units), 16, 16)
    best, where = maps.flatten(2).max(2)                                    # (N, U)
    for j in range(len(units)):
        order = torch.argsort(-best[:, j], stable=True)
        np.testing.assert_allclose(idx["top_score"][j], best[order, j].numpy(), rtol=1e-5, atol=1e-5)
        assert idx["top_image"][j].tolist() == b.indices[order].tolist()
        assert (idx["top_y"][j] * 16 + idx["top_x"][j]).tolist() == where[order, j].tolist()


# --- outputs of functions -------------------------------------------------------------------

@pytest.mark.slow
def test_function_outputs_name_the_nearest_layer():
    from unitlens.model import layer_notes

    # (model, what the forward makes with a function, the nearest module output): GoogLeNet's
    # block ends in torch.cat and its BasicConv2d in F.relu; ResNet adds before the shared ReLU
    models = {}
    for arch, made, nearest in [("googlenet", "inception3a.cat", "inception3a"),
                                ("googlenet", "inception3a.branch2.0.relu", "inception3a.branch2.0"),
                                ("resnet18", "layer1.0.add", "layer1.0.relu_1")]:
        if arch not in models:
            models[arch] = load_model(f"torchvision:{arch}", size=64)
        model = models[arch]
        assert made not in model.layers() and nearest in model.layers()
        with pytest.raises(UnitlensError, match=rf"'{made}' is made by a function.*Nearest layer: {nearest} "):
            model.layer(made)
        if arch == "resnet18":
            assert f"{made} -> {nearest}" in " ".join(layer_notes(model))


def test_layers_command_says_what_is_left_out():
    r = run_cli("layers", "torchvision:resnet18", "--size", "64")
    row = next(line for line in r.stdout.splitlines() if line.startswith("layer1.0.relu_1 "))
    assert "call 2 of layer1.0.relu" in row and " 27 " in row  # 27 px: the block output's field
    assert "layer1.0.add -> layer1.0.relu_1" in r.stdout
