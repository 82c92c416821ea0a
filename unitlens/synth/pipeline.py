"""Run-folder synthesis: validate, optimise layer by layer, write each finished batch (layout in results.py)."""
from __future__ import annotations

import time
from pathlib import Path

import numpy as np
import torch

from .. import dist
from .._memory import heap_reuse
from ..errors import UnitlensError, interrupted
from ..units import ranges_text
from ..store import Run, atomic_write, disk_bytes, read_json, read_npz, space_for, write_json, write_npz
from ..neighbours import NaturalNeighbours, synth_neighbours
from .evidence import assess, exemplar_references, parity
from .bases import ColourBasis
from .goal import Goal
from .loop import SynthConfig, iter_layer
from .results import best_exemplars, same_model


@heap_reuse()
def synthesize(model, goal: Goal, out, config: SynthConfig = SynthConfig(), *, progress: bool = False,
               force: bool = False, timings: dict | None = None) -> Run:
    """Synthesise images for the units of `goal` into the run folder `out`. In a run folder, a
    layer named without channels means the channels mined there, and a goal without units all of them.

    Resumes: units already in the folder with the same settings are not redone. `timings`, if
    given, receives {layer: where this call's time went} (see _layer), for the time-budget planner.

    >>> m = load_model("torchvision:resnet18", size=128)                                 # doctest: +SKIP
    >>> synthesize(m, Goal("layer3:0-15", diversity=0.5), "runs/r18", SynthConfig(steps=128))  # doctest: +SKIP
    """
    config.validate()
    if goal.reduce == "direction":
        raise UnitlensError("A run folder files images under their channel, and a direction goal has none; "
                            "synthesise directions in memory with optimise_units.")
    size = config.size or model.preprocess.side
    run = Run(out)
    manifest = run.manifest() if run.exists() else {}
    if manifest.get("model") and not same_model(manifest["model"], model.describe()):
        raise UnitlensError(f"{run.path} was made with another model ({manifest['model']['spec']}, weights "
                            f"{_weights_text(manifest['model'])}). Use another --out folder.")
    _check_mined(run, manifest)
    layers = goal.layers(model, manifest)  # everything checked before the first step
    model.check_size(size, sorted({lu.layer for lu in layers}))

    g = dist.group()  # one process, or this rank of a torchrun job: it takes every world-th unit of a layer
    colour = ColourBasis.from_run(manifest, model.preprocess.channels)
    used = colour if config.whiten_colour else ColourBasis.plain(colour.mean)
    settings = {"config": config.describe(size), "goal": goal.record(), "colour": used.describe()}
    old = manifest.get("synth")
    if old and old.get("settings") != settings:
        # a start that finished no unit (e.g. stopped in its first batch) has nothing to lose
        started = any(st.get("done") for st in old.get("layers", {}).values()) \
            or any((run.path / "synth").glob("*/unit-*.png"))
        if not force and started:
            raise UnitlensError(f"{run.path} already holds synthesised images with other settings "
                                f"({_diff(old.get('settings'), settings)}). Use --force to redo them, "
                                "or another --out folder.")
        if g.main:
            run.remove_stage("synth", old.get("layers", {}))
        old = None
    manifest.setdefault("model", model.describe())
    status = (old or {}).get("layers", {})
    for lu in layers:
        st = status.setdefault(lu.layer, {"done": 0, "complete": False})
        st.update(units=len(lu.units), channels=ranges_text(lu.units))
    manifest["synth"] = {"settings": settings, "colour": used.describe(), "layers": status, "done": False}
    g.agree((settings, [(lu.layer, lu.units) for lu in layers]), "the synthesis settings or units")
    if g.main:
        run.path.mkdir(parents=True, exist_ok=True)
        run.save_manifest(manifest)
    g.check_shared(run.path)

    need = sum(_bytes_per_unit(config, size) * len(lu.units) for lu in layers)
    with space_for(run.path, max(0, need - sum(disk_bytes(run.layer_dir(lu.layer, "synth")) for lu in layers)),
                   "this synthesis"):
        for lu in layers:
            spent = _layer(run, model, lu, config, goal, colour, size, progress)
            if timings is not None:
                timings[lu.layer] = spent
    if g.main:  # every rank is past its last write (the barrier closing _layer)
        run.remove_stage("synth", ())  # half-written files of a process killed mid-write (store.atomic_write)
        m = run.manifest()
        m["synth"]["done"] = all(v.get("complete") for v in m["synth"]["layers"].values())
        run.save_manifest(m)
    g.barrier("the end of synthesis")
    return run


