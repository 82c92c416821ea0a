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
from unitlens.workflow import MIN_STEPS, _spread, expected_steps, parse_budget, plan


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


def test_plan_counts_the_steps_images_run_not_the_cap():
    # Sampled images of a stopped at 16, 32, 64 and 256 (the cap) steps; of b at 64, 64, 128, 256.
    # Worked by hand, cap 256: a expects (16 + 32 + 64 + 256) / 4 = 92 steps per image, b
    # (64 + 64 + 128 + 256) / 4 = 128; a 64/16 batches * 92 * 0.5 = 184 s, b 2 * 128 * 1.0 = 256 s,
    # + 11.5 s mining = 451.5 s (at the cap the same run would be planned at 1035.5 s).
    calib = {**CALIB, "stop_steps": {"a": [16, 32, 64, 256], "b": [64, 64, 128, 256]}}
    p = plan(2000, 1000, LAYERS, 256, 128, calib)
    assert p.steps == 256 and p.estimate_s == pytest.approx(451.5)
    assert p.image_steps == {"a": 92, "b": 128}
    assert any("a 92 (4 sampled images, 3 stopped before 256)" in r for r in p.reasons), p.reasons
    # 400 s: 388.5 s left. Cap 128: a (16 + 32 + 64 + 128) / 4 = 60 -> 4 * 60 * 0.5 = 120 s, b (64 + 64
    # + 128 + 128) / 4 = 96 -> 2 * 96 = 192 s: 323.5 s fits, every unit kept. Planned at the cap, the
    # same budget needs a cap of 64 (a 256 + b 256 = 512 s at 128 do not fit).
    p = plan(400, 1000, LAYERS, 256, 128, calib)
    assert (p.steps, p.size) == (128, 128) and p.estimate_s == pytest.approx(323.5)
    assert [len(lu.units) for lu in p.layers] == [64, 32]
    assert plan(400, 1000, LAYERS, 256, 128, CALIB).steps == 64
    # The sampled units are synthesised already: while the cap and size stay they cost nothing.
    # a 60 left: 60/16 * 92 * 0.5 = 172.5 s; b 28 left: 28/16 * 128 = 224 s; + 11.5 = 408 s.
    sampled = {"a": (0, 16, 32, 48), "b": (0, 8, 16, 24)}
    p = plan(2000, 1000, LAYERS, 256, 128, {**calib, "sampled": sampled})
    assert p.steps == 256 and p.estimate_s == pytest.approx(408)
    # once the cap is cut they are redone with the rest: the 400 s plan is unchanged
    assert plan(400, 1000, LAYERS, 256, 128, {**calib, "sampled": sampled}).estimate_s == pytest.approx(323.5)


@pytest.mark.parametrize("cap,sample,expect", [(100, [10, 200], 55.0), (256, [10, 200], 105.0), (64, None, 64.0),
                                               (64, [], 64.0), (8, [10, 200], 8.0)])
def test_expected_steps(cap, sample, expect):
    # by hand: each sampled image runs min(its steps, cap); (10 + 100) / 2 = 55, (10 + 200) / 2 = 105
    assert expected_steps(cap, sample) == expect


@pytest.mark.parametrize("units,n,keep,expect", [
    (tuple(range(10)), 5, (), (0, 2, 4, 6, 8)),
    (tuple(range(10)), 4, (1,), (0, 1, 4, 7)),  # 1 kept; 3 of the other 9, every 3rd: 0, 4, 7
    (tuple(range(10)), 2, (3, 5, 9), (3, 5, 9)),  # more kept than asked: the kept ones
    (tuple(range(10)), 12, (3,), tuple(range(10))),
    ((7, 3, 5, 1), 2, (5,), (7, 5)),  # order kept as given
])
def test_spread_keeps_given_units(units, n, keep, expect):
    assert _spread(units, n, keep) == expect


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


