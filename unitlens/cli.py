"""The `unitlens` command: thin typed wrappers over the library; no computation here."""
from __future__ import annotations

import json
import sys
from pathlib import Path
from typing import Optional

import typer

app = typer.Typer(
    add_completion=False,
    no_args_is_help=True,
    pretty_exceptions_enable=False,
    rich_markup_mode=None,
    help="Find out what the units (channels) of a convolutional network respond to.",
)

# -- shared options ------------------------------------------------------------------------
Weights = typer.Option(None, "--weights", help="State-dict file, or a torchvision weights name (DEFAULT, IMAGENET1K_V2).")
Size = typer.Option(None, "--size", help="Input size in pixels, N (square) or HxW, e.g. 96x160 (default: from the weights' metadata).")
Mean = typer.Option(None, "--mean", help="Normalisation mean, one per input channel: R,G,B (e.g. 0.5,0.5,0.5) or one for grey.")
Std = typer.Option(None, "--std", help="Normalisation std, one per input channel.")
AllowPickle = typer.Option(False, "--allow-pickle", help="Allow a whole pickled module as MODEL (runs code from the file).")
ArchOption = typer.Option(None, "--arch-option", metavar="KEY=VALUE", help="Constructor option for torchvision models, key=value (repeatable).")
Json = typer.Option(False, "--json", help="Print JSON instead of a table.")
Device = typer.Option("cpu", "--device", help="Where the network runs: cpu, cuda or cuda:N (under torchrun, cuda is the GPU of LOCAL_RANK).")
StripPaths = typer.Option(None, "--strip-paths/--keep-paths", help="Cut every absolute path on the atlas's pages and "
                          "data to its file name, to hand the folder on (default: as the atlas was last drawn).")
Dedupe = typer.Option(False, "--dedupe", help="Near-identical images (thumbnail cosine >= 0.99) count once in each "
                                             "unit's exemplars; off: the exact top-K.")


def _numbers(text: Optional[str], name: str):
    if text is None:
        return None
    from .errors import UnitlensError

    try:
        return tuple(float(v) for v in text.split(","))
    except ValueError:
        raise UnitlensError(f"--{name} takes one number per input channel, like 0.485,0.456,0.406 (RGB) or 0.5 "
                            f"(grey), got '{text}'.") from None


def _size(text):
    if text is None or isinstance(text, int):
        return text
    from .errors import UnitlensError

    parts = text.lower().split("x")
    if len(parts) > 2 or not all(p.strip().isdigit() for p in parts):
        raise UnitlensError(f"--size takes N (a square input) or HxW (height x width, e.g. 96x160), got '{text}'.")
    return int(parts[0]) if len(parts) == 1 else (int(parts[0]), int(parts[1]))


def _arch_options(items: Optional[list[str]]) -> dict:
    from .errors import UnitlensError

    out = {}
    for item in items or []:
        key, sep, value = item.partition("=")
        if not sep or not key:
            raise UnitlensError(f"--arch-option takes key=value, got '{item}'.")
        low = value.lower()
        out[key] = True if low == "true" else False if low == "false" else int(value) if value.lstrip("-").isdigit() else value
    return out


def place(model, device: str):
    from .dist import place as _place

    return _place(model, device)


def _load(model, weights, size, mean, std, allow_pickle, arch_option):
    from . import load_model

    return load_model(model, weights, size=_size(size), mean=_numbers(mean, "mean"), std=_numbers(std, "std"),
                      allow_pickle=allow_pickle, arch_options=_arch_options(arch_option))


def _model_layers_corpus(model, weights, size, mean, std, allow_pickle, arch_option, layers, units, corpus, labels,
                         device, threads):
    """mine and run: the model, its chosen layers (checked before any image is decoded), the corpus."""
    import torch

    from . import open_corpus, parse_layers

    if threads:
        torch.set_num_threads(threads)
    m = _load(model, weights, size, mean, std, allow_pickle, arch_option)
    chosen = parse_layers(m, layers, units)
    place(m, device)
    return m, chosen, open_corpus(corpus, labels=labels)


