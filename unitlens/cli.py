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
    help="Find out what the units (channels) of a convolutional network respond to.",
)

# -- shared options ------------------------------------------------------------------------
Weights = typer.Option(None, "--weights", help="State-dict file, or a torchvision weights name (DEFAULT, IMAGENET1K_V2).")
Size = typer.Option(None, "--size", help="Input size in pixels (default: from the weights' metadata).")
Mean = typer.Option(None, "--mean", help="Normalisation mean, R,G,B (e.g. 0.5,0.5,0.5).")
Std = typer.Option(None, "--std", help="Normalisation std, R,G,B.")
AllowPickle = typer.Option(False, "--allow-pickle", help="Allow a whole pickled module as MODEL (runs code from the file).")
ArchOption = typer.Option(None, "--arch-option", help="Constructor option for torchvision models, key=value (repeatable).")
Json = typer.Option(False, "--json", help="Print JSON instead of a table.")


def _triple(text: Optional[str], name: str):
    if text is None:
        return None
    from .errors import UnitlensError

    try:
        vals = tuple(float(v) for v in text.split(","))
    except ValueError:
        raise UnitlensError(f"--{name} takes three numbers like 0.485,0.456,0.406, got '{text}'.") from None
    if len(vals) != 3:
        raise UnitlensError(f"--{name} takes three numbers (R,G,B), got {len(vals)}.")
    return vals


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


def _load(model, weights, size, mean, std, allow_pickle, arch_option):
    from . import load_model

    return load_model(model, weights, size=size, mean=_triple(mean, "mean"), std=_triple(std, "std"),
                      allow_pickle=allow_pickle, arch_options=_arch_options(arch_option))


# -- commands ------------------------------------------------------------------------------
@app.command()
def layers(
    model: str = typer.Argument(..., help="torchvision:<arch>, path/file.py:function, or a TorchScript file."),
    weights: Optional[str] = Weights, size: Optional[int] = Size, mean: Optional[str] = Mean,
    std: Optional[str] = Std, allow_pickle: bool = AllowPickle, arch_option: Optional[list[str]] = ArchOption,
    as_json: bool = Json,
):
    """List every layer whose output is a feature map: shape and receptive field."""
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
            "block": info.block,
        })
    if as_json:
        print(json.dumps(rows, indent=1))
        return
    p = m.preprocess
    print(f"{m.spec}  input 3x{p.size}x{p.size}  ({p.source})")
    print(f"{'layer':<34} {'C x H x W':>16} {'field':>9} {'stride':>7} {'offset':>8}  kind")
    for r in rows:
        shape = f"{r['channels']}x{r['height']}x{r['width']}"
        fs = "x".join(map(str, dict.fromkeys(r["rf_size_hw"]))) if r["rf_size_hw"] else "?"
        st = "x".join(map(str, dict.fromkeys(r["rf_stride_hw"]))) if r["rf_stride_hw"] else "?"
        off = "/".join(f"{v:g}" for v in dict.fromkeys(r["rf_offset_hw"])) if r["rf_offset_hw"] else "?"
        print(f"{r['name']:<34} {shape:>16} {fs:>9} {st:>7} {off:>8}  {'block' if r['block'] else 'op'}")


@app.command("mine")
def mine_cmd(
    model: str = typer.Argument(..., help="torchvision:<arch>, path/file.py:function, or a TorchScript file."),
    corpus: Path = typer.Option(..., "--corpus", help="Folder of images (searched recursively) or a text file of paths."),
    layers: list[str] = typer.Option(..., "--layers", help="Layer names, comma-separated, or LAYER:CHANNELS (repeatable)."),
    out: Path = typer.Option(..., "--out", help="Run folder to write (resumed if it exists)."),
    units: Optional[str] = typer.Option(None, "--units", help="Channels for layers given without any, e.g. 0-63,100."),
    top: int = typer.Option(16, "--top", min=1, help="Exemplars kept per unit (top and bottom)."),
    labels: Optional[str] = typer.Option(None, "--labels", help="'folders': class labels from first-level subfolders."),
    batch_size: int = typer.Option(32, "--batch-size", min=1, help="Images per forward pass."),
    workers: Optional[int] = typer.Option(None, "--workers", min=0, help="Decoding processes (default: from core count)."),
    threads: Optional[int] = typer.Option(None, "--threads", min=1, help="Torch compute threads."),
    force: bool = typer.Option(False, "--force", help="Start the run folder's mining over."),
    checkpoint_every: float = typer.Option(5.0, "--checkpoint-every", min=0.0, help="Seconds between saved checkpoints."),
    weights: Optional[str] = Weights, size: Optional[int] = Size, mean: Optional[str] = Mean,
    std: Optional[str] = Std, allow_pickle: bool = AllowPickle, arch_option: Optional[list[str]] = ArchOption,
):
    """Pass 1: find each unit's top- and bottom-activating images and their crops."""
    import torch

    from . import MineConfig, mine, open_corpus, parse_layers

    if threads:
        torch.set_num_threads(threads)
    m = _load(model, weights, size, mean, std, allow_pickle, arch_option)
    chosen = parse_layers(m, layers, units)  # checked before any image is decoded
    c = open_corpus(corpus, labels=labels)
    n_units = sum(len(lu.units) for lu in chosen)
    print(f"Mining {n_units} units in {len(chosen)} layer(s) over {len(c)} images -> {out}", file=sys.stderr)
    run = mine(m, c, chosen, out, MineConfig(top_k=top, batch_size=batch_size, workers=workers,
                                           checkpoint_seconds=checkpoint_every),
               progress=sys.stderr.isatty(), force=force)
    skipped = run.manifest()["corpus"]["skipped"]
    if skipped:
        print(f"{len(skipped)} file(s) skipped; reasons are in {run.manifest_path}", file=sys.stderr)
    print(run.path)


@app.command()
def show(
    run: Path = typer.Argument(..., help="A run folder."),
    unit: str = typer.Argument(..., help="LAYER:CHANNEL, e.g. layer3:37."),
    as_json: bool = Json,
):
    """Print one unit's exemplars and statistics."""
    from . import unit_summary
    from .units import parse_unit

    layer, channel = parse_unit(unit)
    s = unit_summary(run, layer, channel)
    if as_json:
        print(json.dumps(s, indent=1))
        return
    st = s["stats"]
    print(f"{layer} channel {channel}  ({st['images']} images)")
    print(f"  per-image max: mean {st['mean_max']:.4g}, std {st['std_max']:.4g}, range {st['min']:.4g} .. {st['max']:.4g}")
    print(f"  fires (max > 0) on {100 * st['fire_rate']:.1f}% of images", end="")
    print(f"; class selectivity {st['class_selectivity']:.3f}" if st["class_selectivity"] is not None else "")
    for title, key in (("top exemplars", "exemplars"), ("most negative", "negative_exemplars")):
        if key not in s:
            continue
        print(f"  {title}:")
        for e in s[key]:
            label = f"  [{e['label']}]" if e.get("label") else ""
            print(f"   {e['rank']:>3}  {e['score']:>10.4g}  box {e['box']}  {e['id']}{label}")


def main() -> None:
    from .errors import UnitlensError

    try:
        app()
    except UnitlensError as e:
        print(f"Error: {e}", file=sys.stderr)
        sys.exit(1)
    except KeyboardInterrupt:
        print("Interrupted.", file=sys.stderr)
        sys.exit(130)
