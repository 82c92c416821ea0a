"""One unit, one command: its top exemplars, a quick synthesised image, attribution heat maps of
the exemplar crops, and a one-unit HTML page; and the reverse, which units one image drives most.

Two ways in:
  probe(model, "layer3:7", corpus=..., out=...)   mines only that unit into `out` (a normal run
                                                   folder), then synthesises a quick image
  probe("runs/ft", "layer3:7")                     answers from a mined run's index; it never
                                                   re-mines, and synthesises only when asked
                                                   (ProbeConfig.synth=True) and the unit has no image

Attribution explains ONE neuron: the unit's activation at the exemplar's argmax position (the
position mining recorded), not the spatial maximum. The maximum switches position along an
integration path, which makes it a different neuron at different points; a fixed position is one
smooth-enough function of the input, so integrated gradients' completeness (the attributions sum to
f(x) - f(baseline)) holds for exactly the score shown, and every non-zero attribution lies inside
that position's receptive field: the crop. Attribution is taken with respect to the network input in
pixel space ([0, 1] RGB, before normalisation), where a black baseline is a real black image.

Files, in RUN/probe/<layer>-<channel>/:
  index.html, atlas.css, icon.png        the page (opens from file://, makes no request)
  exemplar-NN.png                        crop NN (rank) cut from the original file
  exemplar-NN-<method>.png               its heat map over the crop (integrated-gradients,
                                         gradient-x-input, smoothgrad)
  attributions.npz                       the raw maps, summed over colour, (S, S) in input pixels,
                                         key exemplar-NN-<method>
  synth-N.png                            copy of the unit's synthesised image(s), when any
  probe.json                             what `--json` prints
"""
from __future__ import annotations

import math
import shutil
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import torch
from PIL import Image

from .errors import UnitlensError
from .runview import Probed
from .store import Run, atomic_write, safe_name, write_json, write_npz
from .summary import fires_label

METHODS = {"ig": "integrated-gradients", "gxi": "gradient-x-input", "smoothgrad": "smoothgrad"}
BASELINES = ("black", "blur")
SIGNED = {"integrated-gradients": True, "gradient-x-input": True, "smoothgrad": False}
POSITIVE, NEGATIVE, MAGNITUDE = (232, 96, 28), (24, 136, 196), (250, 210, 40)


@dataclass(frozen=True)
class ProbeConfig:
    """Settings of one probe. Fast by default; every number can be raised."""

    top_k: int = 9  # exemplars kept and printed (Zeiler & Fergus 2014 show 9)
    attribute: int = 3  # of those, how many get heat maps (the cost grows with it)
    methods: tuple[str, ...] = ("ig", "gxi")  # any of METHODS; SmoothGrad costs `samples` passes
    ig_steps: int = 16  # to start from; Sundararajan et al. 2017 found 20-300 enough for 5%
    ig_rule: str = "trapezoid"
    ig_tolerance: float | None = 0.05  # double the steps until completeness is this close ...
    ig_max_steps: int = 32  # ... or this many steps are reached (raise it when the gap stays large)
    baseline: str = "black"  # or "blur": the image under a Gaussian blur, sigma 5% of its side
    smoothgrad_noise: float = 0.15  # sigma as a fraction of the input's range (Smilkov et al.: 0.10-0.20)
    smoothgrad_samples: int = 32  # (Smilkov et al. use about 50)
    batch: int = 16  # path points or noisy copies per forward/backward
    synth: bool | None = None  # None: synthesise when mining afresh, not when reading a run
    synth_steps: int = 48
    synth_size: int = 96  # at most the model's input size
    seed: int = 0
    thumb: int = 160  # side of the crops and heat maps on the page
    batch_size: int = 32  # images per forward pass when mining
    workers: int | None = None  # decoding processes when mining; None: from the core count
    links: bool = True  # measure which units of the mined layer before feed it (links.py), unless stored

    def validate(self) -> None:
        for name, v, lo in (("top_k", self.top_k, 1), ("attribute", self.attribute, 0), ("ig_steps", self.ig_steps, 1),
                            ("ig_max_steps", self.ig_max_steps, 1), ("smoothgrad_samples", self.smoothgrad_samples, 1),
                            ("batch", self.batch, 1), ("synth_steps", self.synth_steps, 1),
                            ("synth_size", self.synth_size, 16), ("thumb", self.thumb, 16)):
            if v < lo:
                raise UnitlensError(f"{name} must be at least {lo}, got {v}.")
        bad = [m for m in self.methods if m not in METHODS]
        if bad:
            raise UnitlensError(f"Unknown attribution method '{bad[0]}'. Valid: {', '.join(METHODS)} "
                                "(comma-separated), all, or none.")
        if self.baseline not in BASELINES:
            raise UnitlensError(f"Unknown baseline '{self.baseline}'. Valid: {', '.join(BASELINES)}.")
        if self.smoothgrad_noise < 0:
            raise UnitlensError(f"SmoothGrad noise must be >= 0, got {self.smoothgrad_noise}.")
        from .attribution import RULES

        if self.ig_rule not in RULES:
            raise UnitlensError(f"Unknown integration rule '{self.ig_rule}'. Valid: {', '.join(RULES)}.")