# -- commands ------------------------------------------------------------------------------
@app.command()
def layers(
    model: str = typer.Argument(..., metavar="MODEL", help="torchvision:<arch>, path/file.py:function, or a TorchScript file."),
    weights: Optional[str] = Weights, size: Optional[str] = Size, mean: Optional[str] = Mean,
    std: Optional[str] = Std, allow_pickle: bool = AllowPickle, arch_option: Optional[list[str]] = ArchOption,
    as_json: bool = Json,
):
    """List every layer whose output is a feature map: shape and receptive field."""
    from .model import layer_notes

    m = _load(model, weights, size, mean, std, allow_pickle, arch_option)
    rows = []
    for info in m.layers().values():
        f = info.field
        rows.append({
            "name": info.name, "channels": info.channels, "height": info.height, "width": info.width,
            "rf_size": max(f.size) if f else None, "rf_stride": max(f.stride) if f else None,
            "rf_offset": max(f.offset) if f else None,
            "rf_size_hw": list(f.size) if f else None, "rf_stride_hw": list(f.stride) if f else None,
            "rf_offset_hw": list(f.offset) if f else None, "rf_exact": f.exact if f else None,
            "block": info.block, "layout": info.layout, "module": info.module, "call": info.call,
        })
    if as_json:
        print(json.dumps(rows, indent=1))
        return
    p = m.preprocess
    print(f"{m.spec}  input {p.channels}x{p.size[0]}x{p.size[1]}  ({p.source})")
    print(f"{'layer':<34} {'C x H x W':>16} {'field':>9} {'stride':>7} {'offset':>8}  kind")
    reused = {r["module"] for r in rows if r["call"]}
    wide = pooled = False
    for r in rows:
        shape = f"{r['channels']}x{r['height']}x{r['width']}"
        fs = "x".join(map(str, dict.fromkeys(r["rf_size_hw"]))) if r["rf_size_hw"] else "?"
        st = "x".join(map(str, dict.fromkeys(r["rf_stride_hw"]))) if r["rf_stride_hw"] else "?"
        off = "/".join(f"{v:g}" for v in dict.fromkeys(r["rf_offset_hw"])) if r["rf_offset_hw"] else "?"
        kind = ["block" if r["block"] else "op"]
        kind += [f"call {r['call'] + 1} of {r['module']}"] if r["module"] in reused else []
        kind += {"NHWC": ["channels-last"], "?": ["layout unknown: not selectable"]}.get(r["layout"], [])
        if r["rf_stride_hw"] and 0 in r["rf_stride_hw"]:  # geometry's mark of a global pool
            fs, st, off, pooled = "global", "-", "-", True
        elif r["rf_size"] and r["rf_size"] > max(p.size):
            fs, wide = fs + "*", True
        print(f"{r['name']:<34} {shape:>16} {fs:>9} {st:>7} {off:>8}  {', '.join(kind)}")
    if wide:
        print(f"* wider than the {p.size_text()} px input: the field counts the padding beyond the edges; "
              "crops are clipped to the image.")
    if pooled:
        print("global: every value pools the whole input (as a global average pool does), so each "
              "position's crop is the whole image.")
    for note in layer_notes(m):
        print(note)


@app.command("mine")
def mine_cmd(
    model: str = typer.Argument(..., metavar="MODEL", help="torchvision:<arch>, path/file.py:function, or a TorchScript file."),
    corpus: Path = typer.Option(..., "--corpus", help="Folder of images (searched recursively) or a text file of paths."),
    layers: list[str] = typer.Option(..., "--layers", metavar="LAYERS", help="Layer names, comma-separated, or LAYER:CHANNELS (repeatable)."),
    out: Path = typer.Option(..., "--out", help="Run folder to write (resumed if it exists)."),
    units: Optional[str] = typer.Option(None, "--units", help="Channels for layers given without any, e.g. 0-63,100."),
    top: int = typer.Option(16, "--top", min=1, help="Exemplars kept per unit (top and bottom)."),
    labels: Optional[str] = typer.Option(None, "--labels", help="'folders': class labels from first-level subfolders."),
    batch_size: int = typer.Option(32, "--batch-size", min=1, help="Images per forward pass."),
    workers: Optional[int] = typer.Option(None, "--workers", min=0, help="Decoding processes (default: from core count)."),
    threads: Optional[int] = typer.Option(None, "--threads", min=1, help="Torch compute threads."),
    force: bool = typer.Option(False, "--force", help="Start the run folder's mining over."),
    checkpoint_every: float = typer.Option(5.0, "--checkpoint-every", min=0.0, help="Seconds between saved checkpoints."),
    dedupe: bool = Dedupe, device: str = Device,
    weights: Optional[str] = Weights, size: Optional[str] = Size, mean: Optional[str] = Mean,
    std: Optional[str] = Std, allow_pickle: bool = AllowPickle, arch_option: Optional[list[str]] = ArchOption,
):
    """Pass 1: find each unit's top- and bottom-activating images and their crops."""
    from . import MineConfig, mine
    from .errors import shown
    from .store import check_folder

    check_folder(out)  # before the model loads
    m, chosen, c = _model_layers_corpus(model, weights, size, mean, std, allow_pickle, arch_option,
                                        layers, units, corpus, labels, device, threads)
    n_units = sum(len(lu.units) for lu in chosen)
    print(f"Mining {n_units} units in {len(chosen)} layer(s) over {len(c)} images -> {shown(out)}", file=sys.stderr)
    run = mine(m, c, chosen, out, MineConfig(top_k=top, batch_size=batch_size, workers=workers,
                                           checkpoint_seconds=checkpoint_every, dedupe=dedupe),
               progress=sys.stderr.isatty(), force=force)
    skipped = run.manifest()["corpus"]["skipped"]
    if skipped:
        print(f"{len(skipped)} file(s) skipped; reasons are in {shown(run.manifest_path)}", file=sys.stderr)
    print(shown(run.path))