def _bytes_per_unit(config: SynthConfig, size: int) -> int:
    """At most what one unit writes: 8-bit RGB PNGs (raw size: noise-like images hardly compress),
    the float32 traces, and about 64 KB of record and nearest-image strip (an estimate)."""
    return config.per_unit * (size * size * 3 + 4 * config.steps) + 65536


def _check_mined(run: Run, manifest: dict) -> None:
    """Refuse a run whose mining pass is unfinished: its colour basis and best exemplars are not
    known yet, and the same command would be refused as 'other settings' once they are."""
    mined = manifest.get("mine")
    if not mined or mined.get("done"):
        return
    state = read_json(run.path / "mine" / "state.json") or {}
    total = (manifest.get("corpus") or {}).get("count")
    where = f" ({state['next']} of {total} images)" if "next" in state and total else ""
    raise UnitlensError(f"Mining in {run.path} is not finished{where}; synthesis takes its colour basis and best "
                        "exemplars from the finished pass. Finish mining first (run the same `unitlens mine` "
                        "command again; it resumes), then synthesise.")


def _layer(run, model, lu, config, goal, colour, size, progress) -> dict:
    """Synthesise one layer's units not in the folder yet; returns where the time went, in seconds:
    {"units": units done here, "loop": the optimisation loop, "references": the best exemplars'
    objectives (decoding and `checks` warped forwards each), "units_s": each finished unit's checks,
    nearest images and files, "whole": the call}."""
    from .._progress import Progress

    t0 = time.perf_counter()
    spent = {"loop": 0.0, "references": 0.0, "units_s": 0.0}

    d = run.layer_dir(lu.layer, "synth")
    d.mkdir(parents=True, exist_ok=True)
    g = dist.group()
    table = read_json(d / "units.json") or {"layer": lu.layer, "units": {}}
    _fold_parts(d, table)  # ranks' tables of an interrupted launch
    finished = {int(k) for k, rec in table["units"].items()
                if all((d / im["file"]).is_file() for im in rec["images"])}
    todo = [c for c in g.shard(lu.units) if c not in finished]
    own = g.part(d / "units.json")  # several ranks never write one file
    best = best_exemplars(run, lu.layer)
    before = len(lu.units) - len(todo)
    bar = Progress(len(lu.units), before, f"synth {lu.layer}", "units", per="h") if progress and todo else None
    on_step = (lambda units, step: bar.advance(before + units, f"step {step}/{config.steps}")) if bar else None
    spec = config.warps.at(size)
    scorer = goal.scorer(lu.layer)
    extract = model.extractor([lu.layer])
    near = NaturalNeighbours.for_layer(run, lu.layer) if todo else None  # None unless mined with an embedding
    refs = {}
    if todo:
        t = time.perf_counter()
        images, have = exemplar_images(run, model, lu.layer, todo, size)
        if have:
            refs = exemplar_references(model, lu.layer, images, have, scorer, spec, colour.mean, config.seed,
                                       config.checks, extract)
        spent["references"] = time.perf_counter() - t
    try:
        if todo:
            t = time.perf_counter()
            for batch in _interruptible(iter_layer(model, lu.layer, todo, config, goal, colour, on_step,
                                                   references=refs), lu, table):
                spent["loop"] += time.perf_counter() - t
                t = time.perf_counter()
                for r in batch:
                    table["units"][str(r.target)] = _write_unit(d, model, lu.layer, r, scorer, spec, colour,
                                                                config, best.get(r.target), extract, near,
                                                                refs.get(r.target))
                write_json(own, table)  # the finished batch counts from here on
                g.check(f"in synthesis of {lu.layer}")
                if g.main:
                    _status(run, lu.layer, len(table["units"]), False)
                spent["units_s"] += time.perf_counter() - t
                t = time.perf_counter()
        write_json(own, table)
        g.barrier(f"the end of synthesis of {lu.layer}")
        if g.main:
            table = _merge_tables(d, table, lu.units)
            _status(run, lu.layer, len(table["units"]), all(str(c) in table["units"] for c in lu.units))
    finally:
        if bar:
            bar.close()
    return {**spent, "units": len(todo), "whole": time.perf_counter() - t0}


