"""The `unitlens` command: thin typed wrappers over the library; no computation here."""
from __future__ import annotations

import contextlib
import json
import logging
import sys
import time
from enum import Enum
import warnings
from pathlib import Path
from typing import NoReturn, Optional

import typer

from .synth import OVERNIGHT

_STARTED = time.monotonic()  # a --budget counts from here (loading the model and the corpus included)

app = typer.Typer(
    add_completion=False,
    no_args_is_help=True,
    pretty_exceptions_enable=False,
    rich_markup_mode=None,
    help="Find out what the units (channels) of a convolutional network respond to.",
)

# -- the usage contract --------------------------------------------------------------------
# A mistake in how a command was called exits 2, shown as typer shows its own (usage line, a hint
# to --help, one `Error:` line); a problem found while running exits 1 with one `Error: ...` line
# (UnitlensError, printed by main); Ctrl-C exits 130 and keeps what was saved.

class _Usage(typer.BadParameter):
    def format_message(self) -> str:
        return self.message


def usage(message: str) -> NoReturn:
    """Stop on a usage mistake the command found itself (exit 2, typer's usage line and --help hint)."""
    raise _Usage(message)


def _choice(name: str, values: tuple[str, ...]) -> type[Enum]:
    """A closed set of option values, offered and checked by typer itself."""
    return Enum(name, [(v, v) for v in values], type=str)


Basis = _choice("Basis", ("spectral", "pixel"))
Drive = _choice("Drive", ("up", "down"))
Labels = _choice("Labels", ("folders",))
IgRule = _choice("IgRule", ("trapezoid", "midpoint", "left", "right"))
Baseline = _choice("Baseline", ("black", "blur"))
LinkMethod = _choice("LinkMethod", ("ig", "gxa"))
LinkBaseline = _choice("LinkBaseline", ("zero", "blur"))


def _value(choice: Optional[Enum]) -> Optional[str]:
    return None if choice is None else choice.value


def _set_threads(threads: Optional[int]) -> Optional[int]:
    """--threads, for every command: torch's compute threads, set once as the option is read."""
    if threads:
        import torch

        torch.set_num_threads(threads)
    return threads


def _is_run(target: str, model_options: dict) -> bool:
    """Whether TARGET names a run folder (whose manifest names the model) rather than a model;
    options that describe a model are a usage mistake with a run folder."""
    if not Path(target).is_dir():
        return False
    given = [name for name, value in model_options.items() if value]
    if given:
        usage(f"{target} is a run folder, whose manifest names the model; {', '.join(given)} apply only when "
              "TARGET is a model.")
    return True


# -- shared options ------------------------------------------------------------------------
Weights = typer.Option(None, "--weights", help="State-dict file, or a torchvision weights name (DEFAULT, IMAGENET1K_V2).")
Size = typer.Option(None, "--size", help="Input size in pixels, N (square) or HxW, e.g. 96x160 (default: from the weights' metadata).")
Mean = typer.Option(None, "--mean", help="Normalisation mean, one per input channel: R,G,B (e.g. 0.5,0.5,0.5) or one for grey.")
Std = typer.Option(None, "--std", help="Normalisation std, one per input channel.")
AllowPickle = typer.Option(False, "--allow-pickle", help="Allow a whole pickled module as MODEL (runs code from the file).")
ArchOption = typer.Option(None, "--arch-option", metavar="KEY=VALUE", help="Constructor option for torchvision models, key=value (repeatable).")
Json = typer.Option(False, "--json", help="Print JSON instead of a table.")
Device = typer.Option("cpu", "--device", help="Where the network runs: cpu, cuda or cuda:N (under torchrun, cuda is the GPU of LOCAL_RANK).")
Threads = typer.Option(None, "--threads", min=1, callback=_set_threads, help="Torch compute threads.")
LabelsOpt = typer.Option(None, "--labels", help="folders: class labels from first-level subfolders.")
StripPaths = typer.Option(None, "--strip-paths/--keep-paths", help="Cut every absolute path on the atlas's pages and "
                          "data to its file name, to hand the folder on (default: as the atlas was last drawn).")
Dedupe = typer.Option(False, "--dedupe", help="Near-identical images (thumbnail cosine >= 0.99) count once in each "
                                             "unit's exemplars; off: the exact top-K.")


