"""What the comparison pages show, read from a comparison folder (compare.json, corpus.json) and,
when the two sides are runs, from the run folders: their sprite sheets, synthesised images, atlases.

One payload per layer pair (window.UNITLENS_PAIR): the pair's figures, and per unit every number
compare.json holds for it, unchanged, plus what each side shows of the unit:
  ex_a, ex_b   up to SHOW of the side's top exemplars as [corpus index, sheet column, in the other
               side's top set (0/1)]: the column of that run's sprite sheet holding the
               receptive-field crop when the run's own exemplar at that rank is the same image,
               else -1 (then a whole-image thumbnail)
  syn_a, syn_b the side's first synthesised image of the unit, when its run has one
Thumbnails are cut here from the corpus files with Pillow, THUMB px square (the centred square the
network sees), at most MAX_THUMBS per comparison, for the most changed units first.
Reads files only; never loads a model.
"""
from __future__ import annotations

import os
from dataclasses import dataclass, field
from pathlib import Path
from urllib.parse import quote

import numpy as np

from ..store import Run, read_json, read_npz, safe_name
from .data import sheet_layout, synth_records

SHOW = 6          # exemplars per side and unit on a page
THUMB = 64        # px, side of a whole-image thumbnail
MAX_THUMBS = 1200  # thumbnails per comparison atlas (a few kB each)


@dataclass
class Side:
    """One side (A or B) of a comparison, as the pages describe and link it."""

    key: str                   # "a" or "b"
    label: str                 # short name on the pages
    run: Run | None = None     # the run folder, when this side is a run and it was found
    atlas: Path | None = None  # that run's atlas folder, when drawn
    note: str | None = None    # why nothing of a run is shown


def _label(side: dict) -> str:
    if side.get("source") == "run":
        return Path(str(side.get("run", "?"))).name or str(side.get("run"))
    model = side.get("model") or {}
    spec = str(model.get("spec", "?"))
    short = spec.rsplit("/", 1)[-1]
    w = model.get("weights") or {}
    where = w.get("path") or w.get("name")
    return f"{short} ({Path(str(where)).name})" if where else short


def _run_candidates(recorded: str, folder: Path, out: str | None) -> list[Path]:
    """Where a run named `recorded` (as typed when comparing) may be now: as recorded, relative to
    the directory the comparison ran in (found by stripping its `out` path off the folder), and
    relative to the current directory."""
    p = Path(recorded)
    if p.is_absolute():
        return [p]
    found = []
    if out and not Path(out).is_absolute() and ".." not in Path(out).parts:
        base = folder.resolve()
        for _ in Path(os.path.normpath(out)).parts:
            base = base.parent
        found.append(base / p)
    return found + [Path.cwd() / p]


def find_sides(summary: dict, folder: Path, out: Path) -> dict[str, Side]:
    """The two sides; a run is used only when its corpus is the one the comparison ran over."""
    labels = {k: _label(summary.get(k) or {}) for k in ("a", "b")}
    if labels["a"] == labels["b"]:
        labels = {k: f"{v} ({k.upper()})" for k, v in labels.items()}
    fingerprint = (summary.get("corpus") or {}).get("fingerprint")
    sides = {}
    for k in ("a", "b"):
        d = summary.get(k) or {}
        side = Side(k, labels[k])
        if d.get("source") == "run":
            for cand in _run_candidates(str(d.get("run", "")), folder, summary.get("out")):
                m = read_json(cand / "manifest.json") if (cand / "manifest.json").is_file() else None
                if m and (m.get("corpus") or {}).get("fingerprint") == fingerprint:
                    side.run = Run(cand)
                    break
            if side.run is None:
                side.note = f"run folder {d.get('run')} not found (or mined over another corpus): thumbnails only"
            elif (side.run.path / "atlas" / "index.html").is_file():
                side.atlas = side.run.path / "atlas"
        sides[k] = side
    return sides


def rel_url(target: Path, start: Path) -> str:
    """A relative URL from folder `start` to `target` (percent-encoded, '/' separated)."""
    return quote(Path(os.path.relpath(target.resolve(), start.resolve())).as_posix())


@dataclass
class _Held:
    """What a run holds for one layer, as the pages need it."""

    pos: dict[int, int] = field(default_factory=dict)   # unit -> row in the sprite sheets
    top: np.ndarray | None = None                       # (U, K) the run's own exemplar image indices
    sheets: dict | None = None                          # the sheet layout for the page (see data.sheet_layout)
    synth: dict[int, dict] = field(default_factory=dict)
    files: list[Path] = field(default_factory=list)     # sheets and synthesised PNGs to place
    href: str | None = None                             # the run atlas's page of this layer


