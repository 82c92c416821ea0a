"""Model specs, safe loading, preprocessing, the layer table and the truncated forward."""
import json
import warnings
from urllib.error import URLError

import numpy as np
import pytest
import torch
import torchvision
from torch import nn

from conftest import TESTS, cli, run_cli
from unitlens import MineConfig, UnitlensError, load_model, mine, open_corpus, parse_layers, unit_summary
from unitlens.errors import UnitlensWarning
from unitlens.units import parse_ranges

NETS = f"{TESTS / 'nets.py'}"


def test_state_dict_file_loads_with_preprocessing_defaults(r18_weights):
    m = load_model("torchvision:resnet18", str(r18_weights))
    ref = torchvision.models.resnet18()
    ref.load_state_dict(torch.load(r18_weights, weights_only=True))
    assert torch.equal(m.module.conv1.weight, ref.conv1.weight)
    assert m.preprocess.size == (224, 224) and m.preprocess.mean == (0.485, 0.456, 0.406)
    assert m.weights["kind"] == "file" and len(m.weights["sha256"]) == 64
    m = load_model("torchvision:inception_v3")
    assert m.preprocess.size == (299, 299)  # torchvision's metadata for Inception v3


def test_overrides_are_recorded(r18_weights):
    m = load_model("torchvision:resnet18", str(r18_weights), size=128, mean=(0.5, 0.5, 0.5))
    assert m.preprocess.size == (128, 128) and m.preprocess.mean == (0.5, 0.5, 0.5)
    assert "overridden: size, mean" in m.describe()["preprocess"]["source"]


def test_checkpoint_wrappers_and_fine_tuned_heads(tmp_path):
    torch.manual_seed(1)
    net = torchvision.models.resnet18(num_classes=7)
    # a training checkpoint saved from DataParallel, as people do
    torch.save({"epoch": 3, "state_dict": {f"module.{k}": v for k, v in net.state_dict().items()}},
               tmp_path / "ckpt.pth")
    m = load_model("torchvision:resnet18", str(tmp_path / "ckpt.pth"))
    assert m.module.fc.out_features == 7 and m.arch_options["num_classes"] == 7
    assert torch.equal(m.module.layer1[0].conv1.weight, net.layer1[0].conv1.weight)


def test_inception_without_auxiliary_head_loads(tmp_path):
    net = torchvision.models.inception_v3(weights=None, aux_logits=False, init_weights=False)
    torch.save(net.state_dict(), tmp_path / "inc.pth")
    m = load_model("torchvision:inception_v3", str(tmp_path / "inc.pth"))
    assert m.module.AuxLogits is None


def test_key_mismatch_names_the_keys(tmp_path):
    sd = torchvision.models.resnet18().state_dict()
    sd.pop("layer1.0.conv1.weight")
    sd["extra.weight"] = torch.zeros(1)
    torch.save(sd, tmp_path / "bad.pth")
    with pytest.raises(UnitlensError, match=r"missing \(first: layer1.0.conv1.weight\).*unexpected \(first: extra.weight\)"):
        load_model("torchvision:resnet18", str(tmp_path / "bad.pth"))


def test_pickled_module_needs_opt_in(tmp_path, capsys):
    torch.save(nn.Sequential(nn.Conv2d(3, 4, 3)), tmp_path / "whole.pt")
    with pytest.raises(UnitlensError, match="--allow-pickle"):
        load_model(str(tmp_path / "whole.pt"))
    with pytest.raises(UnitlensError, match="pickled object"):
        load_model("torchvision:resnet18", str(tmp_path / "whole.pt"))
    capsys.readouterr()
    with pytest.warns(UnitlensWarning, match="loading a pickled module"):
        m = load_model(str(tmp_path / "whole.pt"), allow_pickle=True)
    assert capsys.readouterr().err == ""  # the library warns; the CLI decides what to print
    assert list(m.layers()) == ["0"]
    with warnings.catch_warnings():
        warnings.simplefilter("always", UnitlensWarning)  # pyproject's test settings ignore it
        code, out, err = cli(capsys, "layers", tmp_path / "whole.pt", "--allow-pickle", "--size", "16")
    assert code == 0 and err.count("Warning: loading a pickled module") == 1, (code, out, err)