def _fold_parts(d: Path, table: dict) -> list[Path]:
    """Add the units of the ranks' tables (units-rank*.json) to `table`; the part files found."""
    parts = sorted(d.glob("units-rank*.json"))
    for part in parts:
        table["units"].update((read_json(part) or {}).get("units", {}))
    return parts


def _merge_tables(d: Path, table: dict, units) -> dict:
    """Fold the ranks' unit tables into units.json (in unit order) and remove them."""
    parts = _fold_parts(d, table)
    if not parts:
        return table
    order = {str(c): i for i, c in enumerate(units)}
    table["units"] = dict(sorted(table["units"].items(), key=lambda kv: (order.get(kv[0], len(order)), int(kv[0]))))
    write_json(d / "units.json", table)
    for part in parts:
        part.unlink(missing_ok=True)
    return table


def _interruptible(batches, lu, table):
    try:
        yield from batches
    except KeyboardInterrupt:
        done = sum(str(c) in table["units"] for c in lu.units)
        raise interrupted(f"after {done} of {len(lu.units)} units of {lu.layer}; finished units are saved. "
                          "Run the same command to resume.") from None


def exemplar_images(run: Run, model, layer: str, units, size: int) -> tuple[torch.Tensor, list[int]]:
    """The best natural exemplar of each mined unit as mining saw it (the model's input frame),
    resized to the synthesis square if that differs: (N, C, size, size) uint8 and the N units that have one."""
    import torch.nn.functional as F

    from ..corpus import CorpusDataset

    C = model.preprocess.channels
    none = torch.zeros((0, C, size, size), dtype=torch.uint8), []
    path = run.layer_dir(layer) / "index.npz"
    if not path.is_file():
        return none
    idx = read_npz(path)
    row = {int(u): k for k, u in enumerate(idx["units"])}
    corpus = run.corpus()
    have = [u for u in units if u in row and np.isfinite(idx["top_score"][row[u], 0])
            and int(idx["top_image"][row[u], 0]) < len(corpus)]
    data = CorpusDataset(corpus, model.preprocess.frame, [int(idx["top_image"][row[u], 0]) for u in have])
    items = [data[k] for k in range(len(data))]
    have = [u for u, it in zip(have, items) if it[1] is not None]  # a file gone since mining: no reference
    if not have:
        return none
    x = torch.stack([it[1] for it in items if it[1] is not None])  # (N, C, H, W) uint8
    if tuple(x.shape[-2:]) != (size, size):
        x = F.interpolate(x.float(), size=(size, size), mode="bilinear", antialias=True, align_corners=False)
        x = x.round().clamp(0, 255).to(torch.uint8)
    return x, have