def test_sample_costs_worked_example():
    from unitlens.workflow import sample_costs

    calib = {"synth_s_per_step": {"a": 1.0, "b": 2.0}, "synth_s_fixed": {"a": 0.0}, "batch": {"a": 4, "b": 4},
             "synth_s_per_unit": {"a": 0.1, "b": 0.2}}
    # Worked by hand: 4 sampled units of a ran 10, 20, 30, 40 steps in one batch of 4: the step
    # model gives 100 image steps / 4 x 1 s = 25 s; the loop really took 30 s, so 1.2x. Each unit
    # cost (2 + 6) / 4 = 2 s beside the loop, split over 2 ranks: 1 s. b was not timed: its
    # calibration figure, split (0.2 / 2).
    timings = {"a": {"units": 4, "loop": 30.0, "references": 2.0, "units_s": 6.0}}
    got = sample_costs(calib, timings, {"a": [10, 20, 30, 40]}, 256, world=2, atlas_s=1.5)
    assert got["loop_factor"] == pytest.approx({"a": 1.2})
    assert got["synth_s_per_unit"] == pytest.approx({"a": 1.0, "b": 0.1}) and got["atlas_s"] == 1.5
    # the factor is held within [0.75, 2] (a sample hit by a burst of load must not skew the plan)
    for loop, factor in ((100.0, 2.0), (5.0, 0.75)):
        got = sample_costs(calib, {"a": {**timings["a"], "loop": loop}}, {"a": [10, 20, 30, 40]}, 256)
        assert got["loop_factor"]["a"] == factor
    # a sample thinner than the layer's batch (4 units, batch 8) says nothing of a full batch's loop;
    # its per-unit cost still counts
    got = sample_costs({**calib, "batch": {"a": 8, "b": 4}}, timings, {"a": [10, 20, 30, 40]}, 256)
    assert got["loop_factor"] == {} and got["synth_s_per_unit"]["a"] == pytest.approx(2.0)


def test_plan_applies_the_loop_factor_and_a_redraw_per_layer():
    # Worked by hand from the first example: a's loop 512 s x 1.5 = 768 s, b's 512 s; each layer
    # adds a 2 s redraw of the atlas: 11.5 + 770 + 514 = 1295.5 s
    p = plan(2000, 1000, LAYERS, 256, 128, {**CALIB, "loop_factor": {"a": 1.5}, "atlas_s": 2.0})
    assert p.estimate_s == pytest.approx(1295.5) and p.parts == pytest.approx({"mining": 11.5, "a": 770, "b": 514})


@pytest.fixture
def neutral_sample(monkeypatch):
    """Plan from the fixed calibration only: the sample's measured costs (real time) left out,
    at most 8 units sampled per layer; the arguments sample_costs was given are recorded."""
    from unitlens import workflow

    seen = []
    monkeypatch.setattr(workflow, "SAMPLE_UNITS", (8,))
    monkeypatch.setattr(workflow, "sample_costs", lambda *a, **k: seen.append((a, k)) or {})
    return seen


def test_a_budget_cuts_synthesised_units_never_mined_ones(tmp_path, monkeypatch, neutral_sample):
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


def _budget_run(tmp_path, monkeypatch, config, budget, channels="2:0-15"):
    from unitlens import MineConfig, load_model, open_corpus, parse_layers, run_all
    from unitlens.store import Run

    m = load_model(f"{ROOT / 'tests' / 'nets.py'}:digits_net", size=16)
    layers = parse_layers(m, [channels])
    corpus = open_corpus(_corpus(tmp_path / "c", 6))
    out, lines = tmp_path / "run", []
    run_all(m, corpus, layers, out, MineConfig(top_k=2, workers=0), config, budget=budget, log=lines.append)
    table = json.loads((out / "synth" / "2" / "units.json").read_text())["units"]
    return Run(out).manifest(), table, lines


def test_a_budget_plans_with_the_steps_sampled_units_ran(tmp_path, monkeypatch, neutral_sample):
    from unitlens import workflow
    from unitlens.synth import SynthConfig

    # Calibration fixed (no timing in tests): a batch of 2 units costs 0.01 s per step.
    fixed = {"mine_s_per_image": 0.0, "synth_s_per_step": {"2": 0.01}, "synth_s_per_unit": {"2": 0.0},
             "batch": 2, "size": 16}
    monkeypatch.setattr(workflow, "calibrate", lambda *a, **k: fixed)
    man, table, lines = _budget_run(tmp_path, monkeypatch, SynthConfig(steps=64, checks=4, stop_at_parity=0.1), "1h")
    p = man["budget"]["plan"]
    sampled = range(0, 16, 2)  # 8 of 16, evenly spread
    ran = [im["steps"] for u in sampled for im in table[str(u)]["images"]]
    # the oracle: the steps the sampled units' images ran, as their records say (each at most the cap)
    assert max(ran) <= 64 and p["image_steps"]["2"] == pytest.approx(sum(ran) / len(ran), abs=0.05)
    # the 8 units left cost 8 / 2 batches x the mean steps x 0.01 s
    assert p["estimate_parts"]["2"] == pytest.approx(4 * sum(ran) / len(ran) * 0.01, abs=0.051)  # rounded to 0.1 s
    assert sorted(int(u) for u in table) == list(range(16)) and p["channels"] == {"2": "0-15"}
    assert not p["redo_sample"] and man["synth"]["settings"]["config"]["steps"] == 64
    assert any("synthesis of 8 units" in line for line in lines), lines
    assert any("8 sampled images" in line for line in lines), lines
    assert any("mining all 16 units first" in line for line in lines), lines
    # the sample's own times reached the planner: 8 units of layer 2, timed stage by stage
    (calib, timings, stops, cap, world, atlas_s), _ = neutral_sample[0]
    assert timings["2"]["units"] == 8 and timings["2"]["loop"] > 0 and stops["2"] == ran and cap == 64
    assert p["sample_s"]["2"]["units"] == 8


