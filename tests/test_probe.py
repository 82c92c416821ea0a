"""`unitlens probe` end to end (unitlens/probing.py): the printed top exemplars and the reverse
question against brute force with plain torch over the corpus, the heat-map files, the run-folder
form, the page in a real browser, and the README's probe examples."""
import json
import re
import shlex
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
import torch
from PIL import Image

from conftest import ROOT, TESTS, chromium_or_skip, run_cli
from unitlens import UnitlensError

MODEL = f"{TESTS / 'nets.py'}:digits_net"
SIZE = 32
MEAN, STD = (0.485, 0.456, 0.406), (0.229, 0.224, 0.225)  # ImageNet statistics, the default for user code
LAYER, UNIT = "3", 5


@pytest.fixture(scope="module")
def corpus(tmp_path_factory):
    """30 of scikit-learn's digits as 32 x 32 RGB PNGs in one folder per digit, and seeded weights."""
    from digits import digit_images

    d = tmp_path_factory.mktemp("probe")
    images, labels = digit_images(SIZE)
    for i in range(30):
        p = d / "digits" / str(int(labels[i])) / f"img-{i:02d}.png"
        p.parent.mkdir(parents=True, exist_ok=True)
        Image.fromarray(images[i].permute(1, 2, 0).numpy()).save(p)
    from nets import digits_net

    torch.manual_seed(0)
    torch.save(digits_net().state_dict(), d / "w.pth")
    return d


def brute_force(corpus: Path, channel: int):
    """Per image (sorted by id, as the corpus is): the unit's spatial max and its position, with
    nothing of unitlens: PIL pixels, normalised by hand, the Sequential's first four modules."""
    from nets import digits_net

    net = digits_net()
    net.load_state_dict(torch.load(corpus / "w.pth"))
    net.eval()
    files = sorted(corpus.joinpath("digits").rglob("*.png"), key=lambda p: p.relative_to(corpus / "digits").as_posix())
    x = torch.stack([torch.from_numpy(np.array(Image.open(f).convert("RGB"))).permute(2, 0, 1) for f in files])
    x = (x.float() / 255 - torch.tensor(MEAN).view(1, 3, 1, 1)) / torch.tensor(STD).view(1, 3, 1, 1)
    with torch.no_grad():
        fmap = net[:4](x)  # (N, 32, 16, 16)
    return files, fmap


def field_box(y: int, x: int) -> list[int]:
    # conv 3x3 pad 1, then conv 3x3 stride 2 pad 1: size 5, stride 2, padding 2 (y*S - P ... + r),
    # clipped to the 32 x 32 input, which is the whole (square, 32 px) original
    return [max(2 * x - 2, 0), max(2 * y - 2, 0), min(2 * x + 3, SIZE), min(2 * y + 3, SIZE)]


def expected_top(corpus: Path, k: int):
    files, fmap = brute_force(corpus, UNIT)
    flat = fmap[:, UNIT].flatten(1)
    mx, amx = flat.max(1)
    order = sorted(range(len(files)), key=lambda i: -float(mx[i]))  # stable: ties keep corpus order
    out = []
    for r, i in enumerate(order[:k], 1):
        y, x = divmod(int(amx[i]), 16)
        out.append({"rank": r, "image": str(files[i]), "score": float(mx[i]), "position": [y, x], "box": field_box(y, x)})
    return out


def check_exemplars(got: list[dict], want: list[dict]) -> None:
    assert [e["image"] for e in got] == [e["image"] for e in want]
    for g, w in zip(got, want):
        assert g["rank"] == w["rank"] and g["box"] == w["box"]
        assert g["score"] == pytest.approx(w["score"], rel=1e-4, abs=1e-5)
        if "position" in g:
            assert g["position"] == w["position"]


@pytest.fixture(scope="module")
def probed(corpus):
    run = corpus / "run"
    r = run_cli("probe", MODEL, f"{LAYER}:{UNIT}", "--corpus", corpus / "digits", "--labels", "folders",
                "--weights", corpus / "w.pth", "--size", SIZE, "--top", 6, "--attribute", 3, "--attribution", "all",
                "--samples", 8, "--steps", 4, "--out", run, "--json")
    return run, json.loads(r.stdout)