@app.command()
def show(
    run: Path = typer.Argument(..., metavar="RUN", help="A run folder."),
    unit: str = typer.Argument(..., metavar="UNIT", help="LAYER:CHANNEL, e.g. layer3:37."),
    as_json: bool = Json,
):
    """Print one unit's exemplars and statistics."""
    from . import unit_summary
    from .errors import shown
    from .units import parse_unit

    layer, channel = parse_unit(unit)
    s = unit_summary(run, layer, channel)
    if as_json:
        print(json.dumps(s, indent=1))
        return
    st = s["stats"]
    if st is None:
        print(f"{shown(layer)} channel {channel}  (synthesised only: this layer was not mined, so no exemplars "
              "or statistics)")
    else:
        print(f"{shown(layer)} channel {channel}  ({st['images']} images)")
        print(f"  per-image max: mean {st['mean_max']:.4g}, std {st['std_max']:.4g}, range {st['min']:.4g} .. {st['max']:.4g}")
        print(f"  fires (max > 0) on {100 * st['fire_rate']:.1f}% of images", end="")
        print(f"; class selectivity {st['class_selectivity']:.3f}" if st["class_selectivity"] is not None else "")
    for title, key in (("top exemplars", "exemplars"), ("most negative", "negative_exemplars")):
        if not s.get(key):
            continue
        print(f"  {title}:")
        for e in s[key]:
            label = f"  [{shown(e['label'])}]" if e.get("label") else ""
            print(f"   {e['rank']:>3}  {e['score']:>10.4g}  box {e['box']}  {shown(e['id'])}{label}")
    for r in s.get("synth") or []:
        vs = f", {r['vs_best_exemplar']:.2f} x the best exemplar" if r.get("vs_best_exemplar") is not None else ""
        print(f"  synthesised: {shown(r['image'])}  (spatial max {r['max_activation']:.4g}{vs}; "
              f"rank {r['rank']} of {r['channels']} channels, {r['steps']} steps)")
        if r.get("nearest"):
            print("    nearest natural images: " + ", ".join(f"{shown(n['id'])} ({n['similarity']:.2f})"
                                                          for n in r["nearest"][:3]))