def parse_methods(text: str | None) -> tuple[str, ...]:
    """'ig,gxi' -> ('ig', 'gxi'); 'all'; 'none' -> (). None keeps the default."""
    if text is None:
        return ProbeConfig.methods
    t = text.strip().lower()
    if t == "all":
        return tuple(METHODS)
    if t in ("none", ""):
        return ()
    names = tuple(dict.fromkeys(p.strip() for p in t.split(",") if p.strip()))
    ProbeConfig(methods=names).validate()
    return names


# -- the unit as a function of the input ---------------------------------------------------------

def unit_function(model, layer: str, channel: int, y: int, x: int, extractor=None):
    """f(pixels (B, 3, S, S) in [0, 1]) -> (B,) activation of `channel` of `layer` at (y, x)."""
    extract = extractor or model.extractor([layer])

    def f(pixels: torch.Tensor) -> torch.Tensor:
        return extract(model.normalize(pixels))[layer][:, channel, y, x]

    return f


def attribute(f, pixels: torch.Tensor, config: ProbeConfig) -> list:
    """Every chosen method on one input: a list of attribution.Attribution."""
    from . import attribution as A
    from .attribution import baseline_of

    out = []
    for m in config.methods:
        if m == "ig":
            out.append(A.integrated_gradients(f, pixels, baseline_of(pixels, config.baseline), config.ig_steps,
                                              rule=config.ig_rule, batch=config.batch,
                                              tolerance=config.ig_tolerance if config.ig_rule == "trapezoid" else None,
                                              max_steps=config.ig_max_steps))
        elif m == "gxi":
            out.append(A.gradient_x_input(f, pixels))
        else:
            out.append(A.smoothgrad(f, pixels, config.smoothgrad_noise, config.smoothgrad_samples,
                                    seed=config.seed, batch=config.batch))
    return out


# -- heat maps -----------------------------------------------------------------------------------

def heat_overlay(cell: np.ndarray, heat: np.ndarray, fit: tuple[int, int], signed: bool) -> np.ndarray:
    """Colour `heat` (h, w) over the crop `cell` (T, T, 3) uint8, where the crop fills a centred
    `fit` = (width, height) area of the cell (as crops.py lays a box out in its cell).

    Positive attributions are orange, negative blue (signed maps), magnitudes yellow (SmoothGrad);
    opacity grows with |value| up to its 99th percentile, where display is capped (Smilkov et al. 2017)."""
    T = cell.shape[0]
    w, h = fit
    a = np.asarray(Image.fromarray(heat.astype(np.float32), mode="F").resize((w, h), Image.BILINEAR))
    cap = float(np.percentile(np.abs(heat), 99)) or float(np.abs(heat).max()) or 1.0
    alpha = np.zeros((T, T, 1), np.float32)
    colour = np.zeros((T, T, 3), np.float32)
    x0, y0 = (T - w) // 2, (T - h) // 2
    alpha[y0:y0 + h, x0:x0 + w, 0] = 0.85 * np.clip(np.abs(a) / cap, 0, 1)
    if signed:
        colour[y0:y0 + h, x0:x0 + w] = np.where(a[..., None] >= 0, POSITIVE, NEGATIVE)
    else:
        colour[y0:y0 + h, x0:x0 + w] = MAGNITUDE
    base = cell.astype(np.float32)
    grey = base.mean(2, keepdims=True)
    base = 0.35 * base + 0.65 * (0.6 * grey + 50)  # a muted crop, so the colours read
    return np.clip(base * (1 - alpha) + colour * alpha, 0, 255).round().astype(np.uint8)