def test_model_form_prints_the_brute_force_top_exemplars(corpus, probed):
    _, s = probed
    check_exemplars(s["exemplars"], expected_top(corpus, 6))
    assert all(e["label"] == Path(e["image"]).parent.name for e in s["exemplars"])
    assert s["layer"] == LAYER and s["unit"] == UNIT and s["stats"]["images"] == 30
    assert len(s["synth"]) == 1 and Path(s["page"]).is_file()


def test_heat_maps_are_named_complete_and_inside_the_receptive_field(probed):
    run, s = probed
    d = Path(s["page"]).parent
    maps = np.load(d / "attributions.npz")
    for e in s["exemplars"]:
        assert (d / e["crop"]).is_file()
        if e["rank"] > 3:
            assert e["attribution"] == {}
            continue
        names = {m: a["file"] for m, a in e["attribution"].items()}
        assert names == {m: f"exemplar-{e['rank']:02d}-{m}.png" for m in
                         ("integrated-gradients", "gradient-x-input", "smoothgrad")}
        for m, a in e["attribution"].items():
            assert Image.open(d / a["file"]).size == (160, 160)
            heat = maps[f"exemplar-{e['rank']:02d}-{m}"]
            assert heat.shape == (SIZE, SIZE) and float(heat.sum()) == pytest.approx(a["sum"], rel=1e-4, abs=1e-6)
            # one neuron depends only on its receptive field: nothing outside the box (analytic)
            assert a["outside_box"] == 0.0
            assert a["score"] == pytest.approx(e["score"], rel=1e-4, abs=1e-5)  # the neuron mining ranked by
        ig = e["attribution"]["integrated-gradients"]
        if abs(ig["score"] - ig["baseline_score"]) > 1e-3:  # completeness, Sundararajan et al. 2017
            assert ig["completeness_gap"] <= 0.05
            assert ig["sum"] == pytest.approx(ig["score"] - ig["baseline_score"], rel=0.05)
        assert "problem" not in e


def _text_rows(stdout: str) -> list[dict]:
    rows = []
    for line in stdout.splitlines():
        m = re.match(r"^\s+(\d+)\s+(\S+)\s+(\[[\d, ]+\])\s+(\S+)", line)
        if m:
            rows.append({"rank": int(m[1]), "score": float(m[2]), "box": json.loads(m[3]), "image": m[4]})
    return rows


def test_run_form_answers_from_the_index_without_mining(corpus, probed):
    run, _ = probed
    index, units = run / "mine" / LAYER / "index.npz", run / "synth" / LAYER / "units.json"
    before = index.stat().st_mtime_ns, units.stat().st_mtime_ns
    r = run_cli("probe", run, f"{LAYER}:{UNIT}", "--top", 4, "--attribute", 1, "--baseline", "blur")
    want = expected_top(corpus, 4)
    for w in want:
        w["score"] = float(f"{w['score']:.4g}")  # the table prints 4 significant digits
    check_exemplars(_text_rows(r.stdout), want)
    assert (index.stat().st_mtime_ns, units.stat().st_mtime_ns) == before  # read, never redone
    page = Path(r.stdout.strip().splitlines()[-1])
    assert page.is_file() and "integrated gradients, exemplar 1" in r.stdout and "synthesised:" in r.stdout
    s = json.loads((page.parent / "probe.json").read_text())
    assert s["settings"]["integrated_gradients"]["baseline"] == "blur"


def test_other_weights_than_the_runs_are_flagged(corpus, tmp_path):
    # without --weights a model is initialised at random on every load, so the run form gets another net
    run = tmp_path / "random"
    run_cli("probe", MODEL, f"{LAYER}:{UNIT}", "--corpus", corpus / "digits", "--size", SIZE, "--top", 2,
            "--attribute", 1, "--attribution", "gxi", "--no-synth", "--out", run)
    r = run_cli("probe", run, f"{LAYER}:{UNIT}", "--attribution", "gxi", "--attribute", 1)
    assert "warning, exemplar 1: the network gives" in r.stdout and "--weights" in r.stdout