def _numbers(text: Optional[str], name: str):
    if text is None:
        return None
    try:
        return tuple(float(v) for v in text.split(","))
    except ValueError:
        usage(f"--{name} takes one number per input channel, like 0.485,0.456,0.406 (RGB) or 0.5 "
                            f"(grey), got '{text}'.")


def _size(text):
    if text is None or isinstance(text, int):
        return text
    parts = text.lower().split("x")
    if len(parts) > 2 or not all(p.strip().isdigit() for p in parts):
        usage(f"--size takes N (a square input) or HxW (height x width, e.g. 96x160), got '{text}'.")
    return int(parts[0]) if len(parts) == 1 else (int(parts[0]), int(parts[1]))


def _arch_options(items: Optional[list[str]]) -> dict:
    out = {}
    for item in items or []:
        key, sep, value = item.partition("=")
        if not sep or not key:
            usage(f"--arch-option takes key=value, got '{item}'.")
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
                         device):
    """mine and run: the model, its chosen layers (checked before any image is decoded), the corpus."""
    from . import open_corpus, parse_layers

    m = _load(model, weights, size, mean, std, allow_pickle, arch_option)
    chosen = parse_layers(m, layers, units)
    place(m, device)
    return m, chosen, open_corpus(corpus, labels=_value(labels))


# -- commands ------------------------------------------------------------------------------
@app.command()
def layers(
    model: str = typer.Argument(..., metavar="MODEL", help="torchvision:<arch>, path/file.py:function, or a TorchScript file."),
    weights: Optional[str] = Weights, size: Optional[str] = Size, mean: Optional[str] = Mean,
    std: Optional[str] = Std, allow_pickle: bool = AllowPickle, arch_option: Optional[list[str]] = ArchOption,
    as_json: bool = Json,
):
    """List every layer whose output is a feature map: shape and receptive field."""
    from .model import layer_rows, layers_text

    m = _load(model, weights, size, mean, std, allow_pickle, arch_option)
    print(json.dumps(layer_rows(m), indent=1) if as_json else layers_text(m))


@app.command("mine")
def mine_cmd(
    model: str = typer.Argument(..., metavar="MODEL", help="torchvision:<arch>, path/file.py:function, or a TorchScript file."),
    corpus: Path = typer.Option(..., "--corpus", help="Folder of images (searched recursively) or a text file of paths."),
    layers: list[str] = typer.Option(..., "--layers", metavar="LAYERS", help="Layer names, comma-separated, or LAYER:CHANNELS (repeatable)."),
    out: Path = typer.Option(..., "--out", help="Run folder to write (resumed if it exists)."),
    units: Optional[str] = typer.Option(None, "--units", help="Channels for layers given without any, e.g. 0-63,100."),
    top: int = typer.Option(16, "--top", min=1, help="Exemplars kept per unit (top and bottom)."),
    labels: Optional[Labels] = LabelsOpt,
    batch_size: int = typer.Option(32, "--batch-size", min=1, help="Images per forward pass."),
    workers: Optional[int] = typer.Option(None, "--workers", min=0, help="Decoding processes (default: from core count)."),
    threads: Optional[int] = Threads,
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
                                        layers, units, corpus, labels, device)
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
    from .summary import summary_text
    from .units import parse_unit

    layer, channel = parse_unit(unit)
    s = unit_summary(run, layer, channel)
    print(json.dumps(s, indent=1) if as_json else summary_text(s, layer, channel))