def _write_unit(d: Path, model, layer, r, scorer, spec, colour, config, best, extract, near=None,
                reference=None) -> dict:
    from PIL import Image

    u8 = np.clip(np.round(r.images * 255), 0, 255).astype(np.uint8)  # (M, H, W, C)
    M = len(u8)
    files = [f"unit-{r.target:04d}-{m}.png" for m in range(M)]
    for f, a in zip(files, u8):  # a grey image (H, W, 1) is saved as an 8-bit grey PNG
        atomic_write(d / f, lambda fh, a=a: Image.fromarray(a[..., 0] if a.shape[-1] == 1 else a).save(fh, format="PNG"))
    T = max(len(t) for t in r.traces)
    trace = np.full((M, T), np.nan, dtype=np.float32)
    for m, t in enumerate(r.traces):
        trace[m, :len(t)] = t
    write_npz(d / f"unit-{r.target:04d}.npz", trace=trace, steps=np.array(r.steps, dtype=np.int64))
    checks = assess(model, layer, torch.from_numpy(u8).permute(0, 3, 1, 2), [r.target] * M, scorer, spec,
                    colour.mean, config.seed, range(M), config.checks, extract)
    images = []
    for m in range(M):
        c = checks[m]
        ratio = c["max_activation"] / best if best is not None and best > 0 else None
        first = r.parity_steps[m] if r.parity_steps else None
        images.append({"file": files[m], "steps": r.steps[m], "objective": float(r.traces[m][-1]),
                       **c, "vs_best_exemplar": ratio, "parity": parity(c, reference, scorer.sign, first)})
    rec = {"unit": r.target, "best_exemplar": best, "exemplar_objective": reference,
           "trace": f"unit-{r.target:04d}.npz", "images": images}
    if near is not None:  # nearest natural images of the layer (neighbours.py)
        hits, rec["nearest_strip"] = synth_neighbours(near, model, layer, u8, extract, d, f"near-{r.target:04d}",
                                                        r.target)
        rec["nearest_space"] = near.describe()
        for im, h in zip(images, hits):
            im["nearest"] = h
    return rec


def _status(run: Run, layer: str, done: int, complete: bool) -> None:
    m = run.manifest()
    m["synth"]["layers"][layer].update(done=done, complete=complete)
    run.save_manifest(m)


# -- the model of a run ----------------------------------------------------------------------

def model_from_run(run: Run | str, allow_pickle: bool = False):
    """Rebuild the LoadedModel a run folder was made with (spec, weights, preprocessing)."""
    from .._specs import locate
    from ..model import load_model

    run = run if isinstance(run, Run) else Run(run)
    d = run.manifest().get("model")
    if not d:
        raise UnitlensError(f"{run.path}/manifest.json names no model. Give the model instead: "
                            "`unitlens synth MODEL --layers ... --out RUN`.")
    w = d.get("weights") or {"kind": "none"}
    kind = w.get("kind")
    if kind == "pickle" and not allow_pickle:
        raise UnitlensError(f"{run.path} was made from a pickled module ({d['spec']}); loading it runs code "
                            "from the file. Add --allow-pickle if you trust it.")
    weights = {"file": locate(w.get("path", "")), "torchvision": str(w.get("name", "")).split(".")[-1]}.get(kind)
    p = d["preprocess"]
    m = load_model(d["spec"], weights, size=p["size"], mean=tuple(p["mean"]), std=tuple(p["std"]),
                   allow_pickle=allow_pickle, arch_options=d.get("arch_options") or None)
    if w.get("sha256") and m.weights.get("sha256") != w["sha256"]:
        raise UnitlensError(f"The weights file {w.get('path') or d['spec']} changed since {run.path} was made "
                            "(its SHA-256 differs). Restore it, or start a new run folder.")
    return m


def _weights_text(d: dict) -> str:
    w = d.get("weights", {})
    return w.get("path") or w.get("name") or w.get("kind", "?")


def _diff(prev, new) -> str:
    if not isinstance(prev, dict):
        return "unknown settings"
    parts = []
    for k in new:
        if isinstance(new[k], dict) and isinstance(prev.get(k), dict):
            parts += [f"{k}.{j}" for j in new[k] if prev[k].get(j) != new[k][j]]
        elif prev.get(k) != new[k]:
            parts.append(k)
    return "differs in " + ", ".join(parts) if parts else "unknown settings"