def test_mistakes_get_one_clear_error(corpus, probed):
    run, _ = probed
    img = next(corpus.joinpath("digits").rglob("*.png"))
    usage = [  # exit 2, with typer's usage line and a hint to --help
        ((MODEL, f"{LAYER}:{UNIT}", "--size", SIZE), "give --corpus DIR and --out DIR"),
        ((MODEL, "--image", img, "--size", SIZE), "give --layer L"),
        ((run, f"{LAYER}:{UNIT}", "--weights", corpus / "w.pth"), "apply only when TARGET is a model"),
    ]
    cases = [
        ((run, f"{LAYER}:6"), "Channel 6 of 3 was not mined"),
        ((run, f"{LAYER}:{UNIT}", "--attribution", "ig,lrp"), "Unknown attribution method 'lrp'"),
        ((MODEL, "9:0", "--size", SIZE, "--corpus", corpus / "digits", "--out", corpus / "never"), "Unknown layer '9'"),
        ((run, "layer3"), "Expected LAYER:CHANNEL"),
    ]
    from typer.testing import CliRunner

    from unitlens.cli import app

    for args, text in cases:  # in this process, for speed; main() turns the error into one line
        r = CliRunner().invoke(app, ["probe", *map(str, args)])
        assert isinstance(r.exception, UnitlensError) and text in str(r.exception), (args, r.exception)
    for args, text in usage:
        r = CliRunner().invoke(app, ["probe", *map(str, args)])
        assert r.exit_code == 2 and text in r.output and "--help' for help" in r.output, (args, r.output)
    assert not (corpus / "never").exists()  # checked before any image was read
    r = run_cli("probe", *cases[0][0], check=False)
    assert r.returncode == 1 and r.stderr.startswith("Error: ") and "Traceback" not in r.stderr


def test_image_form_lists_the_units_one_image_drives(corpus, probed):
    # a 64 x 32 image: the network sees its centre 32 x 32 at scale 1, so original x = input x + 16
    from digits import digit_images

    images, _ = digit_images(SIZE)
    wide = np.zeros((SIZE, 2 * SIZE, 3), np.uint8)
    wide[:, 16:48] = images[7].permute(1, 2, 0).numpy()
    wide[:, :16] = 90
    p = corpus / "wide.png"
    Image.fromarray(wide).save(p)
    r = run_cli("probe", MODEL, "--weights", corpus / "w.pth", "--size", SIZE, "--image", p, "--layer", LAYER,
                "--top", 5, "--json")
    s = json.loads(r.stdout)
    from nets import digits_net

    net = digits_net()
    net.load_state_dict(torch.load(corpus / "w.pth"))
    net.eval()
    x = torch.from_numpy(wide[:, 16:48]).permute(2, 0, 1)[None].float() / 255
    with torch.no_grad():
        fmap = net[:4]((x - torch.tensor(MEAN).view(1, 3, 1, 1)) / torch.tensor(STD).view(1, 3, 1, 1))[0]
    mx, amx = fmap.flatten(1).max(1)
    order = sorted(range(32), key=lambda c: -float(mx[c]))[:5]
    assert [u["unit"] for u in s["units"]] == order
    for u, c in zip(s["units"], order):
        y, xx = divmod(int(amx[c]), 16)
        b = field_box(y, xx)
        assert u["max"] == pytest.approx(float(mx[c]), rel=1e-4, abs=1e-5) and u["position"] == [y, xx]
        assert u["box"] == [b[0] + 16, b[1], b[2] + 16, b[3]]
    assert s["size"] == [64, 32] and s["channels"] == 32
    from typer.testing import CliRunner

    from unitlens.cli import app

    text = CliRunner().invoke(app, ["probe", MODEL, "--weights", str(corpus / "w.pth"), "--size", str(SIZE),
                                    "--image", str(p), "--layer", LAYER, "--top", "3"]).stdout
    assert re.search(rf"^\s+1\s+{order[0]}\s", text, re.M)
    from unitlens import probe_image

    assert probe_image(str(probed[0]), p, LAYER, 5)["units"] == s["units"]  # a run folder names the same model