@app.command("label")
def label_cmd(
    run: Path = typer.Argument(..., metavar="RUN", help="A run folder (mined)."),
    masks: Optional[list[Path]] = typer.Option(None, "--masks", metavar="DIR", help="Folder of label maps: one PNG per image, named like it (repeatable)."),
    legend: Optional[list[Path]] = typer.Option(None, "--legend", metavar="CSV", help="value,name per line: what each pixel value means (default: DIR/legend.csv; one for all folders or one per --masks)."),
    coco: Optional[list[Path]] = typer.Option(None, "--coco", metavar="JSON", help="COCO-format annotations: polygons, boxes, run-length masks (repeatable)."),
    tags: Optional[Path] = typer.Option(None, "--tags", metavar="CSV", help="image,tags per line, tags separated by ';' (scored from mining's per-image maxima)."),
    layers: Optional[list[str]] = typer.Option(None, "--layers", metavar="LAYERS", help="Layers to label, comma-separated (default: every mined layer)."),
    batch_size: int = typer.Option(16, "--batch-size", min=1, help="Images per forward pass."),
    workers: Optional[int] = typer.Option(None, "--workers", min=0, help="Decoding processes (default: from core count)."),
    threads: Optional[int] = Threads,
    force: bool = typer.Option(False, "--force", help="Label again even with the same files, thresholds included."),
    as_json: bool = Json,
):
    """Name what each unit detects from your annotations: IoU with masks, ROC AUC with image tags."""
    from .concepts import label, labels_text, read_annotations
    from .store import Run

    r = Run(run)
    chosen = [n.strip() for item in layers or () for n in item.split(",") if n.strip()]
    annotations = read_annotations(r.corpus(), masks or (), legend or (), coco or (), tags)
    entry = label(r, annotations, chosen or None, batch_size=batch_size, workers=workers,
                  progress=sys.stderr.isatty(), force=force)
    print(json.dumps(entry, indent=1) if as_json else labels_text(r))


