"""How units connect (unitlens/links.py): contributions against a planted network, integrated
gradients against a plain-torch Riemann sum, channel ablation as brute force, kernel slices against
the model's own parameters, resuming after a kill, and what `show` prints."""
import json
import shutil
import signal
import subprocess
import sys
import time
import warnings

import numpy as np
import pytest
import torch
from PIL import Image

from conftest import ROOT, TESTS, cli
from unitlens import UnitlensError

SIZE = 24
MEAN, STD = (0.485, 0.456, 0.406), (0.229, 0.224, 0.225)  # ImageNet statistics, the default for user code
PLANTED, RANDOM = f"{TESTS / 'linked.py'}:planted_links", f"{TESTS / 'linked.py'}:small_random"


@pytest.fixture(scope="module")
def runs(tmp_path_factory):
    """24 smooth random images of exactly the input size (so decoding changes nothing), and two mined
    runs over them: the planted network (layers 1 and 3) and the small random one (1, 3 and 5)."""
    from unitlens import MineConfig, load_model, mine, open_corpus, parse_layers

    d = tmp_path_factory.mktemp("links") / "images"
    d.mkdir()
    rng = np.random.default_rng(5)
    for i in range(24):
        base = rng.random((5, 5, 3))
        Image.fromarray((base * 255).astype(np.uint8)).resize((SIZE, SIZE), Image.BICUBIC).save(d / f"img{i:02d}.png")
    out = {}
    for name, spec, layers in (("planted", PLANTED, ["1,3"]), ("random", RANDOM, ["1,3,5"])):
        with pytest.warns(UserWarning):  # user code given no weights: a warning, as it should be
            model = load_model(spec, size=SIZE)
        mine(model, open_corpus(d), parse_layers(model, layers), d.parent / name, MineConfig(top_k=6, workers=0))
        out[name] = (d.parent / name, model)
    out["images"] = d
    return out


def pixels(folder, files) -> torch.Tensor:
    """The images as the network sees them, with nothing of unitlens: PIL, normalised by hand."""
    x = torch.stack([torch.from_numpy(np.array(Image.open(folder / f).convert("RGB"))).permute(2, 0, 1)
                     for f in files]).float() / 255
    return (x - torch.tensor(MEAN).view(1, 3, 1, 1)) / torch.tensor(STD).view(1, 3, 1, 1)


def exemplars(run, layer, u):
    """(image file, y, x) of unit u's top exemplars, from the run's own index and corpus files."""
    z = np.load(run / "mine" / layer / "index.npz")
    files = json.loads((run / "corpus.json").read_text())["files"]
    p = int(np.flatnonzero(z["units"] == u)[0])
    return [(files[i], int(y), int(x)) for i, y, x in zip(z["top_image"][p], z["top_y"][p], z["top_x"][p])]


def plain_ig(head, a, u, y, x, steps):
    """Trapezoid integrated gradients from a zero baseline, in plain torch: (C,) summed over positions."""
    t = torch.linspace(0, 1, steps + 1, dtype=torch.float64)
    z = (t.view(-1, 1, 1, 1) * a.double()).float().requires_grad_(True)  # (steps + 1, C, H, W)
    (g,) = torch.autograd.grad(head(z)[:, u, y, x].sum(), z)
    w = torch.full((steps + 1,), 1.0 / steps, dtype=torch.float64)
    w[0] = w[-1] = 0.5 / steps
    avg = (g.double() * w.view(-1, 1, 1, 1)).sum(0)
    return (a.double() * avg).sum((1, 2))


def test_planted_feeders(runs):
    """Unit 3 of layer 3 = ReLU(A * unit 1 - B * unit 5 + C) with units 1 and 5 equal everywhere: on every
    exemplar the path from zero stays where the ReLU passes (C > 0, every term grows with t), so the
    integrated gradients are exact and unit 1 : unit 5 = A : -B (to 1e-4, float rounding)."""
    from linked import A, B
    from unitlens.links import link, unit_links

    run, model = runs["planted"]
    link(run, "3", model=model)
    f = unit_links(run, "3", 3)["feeders"][0]
    assert f["layer"] == "1"
    assert f["up"][0]["unit"] == 1 and f["down"][0]["unit"] == 5
    ratio = f["up"][0]["contribution"] / -f["down"][0]["contribution"]
    assert ratio == pytest.approx(A / B, rel=1e-4)
    others = [e for e in f["up"] + f["down"] if e["unit"] not in (1, 5)]
    assert others and max(abs(e["share"]) for e in others) < 0.02  # each of them: weight 0.01 vs 2 and 0.5
    assert f["gap"] < 1e-4  # complete: the path never meets the ReLU's kink


