"""`unitlens run`: mine, then synthesise layer by layer, redrawing the atlas after each layer.

Every stage resumes from what the run folder holds, so the same command can be killed and run
again at any moment. With a time budget, a short calibration on this machine picks the synthesis
steps, image size and units per layer that fit, and says why.
"""
from __future__ import annotations

import re
import sys
import time
from dataclasses import dataclass, field, replace

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
    parts: dict = field(default_factory=dict)  # {"mining": s, layer: s}: the estimate stage by stage

    def describe(self) -> dict:
        return {"steps": self.steps, "size": self.size, "estimate_s": round(self.estimate_s, 1),
                "estimate_parts": {k: round(v, 1) for k, v in self.parts.items()},
                "units": {lu.layer: len(lu.units) for lu in self.layers}, "reasons": list(self.reasons)}


def _timed(fn, repeats: int = 2) -> float:
    """Seconds per call of fn(), after one call to warm up."""
    fn()  # warm-up (allocations, lazy initialisation)
    t = time.perf_counter()
    for _ in range(repeats):
        fn()
    return (time.perf_counter() - t) / repeats


def _forward_seconds(model, layers: list[str], n: int, size: int | tuple[int, int], repeats: int = 2) -> float:
    """Seconds of one truncated forward pass of n random images (side `size`, or (H, W)), without gradients."""
    ext = model.extractor(layers)
    h, w = (size, size) if isinstance(size, int) else size
    x = torch.rand(n, model.preprocess.channels, h, w)  # (n, C, H, W)

    def forward():
        with torch.inference_mode():
            ext(model.normalize(x))

    return _timed(forward, repeats)