@app.command("run")
def run_cmd(
    model: str = typer.Argument(..., metavar="MODEL", help="torchvision:<arch>, path/file.py:function, or a TorchScript file."),
    corpus: Path = typer.Option(..., "--corpus", help="Folder of images (searched recursively) or a text file of paths."),
    layers: list[str] = typer.Option(..., "--layers", metavar="LAYERS", help="Layer names, comma-separated, or LAYER:CHANNELS (repeatable)."),
    out: Path = typer.Option(..., "--out", help="Run folder (resumed if it exists)."),
    units: Optional[str] = typer.Option(None, "--units", help="Channels for layers given without any, e.g. 0-63,100."),
    top: int = typer.Option(16, "--top", min=1, help="Exemplars kept per unit (top and bottom)."),
    labels: Optional[Labels] = LabelsOpt,
    steps: int = typer.Option(256, "--steps", min=1, help="Synthesis steps per image at most."),
    lr: float = typer.Option(OVERNIGHT["lr"], "--lr", help="Adam learning rate of the synthesis."),
    stop_at_parity: Optional[float] = typer.Option(OVERNIGHT["stop_at_parity"], "--stop-at-parity", min=0.0, help="Stop an image once it drives its unit this fraction past the best natural exemplar."),
    synth_size: Optional[int] = typer.Option(None, "--synth-size", help="Synthesised image size (default: the input size)."),
    seed: int = typer.Option(0, "--seed", help="Synthesis seed."),
    budget: Optional[str] = typer.Option(None, "--budget", help="Time to fit in, e.g. 8h or 90m: steps, size and units are chosen to fit."),
    batch_size: int = typer.Option(32, "--batch-size", min=1, help="Images per forward pass when mining."),
    workers: Optional[int] = typer.Option(None, "--workers", min=0, help="Decoding processes (default: from core count)."),
    threads: Optional[int] = Threads,
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
                                        layers, units, corpus, labels, device)
    run = run_all(m, c, chosen, out, MineConfig(top_k=top, batch_size=batch_size, workers=workers, dedupe=dedupe),
                  SynthConfig(steps=steps, size=synth_size, seed=seed, lr=lr, stop_at_parity=stop_at_parity),
                  budget=budget, progress=sys.stderr.isatty(), force=force, strip_paths=strip_paths,
                  started=_STARTED)
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
    basis: Basis = typer.Option("spectral", "--basis", help="What the optimiser moves: spectral (Fourier coefficients scaled 1/f, whitened colour) or pixel (plain RGB)."),
    reduce: str = typer.Option("mean", "--reduce", help="How a unit's feature map becomes one number: mean (over positions), centre (the centre position) or at:Y,X (one position)."),
    drive: Drive = typer.Option("up", "--drive", help="up: make the unit fire; down: find what turns it off."),
    diversity: float = typer.Option(0.0, "--diversity", min=0.0, help="Weight of the diversity term between a unit's images (e.g. 0.5 with --per-unit 4)."),
    smoothness: float = typer.Option(0.0, "--smoothness", min=0.0, help="Weight of a total-variation penalty that smooths the image (off by default)."),
    grey_pull: float = typer.Option(0.0, "--grey-pull", min=0.0, help="Weight of a penalty on the squared distance of pixels from mid grey (off by default)."),
    blur_period: int = typer.Option(0, "--blur-period", min=0, help="Blur the image once every N steps (0: never)."),
    no_warps: bool = typer.Option(False, "--no-warps", help="No random warps (images turn to high-frequency noise)."),
    early_stop: bool = typer.Option(True, "--early-stop/--no-early-stop", help="Stop an image once its objective stops improving."),
    stop_at_parity: Optional[float] = typer.Option(None, "--stop-at-parity", min=0.0, help="Stop an image once it drives its unit this fraction past the best natural exemplar (e.g. 0.1; needs a mined run)."),
    lr: float = typer.Option(0.05, "--lr", help="Adam learning rate."),
    batch_size: Optional[int] = typer.Option(None, "--batch-size", min=1, help="Images per pass (default: from free memory, at most 32)."),
    threads: Optional[int] = Threads,
    force: bool = typer.Option(False, "--force", help="Redo synthesised images made with other settings."),
    device: str = Device,
    weights: Optional[str] = Weights, size: Optional[str] = Size, mean: Optional[str] = Mean,
    std: Optional[str] = Std, allow_pickle: bool = AllowPickle, arch_option: Optional[list[str]] = ArchOption,
):
    """Pass 2: synthesise images that drive each unit, many units per batch."""
    from . import Goal, SynthConfig, synthesize
    from .store import Run
    from .synth import Warps
    from .synth.pipeline import model_from_run

    run_dir = Path(target)
    is_run = _is_run(target, {"--weights": weights, "--size": size, "--mean": mean, "--std": std,
                              "--arch-option": arch_option, "--out": out})
    if not is_run and (out is None or not layers):
        usage(f"'{target}' is not a run folder. To synthesise from a model, give --layers and --out "
              "(e.g. unitlens synth torchvision:resnet18 --layers layer3 --out runs/r18).")
    goal = Goal(tuple(layers or ()), units, reduce=reduce, drive=drive.value, diversity=diversity,
                smoothness=smoothness, grey_pull=grey_pull)  # its syntax is checked here, before the model loads
    if is_run:
        m = model_from_run(run_dir, allow_pickle)
    else:
        from .store import check_folder

        check_folder(out)  # before the model loads
        m = _load(target, weights, size, mean, std, allow_pickle, arch_option)
        run_dir = out
    chosen = goal.layers(m, Run(run_dir).manifest() if Run(run_dir).exists() else None)
    place(m, device)
    config = SynthConfig(steps=steps, size=synth_size, per_unit=per_unit, seed=seed, lr=lr, basis=basis.value,
                         warps=Warps.none() if no_warps else Warps(),
                         blur_period=blur_period, stop_gain=SynthConfig.stop_gain if early_stop else None,
                         batch_size=batch_size, stop_at_parity=stop_at_parity)
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
    threads: Optional[int] = Threads,
    size: Optional[str] = typer.Option(None, "--size", help="Input size of both models, N or HxW (default: from the weights' metadata)."),
    mean: Optional[str] = typer.Option(None, "--mean", help="Normalisation mean of both models, R,G,B."),
    std: Optional[str] = typer.Option(None, "--std", help="Normalisation std of both models, R,G,B."),
    arch_option: Optional[list[str]] = typer.Option(None, "--arch-option", metavar="KEY=VALUE", help="Constructor option for torchvision models, key=value, for both models (repeatable)."),
    allow_pickle: bool = AllowPickle, as_json: bool = Json, device: str = Device,
    strip_paths: Optional[bool] = StripPaths,
):
    """Compare two checkpoints (or two mined runs) on one corpus: CKA per layer, drift per unit."""
    from . import CompareConfig, compare
    from .comparison import comparison_text

    config = CompareConfig(top_k=top, full_maps=full_maps, bootstrap=bootstrap, batch_size=batch_size, workers=workers)
    model_options = {"--weights-a": weights_a, "--weights-b": weights_b, "--size": size, "--mean": mean,
                     "--std": std, "--arch-option": arch_option}
    if _is_run(a, model_options) | _is_run(b, model_options):  # both checked: each may be a run folder
        s = compare(a, b, corpus=corpus, layers=layers, layers_b=layers_b, out=out, config=config,
                    progress=sys.stderr.isatty(), allow_pickle=allow_pickle, strip_paths=strip_paths)
    else:
        if out is None:
            usage("Comparing two models writes a folder: give --out DIR.")
        ma = place(_load(a, weights_a, size, mean, std, allow_pickle, arch_option), device)
        mb = place(_load(b, weights_b, size, mean, std, allow_pickle, arch_option), device)
        s = compare(ma, mb, corpus=corpus, layers=layers, layers_b=layers_b, out=out, config=config,
                    progress=sys.stderr.isatty(), strip_paths=strip_paths)
    if as_json:
        print(json.dumps(s, indent=1))
        return
    print(comparison_text(s))


