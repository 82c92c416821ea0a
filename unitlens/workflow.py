"""`unitlens run`: mine, then synthesise layer by layer, redrawing the atlas after each layer.

Every stage resumes from what the run folder holds, so the same command can be killed and run
again at any moment. With a time budget, every unit is mined first (mining is cheap beside
synthesis and is never cut); then a few units of each layer are synthesised to see at which step
their images stop (parity with the best exemplar plus the margin, or the step cap), a short
calibration times one synthesis step, and the planner picks the step cap, image size and units per
layer that fit, in that order, and says why.
"""
from __future__ import annotations

import heapq
import re
import sys
import time
from dataclasses import dataclass, field, replace

import torch

from ._memory import heap_reuse
from .errors import UnitlensError
from .units import LayerUnits

_UNITS = {"s": 1, "m": 60, "h": 3600, "d": 86400}
MIN_STEPS = 64  # below this, spectral images are still mostly noise
MIN_SIZE = 96
# units per layer synthesised before planning, to see the steps at which images stop: the most of
# these whose time fits the sample's share (the steps images run have a long tail; on the demo
# network a sample of 8 misjudged a layer's mean by about 40% (standard error), of 32 by about 15%)
SAMPLE_UNITS = (32, 16, 8)
SAMPLE_SHARE = 0.5  # the sample may take at most this share of the time left after mining (its units are kept)


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
    image_steps: dict = field(default_factory=dict)  # {layer: steps an image is expected to run}

    def describe(self) -> dict:
        from .synth.pipeline import ranges_text

        return {"steps": self.steps, "size": self.size, "estimate_s": round(self.estimate_s, 1),
                "estimate_parts": {k: round(v, 1) for k, v in self.parts.items()},
                "image_steps": {k: round(v, 1) for k, v in self.image_steps.items()},
                "units": {lu.layer: len(lu.units) for lu in self.layers},
                "channels": {lu.layer: ranges_text(lu.units) for lu in self.layers}, "reasons": list(self.reasons)}


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


def mine_seconds(model, layers) -> float:
    """Seconds per mined image: a truncated forward of 16 images at the input size, measured here."""
    n = 16
    return _forward_seconds(model, [lu.layer for lu in layers], n, model.preprocess.size) / n