@app.command("run")
def run_cmd(
    model: str = typer.Argument(..., metavar="MODEL", help="torchvision:<arch>, path/file.py:function, or a TorchScript file."),
    corpus: Path = typer.Option(..., "--corpus", help="Folder of images (searched recursively) or a text file of paths."),
    layers: list[str] = typer.Option(..., "--layers", metavar="LAYERS", help="Layer names, comma-separated, or LAYER:CHANNELS (repeatable)."),
    out: Path = typer.Option(..., "--out", help="Run folder (resumed if it exists)."),
    units: Optional[str] = typer.Option(None, "--units", help="Channels for layers given without any, e.g. 0-63,100."),
    top: int = typer.Option(16, "--top", min=1, help="Exemplars kept per unit (top and bottom)."),
    labels: Optional[str] = typer.Option(None, "--labels", help="'folders': class labels from first-level subfolders."),
    steps: int = typer.Option(256, "--steps", min=1, help="Synthesis steps per image at most."),
    synth_size: Optional[int] = typer.Option(None, "--synth-size", help="Synthesised image size (default: the input size)."),
    seed: int = typer.Option(0, "--seed", help="Synthesis seed."),
    budget: Optional[str] = typer.Option(None, "--budget", help="Time to fit in, e.g. 8h or 90m: steps, size and units are chosen to fit."),
    batch_size: int = typer.Option(32, "--batch-size", min=1, help="Images per forward pass when mining."),
    workers: Optional[int] = typer.Option(None, "--workers", min=0, help="Decoding processes (default: from core count)."),
    threads: Optional[int] = typer.Option(None, "--threads", min=1, help="Torch compute threads."),
    force: bool = typer.Option(False, "--force", help="Start the run folder's mining and synthesis over."),
    strip_paths: Optional[bool] = StripPaths,
    dedupe: bool = Dedupe, device: str = Device,
    weights: Optional[str] = Weights, size: Optional[str] = Size, mean: Optional[str] = Mean,
    std: Optional[str] = Std, allow_pickle: bool = AllowPickle, arch_option: Optional[list[str]] = ArchOption,
):
    """Mine, synthesise and draw the atlas in one resumable command (kill it and run it again)."""
    from . import MineConfig, SynthConfig, run_all
    from .store import check_folder

    check_folder(out)  # before the model loads
    m, chosen, c = _model_layers_corpus(model, weights, size, mean, std, allow_pickle, arch_option,
                                        layers, units, corpus, labels, device, threads)
    run = run_all(m, c, chosen, out, MineConfig(top_k=top, batch_size=batch_size, workers=workers, dedupe=dedupe),
                  SynthConfig(steps=steps, size=synth_size, seed=seed), budget=budget,
                  progress=sys.stderr.isatty(), force=force, strip_paths=strip_paths)
    print(run.path / "atlas" / "index.html")


