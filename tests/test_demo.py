"""The built-in demo: shipped weights, the `unitlens demo` command, and the demo as an end-to-end
check, since every swatch's generating factors are known."""
from __future__ import annotations

import math
import subprocess
import sys
from dataclasses import replace
from pathlib import Path

import numpy as np
import pytest
import torch

from unitlens import MineConfig, mine, open_corpus, parse_layers
from unitlens.demo import net, swatches
from unitlens.demo.build import LAYERS, demo_corpus, demo_model
from unitlens.store import Run

from conftest import run_cli

ROOT = Path(__file__).resolve().parents[1]


def _inputs(images) -> torch.Tensor:
    return torch.stack([torch.from_numpy(np.array(im)).permute(2, 0, 1) for im in images])  # (B, 3, S, S) uint8


@pytest.fixture(scope="module")
def model():
    return demo_model()


def test_shipped_weights_are_small_and_classify_fresh_swatches(model):
    assert net.WEIGHTS.stat().st_size <= 5 * 2**20
    assert model.preprocess.size == (net.INPUT_SIZE,) * 2 and model.preprocess.source == "PREPROCESS in net.py"
    # Seed 9 was used neither in training (1), in its held-out check (2) nor by the demo corpus (0).
    fresh = [swatches.sample(i, seed=9) for i in range(240)]
    with torch.no_grad():
        logits = model.module(model.normalize(_inputs(swatches.render(s, net.INPUT_SIZE) for s in fresh)))
    truth = torch.tensor([swatches.CLASSES.index(s.kind) for s in fresh])
    accuracy = float((logits.argmax(1) == truth).float().mean())
    assert accuracy >= 0.9, accuracy  # chance is 1/6; scripts/train_demo_model.py reports ~0.99 held out
    per_kind = [float((logits.argmax(1)[truth == c] == c).float().mean()) for c in range(len(swatches.CLASSES))]
    assert min(per_kind) >= 0.7, per_kind


def _circular_mean(degrees: np.ndarray) -> tuple[float, float]:
    """Mean axis of orientations on the 180-degree circle, and its resultant length in [0, 1]
    (doubled angles: the usual statistic for axial data, Mardia & Jupp 2000, section 9.3)."""
    z = np.exp(2j * np.deg2rad(degrees)).mean()
    return float(np.rad2deg(np.angle(z)) / 2 % 180), float(abs(z))


def test_units_with_one_exemplar_orientation_are_orientation_selective_on_fresh_swatches(model, tmp_path):
    corpus_dir = demo_corpus(tmp_path / "corpus", count=600)
    corpus = open_corpus(corpus_dir, labels="folders")
    mine(model, corpus, parse_layers(model, ["block3", "block4"]), tmp_path / "run", MineConfig(top_k=16, workers=0))
    run = Run(tmp_path / "run")
    truth = {p.resolve(): s for p, s in swatches.read_factors(corpus_dir)}
    factors = [truth[corpus.path(i).resolve()] for i in range(len(corpus))]
    fresh = {k: [s for s in (swatches.sample(i, seed=7) for i in range(200)) if s.kind == k][:16]
             for k in ("twill", "stripe")}
    extract = model.extractor(["block3", "block4"])

    def peak(layer, unit, swatch_list):  # the unit's spatial maximum on each image
        with torch.no_grad():
            x = model.normalize(_inputs(swatches.render(s, net.INPUT_SIZE) for s in swatch_list))
            return extract(x)[layer][:, unit].amax((1, 2)).numpy()

    checked = []
    for layer in ("block3", "block4"):
        idx = run.index(layer)
        for row, unit in enumerate(idx["units"]):
            lined = [factors[i] for i in idx["top_image"][row] if factors[i].kind in ("twill", "stripe")]
            if len(lined) < 8:
                continue
            axis, length = _circular_mean(np.array([s.orientation for s in lined]))
            if length < 0.9:  # the exemplars do not share one orientation
                continue
            kind = max(("twill", "stripe"), key=[s.kind for s in lined].count)
            # Same swatches (dye, frequency, phase, noise), only the orientation turned by 90 degrees.
            best = peak(layer, int(unit), [replace(s, orientation=axis) for s in fresh[kind]])
            across = peak(layer, int(unit), [replace(s, orientation=(axis + 90) % 180) for s in fresh[kind]])
            checked.append((layer, int(unit), float((best > across).mean()), float(best.mean() / across.mean())))
    assert len(checked) >= 5, checked
    for layer, unit, wins, ratio in checked:
        assert wins >= 0.8 and ratio >= 1.1, (layer, unit, wins, ratio)


def test_demo_command_builds_an_atlas(tmp_path):
    out = tmp_path / "demo"
    r = run_cli("demo", "--out", str(out), "--count", "36", "--units", "2", "--steps", "4", "--threads", "1")
    index = Path(r.stdout.strip().splitlines()[-1])
    assert index == out / "atlas" / "index.html" and index.is_file()
    m = Run(out).manifest()
    assert sorted(m["mine"]["layers"]) == sorted(LAYERS) and m["mine"]["done"]
    assert all((out / "synth" / layer / "unit-0001.npz").is_file() for layer in LAYERS)
    assert len(list((out / "corpus").rglob("*.png"))) == 36
    again = run_cli("demo", "--out", str(out), "--count", "36", "--units", "2", "--steps", "4", "--threads", "1")
    assert again.stdout.strip().splitlines()[-1] == str(index)  # resumed: nothing left to do
    # ... and it says so, with the option that would redo it, instead of "mining 36 images"
    assert "Nothing was redone" in again.stderr and "--force" in again.stderr
    assert "mining 36 images" not in again.stderr and "left" not in again.stderr
    # other settings need --force, which the message names and the command has
    other = run_cli("demo", "--out", str(out), "--count", "40", "--units", "2", "--steps", "4", "--threads", "1",
                    check=False)
    assert other.returncode == 1 and "--force" in other.stderr
    forced = run_cli("demo", "--out", str(out), "--count", "40", "--units", "2", "--steps", "4", "--threads", "1",
                     "--force")
    assert "Nothing was redone" not in forced.stderr and Run(out).manifest()["corpus"]["count"] == 40
    assert all((out / "synth" / layer / "unit-0001.npz").is_file() for layer in LAYERS)