def test_mining_notes_skipped_files_on_the_logger_not_stderr(tmp_path, capsys, caplog):
    from PIL import Image

    c = tmp_path / "c"
    c.mkdir()
    for i in range(3):
        Image.new("RGB", (20, 20), (60 * i, 90, 30)).save(c / f"ok{i}.png")
    (c / "bad.png").write_bytes(b"not an image")
    model = load_model(f"{TESTS / 'nets.py'}:digits_net", size=16)
    with caplog.at_level("WARNING", logger="unitlens"):
        mine(model, open_corpus(c), parse_layers(model, ["3"]), tmp_path / "run", MineConfig(top_k=2, workers=0))
    assert [r.getMessage().split(":")[0] for r in caplog.records if r.name == "unitlens"] == ["Skipped bad.png"]
    assert capsys.readouterr().err == ""


def test_torchscript_sequential_works_and_compiled_forward_is_refused(tmp_path):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        seq = torch.jit.script(nn.Sequential(nn.Conv2d(3, 4, 3, padding=1), nn.ReLU(), nn.Conv2d(4, 5, 3, stride=2)))
        torch.jit.save(seq, str(tmp_path / "seq.pt"))
        torch.jit.save(torch.jit.script(torchvision.models.resnet18().eval()), str(tmp_path / "r18.pt"))
    m = load_model(str(tmp_path / "seq.pt"), size=32)
    assert [(i.name, i.channels, i.height) for i in m.layers().values()] == [("0", 4, 32), ("1", 4, 32), ("2", 5, 15)]
    x = torch.randn(2, 3, 32, 32)
    out = m.extractor(["1"])(x)
    assert torch.allclose(out["1"], seq[1](seq[0](x)))
    m = load_model(str(tmp_path / "r18.pt"))
    with pytest.raises(UnitlensError, match="compiled forward"):
        m.layers()


def test_torchvision_weights_name_uses_cache_and_explains_offline(tmp_path, monkeypatch, r18_weights):
    # A cached download is used without any network (torch hub cache layout).
    import shutil

    from torchvision.models import ResNet18_Weights

    w = ResNet18_Weights.IMAGENET1K_V1
    cache = tmp_path / "hub" / "checkpoints"
    cache.mkdir(parents=True)
    shutil.copy(r18_weights, cache / w.url.rsplit("/", 1)[1])
    monkeypatch.setenv("TORCH_HOME", str(tmp_path))
    m = load_model("torchvision:resnet18", "IMAGENET1K_V1")
    assert m.weights["name"] == str(w) and m.preprocess.source.startswith("torchvision metadata")
    # Offline with nothing cached: a clear error saying how to pass a local file.
    monkeypatch.setenv("TORCH_HOME", str(tmp_path / "empty"))

    def offline(*a, **k):
        raise URLError("network is unreachable")

    monkeypatch.setattr(torch.hub, "load_state_dict_from_url", offline)
    with pytest.raises(UnitlensError, match=r"Offline\? Fetch https://.*--weights /path/to/resnet18-"):
        load_model("torchvision:resnet18", "DEFAULT")
    with pytest.raises(UnitlensError, match="Valid names: IMAGENET1K_V1, DEFAULT"):
        load_model("torchvision:resnet18", "IMAGENET_V9")


@pytest.mark.parametrize("spec,message", [
    ("resnet50", "Did you mean torchvision:resnet50"),
    ("torchvision:resnet5O", "Closest: resnet50"),
    (f"{NETS}:digit_net", "Closest: digits_net"),
    ("nowhere.py:f", "not found"),
])
def test_bad_specs_say_what_to_do(spec, message):
    with pytest.raises(UnitlensError, match=message):
        load_model(spec)


def test_layer_and_unit_selection_errors():
    m = load_model("torchvision:resnet18", size=64)
    with pytest.raises(UnitlensError, match=r"Unknown layer 'layer5'.*Closest: layer4"):
        parse_layers(m, ["layer5"])
    with pytest.raises(UnitlensError, match=r"Channel 700 is out of range for layer4 \(0-511\)"):
        parse_layers(m, ["layer4:0-700"])
    sel = parse_layers(m, ["layer3,layer1", "layer2:5,1-2"], units="0-3")
    assert [(s.layer, s.units) for s in sel] == [("layer1", (0, 1, 2, 3)), ("layer2", (5, 1, 2)), ("layer3", (0, 1, 2, 3))]
    for text, expect in [("3", (3,)), ("0-2,2,9", (0, 1, 2, 9)), (" 4 , 1 ", (4, 1))]:
        assert parse_ranges(text, 10) == expect
    for bad in ["a", "5-2", "", "3-"]:
        with pytest.raises(UnitlensError):
            parse_ranges(bad, 10)