@app.command("synth")
def synth(
    target: str = typer.Argument(..., metavar="TARGET", help="A run folder (model and units from its manifest), or a MODEL (then give --layers and --out)."),
    layers: Optional[list[str]] = typer.Option(None, "--layers", metavar="LAYERS", help="Layer names, comma-separated, or LAYER:CHANNELS (repeatable; default: those mined)."),
    units: Optional[str] = typer.Option(None, "--units", help="Channels for layers given without any, e.g. 0-63,100."),
    out: Optional[Path] = typer.Option(None, "--out", help="Run folder to write when TARGET is a model (resumed if it exists)."),
    steps: int = typer.Option(256, "--steps", min=1, help="Adam steps per image at most (Olah et al. 2017 used 2560)."),
    synth_size: Optional[int] = typer.Option(None, "--synth-size", help="Synthesised image size in px (default: the model's input size)."),
    per_unit: int = typer.Option(1, "--per-unit", min=1, help="Images per unit."),
    seed: int = typer.Option(0, "--seed", help="Seed; a unit's images depend only on it, the layer, the channel and the image number."),
    basis: str = typer.Option("spectral", "--basis", help="What the optimiser moves: spectral (Fourier coefficients scaled 1/f, whitened colour) or pixel (plain RGB)."),
    reduce: str = typer.Option("mean", "--reduce", help="How a unit's feature map becomes one number: mean (over positions), centre (the centre position) or at:Y,X (one position)."),
    drive: str = typer.Option("up", "--drive", help="up: make the unit fire; down: find what turns it off."),
    diversity: float = typer.Option(0.0, "--diversity", min=0.0, help="Weight of the diversity term between a unit's images (e.g. 0.5 with --per-unit 4)."),
    smoothness: float = typer.Option(0.0, "--smoothness", min=0.0, help="Weight of a total-variation penalty that smooths the image (off by default)."),
    grey_pull: float = typer.Option(0.0, "--grey-pull", min=0.0, help="Weight of a penalty on the squared distance of pixels from mid grey (off by default)."),
    blur_period: int = typer.Option(0, "--blur-period", min=0, help="Blur the image once every N steps (0: never)."),
    no_warps: bool = typer.Option(False, "--no-warps", help="No random warps (images turn to high-frequency noise)."),
    early_stop: bool = typer.Option(True, "--early-stop/--no-early-stop", help="Stop an image once its objective stops improving."),
    lr: float = typer.Option(0.05, "--lr", help="Adam learning rate."),
    batch_size: Optional[int] = typer.Option(None, "--batch-size", min=1, help="Images per pass (default: from free memory, at most 32)."),
    threads: Optional[int] = typer.Option(None, "--threads", min=1, help="Torch compute threads."),
    force: bool = typer.Option(False, "--force", help="Redo synthesised images made with other settings."),
    device: str = Device,
    weights: Optional[str] = Weights, size: Optional[int] = Size, mean: Optional[str] = Mean,
    std: Optional[str] = Std, allow_pickle: bool = AllowPickle, arch_option: Optional[list[str]] = ArchOption,
):
    """Pass 2: synthesise images that drive each unit, many units per batch."""
    import torch

    from . import Goal, SynthConfig, synthesize
    from .errors import UnitlensError
    from .store import Run
    from .synth import Warps
    from .synth.pipeline import model_from_run

    goal = Goal(tuple(layers or ()), units, reduce=reduce, drive=drive, diversity=diversity, smoothness=smoothness,
                grey_pull=grey_pull)  # its syntax is checked here, before the model loads
    if threads:
        torch.set_num_threads(threads)
    run_dir = Path(target)
    if run_dir.is_dir():
        if out is not None:
            raise UnitlensError(f"{target} is a run folder; --out is for synthesising from a MODEL.")
        given = [n for n, v in (("--weights", weights), ("--size", size), ("--mean", mean), ("--std", std),
                                ("--arch-option", arch_option)) if v]
        if given:
            raise UnitlensError(f"{target} is a run folder, whose manifest names the model; {', '.join(given)} "
                                "apply only when TARGET is a model.")
        m = model_from_run(run_dir, allow_pickle)
    else:
        if out is None or not layers:
            raise UnitlensError(f"'{target}' is not a run folder. To synthesise from a model, give --layers and --out "
                                "(e.g. unitlens synth torchvision:resnet18 --layers layer3 --out runs/r18).")
        from .store import check_folder

        check_folder(out)  # before the model loads
        m = _load(target, weights, size, mean, std, allow_pickle, arch_option)
        run_dir = out
    chosen = goal.layers(m, Run(run_dir).manifest() if Run(run_dir).exists() else None)
    place(m, device)
    config = SynthConfig(steps=steps, size=synth_size, per_unit=per_unit, seed=seed, lr=lr, basis=basis,
                         warps=Warps.none() if no_warps else Warps(),
                         blur_period=blur_period, stop_gain=SynthConfig.stop_gain if early_stop else None,
                         batch_size=batch_size)
    n_units = sum(len(lu.units) for lu in chosen)
    print(f"Synthesising {n_units} units in {len(chosen)} layer(s), {steps} steps at most -> {run_dir}", file=sys.stderr)
    run = synthesize(m, goal, run_dir, config, progress=sys.stderr.isatty(), force=force)
    print(run.path)