def test_blurred_baseline_is_complete_and_differs(runs, tmp_path):
    """From the blurred exemplar's activations the planted unit's path stays where its ReLU passes (an
    affine function positive at both ends), so the contributions add up to u(a) - u(blurred) exactly; the
    change is smaller than from zero (blurring keeps part of the activation)."""
    from unitlens.links import LinkConfig, link

    run = tmp_path / "run"
    shutil.copytree(runs["planted"][0], run, ignore=shutil.ignore_patterns("links", "atlas", "probe"))
    model = runs["planted"][1]
    zero = np.load(link(run, "3", "1", units=[3], model=model))
    blur = np.load(link(run, "3", "1", units=[3], model=model, config=LinkConfig(baseline="blur"), force=True))
    p = int(np.flatnonzero(blur["units"] == 3)[0])
    assert float(blur["gap"][p]) < 1e-4
    assert 0 < float(blur["change"][p]) < float(zero["change"][p])
    assert float(blur["contribution"][p].sum()) == pytest.approx(float(blur["change"][p]), rel=1e-4)


def test_ig_against_riemann_sum_and_completeness(runs):
    """Stored contributions (mean over exemplars) equal a plain-torch trapezoid sum with the same steps;
    their total matches u(a) - u(0) as closely as that sum does, and a 512-step sum comes within 0.5%."""
    from unitlens.links import LinkConfig, link
    from linked import small_random

    run, model = runs["random"]
    path = link(run, "5", "1", config=LinkConfig(steps=16), model=model)
    z = np.load(path)
    net = small_random().eval()
    tail = net[2:]
    for p, u in enumerate(z["units"][:3]):
        ours, total, change = [], [], []
        for file, y, x in exemplars(run, "5", int(u)):
            with torch.no_grad():
                a = net[:2](pixels(runs["images"], [file]))[0]  # (8, 24, 24)
                fa, f0 = float(tail(a[None])[0, u, y, x]), float(tail(torch.zeros_like(a)[None])[0, u, y, x])
            c = plain_ig(tail, a, int(u), y, x, 16)
            ours.append(c)
            fine = plain_ig(tail, a, int(u), y, x, 512).sum()
            assert float(fine) == pytest.approx(fa - f0, rel=5e-3, abs=1e-6)
            total.append(float(c.sum()))
            change.append(fa - f0)
        np.testing.assert_allclose(z["contribution"][p], torch.stack(ours).mean(0).numpy(), rtol=1e-4, atol=1e-6,
                                   err_msg=str((p, int(u), exemplars(run, "5", int(u)), [c.numpy().round(4) for c in ours])))
        assert float(z["change"][p]) == pytest.approx(np.mean(change), rel=1e-5)
        worst = max(abs(t - c) / max(abs(c), 1e-12) for t, c in zip(total, change))
        assert float(z["gap"][p]) == pytest.approx(worst, rel=1e-3, abs=1e-6)


def spearman(a, b) -> float:
    """Spearman's rank correlation with numpy ranks (no ties in continuous data)."""
    ra, rb = np.argsort(np.argsort(a)).astype(float), np.argsort(np.argsort(b)).astype(float)
    return float(np.corrcoef(ra, rb)[0, 1])


def test_ablation_ranks_like_contributions(runs):
    """Brute force: zero each channel of layer 1 in turn; the drop of each unit of layer 5 summed over its
    exemplars ranks the channels as the contributions do (Spearman >= 0.9 over every (unit, channel) pair,
    and for the median unit)."""
    from unitlens.links import link
    from linked import small_random

    run, model = runs["random"]
    z = np.load(link(run, "5", "1", model=model))
    net = small_random().eval()
    rhos, all_drops = [], []
    for p, u in enumerate(z["units"]):
        drops = np.zeros(8)
        for file, y, x in exemplars(run, "5", int(u)):
            with torch.no_grad():
                a = net[:2](pixels(runs["images"], [file]))  # (1, 8, 24, 24)
                full = float(net[2:](a)[0, u, y, x])
                for k in range(8):
                    cut = a.clone()
                    cut[:, k] = 0
                    drops[k] += full - float(net[2:](cut)[0, u, y, x])
        rhos.append(spearman(drops, z["contribution"][p]))
        all_drops.append(drops)
    pooled = spearman(np.concatenate(all_drops), z["contribution"].ravel())
    # a unit whose channels' effects lie close together may swap two (0.83 and 0.88 seen with 8 channels);
    # over all (unit, channel) pairs, and for the typical unit, the orders agree
    assert pooled >= 0.9 and np.median(rhos) >= 0.9, (rhos, pooled)


