"""`unitlens run`: mine, then synthesise layer by layer, redrawing the atlas after each layer.

Every stage resumes from what the run folder holds, so the same command can be killed and run
again at any moment. With a time budget, a short calibration on this machine picks the synthesis
steps, image size and units per layer that fit, and says why.
"""
from __future__ import annotations

import re
import sys
import time
from dataclasses import dataclass, replace

import torch

from .errors import UnitlensError
from .units import LayerUnits

_UNITS = {"s": 1, "m": 60, "h": 3600, "d": 86400}
MIN_STEPS = 64  # below this, spectral images are still mostly noise
MIN_SIZE = 96


def parse_budget(text: str) -> float:
    """'8h', '90m', '2h30m', '45s' or a plain number of seconds -> seconds."""
    t = text.strip().lower().replace(" ", "")
    if re.fullmatch(r"\d+(\.\d+)?", t):
        return float(t)
    parts = re.findall(r"(\d+(?:\.\d+)?)([smhd])", t)
    if not parts or "".join(a + b for a, b in parts) != t:
        raise UnitlensError(f"Cannot read the budget '{text}'; write e.g. 8h, 90m, 2h30m or 3600.")
    return sum(float(a) * _UNITS[b] for a, b in parts)


@dataclass(frozen=True)
class Plan:
    steps: int
    size: int
    layers: tuple[LayerUnits, ...]
    estimate_s: float
    reasons: tuple[str, ...]

    def describe(self) -> dict:
        return {"steps": self.steps, "size": self.size, "estimate_s": round(self.estimate_s, 1),
                "units": {lu.layer: len(lu.units) for lu in self.layers}, "reasons": list(self.reasons)}


def _timed(fn, repeats: int = 2) -> float:
    fn()  # warm-up (allocations, lazy initialisation)
    t = time.perf_counter()
    for _ in range(repeats):
        fn()
    return (time.perf_counter() - t) / repeats


def calibrate(model, layers, batch: int, size: int) -> dict:
    """Seconds per mined image and per synthesis step of a full batch, measured on this machine."""
    ext = model.extractor([lu.layer for lu in layers])
    x = torch.rand(batch, model.preprocess.channels, *model.preprocess.size)

    def forward():
        with torch.inference_mode():
            ext(model.normalize(x))

    per_image = _timed(forward) / batch
    per_step = {}
    for lu in layers:
        one = model.extractor([lu.layer])
        img = torch.rand(batch, model.preprocess.channels, size, size, requires_grad=True)

        def step():
            with torch.enable_grad():
                one(model.normalize(img))[lu.layer].mean().backward()

        per_step[lu.layer] = _timed(step, 1)
    return {"mine_s_per_image": per_image, "synth_s_per_step": per_step, "batch": batch, "size": size}