@app.command("compare")
def compare_cmd(
    a: str = typer.Argument(..., metavar="A", help="Model A (torchvision:<arch>, file.py:function, TorchScript file), or a run folder."),
    b: str = typer.Argument(..., metavar="B", help="Model B, or a second run folder mined over the same corpus."),
    weights_a: Optional[str] = typer.Option(None, "--weights-a", help="Weights of model A: state-dict file or torchvision weights name."),
    weights_b: Optional[str] = typer.Option(None, "--weights-b", help="Weights of model B."),
    corpus: Optional[Path] = typer.Option(None, "--corpus", help="Probe images for two models (runs carry their corpus)."),
    layers: Optional[list[str]] = typer.Option(None, "--layers", metavar="LAYERS", help="Layers of A (and of B without --layers-b), comma-separated; LAYER:CHANNELS limits the unit tables. Runs: default, all mined in both."),
    layers_b: Optional[list[str]] = typer.Option(None, "--layers-b", metavar="LAYERS", help="Layers of B, paired with --layers in depth order (e.g. another architecture)."),
    out: Optional[Path] = typer.Option(None, "--out", help="Folder for compare.json and the CSV tables (runs: default RUN_A/compare/<RUN_B name>)."),
    full_maps: bool = typer.Option(False, "--full-maps", help="Also CKA of whole feature maps (minibatch estimator, unbiased HSIC)."),
    top: int = typer.Option(16, "--top", min=1, help="Size of the top exemplar sets whose overlap (Jaccard) is reported."),
    bootstrap: int = typer.Option(200, "--bootstrap", min=0, help="Resamples for the 95% CKA intervals (0: none)."),
    batch_size: int = typer.Option(64, "--batch-size", min=1, help="Images per forward pass (the minibatch of --full-maps)."),
    workers: Optional[int] = typer.Option(None, "--workers", min=0, help="Decoding processes (default: from core count)."),
    threads: Optional[int] = typer.Option(None, "--threads", min=1, help="Torch compute threads."),
    size: Optional[str] = typer.Option(None, "--size", help="Input size of both models, N or HxW (default: from the weights' metadata)."),
    mean: Optional[str] = typer.Option(None, "--mean", help="Normalisation mean of both models, R,G,B."),
    std: Optional[str] = typer.Option(None, "--std", help="Normalisation std of both models, R,G,B."),
    arch_option: Optional[list[str]] = typer.Option(None, "--arch-option", metavar="KEY=VALUE", help="Constructor option for torchvision models, key=value, for both models (repeatable)."),
    allow_pickle: bool = AllowPickle, as_json: bool = Json, device: str = Device,
):
    """Compare two checkpoints (or two mined runs) on one corpus: CKA per layer, drift per unit."""
    import torch

    from . import CompareConfig, compare
    from .errors import UnitlensError

    if threads:
        torch.set_num_threads(threads)
    config = CompareConfig(top_k=top, full_maps=full_maps, bootstrap=bootstrap, batch_size=batch_size, workers=workers)
    if Path(a).is_dir() or Path(b).is_dir():
        given = [n for n, v in (("--weights-a", weights_a), ("--weights-b", weights_b), ("--size", size),
                                ("--mean", mean), ("--std", std), ("--arch-option", arch_option)) if v]
        if given:
            raise UnitlensError(f"{', '.join(given)} apply to models; a run folder's manifest names its model.")
        s = compare(a, b, corpus=corpus, layers=layers, layers_b=layers_b, out=out, config=config,
                    progress=sys.stderr.isatty(), allow_pickle=allow_pickle)
    else:
        if out is None:
            raise UnitlensError("Comparing two models writes a folder: give --out DIR.")
        ma = place(_load(a, weights_a, size, mean, std, allow_pickle, arch_option), device)
        mb = place(_load(b, weights_b, size, mean, std, allow_pickle, arch_option), device)
        s = compare(ma, mb, corpus=corpus, layers=layers, layers_b=layers_b, out=out, config=config,
                    progress=sys.stderr.isatty())
    if as_json:
        print(json.dumps(s, indent=1))
        return
    from .atlas.comparison_page import cka_text

    fmt = lambda v: "-" if v is None else f"{v:.3f}"  # noqa: E731
    cka = lambda v: "-" if v is None else cka_text(v)  # noqa: E731  enough digits to tell 0.999 from 1
    print(f"{'layer':<20} {'CKA':>6} {'95% interval':>15} {'full-map':>9} {'corr':>6} {'jaccard':>7} {'dead':>4} {'changed':>7}  most changed")
    for e in s["layers"]:
        name = e["layer"] if e["layer"] == e["layer_b"] else f"{e['layer']}~{e['layer_b']}"
        ci = f"{cka(e['cka_ci'][0])}-{cka(e['cka_ci'][1])}" if e["cka_ci"] else "-"
        print(f"{name:<20} {cka(e['cka']):>6} {ci:>15} {cka(e['cka_full_maps']):>9} {fmt(e['mean_corr']):>6} "
              f"{fmt(e['mean_jaccard']):>7} {e['dead']:>4} {e['changed']:>7}  {', '.join(map(str, e['most_changed'][:8])) or e['units_note'] or ''}")
    print(s["out"])
    print(s["atlas"])


@app.command("atlas")
def atlas_cmd(
    run: Path = typer.Argument(..., metavar="RUN", help="A run folder (mined, synthesised, or both), or a folder written by `compare`."),
    layers: Optional[list[str]] = typer.Option(None, "--layers", metavar="LAYERS", help="Redraw only these layers, comma-separated (repeatable; default: all)."),
    strip_paths: Optional[bool] = StripPaths,
):
    """Draw the run's static HTML atlas into RUN/atlas/ (opens from file://, no server, no network).

    Given a comparison folder, (re)draw its pages into COMPARE/atlas/ instead."""
    from . import render_atlas

    names = [n.strip() for text in layers for n in text.split(",") if n.strip()] if layers else None
    print(render_atlas(run, layers=names, strip_paths=strip_paths))