def test_adjacent_weights_are_the_models(runs):
    """One convolution apart: the kernel slice norms (3x3) and the weights themselves (1x1) are the
    parameters read with plain torch indexing; two convolutions apart, none are stored."""
    from unitlens.links import link
    from linked import planted_links, small_random

    run, model = runs["random"]
    z = np.load(link(run, "3", "1", model=model))
    w = small_random()[2].weight.detach()  # (8, 8, 3, 3)
    for p, u in enumerate(z["units"]):
        for k in range(8):
            assert z["weight_norm"][p, k] == pytest.approx(float(torch.sqrt((w[u, k] ** 2).sum())), rel=1e-6)
    assert "weight" not in z
    assert "weight_norm" not in np.load(link(run, "5", "1", model=model))
    run, model = runs["planted"]
    z = np.load(link(run, "3", "1", model=model))
    w = planted_links()[2].weight.detach()  # (4, 6, 1, 1)
    for p, u in enumerate(z["units"]):
        np.testing.assert_array_equal(z["weight"][p], w[u, :, 0, 0].numpy())


def test_show_lists_feeders_and_fed_units(runs, capsys):
    from unitlens.links import link

    run, model = runs["planted"]
    link(run, "3", model=model)
    code, out, _ = cli(capsys, "show", run, "3:3")
    assert code == 0
    up = next(line for line in out.splitlines() if "drive it up:" in line)
    down = next(line for line in out.splitlines() if "hold it down:" in line)
    assert up.split(":", 1)[1].strip().startswith("1 (+") and down.split(":", 1)[1].strip().startswith("5 (-")
    code, out, _ = cli(capsys, "show", run, "1:5", "--json")
    s = json.loads(out)
    fed = s["links"]["feeds"][0]
    to3 = next(e for e in fed["units"] if e["unit"] == 3)  # layer 3 has 4 units: all are listed
    feeders = json.loads(cli(capsys, "show", run, "3:3", "--json")[1])["links"]["feeders"][0]
    assert fed["layer"] == "3" and to3["contribution"] == feeders["down"][0]["contribution"] < 0
    code, out, _ = cli(capsys, "show", run, "1:5")
    assert "feeds in 3" in out


@pytest.mark.parametrize("args, words", [
    (("--layer", "1", "--from", "3"), "comes after"),
    (("--layer", "3", "--units", "9"), "out of range"),
    (("--layer", "1"), "No layer mined"),
    (("--layer", "3", "--from", "nope"), "Unknown layer 'nope'"),
])
def test_link_errors(runs, capsys, args, words):
    run, _ = runs["planted"]
    code, _, err = cli(capsys, "link", run, *args)
    assert code == 1 and words in err and err.count("Error:") == 1, err


def test_other_settings_need_force(runs, capsys):
    run, _ = runs["planted"]
    assert cli(capsys, "link", run, "--layer", "3")[0] == 0
    code, _, err = cli(capsys, "link", run, "--layer", "3", "--method", "gxa")
    assert code == 1 and "--force" in err
    code, out, _ = cli(capsys, "link", run, "--layer", "3", "--method", "gxa", "--force")
    assert code == 0 and "gradient x activation" in out
    cli(capsys, "link", run, "--layer", "3", "--force")  # back to what the other tests read