@app.command("link")
def link_cmd(
    run: Path = typer.Argument(..., metavar="RUN", help="A mined run folder."),
    layer: str = typer.Option(..., "--layer", help="The later layer, whose mined units are fed (e.g. layer3)."),
    source: Optional[str] = typer.Option(None, "--from", help="The earlier layer whose channels feed it (default: the mined layer just before)."),
    units: Optional[str] = typer.Option(None, "--units", help="Only these units of --layer, e.g. 0-63,100 (default: all mined)."),
    method: LinkMethod = typer.Option("ig", "--method", help="ig: integrated gradients; gxa: gradient x activation (one backward)."),
    steps: int = typer.Option(16, "--steps", min=1, help="Integrated-gradients steps (trapezoid rule)."),
    baseline: LinkBaseline = typer.Option("zero", "--baseline", help="Start of the path: zero activations, or the blurred exemplar's."),
    exemplars: Optional[int] = typer.Option(None, "--exemplars", min=1, help="Top exemplars per unit to use (default: all mining kept)."),
    batch: int = typer.Option(64, "--batch", min=1, help="Rows (exemplars x path points) per forward and backward."),
    force: bool = typer.Option(False, "--force", help="Measure again, replacing links stored with other settings."),
    checkpoint_every: float = typer.Option(10.0, "--checkpoint-every", min=0.0, help="Seconds between saved checkpoints."),
    allow_pickle: bool = AllowPickle, threads: Optional[int] = Threads,
):
    """Measure how the channels of an earlier layer feed each unit of LAYER; `show` and the atlas list them."""
    from .links import LinkConfig, link, link_text

    config = LinkConfig(method=method.value, steps=steps, baseline=baseline.value, exemplars=exemplars, batch=batch,
                        checkpoint_seconds=checkpoint_every)
    path = link(run, layer, source, units=units, config=config, progress=sys.stderr.isatty(), force=force,
                allow_pickle=allow_pickle)
    print(link_text(path))


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
    ig_rule: IgRule = typer.Option("trapezoid", "--ig-rule", help="Integration rule (only trapezoid refines)."),
    baseline: Baseline = typer.Option("black", "--baseline", help="Integrated-gradients baseline."),
    noise: float = typer.Option(0.15, "--noise", min=0.0, help="SmoothGrad noise, a fraction of the image's range."),
    samples: int = typer.Option(32, "--samples", min=1, help="SmoothGrad noisy copies."),
    synth: Optional[bool] = typer.Option(None, "--synth/--no-synth", help="Synthesise an image if the unit has none (default: only when mining afresh)."),
    links: bool = typer.Option(True, "--links/--no-links", help="List the units of the mined layer before that feed it (measured once, then read from the run)."),
    steps: int = typer.Option(48, "--steps", min=1, help="Synthesis steps."),
    synth_size: int = typer.Option(96, "--synth-size", min=16, help="Synthesised image size (at most the input size)."),
    labels: Optional[Labels] = LabelsOpt,
    workers: Optional[int] = typer.Option(None, "--workers", min=0, help="Decoding processes (default: from core count)."),
    threads: Optional[int] = Threads,
    weights: Optional[str] = Weights, size: Optional[str] = Size, mean: Optional[str] = Mean,
    std: Optional[str] = Std, allow_pickle: bool = AllowPickle, arch_option: Optional[list[str]] = ArchOption,
    as_json: bool = Json,
):
    """Check one unit: top exemplars, attribution heat maps, a quick synthesised image, a one-unit page.

    With --image FILE --layer L: the units of L that one image drives most, and where."""

    from .probing import ProbeConfig, image_text, parse_methods, probe, probe_image, probe_text

    is_run = _is_run(target, {"--weights": weights, "--size": size, "--mean": mean, "--std": std,
                              "--arch-option": arch_option})
    if image is not None and (unit is not None or layer is None):
        usage("With --image, give --layer L (and no LAYER:CHANNEL), e.g. "
              "unitlens probe torchvision:resnet18 --image cat.jpg --layer layer3.")
    if image is None and unit is None:
        usage("Name the unit as LAYER:CHANNEL (e.g. layer3:37), or give --image FILE --layer L.")
    if image is None and not is_run and (corpus is None or out is None):
        usage(f"'{target}' is not a run folder. To probe a model, give --corpus DIR and --out DIR "
              "(e.g. unitlens probe torchvision:resnet18 layer3:7 --corpus photos --out runs/p).")
    source = target if is_run else _load(target, weights, size, mean, std, allow_pickle, arch_option)
    if image is not None:
        s = probe_image(source, image, layer, top, allow_pickle=allow_pickle)
        print(json.dumps(s, indent=1) if as_json else image_text(s))
        return
    config = ProbeConfig(top_k=top, attribute=attribute, methods=parse_methods(attribution), ig_steps=ig_steps,
                         ig_max_steps=ig_max_steps, ig_rule=ig_rule.value, baseline=baseline.value, smoothgrad_noise=noise,
                         smoothgrad_samples=samples, synth=synth, synth_steps=steps, synth_size=synth_size,
                         workers=workers, links=links)
    c = None
    if not is_run:
        from . import open_corpus

        c = open_corpus(corpus, labels=_value(labels))
    s = probe(source, unit, corpus=c, out=out, config=config, progress=sys.stderr.isatty(), allow_pickle=allow_pickle)
    print(json.dumps(s, indent=1) if as_json else probe_text(s))


