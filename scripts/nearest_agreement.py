"""Do the natural images nearest a unit's synthesised image agree with the unit? Measured on the demo.

Mines the demo network's layer over generated swatches and synthesises every unit (cached in
--work), then, for the units whose top exemplars are at least 80% one kind of swatch (the corpus's
factors.csv is the oracle), prints the share of their synthesised images' nearest natural images
that are of that kind, in each search space:

  means     the per-image channel means (the embedding the facets use), centred, cosine
  maxima    the per-image channel maxima of the layer, centred, cosine
  maxima-z  the same, each channel divided by its standard deviation over the corpus
  maxima-own-xW   maxima, centred, with the unit's own channel weighted W times (what `synth` searches
                  in, W = 4)
  synth     the nearest images stored in units.json by the synthesis that made the images

    python scripts/nearest_agreement.py                   # block3, 1,000 swatches, 96 steps
    python scripts/nearest_agreement.py --layer block2 --count 600
"""
from __future__ import annotations

import argparse
import csv
import sys
from collections import Counter
from pathlib import Path

import numpy as np
import torch
from PIL import Image

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from unitlens import MineConfig, mine, open_corpus, parse_layers
from unitlens.demo.build import demo_corpus, demo_model
from unitlens.embedding import normalise
from unitlens.neighbours import NEAR_K
from unitlens.store import Run, read_npz
from unitlens.synth import Goal, SynthConfig, synthesize

PURE = 0.8  # a unit is single-kind when this share of its top exemplars is one kind
WEIGHTS = (2, 4, 8)  # weights of the unit's own channel tried in the unit-weighted space


def prepare(work: Path, layer: str, count: int, steps: int) -> Run:
    model = demo_model()
    corpus = open_corpus(demo_corpus(work / "corpus", count), labels="folders")
    run = work / "run"
    if not (run / "mine" / layer / "values.npy").is_file():
        mine(model, corpus, parse_layers(model, [layer]), run, MineConfig(top_k=16, workers=0))
    synthesize(model, Goal((layer,)), run, SynthConfig(steps=steps, checks=0))
    return Run(run)


def features(model, layer: str, files: list[Path]) -> tuple[np.ndarray, np.ndarray]:
    """(channel means, channel maxima) of images, each (n, C), as the corpus was seen (input size, 8 bits)."""
    size = model.preprocess.size
    x = torch.stack([torch.from_numpy(np.array(Image.open(f).convert("RGB"))).permute(2, 0, 1) for f in files]).float() / 255
    x = torch.nn.functional.interpolate(x, size=size, mode="bilinear", antialias=True, align_corners=False)
    x = (x * 255).round().clamp(0, 255) / 255.0
    with torch.no_grad():
        f = model.extractor([layer])(model.normalize(x))[layer].float()  # (n, C, H, W)
    return f.mean((2, 3)).numpy(), f.amax((2, 3)).numpy()


def agreement(work: Path, layer: str, count: int, steps: int) -> dict[str, float]:
    run = prepare(work, layer, count, steps)
    model = demo_model()
    with open(work / "corpus" / "factors.csv") as fh:
        kinds = {r["file"]: r["kind"] for r in csv.DictReader(fh)}
    files = run.corpus().files
    kind = np.array([kinds.get(f, "?") for f in files])
    idx = read_npz(run.layer_dir(layer) / "index.npz")
    units = idx["units"].tolist()
    maxima = np.load(run.layer_dir(layer) / "values.npy").astype(np.float64)  # (N, U)
    means = np.load(run.layer_dir(layer) / "means.npy").astype(np.float64)  # (N, U)
    table = (run.layer_dir(layer, "synth") / "units.json")
    import json

    recs = json.loads(table.read_text())["units"]
    chosen = []
    for p, u in enumerate(units):
        top = [kind[i] for i in idx["top_image"][p] if i < len(files)]
        k, n = Counter(top).most_common(1)[0]
        if n >= PURE * len(top) and str(u) in recs:
            chosen.append((u, k))
    pngs = [run.layer_dir(layer, "synth") / recs[str(u)]["images"][0]["file"] for u, _ in chosen]
    q_means, q_max = features(model, layer, pngs)
    sd = maxima.std(0)
    spaces = {
        "means": (means, q_means[:, units], means.mean(0), 1.0),
        "maxima": (maxima, q_max[:, units], maxima.mean(0), 1.0),
        "maxima-z": (maxima, q_max[:, units], maxima.mean(0), np.where(sd > 0, sd, 1)),
    }
    out = {}
    for name, (base, q, centre, scale) in spaces.items():
        B, Q = normalise((base - centre) / scale), normalise((q - centre) / scale)
        near = np.argsort(-(Q @ B.T), axis=1, kind="stable")[:, :NEAR_K]  # brute force: the corpus is small
        out[name] = float(np.mean([np.mean(kind[near[j]] == k) for j, (_, k) in enumerate(chosen)]))
    for w in WEIGHTS:  # the unit's own channel weighs w times the others (maxima, centred)
        shares = []
        for j, (u, k) in enumerate(chosen):
            wt = np.ones(len(units))
            wt[units.index(u)] = w
            B = normalise((maxima - maxima.mean(0)) * wt)
            Q = normalise((q_max[j:j + 1, units] - maxima.mean(0)) * wt)
            near = np.argsort(-(Q @ B.T)[0], kind="stable")[:NEAR_K]
            shares.append(np.mean(kind[near] == k))
        out[f"maxima-own-x{w:g}"] = float(np.mean(shares))
    # what `synth` wrote: the nearest images stored with each synthesised image
    at = {f: i for i, f in enumerate(files)}
    out["synth"] = float(np.mean([np.mean([kind[at[n["id"]]] == k for n in recs[str(u)]["images"][0]["nearest"]])
                                  for u, k in chosen]))
    out["units"] = len(chosen)
    return out


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--layer", default="block3")
    ap.add_argument("--count", type=int, default=1000)
    ap.add_argument("--steps", type=int, default=96)
    ap.add_argument("--work", type=Path, default=Path("/tmp/unitlens-nearest"))
    a = ap.parse_args()
    r = agreement(a.work, a.layer, a.count, a.steps)
    print(f"{a.layer}: {r['units']} single-kind units (>= {PURE:.0%} of the top exemplars one kind), "
          f"{NEAR_K} nearest images each")
    for name in ("means", "maxima", "maxima-z", *(f"maxima-own-x{w:g}" for w in WEIGHTS), "synth"):
        print(f"  {name:<9} {r[name]:.1%} of the nearest images are of the unit's kind")
    print("  (synth: as stored by the synthesis that made the images, in the search space of that version)")


if __name__ == "__main__":
    main()