def _save_png(path: Path, a: np.ndarray) -> None:
    atomic_write(path, lambda fh: Image.fromarray(a).save(fh, format="PNG"))


# -- the probe -----------------------------------------------------------------------------------

def probe(source, unit: str | tuple[str, int], *, corpus=None, out=None, config: ProbeConfig = ProbeConfig(),
          progress: bool = False, allow_pickle: bool = False) -> Probed:
    """What does one unit respond to? Returns the unit's summary (as `show --json`) with heat maps,
    synthesised images and the page path (a dict that also draws itself in a notebook, see
    runview.Probed); writes the page under RUN/probe/.

    `source` is a LoadedModel (then give `corpus`, a Corpus or folder, and `out`, a run folder) or a
    mined run folder.

    >>> probe(load_model("torchvision:resnet18"), "layer3:7", corpus="photos", out="runs/p")  # doctest: +SKIP
    >>> probe("runs/p", "layer3:7")["exemplars"][0]["box"]                                   # doctest: +SKIP
    """
    from .mining import MineConfig, mine
    from .summary import unit_summary
    from .units import parse_layers, parse_unit

    config.validate()
    layer, channel = parse_unit(unit) if isinstance(unit, str) else unit
    if isinstance(source, (str, Path)):
        if corpus is not None or out is not None:
            raise UnitlensError(f"{source} is a run folder, which holds its corpus and is written to; "
                                "corpus and out apply when probing a model.")
        from .synth.pipeline import model_from_run

        run = Run(source)
        run.manifest()  # a clear error for a folder that is not a run
        model = model_from_run(run, allow_pickle)
        lu = parse_layers(model, [f"{layer}:{channel}"])[0]
        fresh = False
    else:
        model = source
        if corpus is None or out is None:
            raise UnitlensError("Probing a model mines the unit over a corpus into a run folder: give both the "
                                "corpus (a folder of images) and out (the run folder to write).")
        lu = parse_layers(model, [f"{layer}:{channel}"])[0]  # checked before any image is decoded
        from .corpus import Corpus, open_corpus

        corpus = corpus if isinstance(corpus, Corpus) else open_corpus(corpus)
        run = mine(model, corpus, (lu,), out, MineConfig(top_k=config.top_k, batch_size=config.batch_size,
                                                          workers=config.workers, keep_values=False),
                   progress=progress)
        fresh = True
    summary = unit_summary(run, layer, channel)  # refuses a unit the run did not mine
    if (config.synth if config.synth is not None else fresh) and not summary["synth"]:
        from .synth import synthesize

        goal, synth_config = _synth_goal_config(run, model, lu, config)
        synthesize(model, goal, run.path, synth_config, progress=progress)
        summary = unit_summary(run, layer, channel)
    if config.links and not summary.get("links", {}).get("feeders"):
        from .links import link_unit

        if link_unit(run, model, layer, channel, progress=progress):
            summary = unit_summary(run, layer, channel)
    summary["exemplars"] = summary["exemplars"][:config.top_k]
    summary["model"] = model.spec
    d = run.path / "probe" / f"{safe_name(layer)}-{channel:04d}"
    d.mkdir(parents=True, exist_ok=True)
    _exemplar_files(model, run, layer, channel, summary["exemplars"], config, d)
    for k, s in enumerate(summary["synth"]):
        name = f"synth-{k}.png"
        shutil.copyfile(s["image"], d / name)
        s["page_image"] = name
    summary["settings"] = _settings(config)
    from .atlas.probe_page import write_page

    summary["page"] = str(write_page(d, run, summary))
    write_json(d / "probe.json", summary)
    return Probed(summary)


def _synth_goal_config(run: Run, model, lu, config: ProbeConfig):
    """(goal, settings) of the quick synthesis of `lu`; in a run that already holds
    synthesised images, the run's own goal and settings (one folder holds images made one way)."""
    from .synth import Goal, SynthConfig, Warps

    quick = SynthConfig(steps=config.synth_steps, seed=config.seed, checks=8, batch_size=1,
                        size=min(config.synth_size, model.preprocess.side))
    old = ((run.manifest().get("synth") or {}).get("settings") or {})
    d = old.get("config")
    if not d:
        return Goal(lu), quick
    keep = {k: v for k, v in d.items() if k in SynthConfig.__dataclass_fields__ and k not in ("warps", "size")}
    return Goal(lu, **(old.get("goal") or {})), SynthConfig(
        **keep, size=d.get("size"), batch_size=1, warps=Warps.none() if d.get("warps") is None else Warps())