def test_killed_pass_resumes(runs, tmp_path):
    """SIGKILL while the 4th group is measured (one unit per group, a checkpoint after each): 3 units are
    kept; the same command finishes the rest, equal to an uninterrupted pass."""
    run = tmp_path / "run"
    shutil.copytree(runs["random"][0], run)
    shutil.rmtree(run / "links", ignore_errors=True)
    whole = tmp_path / "whole"
    shutil.copytree(run, whole)
    args = ["link", "--layer", "5", "--from", "3", "--method", "gxa", "--exemplars", "2", "--batch", "2",
            "--checkpoint-every", "0"]
    marker = tmp_path / "paused"
    p = subprocess.Popen([sys.executable, str(TESTS / "pause.py"), "unitlens.links:_measure", "4", str(marker), "--",
                          args[0], str(run), *args[1:]], cwd=ROOT, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    deadline = time.monotonic() + 120
    while not marker.exists() and p.poll() is None and time.monotonic() < deadline:
        time.sleep(0.1)
    assert marker.exists(), "the pass never reached its 4th group"
    p.send_signal(signal.SIGKILL)
    assert p.wait(30) == -signal.SIGKILL  # the kill landed while it was held
    z = np.load(run / "links" / "5" / "from-3.npz")
    assert int(z["done"].sum()) == 3 and not z["done"].all()
    entry = json.loads((run / "manifest.json").read_text())["links"]["5<-3"]
    assert entry["done"] is False and entry["done_units"] == 3
    for folder in (run, whole):
        r = subprocess.run([sys.executable, "-m", "unitlens", args[0], str(folder), *args[1:]], cwd=ROOT,
                           capture_output=True, text=True)
        assert r.returncode == 0, r.stderr
    a, b = np.load(run / "links" / "5" / "from-3.npz"), np.load(whole / "links" / "5" / "from-3.npz")
    assert a["done"].all()
    np.testing.assert_allclose(a["contribution"], b["contribution"], rtol=1e-6, atol=1e-7)


def test_library_refuses_bad_settings():
    from unitlens.links import LinkConfig

    for bad, words in ((LinkConfig(method="x"), "Unknown link method"), (LinkConfig(baseline="black"), "Valid: zero"),
                       (LinkConfig(steps=0), "steps must be")):
        with pytest.raises(UnitlensError, match=words):
            bad.validate()


def test_atlas_feeder_links_walk_the_network(runs, browser):
    """The unit view of layer 3's unit 3 shows unit 1 driving it up and unit 5 holding it down, each with
    its crop; clicking unit 1 lands on layer 1's page at unit 1's view, whose fed strip leads back."""
    from unitlens import render_atlas
    from unitlens.links import link

    run, model = runs["planted"]
    link(run, "3", model=model)
    atlas = render_atlas(run).parent
    page = browser.page(1280, 1400)
    page.goto((atlas / "layer-3.html").as_uri() + "#unit-3")
    page.wait_for("document.getElementById('unit').dataset.complete")
    first = page.js("[...document.querySelectorAll('.uv-fedby .link-row')].map(r => "
                    "[r.querySelector('h4').textContent, r.querySelector('.link-unit').dataset.unit])")
    assert first == [["drive it up", "1"], ["hold it down", "5"]]
    bg = page.js("document.querySelector('.uv-fedby .link-unit .crop').style.backgroundImage")
    assert "img/1/sheet-000.jpg" in bg and (atlas / "img" / "1" / "sheet-000.jpg").is_file()
    assert not page.js("document.querySelector('#sort option[value=feeders]').disabled")
    page.js("document.querySelector('.uv-fedby a.link-unit').click()")
    page.wait_for("location.pathname.endsWith('/layer-1.html') && location.hash === '#unit-1' && "
                  "(document.getElementById('unit') || {dataset: {}}).dataset.complete === '1'")  # null while it loads
    assert page.js("document.getElementById('unit').dataset.unit") == "1"
    back = page.js("[...document.querySelectorAll('.uv-feeds a.link-unit')].map(a => a.getAttribute('href'))")
    assert "layer-3.html#unit-3" in back
    assert page.errors == [], page.errors
    assert all(u.startswith("file://") for u in page.requests), page.requests
    page.close()
    # the layer page orders by effective feeders: oracle (sum |c|)^2 / sum c^2 in numpy, high first, ties by id
    page = browser.page(1280, 900)
    page.goto((atlas / "layer-3.html").as_uri())
    page.wait_for("document.documentElement.dataset.ready")
    page.js("(() => { const e = document.getElementById('sort'); e.value = 'feeders'; e.dispatchEvent(new Event('change')); })()")
    shown = page.js("(() => { const c = [...document.querySelectorAll('#grid .card')]; "
                    "c.sort((a, b) => parseFloat(a.style.top) - parseFloat(b.style.top) || parseFloat(a.style.left) - parseFloat(b.style.left)); "
                    "return c.map(e => +e.dataset.unit); })()")
    c = np.abs(np.load(run / "links" / "3" / "from-1.npz")["contribution"].astype(np.float64))
    eff = np.array([float(f"{v:.3g}") for v in c.sum(1) ** 2 / (c * c).sum(1)])
    assert shown == np.lexsort((np.arange(len(eff)), -eff)).tolist()
    page.close()


def test_run_object_walks_the_links(runs):
    """load_run(...).unit(...).feeders / .feeds: the same numbers as `show --json`, and a row leads to its unit."""
    from unitlens import load_run
    from unitlens.links import link, unit_links

    run, model = runs["planted"]
    link(run, "3", model=model)
    view = load_run(run)
    u = view.unit("3:3")
    rows = u.feeders
    assert [(r["layer"], r["unit"], r["direction"]) for r in rows][:1] == [("1", 1, "up")]
    down = [r for r in rows if r["direction"] == "down"]
    assert down[0]["unit"] == 5 and down[0]["contribution"] == unit_links(run, "3", 3)["feeders"][0]["down"][0]["contribution"]
    source = view.layer(rows[0]["layer"]).unit(rows[0]["unit"])
    assert any(r["layer"] == "3" and r["unit"] == 3 for r in source.feeds)
    assert list(rows.frame().columns[:3]) == ["layer", "unit", "direction"]


def test_probe_measures_the_feeders_of_its_unit(runs, tmp_path):
    """probe on a run with an earlier mined layer links that one unit (only it) and prints its feeders;
    --no-links leaves them out."""
    run = tmp_path / "run"
    shutil.copytree(runs["planted"][0], run, ignore=shutil.ignore_patterns("links", "probe", "atlas"))
    r = subprocess.run([sys.executable, "-m", "unitlens", "probe", str(run), "3:3", "--attribution", "none",
                        "--no-synth"], cwd=ROOT, capture_output=True, text=True)
    assert r.returncode == 0, r.stderr
    assert "drive it up: 1 (+" in r.stdout and "hold it down: 5 (-" in r.stdout
    z = np.load(run / "links" / "3" / "from-1.npz")
    assert z["units"][z["done"]].tolist() == [3]
    r = subprocess.run([sys.executable, "-m", "unitlens", "probe", str(run), "3:2", "--attribution", "none",
                        "--no-synth", "--no-links"], cwd=ROOT, capture_output=True, text=True)
    assert r.returncode == 0 and "drive it up" not in r.stdout, r.stderr


def test_readme_link_examples_run(tmp_path):
    import shlex

    text = (ROOT / "README.md").read_text()
    section = text.split("### How units connect", 1)[1].split("\n### ", 1)[0]
    block = section.split("```bash\n", 1)[1].split("```", 1)[0]
    commands = [line.split("  #")[0].strip() for line in block.splitlines() if line.strip()]
    assert len(commands) == 7
    outs = []
    for cmd in commands:
        argv = shlex.split(cmd)
        argv = [sys.executable, *(["-m", "unitlens"] if argv[0] == "unitlens" else []), *argv[1:]]
        r = subprocess.run(argv, cwd=tmp_path, capture_output=True, text=True)
        assert r.returncode == 0, (cmd, r.stderr)
        outs.append(r.stdout)
    assert "drive it up:" in outs[4] and "feeds in layer3" in outs[5]
    assert (tmp_path / "runs" / "links" / "links" / "layer3" / "from-layer2.npz").is_file()
    assert "Fed by" in (tmp_path / "runs" / "links" / "atlas" / "atlas.js").read_text()


@pytest.mark.parametrize("source, target, reads_image", [("layer2", "layer3", False), ("layer3.0.conv1", "layer3.0", True)])
def test_cut_network_gives_the_models_own_maps(source, target, reads_image):
    """The network between two layers, fed the source's map, gives the target's map as forward hooks on
    torchvision's ResNet-18 record it; inside a residual block the target also reads the block's input."""
    import torchvision

    from unitlens import load_model
    from unitlens.links import between

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # random weights: warned about once per process, not the point here
        model = load_model("torchvision:resnet18", size=64)
    net = model.module
    seen = {}
    hooks = [net.get_submodule(n).register_forward_hook(lambda _m, _i, o, n=n: seen.__setitem__(n, o.clone()))
             for n in (source, target)]
    x = torch.randn(2, 3, 64, 64, generator=torch.Generator().manual_seed(0))
    with torch.no_grad():
        net(x)
        for h in hooks:
            h.remove()
        cut = between(model, source, target)
        out = cut.forward(seen[source], x if cut.needs_input else None)
    assert cut.needs_input is reads_image
    torch.testing.assert_close(out, seen[target], rtol=1e-5, atol=1e-5)
    assert isinstance(net, torchvision.models.ResNet)


def test_links_of_a_layer_mined_again_are_marked_stale(runs, tmp_path, capsys):
    from unitlens import MineConfig, mine, open_corpus, parse_layers
    from unitlens.links import link

    run = tmp_path / "run"
    shutil.copytree(runs["planted"][0], run, ignore=shutil.ignore_patterns("atlas", "probe"))
    model = runs["planted"][1]
    link(run, "3", model=model)
    assert "stale" not in cli(capsys, "show", run, "3:3")[1]
    mine(model, open_corpus(runs["images"]), parse_layers(model, ["3"]), run, MineConfig(top_k=3, workers=0),
         force=True)  # fewer exemplars kept: other ones
    out = cli(capsys, "show", run, "3:3")[1]
    assert "stale: the layer was mined again" in out
