"""`unitlens run`: budget planning, and resume after SIGKILL in each stage."""
import json
import os
import signal
import subprocess
import sys
import time

import numpy as np
import pytest

from conftest import ROOT
from unitlens import UnitlensError
from unitlens.units import LayerUnits
from unitlens.workflow import MIN_STEPS, parse_budget, plan


@pytest.mark.parametrize("text,seconds", [("8h", 28800), ("90m", 5400), ("2h30m", 9000), ("45s", 45),
                                          ("3600", 3600), ("1.5h", 5400), ("1d", 86400)])
def test_budget_text(text, seconds):
    assert parse_budget(text) == seconds


@pytest.mark.parametrize("bad", ["", "8x", "h", "8h junk", "-1h"])
def test_bad_budget_text(bad):
    with pytest.raises(UnitlensError, match="budget"):
        parse_budget(bad)


CALIB = {"mine_s_per_image": 0.01, "synth_s_per_step": {"a": 0.5, "b": 1.0}, "batch": 16, "size": 128}
LAYERS = (LayerUnits("a", tuple(range(64))), LayerUnits("b", tuple(range(32))))


def test_plan_worked_examples():
    # Worked by hand: mining 1000 images = 1000 * 0.01 * 1.15 = 11.5 s. Synthesis at 256 steps:
    # a: 4 batches * 256 * 0.5 = 512 s; b: 2 batches * 256 * 1.0 = 512 s; total 1035.5 s.
    p = plan(2000, 1000, LAYERS, 256, 128, CALIB)
    assert (p.steps, p.size) == (256, 128) and p.estimate_s == pytest.approx(1035.5)
    assert "everything requested fits" in p.reasons
    # Half the budget: steps halve to 128 (a 256 + b 256 + 11.5 = 523.5 s).
    p = plan(600, 1000, LAYERS, 256, 128, CALIB)
    assert p.steps == 128 and p.size == 128 and p.estimate_s == pytest.approx(523.5)
    # Very tight: steps hit their floor, then the size shrinks (to 96 px: cost x 0.5625), then
    # the units. All units at 64 steps, 96 px: a 64/16 * 64 * 0.5 * 0.5625 = 72 s, b 2 * 64 * 0.5625
    # = 72 s; 80 - 11.5 = 68.5 s left is a fraction 0.4757 of 144 s: a keeps int(64 * 0.4757) = 30
    # units (33.75 s), b 15 (33.75 s), 67.5 s in all: it fits, so the estimate is 79 s.
    p = plan(80, 1000, LAYERS, 256, 128, CALIB)
    assert p.steps == MIN_STEPS and p.size == 96 and p.estimate_s == pytest.approx(79.0)
    assert [len(lu.units) for lu in p.layers] == [30, 15]
    assert p.layers[0].units[:4] == (0, 2, 4, 6) and p.layers[1].units[:3] == (0, 2, 4)  # evenly spread
    assert p.parts == pytest.approx({"mining": 11.5, "a": 33.75, "b": 33.75})
    # one unit per layer: a 1/16 * 64 * 0.5 * 0.5625 = 1.125 s + b 2.25 s; 14 - 11.5 = 2.5 s do not hold it
    with pytest.raises(UnitlensError, match="Even one unit per layer"):
        plan(14, 1000, LAYERS, 256, 128, CALIB)
    with pytest.raises(UnitlensError, match="Mining 1000 images alone"):
        plan(5, 1000, LAYERS, 256, 128, CALIB)


def _corpus(d, n=24):
    from PIL import Image

    d.mkdir()
    rng = np.random.default_rng(5)
    for i in range(n):
        Image.fromarray(rng.integers(0, 255, (40, 48, 3), dtype=np.uint8)).save(d / f"{i:02d}.png")
    return d


def _cmd(corpus, out, weights):
    return [sys.executable, "-m", "unitlens", "run", "torchvision:resnet18", "--weights", str(weights),
            "--size", "32", "--corpus", str(corpus), "--layers", "layer1:0-5", "--layers", "layer2:0-3",
            "--steps", "24", "--top", "3", "--workers", "0", "--batch-size", "4", "--out", str(out)]


def _atlas_data(out):
    d = out / "atlas" / "data"
    return {p.name: p.read_text() for p in sorted(d.glob("*.js"))}