def test_a_sample_made_at_a_cap_the_plan_cuts_is_redone(tmp_path, monkeypatch, neutral_sample):
    from unitlens import workflow
    from unitlens.synth import SynthConfig

    # Every image runs to its cap (no early stop). 1 s per step of 2 units. By hand: 8 of the 32
    # units sampled at 128 steps (512 s at most: the sample's share is lifted for the test); the
    # 24 left need 24/2 * 128 = 1536 s, more than the ~1300 s left; a cap of 64 redoes all 32 in
    # 32/2 * 64 = 1024 s, which fits.
    fixed = {"mine_s_per_image": 0.0, "synth_s_per_step": {"2": 1.0}, "synth_s_per_unit": {"2": 0.0},
             "batch": 2, "size": 16}
    monkeypatch.setattr(workflow, "calibrate", lambda *a, **k: fixed)
    monkeypatch.setattr(workflow, "SAMPLE_SHARE", 1.0)
    man, table, lines = _budget_run(tmp_path, monkeypatch, SynthConfig(steps=128, checks=0, stop_gain=None),
                                    "1300s", "2:0-31")
    p = man["budget"]["plan"]
    assert p["steps"] == 64 and p["redo_sample"] and p["estimate_parts"]["2"] == pytest.approx(1024)
    assert man["synth"]["settings"]["config"]["steps"] == 64
    assert sorted(int(u) for u in table) == list(range(32))
    assert {im["steps"] for rec in table.values() for im in rec["images"]} == {64}  # the sample redone at 64


def test_loop_seconds_pays_the_fixed_part_of_a_thin_batch():
    from unitlens.workflow import loop_seconds

    # Worked by hand: 4 units, 2 at a time, sampled stops 10 and 30 steps, so the units run 10, 30,
    # 10, 30. Slot A: unit 0 (0-10), unit 2 (10-20), unit 3 (20-50); slot B: unit 1 (0-30): 50 loop
    # steps. A full step costs 1 s, of which 0.5 s is fixed: 50 * 0.5 + (80 image steps) * 0.5 / 2 = 45 s.
    assert loop_seconds(4, 2, 256, [10, 30], 1.0, 0.5) == pytest.approx(45.0)
    # without a fixed part: image steps / batch full steps, 80 / 2 * 1 s = 40 s (the thin tail costs
    # in proportion to its images)
    assert loop_seconds(4, 2, 256, [10, 30], 1.0) == pytest.approx(40.0)
    # the cap holds each unit: 10, 20, 10, 20 -> slot A 0-10, 10-20, 20-40; B 0-20: 40 steps * 0.5
    # + 60 * 0.25 = 35 s; no sample: every unit the cap, 2 rounds of 20 steps: 40 * 0.5 + 80 * 0.25 = 40 s
    assert loop_seconds(4, 2, 20, [10, 30], 1.0, 0.5) == pytest.approx(35.0)
    assert loop_seconds(4, 2, 20, None, 1.0, 0.5) == pytest.approx(40.0)
    assert loop_seconds(0, 2, 20, None, 1.0, 0.5) == 0.0


def test_eta_scales_by_the_layers_done_once_they_are_a_fifth_of_the_plan(monkeypatch):
    from unitlens import workflow

    monkeypatch.setattr(workflow.time, "monotonic", lambda: 1000.0)
    plan_s = {"a": 10.0, "b": 40.0, "c": 50.0}
    # Worked by hand: a (10 s of a 100 s plan) took 30 s; a tenth of the plan is not scaled: b + c = 90 s
    assert workflow._eta(970.0, 1, 3, plan_s, ("a",), ("b", "c")) == "about 1.5 min left"
    # a and b (half the plan, 50 s planned) took 100 s: twice the plan, so c's 50 s become 100 s
    assert workflow._eta(900.0, 2, 3, plan_s, ("a", "b"), ("c",)) == "about 1.7 min left"
    # no plan: the mean time per unit so far, 100 s for 2 of 3 units -> 50 s
    assert workflow._eta(900.0, 2, 3) == "about 50 s left"