@app.command("probe")
def probe_cmd(
    target: str = typer.Argument(..., metavar="TARGET", help="A model (then give --corpus and --out, or --image), or a mined run folder."),
    unit: Optional[str] = typer.Argument(None, metavar="UNIT", help="LAYER:CHANNEL, e.g. layer3:37 (leave out with --image)."),
    corpus: Optional[Path] = typer.Option(None, "--corpus", help="Images to mine the unit over (a model only)."),
    out: Optional[Path] = typer.Option(None, "--out", help="Run folder to write (a model only; resumed if it exists)."),
    top: int = typer.Option(9, "--top", min=1, help="Exemplars to keep and print; with --image, units to list."),
    image: Optional[Path] = typer.Option(None, "--image", help="One image: list the units of --layer it drives most."),
    layer: Optional[str] = typer.Option(None, "--layer", help="The layer whose units --image ranks."),
    attribution: Optional[str] = typer.Option(None, "--attribution", help="Heat maps: ig, gxi, smoothgrad (comma-separated), all or none. Default: ig,gxi."),
    attribute: int = typer.Option(3, "--attribute", min=0, help="How many of the top exemplars get heat maps."),
    ig_steps: int = typer.Option(16, "--ig-steps", min=1, help="Integrated-gradients steps to start from (doubled until complete)."),
    ig_max_steps: int = typer.Option(32, "--ig-max-steps", min=1, help="Most integrated-gradients steps."),
    ig_rule: str = typer.Option("trapezoid", "--ig-rule", help="trapezoid, midpoint, left or right (only trapezoid refines)."),
    baseline: str = typer.Option("black", "--baseline", help="Integrated-gradients baseline: black or blur."),
    noise: float = typer.Option(0.15, "--noise", min=0.0, help="SmoothGrad noise, a fraction of the image's range."),
    samples: int = typer.Option(32, "--samples", min=1, help="SmoothGrad noisy copies."),
    synth: Optional[bool] = typer.Option(None, "--synth/--no-synth", help="Synthesise an image if the unit has none (default: only when mining afresh)."),
    steps: int = typer.Option(48, "--steps", min=1, help="Synthesis steps."),
    synth_size: int = typer.Option(96, "--synth-size", min=16, help="Synthesised image size (at most the input size)."),
    labels: Optional[str] = typer.Option(None, "--labels", help="'folders': class labels from first-level subfolders."),
    workers: Optional[int] = typer.Option(None, "--workers", min=0, help="Decoding processes (default: from core count)."),
    threads: Optional[int] = typer.Option(None, "--threads", min=1, help="Torch compute threads."),
    weights: Optional[str] = Weights, size: Optional[str] = Size, mean: Optional[str] = Mean,
    std: Optional[str] = Std, allow_pickle: bool = AllowPickle, arch_option: Optional[list[str]] = ArchOption,
    as_json: bool = Json,
):
    """Check one unit: top exemplars, attribution heat maps, a quick synthesised image, a one-unit page.

    With --image FILE --layer L: the units of L that one image drives most, and where."""
    import torch

    from .errors import UnitlensError
    from .probing import ProbeConfig, image_text, parse_methods, probe, probe_image, probe_text

    if threads:
        torch.set_num_threads(threads)
    is_run = Path(target).is_dir()
    model_opts = [n for n, v in (("--weights", weights), ("--size", size), ("--mean", mean), ("--std", std),
                                 ("--arch-option", arch_option)) if v]
    if is_run and model_opts:
        raise UnitlensError(f"{target} is a run folder, whose manifest names the model; {', '.join(model_opts)} "
                            "apply only when TARGET is a model.")
    source = target if is_run else _load(target, weights, size, mean, std, allow_pickle, arch_option)
    if image is not None:
        if unit is not None or layer is None:
            raise UnitlensError("With --image, give --layer L (and no LAYER:CHANNEL), e.g. "
                                "unitlens probe torchvision:resnet18 --image cat.jpg --layer layer3.")
        s = probe_image(source, image, layer, top, allow_pickle=allow_pickle)
        print(json.dumps(s, indent=1) if as_json else image_text(s))
        return
    if unit is None:
        raise UnitlensError("Name the unit as LAYER:CHANNEL (e.g. layer3:37), or give --image FILE --layer L.")
    if not is_run and (corpus is None or out is None):
        raise UnitlensError(f"'{target}' is not a run folder. To probe a model, give --corpus DIR and --out DIR "
                            "(e.g. unitlens probe torchvision:resnet18 layer3:7 --corpus photos --out runs/p).")
    config = ProbeConfig(top_k=top, attribute=attribute, methods=parse_methods(attribution), ig_steps=ig_steps,
                         ig_max_steps=ig_max_steps, ig_rule=ig_rule, baseline=baseline, smoothgrad_noise=noise,
                         smoothgrad_samples=samples, synth=synth, synth_steps=steps, synth_size=synth_size,
                         workers=workers)
    c = None
    if not is_run:
        from . import open_corpus

        c = open_corpus(corpus, labels=labels)
    s = probe(source, unit, corpus=c, out=out, config=config, progress=sys.stderr.isatty(), allow_pickle=allow_pickle)
    print(json.dumps(s, indent=1) if as_json else probe_text(s))