# Practitioners' usual architectures, random weights: layer table, fx/hook agreement, a few-image mine.
ARCHS = [
    ("vgg16", "features.29", 224),
    ("resnet50", "layer3", 224),
    ("inception_v3", "Mixed_6e", 299),
    ("googlenet", "inception4c", 224),
    ("mobilenet_v3_large", "features.12", 224),
    ("convnext_tiny", "features.5", 224),
]


@pytest.mark.parametrize("arch,layer,size", ARCHS)
def test_architectures_end_to_end(arch, layer, size, tmp_path, smooth_corpus):
    r = run_cli("layers", f"torchvision:{arch}", "--json")
    rows = {row["name"]: row for row in json.loads(r.stdout)}
    assert layer in rows and rows[layer]["rf_size"] > 1 and rows[layer]["rf_stride"] >= 1
    m = load_model(f"torchvision:{arch}")
    assert m.preprocess.size == (size, size)
    ext = m.extractor([layer])
    assert ext.strategy == "fx"
    x = torch.randn(1, 3, size, size)
    seen = {}
    h = m.module.get_submodule(layer).register_forward_hook(lambda mod, i, o: seen.setdefault("o", o))
    with torch.no_grad():
        m.module(x)
        got = ext(x)[layer]
    h.remove()
    torch.testing.assert_close(got, seen["o"])  # the pruned graph computes the same feature map
    listing = tmp_path / "three.txt"
    listing.write_text("".join(f"{p}\n" for p in sorted(smooth_corpus.iterdir())[:3]))
    few = open_corpus(listing)
    run = mine(m, few, parse_layers(m, [f"{layer}:0-3"]), tmp_path / arch, MineConfig(top_k=2, workers=0))
    s = unit_summary(run, layer, 1)
    assert len(s["exemplars"]) == 2 and all(e["box"][2] > e["box"][0] for e in s["exemplars"])


def test_user_code_model_and_hook_fallback(tmp_path):
    code = tmp_path / "mynet.py"
    code.write_text(
        "import torch\nfrom torch import nn\n"
        "class Branchy(nn.Module):\n"
        "    def __init__(self):\n        super().__init__()\n"
        "        self.a = nn.Conv2d(3, 4, 3, padding=1)\n        self.b = nn.Conv2d(4, 4, 3, padding=1)\n"
        "    def forward(self, x):\n"
        "        y = self.a(x)\n"
        "        if y.sum() > -1e9:  # data-dependent control flow: does not trace\n"
        "            y = self.b(y)\n"
        "        return y\n"
        "def build():\n    return Branchy()\n"
    )
    m = load_model(f"{code}:build", size=32)
    ext = m.extractor(["a"])
    assert ext.strategy == "hooks"
    x = torch.randn(2, 3, 32, 32)
    assert torch.allclose(ext(x)["a"], m.module.a(x))
    r = run_cli("layers", f"{code}:build", "--size", "32")
    assert "a " in r.stdout and "4x32x32" in r.stdout


def test_user_code_declares_its_preprocessing(tmp_path):
    code = tmp_path / "tiny.py"
    code.write_text("import torch\nPREPROCESS = {'size': 40, 'mean': (0.5, 0.5, 0.5), 'std': (0.2, 0.2, 0.2)}\n"
                    "def build():\n    return torch.nn.Sequential(torch.nn.Conv2d(3, 4, 3), torch.nn.ReLU())\n")
    m = load_model(f"{code}:build")
    assert (m.preprocess.size, m.preprocess.mean, m.preprocess.std) == ((40, 40), (0.5,) * 3, (0.2,) * 3)
    assert m.preprocess.source == "PREPROCESS in tiny.py"
    assert load_model(f"{code}:build", size=64).preprocess.size == (64, 64)  # the command line still wins
    code.write_text("import torch\nPREPROCESS = {'size': 40, 'colour': 'rgb'}\n"
                    "def build():\n    return torch.nn.Conv2d(3, 4, 3)\n")
    with pytest.raises(UnitlensError, match="keys size, mean, std"):
        load_model(f"{code}:build")


def test_torchscript_model_is_recorded_by_its_absolute_path(tmp_path, monkeypatch):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        torch.jit.save(torch.jit.script(nn.Sequential(nn.Conv2d(3, 4, 3))), str(tmp_path / "seq.pt"))
    monkeypatch.chdir(tmp_path)
    m = load_model("seq.pt", size=32)
    assert m.spec == str((tmp_path / "seq.pt").resolve()) and m.describe()["spec"] == m.spec
    monkeypatch.chdir(TESTS)
    assert list(load_model(m.spec, size=32).layers()) == ["0"]  # reopened from another directory


