"""`unitlens show`: what a run knows about one unit, read without torch."""
import json
import os
import subprocess
import sys
from pathlib import Path

import pytest
from conftest import ROOT, run_cli

from unitlens import MineConfig, mine, open_corpus, parse_layers
from unitlens.demo.build import demo_corpus, demo_model
from unitlens.synth import Goal, SynthConfig, synthesize


@pytest.fixture(scope="module")
def run(tmp_path_factory):
    """A demo-network run, mined over 24 swatches and with two units of block1 synthesised."""
    d = tmp_path_factory.mktemp("summary")
    model = demo_model()
    corpus = open_corpus(demo_corpus(d / "corpus", 24), labels="folders")
    mine(model, corpus, parse_layers(model, ["block1:0-1"]), d / "run", MineConfig(top_k=3, workers=0))
    synthesize(model, Goal(("block1:0-1",)), d / "run", SynthConfig(steps=4, checks=0, stop_gain=None))
    # block2:0 is synthesised but block2 was never mined
    synthesize(model, Goal(("block2:0",)), d / "run", SynthConfig(steps=4, checks=0, stop_gain=None))
    return d / "run"


def test_show_does_not_import_torch(run):
    code = ("import sys\n"
            "from unitlens.cli import main\n"
            f"sys.argv = ['unitlens', 'show', {str(run)!r}, 'block1:0']\n"
            "try:\n    main()\nexcept SystemExit as e:\n    assert not e.code, e.code\n"
            "print(sorted(m for m in sys.modules if m == 'torch' or m.startswith('torch.')))\n")
    r = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, cwd=ROOT, timeout=120,
                       check=False)
    assert r.returncode == 0, r.stderr
    assert "top exemplars" in r.stdout  # it did read the unit
    assert r.stdout.strip().splitlines()[-1] == "[]"


def test_show_json_gives_every_path_absolute_even_for_a_relative_run(run):
    rel = os.path.relpath(run, ROOT)  # run_cli runs in ROOT
    assert not Path(rel).is_absolute()
    s = json.loads(run_cli("show", rel, "block1:1", "--json").stdout)
    paths = [s["run"]] + [e["image"] for e in s["exemplars"]]
    paths += [p for r in s["synth"] for p in (r["image"], r["trace"])]
    assert len(s["synth"]) == 1 and len(paths) == 1 + 3 + 2
    for p in paths:
        assert Path(p).is_absolute() and Path(p).exists(), p


def test_show_prints_a_unit_that_was_synthesised_but_not_mined(run):
    out = run_cli("show", str(run), "block2:0").stdout
    assert "synthesised only" in out and "synthesised: " in out
    png = out.split("synthesised: ")[1].split("  (")[0]
    assert Path(png).is_file()  # the line names the real image
    s = json.loads(run_cli("show", str(run), "block2:0", "--json").stdout)
    assert s["stats"] is None and s["exemplars"] is None and len(s["synth"]) == 1
    r = run_cli("show", str(run), "block2:1", check=False)  # neither mined nor synthesised
    assert r.returncode == 1 and "has not been mined" in r.stderr


def test_show_fires_by_the_layers_percentile_and_says_so(run):
    """show's firing share uses the atlas's threshold (the layer's pooled 90th percentile of per-image
    maxima), checked by brute force on the raw per-image maxima mining keeps; text and JSON state it."""
    import numpy as np

    values = np.load(run / "mine" / "block1" / "values.npy").astype(np.float64)  # (N, U) per-image maxima
    for channel in (0, 1):
        s = json.loads(run_cli("show", str(run), f"block1:{channel}", "--json").stdout)
        st = s["stats"]
        t = st["fire_threshold"]
        assert st["fire_quantile"] == 0.9 and st["fire_units"] == values.shape[1]
        assert np.mean(values >= t) <= 0.1 + 1e-9  # pooled: at most a tenth of all maxima reach it
        assert np.mean(values >= np.nextafter(np.float32(t), -np.inf)) > 0  # and some do
        assert st["fire_rate"] == pytest.approx(np.mean(values[:, channel] >= np.float32(t)), abs=1e-9)
        text = run_cli("show", str(run), f"block1:{channel}").stdout
        assert f"fires (max >= {t:.3g}, the 90th percentile" in text
        assert f"on {100 * st['fire_rate']:.1f}% of images" in text and "max > 0" not in text