@app.command("demo")
def demo_cmd(
    out: Path = typer.Option(Path("unitlens-demo"), "--out", help="Folder for the generated corpus and the run (resumed if it exists)."),
    count: Optional[int] = typer.Option(None, "--count", min=12, help="Swatch images to generate (default 2000)."),
    steps: Optional[int] = typer.Option(None, "--steps", min=1, help="Optimisation steps per synthesised image, at most (default 128)."),
    units: Optional[int] = typer.Option(None, "--units", min=1, help="Only the first N units of each layer (default: all 208)."),
    threads: Optional[int] = Threads,
    force: bool = typer.Option(False, "--force", help="Start the run over (the generated corpus is kept if it fits)."),
):
    """Build a whole atlas of the shipped swatch network on generated swatches (no downloads), print its path."""

    from . import build_demo

    given = {k: v for k, v in (("count", count), ("steps", steps)) if v is not None}
    print(build_demo(out, units=units, progress=sys.stderr.isatty(), force=force, **given))


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


class _Stderr(logging.Handler):
    """Prints each record's message on sys.stderr as it is at that moment (a redirected stream is used)."""

    def emit(self, record):
        print(self.format(record), file=sys.stderr)


@contextlib.contextmanager
def report_to_stderr():
    """While the command runs, what the library reports (errors.py) reaches the terminal: each
    UnitlensWarning as one `Warning: ...` line, the `unitlens` logger's records as their message."""
    from .errors import UnitlensWarning, log

    def show(message, category, filename, lineno, file=None, line=None):
        if issubclass(category, UnitlensWarning):
            print(f"Warning: {message}", file=sys.stderr)
        else:
            other(message, category, filename, lineno, file, line)

    handler, level, propagate = _Stderr(), log.level, log.propagate
    log.addHandler(handler)
    log.setLevel(logging.INFO)
    log.propagate = False
    with warnings.catch_warnings():
        other = warnings.showwarning
        warnings.showwarning = show
        try:
            yield
        finally:
            log.removeHandler(handler)
            log.setLevel(level)
            log.propagate = propagate


def main() -> None:
    from .errors import UnitlensError, shown

    try:
        with report_to_stderr():
            app(prog_name="unitlens")  # the usage line and the --help hint name the command as installed
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