def test_the_page_opens_offline_with_every_image(probed):
    import cdp

    chromium = chromium_or_skip()
    _, s = probed
    b = cdp.Browser(chromium)
    try:
        page = b.page(1200, 2000)
        page.goto(Path(s["page"]).as_uri())
        page.wait_for("document.readyState === 'complete' && [...document.images].every(i => i.complete)")
        assert page.errors == [] and page.dialogs == []
        assert page.requests and all(u.startswith("file://") for u in page.requests), page.requests
        assert page.js("[...document.images].filter(i => !i.naturalWidth).length") == 0
        now = json.loads(Path(s["page"]).with_name("probe.json").read_text())  # the latest probe of this unit
        maps = sum(len(e["attribution"]) for e in now["exemplars"])
        assert maps and page.js("document.images.length") == len(now["exemplars"]) + maps + len(now["synth"])
        assert "integrated gradients" in page.js("document.body.innerText")
        page.close()
    finally:
        b.close()


def readme_probe_commands() -> list[str]:
    text = (ROOT / "README.md").read_text()
    section = text.split("### Check one unit in one command", 1)[1].split("\n### ", 1)[0]
    block = section.split("```bash\n", 1)[1].split("```", 1)[0]
    return [line.split("  #")[0].strip() for line in block.splitlines() if line.strip()]


def test_readme_probe_examples_run(tmp_path):
    commands = readme_probe_commands()
    assert len(commands) >= 4
    bin_dir = Path(sys.executable).parent
    for cmd in commands:
        argv = shlex.split(cmd)
        argv[0] = str(bin_dir / argv[0]) if argv[0] in ("unitlens", "python") else argv[0]
        if Path(argv[0]).name == "python":
            argv[0] = sys.executable
        t = time.perf_counter()
        r = subprocess.run(argv, cwd=tmp_path, capture_output=True, text=True)
        assert r.returncode == 0, (cmd, r.stderr)
        print(f"{time.perf_counter() - t:5.1f} s  {cmd}")
    assert list(tmp_path.glob("runs/*/probe/layer3-0007/index.html"))


def test_synth_on_request_follows_the_runs_own_settings(corpus, tmp_path):
    # a run whose unit 6 was synthesised one way (a goal with its own reduction and penalty): probing
    # unit 5 with synth=True adds its image the same way
    from unitlens import MineConfig, ProbeConfig, load_model, mine, open_corpus, parse_layers, probe
    from unitlens.synth import Goal, SynthConfig, synthesize

    model = load_model(MODEL, str(corpus / "w.pth"), size=SIZE)
    run = tmp_path / "run"
    mine(model, open_corpus(corpus / "digits"), parse_layers(model, [f"{LAYER}:5-6"]), run,
         MineConfig(top_k=3, workers=0))
    synthesize(model, Goal(f"{LAYER}:6", reduce="centre", smoothness=0.2), run, SynthConfig(steps=3, size=24, checks=2))
    s = probe(str(run), f"{LAYER}:{UNIT}", config=ProbeConfig(attribute=1, methods=("gxi",)))
    assert s["synth"] == []  # not asked: a run is only read
    s = probe(str(run), f"{LAYER}:{UNIT}", config=ProbeConfig(attribute=1, methods=("gxi",), synth=True))
    assert len(s["synth"]) == 1 and Image.open(s["synth"][0]["image"]).size == (24, 24)
    assert s["synth"][0]["steps"] <= 3
    goal = json.loads((run / "manifest.json").read_text())["synth"]["settings"]["goal"]
    assert goal["reduce"] == "centre" and goal["smoothness"] == 0.2  # a different goal would have been refused
    with pytest.raises(UnitlensError, match="run folder, which holds its corpus"):
        probe(str(run), f"{LAYER}:{UNIT}", corpus=corpus / "digits")