def test_user_code_imports_the_files_beside_it(tmp_path):
    import sys

    d = tmp_path / "project"
    d.mkdir()
    (d / "blocks_beside.py").write_text("from torch import nn\ndef stem():\n    return nn.Conv2d(3, 5, 3)\n")
    (d / "net.py").write_text("from torch import nn\nimport blocks_beside\n"
                              "def build():\n    return nn.Sequential(blocks_beside.stem(), nn.ReLU())\n")
    before = list(sys.path)
    m = load_model(f"{d / 'net.py'}:build", size=32)
    assert m.layer("0").channels == 5
    assert sys.path == before  # the folder is on the import path only while the file loads


def test_a_model_file_that_exits_says_so(tmp_path):
    code = tmp_path / "script_like.py"
    code.write_text("import sys\nfrom torch import nn\ndef build():\n    return nn.Conv2d(3, 4, 3)\nsys.exit(3)\n")
    with pytest.raises(UnitlensError, match=r"called sys.exit\(3\)"):
        load_model(f"{code}:build")
    r = run_cli("layers", f"{code}:build", check=False)
    assert r.returncode == 1 and r.stderr.startswith("Error: ") and "sys.exit(3)" in r.stderr
    code.write_text("import sys\ndef build():\n    sys.exit('no gpu')\n")
    with pytest.raises(UnitlensError, match=r"build\(\) called sys.exit\('no gpu'\)"):
        load_model(f"{code}:build")


def test_training_checkpoints_nest_and_prefix_their_weights(tmp_path, capsys):
    torch.manual_seed(2)
    net = torchvision.models.resnet18(num_classes=5)
    # as a training framework saves it: weights under 'state_dict', keys prefixed by the attribute
    # that held the network, a loss with a weight of its own beside it
    sd = {f"model.{k}": v for k, v in net.state_dict().items()}
    torch.save({"epoch": 7, "state_dict": {**sd, "criterion.weight": torch.ones(5)}}, tmp_path / "ckpt.pth")
    m = load_model("torchvision:resnet18", str(tmp_path / "ckpt.pth"))
    assert m.module.fc.out_features == 5 and torch.equal(m.module.layer2[1].conv2.weight, net.layer2[1].conv2.weight)
    err = capsys.readouterr().err
    assert "prefix 'model.'" in err and "1 other keys left out (first: criterion.weight)" in err
    # user code: a network held as `self.backbone`, saved under 'model' with an EMA copy beside it
    code = tmp_path / "small.py"
    code.write_text("from torch import nn\ndef build():\n    return nn.Sequential(nn.Conv2d(3, 4, 3), nn.ReLU())\n")
    small = nn.Sequential(nn.Conv2d(3, 4, 3), nn.ReLU())
    torch.save({"model": {f"backbone.{k}": v for k, v in small.state_dict().items()},
                "model_ema": {f"backbone.{k}": v * 0 for k, v in small.state_dict().items()}}, tmp_path / "s.pt")
    m = load_model(f"{code}:build", str(tmp_path / "s.pt"))
    assert torch.equal(m.module[0].weight, small[0].weight)
    assert "using 'model'" in capsys.readouterr().err
    # weights that do not fit user code: no advice about --arch-option, which user code cannot take
    torch.save({"net.0.weight": torch.zeros(8, 3, 3, 3), "net.0.bias": torch.zeros(8)}, tmp_path / "bad.pt")
    with pytest.raises(UnitlensError, match="do not fit") as e:
        load_model(f"{code}:build", str(tmp_path / "bad.pt"))
    assert "--arch-option" not in str(e.value) and "small.py:build" in str(e.value)


def test_a_module_carrying_its_data_configuration_is_preprocessed_by_it(tmp_path):
    from PIL import Image

    from unitlens.corpus import CorpusDataset

    m = load_model(f"{NETS}:carried")
    p = m.preprocess
    assert (p.size, p.mean, p.std, p.interpolation) == ((40, 56), (0.5, 0.4, 0.3), (0.2, 0.25, 0.3), "bicubic")
    assert p.source.startswith("the model's pretrained_cfg")
    assert m.describe()["preprocess"]["interpolation"] == "bicubic" and m.describe()["preprocess"]["size"] == [40, 56]
    # an original of the input's own aspect is resized as a whole: PIL's bicubic resize is the oracle
    rng = np.random.default_rng(0)
    img = Image.fromarray(rng.integers(0, 256, (80, 112, 3), dtype=np.uint8))
    img.save(tmp_path / "a.png")
    _, pixels, _, _ = CorpusDataset(open_corpus(tmp_path), p.frame)[0]
    want = np.asarray(img.resize((56, 40), Image.Resampling.BICUBIC)).transpose(2, 0, 1)
    np.testing.assert_array_equal(pixels.numpy(), want)
    # the file's PREPROCESS and the command line still win
    assert load_model(f"{NETS}:carried", size=32, mean=(0.1, 0.1, 0.1)).preprocess.size == (32, 32)