def plan(budget_s: float, n_images: int, layers, steps: int, size: int, calib: dict,
         already_mined: bool = False) -> Plan:
    """Choose steps, then size, then units per layer, in that order, until the estimate fits."""
    batch = calib["batch"]
    mine_s = 0.0 if already_mined else n_images * calib["mine_s_per_image"] * 1.15  # decoding and crops

    def synth_s(st, sz, lys):
        scale = (sz / calib["size"]) ** 2  # convolution cost grows with the pixel count
        return sum(-(-len(lu.units) // batch) * st * calib["synth_s_per_step"][lu.layer] * scale for lu in lys)

    reasons = [f"calibration: {calib['mine_s_per_image'] * 1000:.1f} ms per mined image; "
               + ", ".join(f"{k} {v:.2f} s per synthesis step of {batch} images at {calib['size']} px"
                           for k, v in calib["synth_s_per_step"].items())]
    if mine_s > budget_s:
        raise UnitlensError(
            f"Mining {n_images} images alone needs about {mine_s / 3600:.1f} h on this machine, more than the "
            f"budget of {budget_s / 3600:.1f} h. Give a larger --budget or a smaller corpus.")
    left = budget_s - mine_s
    st, sz, lys = steps, size, tuple(layers)
    while synth_s(st, sz, lys) > left and st > MIN_STEPS:
        st = max(MIN_STEPS, st // 2)
    if st != steps:
        reasons.append(f"steps {steps} -> {st}: the requested steps do not fit")
    while synth_s(st, sz, lys) > left and sz > MIN_SIZE:
        sz = max(MIN_SIZE, int(sz * 0.75))
    if sz != size:
        reasons.append(f"size {size} -> {sz} px: {st} steps at {size} px do not fit")
    if synth_s(st, sz, lys) > left:
        # keep an evenly spaced subset of each layer's units, so every layer stays represented;
        # shrink the fraction step by step, since units cost whole batches
        fraction, full = left / synth_s(st, sz, lys), lys
        while True:
            lys = tuple(replace(lu, units=_spread(lu.units, max(1, int(len(lu.units) * fraction)))) for lu in full)
            if synth_s(st, sz, lys) <= left:
                break
            if all(len(lu.units) == 1 for lu in lys):
                raise UnitlensError(
                    f"Even one unit per layer at {st} steps and {sz} px needs about "
                    f"{(mine_s + synth_s(st, sz, lys)) / 60:.0f} min, more than the budget of "
                    f"{budget_s / 60:.0f} min. Give a larger --budget or fewer layers.")
            fraction *= 0.9
        kept = sum(len(lu.units) for lu in lys)
        reasons.append(f"units cut to {kept} of {sum(len(lu.units) for lu in full)} (evenly spaced in each "
                       "layer): all units do not fit")
    if len(reasons) == 1:
        reasons.append("everything requested fits")
    return Plan(st, sz, lys, mine_s + synth_s(st, sz, lys), tuple(reasons))


def _spread(units: tuple[int, ...], n: int) -> tuple[int, ...]:
    if n >= len(units):
        return units
    step = len(units) / n
    return tuple(units[int(i * step)] for i in range(n))


def run_all(model, corpus, layers, out, mine_config, synth_config, *, budget: str | None = None,
            progress: bool = False, log=None):
    """Mine `corpus`, synthesise `layers` one by one, and keep `out`/atlas up to date."""
    from . import dist
    from .atlas import render_atlas
    from .mining import mine
    from .store import Run
    from .synth import Goal, synthesize

    g = dist.group()  # under torchrun: every rank mines and synthesises its shard, rank 0 draws
    say = (log or (lambda msg: print(msg, file=sys.stderr))) if g.main else (lambda msg: None)
    draw = render_atlas if g.main else (lambda run: None)
    run = Run(out)
    size = synth_config.size or model.preprocess.side
    chosen_plan = None
    if budget is not None:
        seconds = parse_budget(budget)
        mined = run.exists() and (run.manifest().get("mine") or {}).get("done", False)
        previous = run.manifest().get("budget") if run.exists() else None
        if previous and previous.get("budget_s") == seconds:
            chosen_plan = previous["plan"]  # a resumed run keeps the plan it started with
            say(f"budget: resuming with the plan chosen before ({chosen_plan['steps']} steps, "
                f"{chosen_plan['size']} px)")
        elif g.main:  # one calibration, one plan for every rank; the work splits g.world ways
            calib = calibrate(model, layers, synth_config.batch_size or synth_config.max_batch, size)
            split = {**calib, "mine_s_per_image": calib["mine_s_per_image"] / g.world,
                     "synth_s_per_step": {k: v / g.world for k, v in calib["synth_s_per_step"].items()}}
            p = plan(seconds, len(corpus), layers, synth_config.steps, size, split, already_mined=mined)
            chosen_plan = {**p.describe(), "calibration": calib}
            say(f"budget {budget}: {p.steps} steps, {p.size} px, "
                + ", ".join(f"{lu.layer} {len(lu.units)} units" for lu in p.layers)
                + f"; estimate {p.estimate_s / 60:.0f} min")
            for r in p.reasons:
                say(f"  why: {r}")
        chosen_plan = g.share(chosen_plan, "the budget plan")
        synth_config = replace(synth_config, steps=chosen_plan["steps"], size=chosen_plan["size"])
        keep = chosen_plan["units"]
        layers = tuple(replace(lu, units=_spread(lu.units, keep.get(lu.layer, len(lu.units)))) for lu in layers)

    t0 = time.monotonic()
    n_units = sum(len(lu.units) for lu in layers)
    say(f"[1/3] mining {len(corpus)} images for {n_units} units")
    mine(model, corpus, layers, out, mine_config, progress=progress)
    if chosen_plan is not None and g.main:
        run.update_manifest(budget={"budget_s": parse_budget(budget), "text": budget, "plan": chosen_plan})
    draw(run)
    done = 0
    for k, lu in enumerate(layers, 1):
        say(f"[2/3] synthesis, layer {k}/{len(layers)} ({lu.layer}, {len(lu.units)} units); "
            f"{done}/{n_units} units done overall, {_eta(t0, done, n_units)}")
        synthesize(model, Goal(lu), out, synth_config, progress=progress)
        done += len(lu.units)
        say(f"[3/3] atlas redrawn after {lu.layer}")
        draw(run)
    say(f"done in {(time.monotonic() - t0) / 60:.1f} min")
    return run


def _eta(t0: float, done: int, total: int) -> str:
    if done == 0:
        return "ETA after the first layer"
    rate = (time.monotonic() - t0) / done
    return f"about {rate * (total - done) / 60:.0f} min left"