def _settings(config: ProbeConfig) -> dict:
    s = {"methods": [METHODS[m] for m in config.methods], "attributed": config.attribute,
         "position": "the exemplar's argmax position (one neuron), in pixel space [0, 1]"}
    if "ig" in config.methods:
        s["integrated_gradients"] = {"steps": config.ig_steps, "rule": config.ig_rule, "baseline": config.baseline,
                                     "tolerance": config.ig_tolerance, "max_steps": config.ig_max_steps}
    if "smoothgrad" in config.methods:
        s["smoothgrad"] = {"noise": config.smoothgrad_noise, "samples": config.smoothgrad_samples, "seed": config.seed}
    return s


def _exemplar_files(model, run: Run, layer: str, channel: int, exemplars: list[dict], config: ProbeConfig,
                    d: Path) -> None:
    """Crop PNGs for every exemplar; heat maps for the first `config.attribute`. Adds the file names
    (and each method's numbers) to the exemplar dicts."""
    from .corpus import CorpusDataset
    from .crops import image_cells, input_box

    info = model.layer(layer)
    size = model.preprocess.frame
    corpus = run.corpus()
    index = {f: i for i, f in enumerate(corpus.files)}
    extract = model.extractor([layer]) if config.methods and config.attribute else None
    raw = {}
    for e in exemplars:
        r = e["rank"]
        y, x = e["position"]
        box_in = input_box(info.field, y, x, size)
        need = int(math.ceil(config.thumb * size.side / max(1.0, min(box_in[2] - box_in[0], box_in[3] - box_in[1]))))
        boxes, _views, cells, err = image_cells(Path(e["image"]), [(box_in, need)], size, config.thumb)
        if err is not None:
            e["crop"] = None
            e["problem"] = f"no crop: {err}"
            continue
        _save_png(d / f"exemplar-{r:02d}.png", cells[0])
        e["crop"] = f"exemplar-{r:02d}.png"
        e["attribution"] = {}
        if extract is None or r > config.attribute:
            continue
        _i, pixels, _place, reason = CorpusDataset(corpus, size, [index[e["id"]]])[0]
        if reason is not None:
            e["problem"] = f"no attribution: {reason}"
            continue
        f = unit_function(model, layer, channel, y, x, extract)
        x0, y0, x1, y1 = (int(round(v)) for v in box_in)
        bx0, by0, bx1, by1 = boxes[0]
        bw, bh = max(bx1 - bx0, 1), max(by1 - by0, 1)
        s = config.thumb / max(bw, bh)
        fit = (max(1, round(bw * s)), max(1, round(bh * s)))
        for att in attribute(f, pixels.float() / 255.0, config):
            heat = att.values.sum(0).numpy()  # (S, S): colour channels summed, so sums still add up
            key = f"exemplar-{r:02d}-{att.method}"
            raw[key] = heat.astype(np.float32)
            shown = heat[y0:y1, x0:x1] if SIGNED[att.method] else np.abs(heat[y0:y1, x0:x1])
            _save_png(d / f"{key}.png", heat_overlay(cells[0], shown, fit, SIGNED[att.method]))
            outside = np.ones(heat.shape, bool)
            outside[y0:y1, x0:x1] = False
            rec = {"file": f"{key}.png", "score": att.f_input, "sum": att.total,
                   "outside_box": float(np.abs(heat[outside]).sum())}  # 0 unless the field is wrong
            if att.f_baseline is not None:
                rec.update(baseline_score=att.f_baseline, steps=att.steps, completeness_gap=att.gap)
            if att.method == "smoothgrad":
                rec["samples"] = att.steps
            e["attribution"][att.method] = rec
        got = e["attribution"][next(iter(e["attribution"]))]["score"] if e["attribution"] else e["score"]
        if abs(got - e["score"]) > 1e-3 * max(abs(e["score"]), 1.0):
            e["problem"] = (f"the network gives {got:.6g} at this position but the run recorded {e['score']:.6g}: "
                            "these are not the weights it was mined with (a model without --weights is "
                            "initialised at random anew on every load; save its weights and pass --weights)")
    if raw:
        write_npz(d / "attributions.npz", **raw)


# -- the reverse question ------------------------------------------------------------------------