def _held(side: Side, layer: str, img_dir: str, out: Path) -> _Held:
    h = _Held()
    if side.run is None:
        return h
    path = side.run.layer_dir(layer) / "index.npz"
    if path.is_file():
        idx = read_npz(path)
        units = [int(u) for u in idx["units"]]
        h.pos, h.top = {u: p for p, u in enumerate(units)}, idx["top_image"]
        sheets, h.sheets = sheet_layout(side.run, layer, idx, len(units), img_dir)
        h.files += sheets
    sdir, records = synth_records(side.run, layer)
    for u, rec in records.items():
        first = rec["images"][0]
        name = Path(str(first["file"])).name
        h.synth[u] = {"src": name, "ratio": first.get("vs_best_exemplar")}
        h.files.append(sdir / name)
    page = side.atlas / f"layer-{safe_name(layer)}.html" if side.atlas else None
    h.href = rel_url(page, out) if page and page.is_file() else None
    return h


def _exemplars(h: _Held, unit: int, top: list[int], other: list[int]) -> list[list[int]]:
    """[[image, sheet column or -1, in `other`], ...] for the first SHOW exemplars of one side."""
    p = h.pos.get(unit)
    usable = h.sheets is not None and p is not None and h.sheets["names"][p // h.sheets["rows"]] is not None
    out = []
    for r, img in enumerate(top[:SHOW]):
        own = int(h.top[p, r]) if usable and r < h.top.shape[1] else None
        out.append([int(img), r if own == img else -1, int(img in other)])
    return out


def pair_data(summary: dict, i: int, sides: dict[str, Side], out: Path) -> tuple[dict, dict[str, list[Path]]]:
    """(payload of layer pair i, {image folder relative to the atlas: files to place there})."""
    e = summary["layers"][i]
    layers = {"a": e["layer"], "b": e["layer_b"]}
    held, place = {}, {}
    for k, side in sides.items():
        img_dir = f"img/{k}/{safe_name(layers[k])}"
        held[k] = _held(side, layers[k], img_dir, out)
        place[img_dir] = held[k].files
    units = []
    for u in sorted(e["units"], key=lambda x: x["rank"]):
        row = {key: v for key, v in u.items() if key not in ("top_a", "top_b")}
        for k in ("a", "b"):
            h = held[k]
            row[f"ex_{k}"] = _exemplars(h, u["unit"], u[f"top_{k}"], u["top_b" if k == "a" else "top_a"])
            row[f"syn_{k}"] = h.synth.get(u["unit"])
            row[f"pos_{k}"] = h.pos.get(u["unit"])
        units.append(row)
    figures = {key: e.get(key) for key in ("layer", "layer_b", "channels", "channels_b", "cka", "cka_ci",
                                           "cka_ci_method", "cka_full_maps", "cka_full_maps_ci", "units_compared",
                                           "units_note", "top_k", "dead", "changed", "mean_corr", "mean_jaccard", "most_changed")}
    payload = {
        **figures,
        "sides": {k: {"label": s.label, "layer": layers[k], "sheets": held[k].sheets, "href": held[k].href,
                      "img_dir": f"img/{k}/{safe_name(layers[k])}", "mined": sorted(held[k].pos) or None,
                      "note": s.note} for k, s in sides.items()},
        "units": units,
        "show": SHOW,
    }
    return payload, place


def wanted_thumbs(payloads: list[dict]) -> list[int]:
    """Corpus indices that need a thumbnail, most changed units first, at most MAX_THUMBS."""
    todo = []
    for p in payloads:
        for u in p["units"]:
            for k in ("a", "b"):
                todo += [(u["rank"], r, img) for r, (img, col, _) in enumerate(u[f"ex_{k}"]) if col < 0]
    seen: dict[int, None] = {}
    for _, _, img in sorted(todo):
        seen.setdefault(img)
        if len(seen) == MAX_THUMBS:
            break
    return list(seen)


def make_thumbs(corpus: dict | None, wanted: list[int], folder: Path) -> set[int]:
    """Write folder/<index>.jpg for each wanted corpus image (kept when already there); returns the
    indices that have one. Files that cannot be read get none, and the page says so."""
    folder.mkdir(parents=True, exist_ok=True)
    keep = {f"{i}.jpg" for i in wanted}
    for f in folder.iterdir():
        if f.name not in keep:
            f.unlink()
    if not corpus or not wanted:
        return set()
    from PIL import ImageOps

    from ..corpus import Corpus, ImageProblem, decode  # (imports torch: only when thumbnails are needed)

    c = Corpus.from_json(corpus)
    have = set()
    for i in wanted:
        dst = folder / f"{i}.jpg"
        if not dst.is_file():
            if i >= len(c):
                continue
            try:
                img = decode(c.path(i), size=THUMB)
            except ImageProblem:
                continue
            tmp = dst.with_name(f".{dst.name}.tmp")
            ImageOps.fit(img, (THUMB, THUMB)).save(tmp, "JPEG", quality=85)
            os.replace(tmp, dst)
        have.add(i)
    return have


def image_ids(corpus: dict | None, payload: dict) -> dict[str, str]:
    """{corpus index: file id} of every exemplar a pair page shows (for its captions)."""
    files = (corpus or {}).get("files") or []
    used = {x[0] for u in payload["units"] for k in ("a", "b") for x in u[f"ex_{k}"]}
    return {str(i): files[i] for i in sorted(used) if i < len(files)}
