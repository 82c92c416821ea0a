"""`unitlens demo`: a whole atlas of the shipped swatch network on a generated swatch corpus.

Nothing is downloaded and nothing is trained: the corpus is drawn from the swatch generator (seed
0, which the network never saw in training) and the weights ship with the package. The result is
an ordinary run folder, so every other command (show, probe, synth, atlas, compare) works on it.

>>> index = build_demo(Path("unitlens-demo"))   # doctest: +SKIP  (about 3 minutes on 2 cores)
"""
from __future__ import annotations

import csv
import sys
from pathlib import Path

from ..errors import UnitlensError
from . import net, swatches

LAYERS = ("block1", "block2", "block3", "block4")  # every unit of every conv stage: 208 units
CORPUS_SIZE = 2000
STEPS = 128


def demo_model():
    """The shipped swatch network as a LoadedModel."""
    from ..model import load_model

    if not net.WEIGHTS.is_file():
        raise UnitlensError(f"The demo weights are missing from the installation ({net.WEIGHTS}); "
                            "reinstall unitlens, or recreate them with scripts/train_demo_model.py.")
    return load_model(net.spec(), str(net.WEIGHTS))


def demo_corpus(folder: Path, count: int = CORPUS_SIZE, label_maps: Path | None = None) -> Path:
    """Write the demo corpus into `folder` unless the same corpus is already there; with
    `label_maps`, the swatches' label maps there too (swatches.label_map) unless present."""
    folder = Path(folder)
    factors = folder / "factors.csv"
    if folder.exists() and any(folder.iterdir()) and not factors.is_file():
        raise UnitlensError(f"{folder} exists and is not a demo corpus (no factors.csv); "
                            "choose another --out, or empty that folder.")
    if factors.is_file():
        with open(factors, newline="") as fh:
            rows = list(csv.DictReader(fh))
        if len(rows) == count and all((folder / r["file"]).is_file() for r in rows):
            if label_maps is not None and not (Path(label_maps) / "legend.csv").is_file():
                _write_label_maps(folder, Path(label_maps))
            return folder
    swatches.write_corpus(folder, count=count, size=net.INPUT_SIZE, seed=0, label_maps=label_maps)
    return folder


def _write_label_maps(folder: Path, out: Path) -> None:
    """Label maps for a corpus already on disk (its images untouched: their dates are in the run's
    corpus fingerprint)."""
    for path, s in swatches.read_factors(folder):
        target = out / path.relative_to(folder)
        target.parent.mkdir(parents=True, exist_ok=True)
        swatches.label_map(s, net.INPUT_SIZE).save(target, format="PNG")
    (out / "legend.csv").write_text(swatches.legend_text())


def build_demo(out: Path, *, count: int = CORPUS_SIZE, steps: int = STEPS, units: int | None = None,
               progress: bool = False, log=None, force: bool = False) -> Path:
    """Generate the corpus into OUT/corpus, mine and synthesise every unit of the four conv stages
    into the run folder OUT, draw the atlas, and return the path of its index page. Resumes
    whatever a previous call left unfinished. `units` keeps only the first n units per layer;
    `force` mines and synthesises again (e.g. after --count or --units changed)."""
    from ..corpus import open_corpus
    from ..mining import MineConfig
    from ..synth import OVERNIGHT, SynthConfig
    from ..units import parse_layers
    from ..workflow import run_all

    if count < 12:
        raise UnitlensError(f"The demo corpus needs at least 12 images (two per kind), got {count}.")
    out = Path(out)
    say = log or (lambda msg: print(msg, file=sys.stderr))
    model = demo_model()
    say(f"corpus: {count} generated swatches -> {out / 'corpus'}")
    maps = out / "label-maps"
    corpus = open_corpus(demo_corpus(out / "corpus", count, maps), labels="folders")
    chosen = [f"{name}:0-{min(units, model.layer(name).channels) - 1}" if units else name for name in LAYERS]
    layers = parse_layers(model, chosen)
    run_all(model, corpus, layers, out, MineConfig(top_k=16), SynthConfig(steps=steps, **OVERNIGHT),
            progress=progress, log=say, force=force)
    from ..atlas import render_atlas
    from ..concepts import label, labels_text, read_annotations
    from ..store import Run

    say(f"concepts: naming units from the generator's label maps in {maps}")
    label(Run(out), read_annotations(corpus, masks=[maps]), model=model, progress=progress)
    say(labels_text(Run(out)))
    return render_atlas(out)