def probe_image(source, image: str | Path, layer: str, top: int = 10, *, allow_pickle: bool = False) -> dict:
    """Which units of `layer` does one image drive most? By spatial maximum, with the position and
    its receptive-field box in the original image's pixels. `source`: a LoadedModel or a run folder.

    >>> probe_image(load_model("torchvision:resnet18"), "cat.jpg", "layer3", top=5)["units"][0]  # doctest: +SKIP
    """
    from .corpus import ImageProblem, decode_original, fit
    from .crops import input_box
    from ._extract import forward_batch

    if top < 1:
        raise UnitlensError(f"top must be at least 1, got {top}.")
    if isinstance(source, (str, Path)):
        from .synth.pipeline import model_from_run

        model = model_from_run(source, allow_pickle)
    else:
        model = source
    info = model.layer(layer)
    path = Path(image)
    if not path.is_file():
        raise UnitlensError(f"Image not found: {image}. Give the path of one image file.")
    size = model.preprocess.frame
    try:
        img, original, _ = decode_original(path, size=size.side)
    except ImageProblem as e:
        raise UnitlensError(f"Cannot use {image}: {e.reason}.") from None
    pixels, place = fit(img, size, original)
    with torch.inference_mode():
        fmap = forward_batch(model.extractor([layer]), model.normalize(torch.from_numpy(pixels)[None]))[layer][0]
    flat = fmap.flatten(1).float()  # (C, H*W)
    mx, amx = flat.max(1)
    mean = flat.mean(1)
    order = torch.argsort(mx, descending=True, stable=True)[:top]  # ties: the lower channel first
    units = []
    for rank, c in enumerate(order.tolist(), 1):
        y, x = divmod(int(amx[c]), info.width)
        units.append({"rank": rank, "unit": c, "max": float(mx[c]), "mean": float(mean[c]), "position": [y, x],
                      "box": list(place.to_original(input_box(info.field, y, x, size)))})
    return {"image": str(path), "model": model.spec, "layer": layer, "channels": info.channels,
            "size": [original[0], original[1]], "units": units}


# -- terminal text -------------------------------------------------------------------------------

def probe_text(s: dict) -> str:
    st = s["stats"]
    lines = [f"{s['layer']} channel {s['unit']} of {s['model']}  ({st['images']} images; per-image max mean "
             f"{st['mean_max']:.4g})",
             f" {fires_label(st)} on {100 * (st['fire_rate'] or 0):.1f}% of images",
             f" {'rank':>4} {'score':>10}  {'box (x0, y0, x1, y1)':<24} image"]
    for e in s["exemplars"]:
        label = f"  [{e['label']}]" if e.get("label") else ""
        lines.append(f" {e['rank']:>4} {e['score']:>10.4g}  {str(e['box']):<24} {e['image']}{label}")
    for e in s["exemplars"]:
        ig = (e.get("attribution") or {}).get("integrated-gradients")
        if ig:
            lines.append(f" integrated gradients, exemplar {e['rank']}: sum {ig['sum']:.4g} vs f(x) - f(baseline) "
                         f"{ig['score'] - ig['baseline_score']:.4g} ({100 * ig['completeness_gap']:.1f}% apart, "
                         f"{ig['steps']} steps{'; raise --ig-max-steps for a closer sum' if ig['completeness_gap'] > 0.05 else ''})")
    for e in s["exemplars"]:
        if e.get("problem"):
            lines.append(f" warning, exemplar {e['rank']}: {e['problem']}")
    for im in s["synth"]:
        ratio = f", {im['vs_best_exemplar']:.2f}x the best exemplar" if im.get("vs_best_exemplar") else ""
        lines.append(f" synthesised: {im['image']} (activation {im['max_activation']:.4g}{ratio})")
    from .links import links_text

    lines += links_text(s.get("links"))
    lines.append(s["page"])
    return "\n".join(lines)


def image_text(s: dict) -> str:
    lines = [f"{s['image']} ({s['size'][0]} x {s['size'][1]} px) through {s['model']}, {s['layer']} "
             f"({s['channels']} channels)", f" {'rank':>4} {'unit':>6} {'max':>10} {'mean':>10}  {'position':<10} box (x0, y0, x1, y1)"]
    for u in s["units"]:
        lines.append(f" {u['rank']:>4} {u['unit']:>6} {u['max']:>10.4g} {u['mean']:>10.4g}  {str(u['position']):<10} {u['box']}")
    return "\n".join(lines)