def test_demo_refuses_a_folder_that_is_not_its_own(tmp_path):
    (tmp_path / "corpus").mkdir()
    (tmp_path / "corpus" / "holiday.jpg").write_bytes(b"not ours")
    r = run_cli("demo", "--out", str(tmp_path), "--count", "36", check=False)
    assert r.returncode == 1 and "is not a demo corpus" in r.stderr
    assert (tmp_path / "corpus" / "holiday.jpg").read_bytes() == b"not ours"


def test_training_script_runs_and_writes_loadable_weights(tmp_path):
    out = tmp_path / "w.pt"
    r = subprocess.run([sys.executable, str(ROOT / "scripts" / "train_demo_model.py"), "--train", "96", "--test", "36",
                        "--epochs", "1", "--threads", "1", "--out", str(out)], capture_output=True, text=True, timeout=300)
    assert r.returncode == 0, r.stderr
    assert "held-out accuracy per class" in r.stdout
    net.swatch_net().load_state_dict(torch.load(out, weights_only=True))


def test_the_demo_folder_is_ignored_by_git_in_a_clone():
    # the README's first command writes unitlens-demo/ into the clone; git must not offer to commit it
    probe = ["unitlens-demo/atlas/index.html", "unitlens-demo/corpus/dots/dots-00000.png", "unitlens-demo/manifest.json"]
    r = subprocess.run(["git", "check-ignore", "--no-index", *probe], cwd=ROOT, capture_output=True, text=True,
                       check=False)
    assert r.returncode == 0 and r.stdout.split() == probe, r.stderr


def test_packaged_code_is_named_by_module_and_old_site_packages_manifests_still_open(tmp_path):
    import json

    from unitlens import load_model
    from unitlens._specs import canonical_spec
    from unitlens.synth import model_from_run

    model = demo_model()
    assert model.spec == "unitlens.demo.net:swatch_net"  # no path: reinstalling moves the files
    by_path = load_model(f"{ROOT / 'unitlens' / 'demo' / 'net.py'}:swatch_net", str(net.WEIGHTS))
    assert by_path.spec == str(ROOT / "unitlens" / "demo" / "net.py") + ":swatch_net"  # user code: its path
    assert all(torch.equal(a, b) for a, b in zip(model.module.state_dict().values(), by_path.module.state_dict().values()))
    corpus = open_corpus(demo_corpus(tmp_path / "corpus", 12), labels="folders")
    layers = parse_layers(model, ["block1:0-1"])
    out = tmp_path / "run"
    mine(model, corpus, layers, out, MineConfig(top_k=2, workers=0))
    assert Run(out).manifest()["model"]["spec"] == "unitlens.demo.net:swatch_net"

    # A manifest written by `pip install .` names files in site-packages that `pip install -e .` removed.
    gone = "/gone/venv/lib/python3.11/site-packages/unitlens/demo"
    assert canonical_spec(f"{gone}/net.py:swatch_net") == "unitlens.demo.net:swatch_net"
    man = json.loads((out / "manifest.json").read_text())
    for d in (man["model"], man["mine"]["settings"]["model"]):
        d["spec"] = f"{gone}/net.py:swatch_net"
        d["weights"]["path"] = f"{gone}/swatch_net.pt"
    (out / "manifest.json").write_text(json.dumps(man))
    again = model_from_run(out)
    assert again.spec == "unitlens.demo.net:swatch_net" and again.weights["sha256"] == model.weights["sha256"]
    mine(model, corpus, layers, out, MineConfig(top_k=2, workers=0))  # the finished pass is recognised, not refused
    r = run_cli("probe", out, "block1:1", "--attribution", "none", "--no-synth", "--top", "2", "--json")
    assert json.loads(r.stdout)["model"] == "unitlens.demo.net:swatch_net"


def test_module_specs_that_do_not_import_say_what_to_do():
    from unitlens import UnitlensError, load_model

    with pytest.raises(UnitlensError, match="Cannot import the model's module 'no_such_pkg.nets'.*file.py:function"):
        load_model("no_such_pkg.nets:build")
    with pytest.raises(UnitlensError, match="has no function 'nope'"):
        load_model("unitlens.demo.net:nope")


def test_code_in_another_environments_site_packages_keeps_its_path(tmp_path):
    from unitlens._specs import canonical_spec

    pkg = tmp_path / "lib" / "site-packages" / "not_importable_here_pkg"
    pkg.mkdir(parents=True)
    (pkg / "nets.py").write_text("")
    spec = f"{pkg / 'nets.py'}:build"
    assert canonical_spec(spec) == spec  # the file is there, its package does not import: keep the file
    assert canonical_spec("/elsewhere/site-packages/unitlens/demo/net.py:swatch_net") == "unitlens.demo.net:swatch_net"
