"""The on-disk layout of pass 2 and reading it back (no torch, so `show` and the atlas stay light).

Layout, beside the mining pass (every file readable without unitlens):
  synth/<layer>/unit-0037-0.png   the image(s) of channel 37 (one per image of the unit), 8-bit RGB
  synth/<layer>/unit-0037.npz     trace (M, T) float32 objective per step, NaN after an early stop;
                                  steps (M,) steps used
  synth/<layer>/units.json        {"layer", "units": {"37": record}}; a record holds "unit",
                                  "best_exemplar" (mining's top score, spatial max; null if not
                                  mined), "exemplar_objective" (the unit's objective on that
                                  image under the robustness transforms; null if not mined),
                                  "trace" (the npz) and "images": one entry per image with
                                  "file", "steps", "objective" (last step, under its transform),
                                  "activation", "max_activation", "vs_best_exemplar" (null when
                                  unknown), "rank", "channels", "robustness" {n, mean, std,
                                  relative} (see evidence.py), "parity" (null when the layer was
                                  not mined): {reached, step (first step the loop saw it reached,
                                  null if never), synthesised (robustness mean), exemplar (the
                                  same on the best exemplar)}, and, when the layer was mined,
                                  "nearest": [{index, id, similarity}] the closest corpus images
                                  of the layer (cosine, neighbours.py); the record's
                                  "nearest_strip" names their thumbnails (near-0037.jpg)
  manifest.json["synth"]          settings (config, goal: the plain fields of Goal.record, colour),
                                  colour basis and where it came from, per-layer status

A unit counts as done once it is in units.json (written after its images), so a killed run
redoes at most the units of the batch in flight. A unit's images depend only on the settings and
(seed, layer, channel, image number), so what is redone comes out the same.
"""
from __future__ import annotations

import numpy as np

from .._specs import canonical_spec
from ..store import Run, read_json, read_npz


def best_exemplars(run: Run, layer: str) -> dict[int, float]:
    """{channel: score of the best natural exemplar} from the mining index (spatial max), if mined."""
    path = run.layer_dir(layer) / "index.npz"
    if not path.is_file():
        return {}
    idx = read_npz(path)
    top = idx["top_score"][:, 0]
    return {int(c): float(s) for c, s in zip(idx["units"], top) if np.isfinite(s)}


def unit_images(run: Run | str, layer: str, channel: int) -> list[dict]:
    """The synthesised images of one unit, for `show`: [] when there are none.

    Each entry: image (PNG path), activation, vs_best_exemplar (None when unknown), max_activation,
    steps, rank, robustness, trace (npz path).
    """
    return layer_images(run, layer).get(channel, [])


def layer_images(run: Run | str, layer: str) -> dict[int, list[dict]]:
    """{channel: the entries of unit_images} for every synthesised unit of `layer` (one read of units.json)."""
    run = run if isinstance(run, Run) else Run(run)
    d = run.layer_dir(layer, "synth")
    table = read_json(d / "units.json") or {"units": {}}
    return {int(key): [{"image": str(d / im["file"]), "trace": str(d / rec["trace"]),
                        **{k: v for k, v in im.items() if k != "file"}} for im in rec["images"]]
            for key, rec in table["units"].items() if rec}


def trace_of(run: Run | str, layer: str, channel: int) -> np.ndarray:
    """(M, T) objective traces of one unit (NaN after an early stop)."""
    run = run if isinstance(run, Run) else Run(run)
    return read_npz(run.layer_dir(layer, "synth") / f"unit-{channel:04d}.npz")["trace"]


def same_model(a: dict, b: dict) -> bool:
    """Same architecture, weights and preprocessing (the free-text provenance may differ)."""
    def key(d):
        w = d.get("weights", {})
        p = d.get("preprocess", {})
        return (canonical_spec(d.get("spec", "")), w.get("kind"), w.get("sha256") or w.get("name"), d.get("arch_options") or {},
                p.get("size"), [round(v, 6) for v in p.get("mean", [])], [round(v, 6) for v in p.get("std", [])])

    return key(a) == key(b)


def parity_share(images: list[dict]) -> float | None:
    """Share of a unit's synthesised images whose parity record says "reached" (None: no image has
    one). `images`: entries with a "parity" dict or None, as units.json, show and the atlas hold them."""
    reached = [bool(im["parity"].get("reached")) for im in images if im.get("parity")]
    return sum(reached) / len(reached) if reached else None


def stalled(trace, window: int, gain: float | None) -> bool:
    """True once the mean of the last `window` values beats the window before by less than `gain`
    (relative); noisy traces (random transforms) need the averaging. The loop's early stop, and the
    atlas's test of whether a finished image converged (no torch here)."""
    if gain is None or len(trace) < 2 * window:
        return False
    a = sum(trace[-2 * window:-window]) / window
    b = sum(trace[-window:]) / window
    return b - a < gain * max(abs(a), abs(b), 1e-8)