@app.command("demo")
def demo_cmd(
    out: Path = typer.Option(Path("unitlens-demo"), "--out", help="Folder for the generated corpus and the run (resumed if it exists)."),
    count: Optional[int] = typer.Option(None, "--count", min=12, help="Swatch images to generate (default 2000)."),
    steps: Optional[int] = typer.Option(None, "--steps", min=1, help="Optimisation steps per synthesised image, at most (default 128)."),
    units: Optional[int] = typer.Option(None, "--units", min=1, help="Only the first N units of each layer (default: all 208)."),
    threads: Optional[int] = typer.Option(None, "--threads", min=1, help="Torch compute threads."),
    force: bool = typer.Option(False, "--force", help="Start the run over (the generated corpus is kept if it fits)."),
):
    """Build a whole atlas of the shipped swatch network on generated swatches (no downloads), print its path."""
    import torch

    from . import build_demo

    if threads:
        torch.set_num_threads(threads)
    given = {k: v for k, v in (("count", count), ("steps", steps)) if v is not None}
    print(build_demo(out, units=units, progress=sys.stderr.isatty(), force=force, **given))


def _print_warnings() -> None:
    """Our warnings as one `Warning: ...` line each on stderr; others as Python prints them."""
    import warnings

    from .errors import UnitlensWarning

    shown = warnings.showwarning

    def show(message, category, filename, lineno, file=None, line=None):
        if issubclass(category, UnitlensWarning):
            print(f"Warning: {message}", file=sys.stderr)
        else:
            shown(message, category, filename, lineno, file, line)

    warnings.showwarning = show


def _one_line_on_interrupt(command):
    """Ctrl-C that no stage reported itself (typer would exit 130 silently): the same one line."""
    import functools

    @functools.wraps(command)
    def run(*args, **kwargs):
        from .errors import interrupted

        try:
            return command(*args, **kwargs)
        except KeyboardInterrupt:
            raise interrupted("before the command finished; what it had saved is kept. Run the same command "
                              "again to continue.") from None

    return run


for _c in app.registered_commands:
    _c.callback = _one_line_on_interrupt(_c.callback)


def main() -> None:
    from .errors import UnitlensError, shown

    _print_warnings()
    try:
        app()
    except UnitlensError as e:
        from .dist import fail

        fail(str(e))  # under torchrun the other ranks stop and quote it
        print(f"Error: {shown(e)}", file=sys.stderr)  # one line, whatever a file name in it holds
        sys.exit(e.status)
    except KeyboardInterrupt:  # before or after a command ran (typer reports none in between)
        print("Error: Interrupted.", file=sys.stderr)
        sys.exit(130)
    except OSError as e:  # a full disk outside the stages that check their space (store.space_for)
        import errno

        if e.errno not in (errno.ENOSPC, errno.EDQUOT):
            raise
        print(f"Error: The disk is full ({e.strerror}, writing {shown(e.filename or '?')}). Free some space and "
              "run the same command again; it resumes from what is saved.", file=sys.stderr)
        sys.exit(1)