def test_input_channels_follow_the_model(tmp_path):
    m = load_model(f"{NETS}:grey_net", size=24)  # no statistics given: ImageNet's, averaged over R,G,B
    assert m.preprocess.channels == 1 and m.preprocess.mean == pytest.approx((sum((0.485, 0.456, 0.406)) / 3,))
    assert "averaged over R,G,B" in m.preprocess.source
    assert load_model(f"{NETS}:grey_net", size=24, mean=(0.5,), std=(0.25,)).preprocess.std == (0.25,)
    for kw, message in (({"mean": (0.5, 0.5, 0.5), "std": (0.2, 0.2, 0.2)}, "need 1 number"),
                        ({"mean": (0.5,), "std": (0.2, 0.2)}, "--mean has 1 numbers and --std 2")):
        with pytest.raises(UnitlensError, match=message):
            load_model(f"{NETS}:grey_net", **kw)
    with pytest.raises(UnitlensError, match=r"need 3 number\(s\) \(R,G,B\)"):
        load_model("torchvision:resnet18", mean=(0.5,), std=(0.5,))
    code = tmp_path / "depthwise.py"  # a grouped first convolution: its weight holds 1 of the 3 channels
    code.write_text("from torch import nn\ndef build():\n    return nn.Sequential(nn.Conv2d(3, 6, 3, groups=3))\n")
    assert load_model(f"{code}:build", size=24).preprocess.channels == 3
    code = tmp_path / "four.py"
    code.write_text("from torch import nn\ndef build():\n    return nn.Conv2d(4, 2, 3)\n")
    with pytest.raises(UnitlensError, match="takes 4 input channels; images decode to 1"):
        load_model(f"{code}:build")
    r = run_cli("layers", f"{NETS}:grey_net", "--size", "24", "--mean", "0.5", "--std", "0.25")
    assert "input 1x24x24" in r.stdout


def test_sizes_are_n_or_height_by_width_and_bounded_by_memory():
    r = run_cli("layers", f"{NETS}:red_detector", "--size", "48x80")
    assert "input 3x48x80" in r.stdout and " 1x48x80 " in r.stdout  # the colour layer keeps the input's shape
    for bad in ("48x", "x80", "48x80x3", "big"):
        r = run_cli("layers", f"{NETS}:red_detector", "--size", bad, check=False)
        assert r.returncode == 2 and "Error: --size takes N" in r.stderr and "Traceback" not in r.stderr  # usage
    r = run_cli("layers", "torchvision:resnet18", "--size", "100000", check=False)
    assert r.returncode == 1 and r.stderr.startswith("Error: Input size 100000 needs about") and r.stderr.count("\n") == 1


def test_a_model_built_without_weights_warns_once(r18_weights, smooth_corpus, tmp_path, monkeypatch):
    from unitlens import model as model_module
    from unitlens.errors import UnitlensWarning

    monkeypatch.setattr(model_module, "_WARNED", set())  # as in a fresh process
    with warnings.catch_warnings(record=True) as seen:
        warnings.simplefilter("always")  # whatever the filters, the library says it once per model
        load_model("torchvision:resnet18")
        load_model("torchvision:resnet18")
        load_model("torchvision:resnet18", str(r18_weights))
        load_model(f"{NETS}:digits_net")
    texts = [str(w.message) for w in seen if issubclass(w.category, UnitlensWarning)]
    assert len(texts) == 2 and "torchvision:resnet18" in texts[0] and "digits_net" in texts[1]
    assert all("random" in t and "--weights" in t for t in texts)
    # the command line prints it as one Warning: line, for mine as for every other command
    r = run_cli("mine", f"{NETS}:digits_net", "--size", "32", "--corpus", smooth_corpus, "--layers", "0:0-1",
                "--top", "2", "--workers", "0", "--out", tmp_path / "run")
    lines = [line for line in r.stderr.splitlines() if "random" in line]
    assert len(lines) == 1 and lines[0].startswith("Warning: ") and "UnitlensWarning" not in r.stderr
    r = run_cli("mine", "torchvision:resnet18", "--weights", r18_weights, "--size", "32", "--corpus", smooth_corpus,
                "--layers", "layer1:0-1", "--top", "2", "--workers", "0", "--out", tmp_path / "run2")
    assert "Warning" not in r.stderr