@heap_reuse()
def calibrate(model, layers, synth_config, size: int) -> dict:
    """Seconds per mined image, per synthesis step of a full batch (the real loop: parameterisation,
    transforms, forward, backward, Adam) and per synthesised unit's evidence (the robustness check
    of each image and the reference on its best exemplar, `checks` warped forwards each), measured
    on this machine."""
    from .synth.loop import step_seconds

    config = replace(synth_config, size=size)
    per_step, fixed, per_unit, batch = {}, {}, {}, {}
    for lu in layers:
        # timed at the batch the loop will use for this layer (all its units when they are few)
        per_step[lu.layer], images = step_seconds(model, lu.layer, lu.units, config)
        batch[lu.layer] = full = max(1, images // config.per_unit)
        # and at a quarter of it: a step's cost is a fixed part plus a part that grows with the images
        # in the batch, and the fixed part is paid while a layer's last images run on in a thin batch
        fixed[lu.layer] = 0.0
        if full >= 4:
            low, low_images = step_seconds(model, lu.layer, lu.units[:full // 4], config)
            f = low_images / images
            slope = max(0.0, (per_step[lu.layer] - low) / (1 - f))
            fixed[lu.layer] = max(0.0, per_step[lu.layer] - slope)
        checks = _forward_seconds(model, [lu.layer], max(config.checks, 1), size, repeats=1)  # one image's check
        per_unit[lu.layer] = checks * (config.checks > 0) * (config.per_unit + 1)  # + the exemplar's reference
    return {"mine_s_per_image": mine_seconds(model, layers), "synth_s_per_step": per_step,
            "synth_s_fixed": fixed, "synth_s_per_unit": per_unit, "batch": batch, "size": size}


def loop_seconds(units: int, batch: int, cap: int, sample: list[int] | None, step_s: float,
                 fixed_s: float = 0.0) -> float:
    """Seconds the synthesis loop takes for `units` units, `batch` at a time, refilled in order as
    they stop: unit j runs min(sample[j % len(sample)], cap) steps (every unit the cap without a
    sample). A step of a batch holding a share f of its units costs fixed_s + (step_s - fixed_s) * f;
    with fixed_s = 0 this is (units x steps each) / batch full steps."""
    if units <= 0:
        return 0.0
    grows = units * expected_steps(cap, sample) * (step_s - fixed_s) / batch
    if fixed_s <= 0:
        return grows
    ends = [0] * min(batch, units)  # when each slot of the batch frees (steps from the start)
    for j in range(units):  # the loop's refill order: the next unit takes the slot that frees first
        heapq.heapreplace(ends, ends[0] + (min(sample[j % len(sample)], cap) if sample else cap))
    return max(ends) * fixed_s + grows


def expected_steps(cap: int, sample: list[int] | None) -> float:
    """Mean steps an image runs under a step cap, from the steps sampled images ran under a cap at
    least as high: an image's path does not depend on its cap before it gets there, so each runs
    min(its steps, cap). Without a sample: the cap."""
    return sum(min(s, cap) for s in sample) / len(sample) if sample else float(cap)


def sample_costs(calib: dict, timings: dict, stops: dict, cap: int, world: int = 1, atlas_s: float = 0.0) -> dict:
    """What the run measured beside the calibration, in the planner's terms: {"synth_s_per_unit":
    {layer: seconds each unit costs beside the loop (its exemplar's reference, checks, nearest
    images and files), split `world` ways}, "loop_factor": {layer: the sample's real loop time /
    what the step model gives it, held within [0.75, 2]; only where the sample filled a whole
    batch}, "atlas_s": a redraw of the atlas}.
    Layers the sample did not time (`timings` {layer: _layer's record}) keep the calibration's figures.

    Timing the real pipeline is the point: the checks' forwards alone (the calibration's figure)
    were a third of a unit's cost beside the loop on the demo network, and the loop's own work per
    step (traces, stop and parity checks, refills) a fifth of the loop on its deepest layer."""
    per_unit = {k: v / world for k, v in calib.get("synth_s_per_unit", {}).items()}
    factor = {}
    for layer, t in timings.items():
        n = t.get("units", 0)
        if not n or layer not in calib["synth_s_per_step"]:
            continue
        per_unit[layer] = (t["references"] + t["units_s"]) / n / world
        batch = calib["batch"][layer] if isinstance(calib["batch"], dict) else calib["batch"]
        if n < batch:  # the sample ran in a thinner batch than the layer will, and a thin batch's cost per
            continue  # image differs both ways (fixed costs; a smaller working set in the caches)
        model = loop_seconds(n, batch, cap, stops.get(layer), calib["synth_s_per_step"][layer],
                             calib.get("synth_s_fixed", {}).get(layer, 0.0))
        if model > 0 and t["loop"] > 0:
            factor[layer] = min(2.0, max(0.75, t["loop"] / model))
    return {"synth_s_per_unit": per_unit, "loop_factor": factor, "atlas_s": atlas_s}


def stop_steps(run, layers) -> dict[str, list[int]]:
    """{layer: steps each image of the given units ran} from the run folder's synthesis records
    (units not synthesised yet are left out)."""
    out = {}
    for lu in layers:
        table = _unit_records(run, lu.layer)
        out[lu.layer] = [int(im["steps"]) for u in lu.units for im in table.get(str(u), {}).get("images", [])]
    return out


def _unit_records(run, layer: str) -> dict:
    """{channel as text: record} of the layer's synthesised units in the run folder (empty if none)."""
    from .store import read_json

    return (read_json(run.layer_dir(layer, "synth") / "units.json") or {}).get("units", {})


def plan(budget_s: float, n_images: int, layers, steps: int, size: int, calib: dict,
         already_mined: bool = False) -> Plan:
    """Choose the step cap, then the size, then the units per layer to synthesise, in that order,
    until the estimate fits. Mining is never cut: every unit asked for is mined (it is cheap beside
    synthesis, and the atlas of the units left out of synthesis still has their exemplars).

    `calib["batch"]` is the units per timed step: one number, or one per layer. With
    `calib["stop_steps"]` {layer: steps each sampled image ran under the cap `steps` at `size`} an
    image is expected to run expected_steps(cap, sample), not the cap (images stop at parity);
    `calib["sampled"]` {layer: channels} were synthesised already with these settings: they cost
    nothing while the cap and size stay, and a cut of units keeps them. `calib["loop_factor"]`
    {layer: the sample's real loop time / the time the step model gives it} corrects the loop (the
    loop's own work per step: traces, stop and parity checks, refills)."""
    batch = calib["batch"] if isinstance(calib["batch"], dict) else {lu.layer: calib["batch"] for lu in layers}
    mine_s = 0.0 if already_mined else n_images * calib["mine_s_per_image"] * 1.15  # decoding and crops
    per_unit, fixed = calib.get("synth_s_per_unit", {}), calib.get("synth_s_fixed", {})
    factor = calib.get("loop_factor", {})
    stops, sampled = calib.get("stop_steps") or {}, calib.get("sampled") or {}

    def done(st, sz, lu) -> tuple[int, ...]:  # units that cost nothing more
        return tuple(sampled.get(lu.layer, ())) if (st, sz) == (steps, size) else ()

    def layer_s(st, sz, lu):
        # Convolution cost grows with the pixel count; the loop refills its batch as images stop, so
        # a layer costs (images x steps each) / (images per timed step) timed steps. (Fewer units
        # than the timed batch cost less per step: the estimate errs long.)
        # (With a fixed part per step, the thin batch of a layer's last images costs more: see
        # loop_seconds.)
        scale = (sz / calib["size"]) ** 2
        todo = len(set(lu.units) - set(done(st, sz, lu)))
        loop = loop_seconds(todo, batch[lu.layer], st, stops.get(lu.layer), calib["synth_s_per_step"][lu.layer],
                            fixed.get(lu.layer, 0.0)) * factor.get(lu.layer, 1.0)
        # and the atlas is redrawn once the layer is done (its time as measured after mining)
        return (loop + todo * per_unit.get(lu.layer, 0.0)) * scale + calib.get("atlas_s", 0.0) * bool(todo)

    def synth_s(st, sz, lys):
        return sum(layer_s(st, sz, lu) for lu in lys)

    reasons = [f"calibration: {calib['mine_s_per_image'] * 1000:.1f} ms per mined image; "
               + ", ".join(f"{k} {v:.2f} s per synthesis step of {batch[k]} units at {calib['size']} px"
                           + (f" ({fixed[k]:.2f} s of it whatever the batch holds)" if fixed.get(k) else "")
                           for k, v in calib["synth_s_per_step"].items())
               + "".join(f"; {k}: each unit {per_unit[k]:.2f} s beside the loop"
                         + (f", the sample's loop {factor[k]:.2f}x the steps' time" if k in factor else "")
                         for k in calib["synth_s_per_step"] if per_unit.get(k))]
    if mine_s > budget_s:
        raise UnitlensError(
            f"Mining {n_images} images alone needs about {mine_s / 3600:.1f} h on this machine, more than the "
            f"budget of {budget_s / 3600:.1f} h. Give a larger --budget or a smaller corpus.")
    left = budget_s - mine_s
    st, sz, lys = steps, size, tuple(layers)
    while synth_s(st, sz, lys) > left and st > MIN_STEPS:
        st = max(MIN_STEPS, st // 2)
    reasons.append(_steps_reason(st, [lu.layer for lu in layers], stops))
    if st != steps:
        reasons.append(f"step cap {steps} -> {st}: the requested cap does not fit")
    while synth_s(st, sz, lys) > left and sz > MIN_SIZE:
        sz = max(MIN_SIZE, int(sz * 0.75))
    if sz != size:
        reasons.append(f"size {size} -> {sz} px: a cap of {st} steps at {size} px does not fit")
    if synth_s(st, sz, lys) > left:
        # the last resort: keep an evenly spaced subset of each layer's units (with those done
        # already), so every layer stays represented; shrink the fraction step by step
        fraction, full = left / synth_s(st, sz, lys), lys
        while True:
            lys = tuple(replace(lu, units=_spread(lu.units, max(1, int(len(lu.units) * fraction)), done(st, sz, lu)))
                        for lu in full)
            if synth_s(st, sz, lys) <= left:
                break
            if fraction * max(len(lu.units) for lu in full) < 1:  # every layer at its least already
                least = "one unit per layer" if all(len(lu.units) == 1 for lu in lys) else \
                    f"the {sum(len(lu.units) for lu in lys)} units synthesised already"
                raise UnitlensError(
                    f"Even {least} at {st} steps and {sz} px needs about "
                    f"{(mine_s + synth_s(st, sz, lys)) / 60:.0f} min, more than the budget of "
                    f"{budget_s / 60:.0f} min. Give a larger --budget or fewer layers.")
            fraction *= 0.9
        kept = sum(len(lu.units) for lu in lys)
        reasons.append(f"units cut to {kept} of {sum(len(lu.units) for lu in full)} (evenly spaced in each "
                       "layer): all units do not fit")
    if len(reasons) == 2:
        reasons.append("everything requested fits")
    parts = {"mining": mine_s, **{lu.layer: layer_s(st, sz, lu) for lu in lys}}
    image_steps = {lu.layer: expected_steps(st, stops.get(lu.layer)) for lu in lys}
    return Plan(st, sz, lys, mine_s + synth_s(st, sz, lys), tuple(reasons), parts, image_steps)


def _steps_reason(cap: int, layers, stops: dict) -> str:
    """What the estimate assumes about the steps each image runs, layer by layer."""
    parts = []
    for layer in layers:
        s = stops.get(layer)
        if not s:
            parts.append(f"{layer} {cap} (the cap: no sample)")
            continue
        early = sum(x < cap for x in s)
        parts.append(f"{layer} {expected_steps(cap, s):.0f} ({len(s)} sampled images, {early} stopped before {cap})")
    return "steps per image expected under a cap of " + f"{cap}: " + ", ".join(parts)


def _spread(units: tuple[int, ...], n: int, keep: tuple[int, ...] = ()) -> tuple[int, ...]:
    """n of `units`, evenly spaced, in their order; those of `keep` always among them (and counted)."""
    if n >= len(units):
        return units
    kept = set(keep) & set(units)
    rest = [u for u in units if u not in kept]
    m = n - len(kept)
    if m > 0:
        step = len(rest) / m
        kept |= {rest[int(i * step)] for i in range(m)}
    return tuple(u for u in units if u in kept)


@heap_reuse()
def run_all(model, corpus, layers, out, mine_config, synth_config, *, budget: str | None = None,
            progress: bool = False, log=None, force: bool = False, strip_paths: bool | None = None,
            started: float | None = None):
    """Mine `corpus`, synthesise `layers` one by one, and keep `out`/atlas up to date.

    A budget may cut the units that are synthesised, never those mined. `force` starts the run
    folder's mining and synthesis over. `strip_paths`: draw the atlas for sharing (see render_atlas).
    `started`: the time.monotonic() at which the command began (loading the model and the corpus
    came out of its budget already); default now."""
    from . import dist
    from .atlas import render_atlas
    from .mining import mine, mined
    from .store import Run
    from .synth import Goal, synthesize

    t0 = time.monotonic() if started is None else started
    g = dist.group()  # under torchrun: every rank mines and synthesises its shard, rank 0 draws
    say = (log or (lambda msg: print(msg, file=sys.stderr))) if g.main else (lambda msg: None)
    draw = (lambda run: render_atlas(run, strip_paths=strip_paths)) if g.main else (lambda run: None)
    run = Run(out)
    size = synth_config.size or model.preprocess.side
    if force and g.main:
        import shutil

        shutil.rmtree(run.path / "synth", ignore_errors=True)  # mine(force=True) resets the rest
    mined_before = not force and mined(out, model, corpus, layers, mine_config)
    n_mined = sum(len(lu.units) for lu in layers)
    chosen_plan, synth_layers, seconds = None, tuple(layers), None
    if budget is not None:
        seconds = parse_budget(budget)
        previous = run.manifest().get("budget") if run.exists() and not force else None
        if previous and previous.get("budget_s") == seconds:
            chosen_plan = previous["plan"]  # a resumed run keeps the plan it started with
            say(f"budget: resuming with the plan chosen before ({chosen_plan['steps']} steps at most, "
                f"{chosen_plan['size']} px)")
        elif g.main and not mined_before:  # mining is never cut, but must fit
            mine_s = len(corpus) * mine_seconds(model, layers) / g.world * 1.15  # as plan() counts it
            if mine_s > seconds - (time.monotonic() - t0):
                plan(seconds - (time.monotonic() - t0), len(corpus), layers, synth_config.steps, size,
                     {"mine_s_per_image": mine_s / 1.15 / len(corpus), "synth_s_per_step": {}, "batch": 1,
                      "size": size})  # raises: mining alone does not fit
            say(f"budget {budget}: mining all {n_mined} units first (estimate {_minutes(mine_s)}); synthesis is "
                f"planned after it, from up to {SAMPLE_UNITS[0]} units per layer synthesised to see where images stop")

    if mined_before:
        say(f"[1/3] mining: done before ({len(corpus)} images, {n_mined} units)")
    else:
        say(f"[1/3] mining {len(corpus)} images for {n_mined} units")
    mine(model, corpus, layers, out, mine_config, progress=progress, force=force)
    atlas_s = 0.0  # a redraw's time, for the plan
    if not mined_before:
        t = time.monotonic()
        draw(run)
        atlas_s = time.monotonic() - t
    if budget is not None:
        if chosen_plan is None:
            chosen_plan = _budget_plan(model, corpus, layers, run, synth_config, size, seconds, t0, g, say, progress,
                                       atlas_s)
            if g.main:
                run.update_manifest(budget={"budget_s": seconds, "text": budget, "plan": chosen_plan})
                say(f"budget {budget}: synthesis with a cap of {chosen_plan['steps']} steps, {chosen_plan['size']} "
                    "px, " + ", ".join(f"{k} {v} units" for k, v in chosen_plan["units"].items())
                    + f"; estimate {_minutes(chosen_plan['estimate_s'])} from here, whole run about "
                    f"{_minutes(chosen_plan['spent_s'] + chosen_plan['estimate_s'])}")
                for r in chosen_plan["reasons"]:
                    say(f"  why: {r}")
        synth_config = replace(synth_config, steps=chosen_plan["steps"], size=chosen_plan["size"])
        synth_layers = tuple(replace(lu, units=_planned_units(lu, chosen_plan)) for lu in layers)
    redo = bool(chosen_plan and chosen_plan.get("redo_sample"))  # the sample's settings were cut
    size = synth_config.size or model.preprocess.side
    finished = {lu.layer for lu in synth_layers if _synthesised(run, lu, synth_config, size)}
    todo = sum(len(lu.units) for lu in synth_layers if lu.layer not in finished)
    estimate = (chosen_plan or {}).get("estimate_parts")
    if chosen_plan is None and len(synth_layers) - len(finished) > 1:
        # no budget: the same sample and calibration give each layer's share of the time, for the ETA
        left = tuple(lu for lu in synth_layers if lu.layer not in finished)
        estimate = _budget_plan(model, corpus, left, run, synth_config, size, float("inf"), t0, g, say,
                                progress, atlas_s)["estimate_parts"]
        say(f"synthesis estimate {_minutes(sum(v for k, v in estimate.items() if k != 'mining'))}")
    # the units synthesised before planning count as done, and a layer they covered is finished
    done = sum(_units_done(run, lu) for lu in synth_layers if lu.layer not in finished) if not redo else 0
    sampled = {lu.layer for lu in synth_layers if lu.layer not in finished and not redo
               and _synthesised(run, lu, synth_config, size)}
    t1, done_layers = time.monotonic(), []
    for k, lu in enumerate(synth_layers, 1):
        head = f"[2/3] synthesis, layer {k}/{len(synth_layers)} ({lu.layer}, {len(lu.units)} units)"
        if lu.layer in finished:
            say(f"{head}: done before")
            continue
        if lu.layer in sampled:
            say(f"{head}: done while sampling; [3/3] atlas redrawn after {lu.layer}")
            draw(run)
            done_layers.append(lu.layer)
            continue
        rest = [x.layer for x in synth_layers[k - 1:] if x.layer not in finished]
        say(f"{head}; {done}/{todo} units to do in this run done, {_eta(t1, done, todo, estimate, done_layers, rest)}")
        synthesize(model, Goal(lu), out, synth_config, progress=progress, force=redo)
        done = sum(_units_done(run, x) for x in synth_layers if x.layer not in finished)
        say(f"[3/3] atlas redrawn after {lu.layer}")
        draw(run)
        done_layers.append(lu.layer)
    if mined_before and not todo:
        draw(run)  # cheap when nothing changed; finishes an atlas whose drawing was interrupted
        n_synth = sum(len(lu.units) for lu in synth_layers)
        say(f"Nothing was redone: {run.path} already holds this run, complete ({len(corpus)} images mined for "
            f"{n_mined} units; {n_synth} units synthesised in {len(synth_layers)} layer(s)). Add --force to mine "
            "and synthesise it all again.")
    else:
        say(f"done in {_minutes(time.monotonic() - t0)}")
    return run


def _budget_plan(model, corpus, layers, run, synth_config, size: int, seconds: float, t0: float, g, say,
                 progress: bool, atlas_s: float = 0.0) -> dict:
    """After mining: time a synthesis step per layer, synthesise a few units of each layer with the
    requested settings (they are kept; on a tight budget at a lower step cap, which then bounds the
    plan's) to see at which step their images stop, and plan the rest of the budget. One plan for
    every rank; the work splits g.world ways."""
    from .synth import Goal, synthesize

    steps, calib, split, sample = synth_config.steps, None, None, None
    if g.main:
        calib = calibrate(model, layers, synth_config, size)
        split = {**calib, "mine_s_per_image": calib["mine_s_per_image"] / g.world,
                 **{k: {n: v / g.world for n, v in calib.get(k, {}).items()}
                    for k in ("synth_s_per_step", "synth_s_fixed", "synth_s_per_unit")}}

        def upper(cap):  # every sampled image at the cap: a bound on the sample's time
            return plan(float("inf"), 0, sample, cap, size, split, already_mined=True).estimate_s

        share = SAMPLE_SHARE * (seconds - (time.monotonic() - t0))
        for n in SAMPLE_UNITS:  # the largest sample that fits its share, then a lower cap
            sample = tuple(replace(lu, units=_spread(lu.units, n)) for lu in layers)
            if upper(steps) <= share:
                break
        while upper(steps) > share and steps > MIN_STEPS:  # a tight budget: sample (and plan) a lower cap
            steps = max(MIN_STEPS, steps // 2)
        if upper(steps) > share:
            say(f"budget: no sample (it could take {_minutes(upper(steps))}); the plan assumes every image runs "
                "to its cap")
            sample, steps = None, synth_config.steps
        elif steps != synth_config.steps:
            say(f"budget: the sample runs at a cap of {steps} steps (at {synth_config.steps} it could take "
                f"{_minutes(upper(synth_config.steps))}); the plan keeps at most that cap")
    sample, steps = g.share((sample, steps), "the units synthesised before planning")
    timings: dict = {}
    if sample:
        say(f"[2/3] synthesis of {sum(len(lu.units) for lu in sample)} units "
            f"({max(len(lu.units) for lu in sample)} per layer at most) "
            "to see where their images stop")
        for lu in sample:
            synthesize(model, Goal(lu), run.path, replace(synth_config, steps=steps), progress=progress,
                       timings=timings)
    chosen = None
    if g.main:
        stops = stop_steps(run, sample) if sample else {}
        split = {**split, **sample_costs(calib, timings, stops, steps, g.world, atlas_s)}
        if sample:
            split = {**split, "stop_steps": stops, "sampled": {lu.layer: lu.units for lu in sample}}
        spent = time.monotonic() - t0  # calibration, mining and the sample come out of the budget first
        p = plan(seconds - spent, len(corpus), layers, steps, size, split, already_mined=True)
        chosen = {**p.describe(), "calibration": calib, "spent_s": round(spent, 1),
                  "sample_s": {k: {n: round(v, 3) for n, v in t.items()} for k, t in timings.items()},
                  "redo_sample": bool(sample) and (p.steps, p.size) != (steps, size)}
        if steps != synth_config.steps:
            chosen["reasons"].insert(1, f"step cap {synth_config.steps} -> {steps} for the sample: it had to fit "
                                        f"{SAMPLE_SHARE:.0%} of the budget left")
    return g.share(chosen, "the budget plan")


def _planned_units(lu: LayerUnits, chosen_plan: dict) -> tuple[int, ...]:
    """The channels of `lu` the plan keeps (plans saved before "channels" was recorded: evenly spread)."""
    from .units import parse_ranges

    text = (chosen_plan.get("channels") or {}).get(lu.layer)
    if text:
        return parse_ranges(text, max(lu.units) + 1)
    return _spread(lu.units, chosen_plan["units"].get(lu.layer, len(lu.units)))


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


def _units_done(run, lu: LayerUnits) -> int:
    """How many of lu's units the run folder holds synthesised images of (with any settings)."""
    table = _unit_records(run, lu.layer)
    return sum(str(u) in table for u in lu.units)


def _minutes(seconds: float) -> str:
    return f"{seconds:.0f} s" if seconds < 90 else f"{seconds / 60:.1f} min"


def _eta(t0: float, done: int, total: int, estimate: dict | None = None, done_layers=(), rest=()) -> str:
    """Time left: the planned seconds of the layers left (`estimate` {layer: s}), scaled by how the
    layers done so far compared with their plan (the load of the machine, the atlas drawing);
    without a plan, the mean time per unit so far."""
    spent = time.monotonic() - t0
    if estimate and all(x in estimate for x in (*done_layers, *rest)):
        planned = sum(estimate[x] for x in done_layers)
        whole = planned + sum(estimate[x] for x in rest)
        # Scaled only once the layers done were a fifth of the plan: a small first layer is mostly
        # fixed costs (the atlas drawing, loading its exemplars) and its ratio would be extrapolated
        # over the whole network.
        factor = spent / planned if done_layers and planned > 0 and planned >= 0.2 * whole else 1.0
        return f"about {_minutes(factor * sum(estimate[x] for x in rest))} left"
    if done == 0:
        return "ETA after the first layer"
    return f"about {_minutes(spent / done * (total - done))} left"