def calibrate(model, layers, synth_config, size: int) -> dict:
    """Seconds per mined image, per synthesis step of a full batch (the real loop: parameterisation,
    transforms, forward, backward, Adam) and per synthesised unit's evidence (its robustness check
    under `checks` transforms), measured on this machine."""
    from .synth.loop import step_seconds

    n = 16
    per_image = _forward_seconds(model, [lu.layer for lu in layers], n, model.preprocess.size) / n
    config = replace(synth_config, size=size)
    per_step, per_unit, batch = {}, {}, {}
    for lu in layers:
        # timed at the batch the loop will use for this layer (all its units when they are few)
        per_step[lu.layer], images = step_seconds(model, lu.layer, lu.units, config)
        batch[lu.layer] = max(1, images // config.per_unit)
        checks = _forward_seconds(model, [lu.layer], max(config.checks, 1), size, repeats=1)  # one unit's evidence
        per_unit[lu.layer] = checks * (config.checks > 0) * config.per_unit
    return {"mine_s_per_image": per_image, "synth_s_per_step": per_step, "synth_s_per_unit": per_unit,
            "batch": batch, "size": size}


def plan(budget_s: float, n_images: int, layers, steps: int, size: int, calib: dict,
         already_mined: bool = False) -> Plan:
    """Choose steps, then size, then units per layer to synthesise, in that order, until the estimate
    fits. Mining is never cut: every unit asked for is mined (it is cheap beside synthesis, and the
    atlas of the units left out of synthesis still has their exemplars). `calib["batch"]` is the
    units per timed step: one number, or one per layer."""
    batch = calib["batch"] if isinstance(calib["batch"], dict) else {lu.layer: calib["batch"] for lu in layers}
    mine_s = 0.0 if already_mined else n_images * calib["mine_s_per_image"] * 1.15  # decoding and crops
    per_unit = calib.get("synth_s_per_unit", {})

    def layer_s(st, sz, lu):
        # Convolution cost grows with the pixel count, and with the images per step: the loop refills
        # its batch as units finish, so each optimisation step of a layer costs units / batch timed
        # steps. (Fewer units than the timed batch cost less per step: the estimate errs long.)
        scale = (sz / calib["size"]) ** 2
        return (len(lu.units) / batch[lu.layer] * st * calib["synth_s_per_step"][lu.layer]
                + len(lu.units) * per_unit.get(lu.layer, 0.0)) * scale

    def synth_s(st, sz, lys):
        return sum(layer_s(st, sz, lu) for lu in lys)

    reasons = [f"calibration: {calib['mine_s_per_image'] * 1000:.1f} ms per mined image; "
               + ", ".join(f"{k} {v:.2f} s per synthesis step of {batch[k]} units at {calib['size']} px"
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
        # shrink the fraction step by step, since at least one unit per layer stays
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
    parts = {"mining": mine_s, **{lu.layer: layer_s(st, sz, lu) for lu in lys}}
    return Plan(st, sz, lys, mine_s + synth_s(st, sz, lys), tuple(reasons), parts)


def _spread(units: tuple[int, ...], n: int) -> tuple[int, ...]:
    if n >= len(units):
        return units
    step = len(units) / n
    return tuple(units[int(i * step)] for i in range(n))


def run_all(model, corpus, layers, out, mine_config, synth_config, *, budget: str | None = None,
            progress: bool = False, log=None, force: bool = False, strip_paths: bool | None = None):
    """Mine `corpus`, synthesise `layers` one by one, and keep `out`/atlas up to date.

    A budget may cut the units that are synthesised, never those mined. `force` starts the run
    folder's mining and synthesis over. `strip_paths`: draw the atlas for sharing (see render_atlas)."""
    from . import dist
    from .atlas import render_atlas
    from .mining import mine, mined
    from .store import Run
    from .synth import Goal, synthesize

    t0 = time.monotonic()
    g = dist.group()  # under torchrun: every rank mines and synthesises its shard, rank 0 draws
    say = (log or (lambda msg: print(msg, file=sys.stderr))) if g.main else (lambda msg: None)
    draw = (lambda run: render_atlas(run, strip_paths=strip_paths)) if g.main else (lambda run: None)
    run = Run(out)
    size = synth_config.size or model.preprocess.side
    if force and g.main:
        import shutil

        shutil.rmtree(run.path / "synth", ignore_errors=True)  # mine(force=True) resets the rest
    mined_before = not force and mined(out, model, corpus, layers, mine_config)
    chosen_plan, synth_layers = None, tuple(layers)
    if budget is not None:
        seconds = parse_budget(budget)
        previous = run.manifest().get("budget") if run.exists() and not force else None
        if previous and previous.get("budget_s") == seconds:
            chosen_plan = previous["plan"]  # a resumed run keeps the plan it started with
            say(f"budget: resuming with the plan chosen before ({chosen_plan['steps']} steps, "
                f"{chosen_plan['size']} px)")
        elif g.main:  # one calibration, one plan for every rank; the work splits g.world ways
            calib = calibrate(model, layers, synth_config, size)
            split = {**calib, "mine_s_per_image": calib["mine_s_per_image"] / g.world,
                     **{k: {n: v / g.world for n, v in calib[k].items()}
                        for k in ("synth_s_per_step", "synth_s_per_unit")}}
            spent = time.monotonic() - t0  # the calibration comes out of the budget too
            p = plan(seconds - spent, len(corpus), layers, synth_config.steps, size, split, already_mined=mined_before)
            chosen_plan = {**p.describe(), "calibration": calib}
            say(f"budget {budget}: mining all {sum(len(lu.units) for lu in layers)} units; synthesis at "
                f"{p.steps} steps, {p.size} px, " + ", ".join(f"{lu.layer} {len(lu.units)} units" for lu in p.layers)
                + f"; estimate {_minutes(p.estimate_s)}")
            for r in p.reasons:
                say(f"  why: {r}")
        chosen_plan = g.share(chosen_plan, "the budget plan")
        synth_config = replace(synth_config, steps=chosen_plan["steps"], size=chosen_plan["size"])
        keep = chosen_plan["units"]
        synth_layers = tuple(replace(lu, units=_spread(lu.units, keep.get(lu.layer, len(lu.units)))) for lu in layers)

    n_mined = sum(len(lu.units) for lu in layers)
    if mined_before:
        say(f"[1/3] mining: done before ({len(corpus)} images, {n_mined} units)")
    else:
        say(f"[1/3] mining {len(corpus)} images for {n_mined} units")
    mine(model, corpus, layers, out, mine_config, progress=progress, force=force)
    if chosen_plan is not None and g.main:
        run.update_manifest(budget={"budget_s": parse_budget(budget), "text": budget, "plan": chosen_plan})
    if not mined_before:
        draw(run)
    size = synth_config.size or model.preprocess.side
    finished = {lu.layer for lu in synth_layers if _synthesised(run, lu, synth_config, size)}
    todo = sum(len(lu.units) for lu in synth_layers if lu.layer not in finished)
    t1, done = time.monotonic(), 0
    for k, lu in enumerate(synth_layers, 1):
        head = f"[2/3] synthesis, layer {k}/{len(synth_layers)} ({lu.layer}, {len(lu.units)} units)"
        if lu.layer in finished:
            say(f"{head}: done before")
            continue
        say(f"{head}; {done}/{todo} units to do in this run done, {_eta(t1, done, todo)}")
        synthesize(model, Goal(lu), out, synth_config, progress=progress)
        done += len(lu.units)
        say(f"[3/3] atlas redrawn after {lu.layer}")
        draw(run)
    if mined_before and not todo:
        draw(run)  # cheap when nothing changed; finishes an atlas whose drawing was interrupted
        n_synth = sum(len(lu.units) for lu in synth_layers)
        say(f"Nothing was redone: {run.path} already holds this run, complete ({len(corpus)} images mined for "
            f"{n_mined} units; {n_synth} units synthesised in {len(synth_layers)} layer(s)). Add --force to mine "
            "and synthesise it all again.")
    else:
        say(f"done in {_minutes(time.monotonic() - t0)}")
    return run


def _synthesised(run, lu: LayerUnits, config, size: int) -> bool:
    """True when the run folder holds every image of `lu` made with these settings."""
    import json

    from .units import ranges_text

    if not run.exists():
        return False
    s = run.manifest().get("synth") or {}
    st = (s.get("layers") or {}).get(lu.layer) or {}
    same = (s.get("settings") or {}).get("config") == json.loads(json.dumps(config.describe(size)))
    return bool(st.get("complete")) and st.get("channels") == ranges_text(lu.units) and same


def _minutes(seconds: float) -> str:
    return f"{seconds:.0f} s" if seconds < 90 else f"{seconds / 60:.1f} min"


def _eta(t0: float, done: int, total: int) -> str:
    if done == 0:
        return "ETA after the first layer"
    rate = (time.monotonic() - t0) / done
    return f"about {_minutes(rate * (total - done))} left"