def _kill_when(cmd, ready, timeout=240) -> int:
    """Start `cmd`, SIGKILL it once `ready()`; its exit status (-9 when the kill landed)."""
    p = subprocess.Popen(cmd, cwd=ROOT, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline and p.poll() is None and not ready():
        time.sleep(0.02)
    if p.poll() is None:
        os.kill(p.pid, signal.SIGKILL)
    return p.wait()


def test_run_resumes_after_sigkill_in_each_stage(tmp_path, r18_weights):
    corpus = _corpus(tmp_path / "c")
    whole = tmp_path / "whole"
    r = subprocess.run(_cmd(corpus, whole, r18_weights), cwd=ROOT, capture_output=True, text=True)
    assert r.returncode == 0, r.stderr
    assert (whole / "atlas" / "index.html").is_file()
    expect = _atlas_data(whole)
    assert expect
    again = subprocess.run(_cmd(corpus, whole, r18_weights), cwd=ROOT, capture_output=True, text=True)
    assert again.returncode == 0 and "Nothing was redone" in again.stderr and "--force" in again.stderr
    assert "mining 24 images" not in again.stderr and "min left" not in again.stderr
    assert _atlas_data(whole) == expect

    # Each stage is held at a chosen call (tests/pause.py), so the kill lands inside it on any machine.
    stops = {"mining": ("unitlens.mining:LayerTally.added", 7),  # batch 4 of 6, second layer pending
             "synthesis": ("unitlens.synth.pipeline:_write_unit", 3),  # some units written, not all
             "atlas": ("unitlens.atlas.render:_draw_layer", 2)}  # first layer drawn, second not

    def manifest(out):
        return json.loads((out / "manifest.json").read_text())

    # what is still unfinished when the kill lands, so the rerun has something to resume
    def mining_unfinished(out):
        return not manifest(out)["mine"].get("done")

    def synth_unfinished(out):
        layers = (manifest(out).get("synth") or {}).get("layers") or {}
        return not (len(layers) == 2 and all(v.get("complete") for v in layers.values()))

    def atlas_unfinished(out):
        return not (out / "atlas" / "index.html").is_file()  # the index is the atlas's last file

    for name, unfinished in (("mining", mining_unfinished), ("synthesis", synth_unfinished),
                             ("atlas", atlas_unfinished)):
        out, marker = tmp_path / name, tmp_path / f"{name}.paused"
        target, n = stops[name]
        held = [sys.executable, str(ROOT / "tests" / "pause.py"), target, str(n), str(marker), "--",
                *_cmd(corpus, out, r18_weights)[3:]]
        assert _kill_when(held, marker.is_file) == -signal.SIGKILL, f"{name}: ended unkilled"
        assert marker.is_file(), f"{name}: the kill came before the chosen moment"
        assert unfinished(out), f"the kill should land during {name}"
        r = subprocess.run(_cmd(corpus, out, r18_weights), cwd=ROOT, capture_output=True, text=True)
        assert r.returncode == 0, r.stderr
        assert _atlas_data(out) == expect, f"killed during {name}"


def test_plan_counts_each_units_evidence_and_reports_mining_whole():
    # Worked by hand: as the first example, plus 0.25 s of evidence per unit: a 64 * 0.25 = 16 s,
    # b 32 * 0.25 = 8 s, so 1035.5 + 24 = 1059.5 s; every unit is still synthesised.
    calib = {**CALIB, "synth_s_per_unit": {"a": 0.25, "b": 0.25}}
    p = plan(2000, 1000, LAYERS, 256, 128, calib)
    assert p.estimate_s == pytest.approx(1059.5) and [len(lu.units) for lu in p.layers] == [64, 32]
    # already mined: the mining term is 0 whatever the corpus size
    assert plan(2000, 10**9, LAYERS, 256, 128, calib, already_mined=True).estimate_s == pytest.approx(1048)


def test_a_budget_cuts_synthesised_units_never_mined_ones(tmp_path, monkeypatch):
    from unitlens import MineConfig, load_model, open_corpus, parse_layers, run_all, workflow
    from unitlens.store import Run
    from unitlens.synth import SynthConfig

    # Calibration numbers fixed (no timing in tests): a batch of 2 units costs 1 s per step, mining nothing.
    fixed = {"mine_s_per_image": 0.0, "synth_s_per_step": {"2": 1.0}, "synth_s_per_unit": {"2": 0.0},
             "batch": 2, "size": 16}
    monkeypatch.setattr(workflow, "calibrate", lambda *a, **k: fixed)
    m = load_model(f"{ROOT / 'tests' / 'nets.py'}:digits_net", size=16)
    layers = parse_layers(m, ["2:0-7"])
    corpus = open_corpus(_corpus(tmp_path / "c", 6))
    out = tmp_path / "run"
    # 64 steps (the floor) x 1 s per batch of 2: 4 batches need 256 s; 150 s fit 2 batches, 4 units.
    lines = []
    run_all(m, corpus, layers, out, MineConfig(top_k=2, workers=0), SynthConfig(steps=64, checks=0),
            budget="150s", log=lines.append)
    man = Run(out).manifest()
    assert man["mine"]["settings"]["layers"] == {"2": list(range(8))}  # every unit mined
    assert man["budget"]["plan"]["units"] == {"2": 4} and man["synth"]["layers"]["2"]["channels"] == "0,2,4,6"
    assert man["budget"]["plan"]["estimate_s"] == pytest.approx(128)
    assert any("mining all 8 units" in line for line in lines), lines
