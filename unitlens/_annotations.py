"""The user's annotations, read from open formats and matched to corpus images by relative path.

Pixel annotations (a `Source` each) give, for one image, a stack of boolean masks in the original's
pixels, one per concept of the source:
  - label maps: a folder with one single-channel PNG per image (`DIR/<id minus its suffix>.png`,
    or `DIR/<id>.png`), whose pixel values index a legend CSV `value,name`; values not in the
    legend are unlabelled pixels;
  - COCO-format JSON: polygons, boxes and run-length masks per image and category.
Image tags come from a CSV `image,tags`, the tags separated by ';'.

An image a source does not annotate is unknown for that source's concepts, never a negative.
"""
from __future__ import annotations

import csv
import json
from dataclasses import dataclass, field
from pathlib import Path, PurePosixPath

import numpy as np

from .errors import UnitlensError, shown

TAG_SEPARATOR = ";"


@dataclass(frozen=True)
class Source:
    """One source of pixel annotations: its concepts and, per annotated corpus image, what to read."""
    kind: str                      # "label map" or "coco"
    path: str                      # the folder or file it came from
    concepts: tuple[str, ...]
    entries: dict = field(repr=False)  # corpus id -> PNG path (label maps) or list of COCO annotations
    values: tuple[int, ...] = ()   # label maps: the legend value of each concept
    sizes: dict = field(default_factory=dict, repr=False)  # COCO: corpus id -> (width, height) it declares
    unmatched: int = 0             # annotated images that are not in the corpus

    def masks(self, fid: str, size: tuple[int, int]) -> np.ndarray:
        """(K, H, W) bool masks of image `fid`, whose original (after EXIF orientation) is `size` = (W, H)."""
        if self.kind == "label map":
            return _label_masks(Path(self.entries[fid]), self.values, size)
        return _coco_masks(self.entries[fid], len(self.concepts), size)


# ----------------------------------------------------------------------------- label maps

def read_legend(path: str | Path) -> tuple[tuple[int, ...], tuple[str, ...]]:
    """(values, names) of a legend CSV `value,name` (a header line is allowed)."""
    rows = _csv_rows(path, "legend")
    values, names = [], []
    for n, row in rows:
        if len(row) < 2 or not row[1].strip():
            raise UnitlensError(f"Line {n} of the legend {shown(path)} is {','.join(row)!r}; each line is "
                                "`value,name` (e.g. `1,red square`). Fix that line.")
        try:
            v = int(row[0])
        except ValueError:
            if n == rows[0][0]:
                continue  # a header
            raise UnitlensError(f"Line {n} of the legend {shown(path)} starts with {row[0]!r}, not a whole number; "
                                "each line is `value,name`, the value a pixel value of the label maps.") from None
        if v in values:
            raise UnitlensError(f"The legend {shown(path)} gives the value {v} twice (line {n}); give each value "
                                "one name.")
        values.append(v)
        names.append(row[1].strip())
    if not values:
        raise UnitlensError(f"The legend {shown(path)} names no concept; write one `value,name` line per concept.")
    return tuple(values), tuple(names)


def label_maps(folder: str | Path, legend: str | Path | None, corpus) -> Source:
    """The label-map source of `folder` for the images of `corpus`; the legend defaults to folder/legend.csv."""
    d = Path(folder)
    if not d.is_dir():
        raise UnitlensError(f"Label-map folder {shown(folder)} does not exist. Give a folder holding one PNG per "
                            "image, named like the image (masks/cats/01.png for cats/01.jpg).")
    legend = Path(legend) if legend else d / "legend.csv"
    if not legend.is_file():
        raise UnitlensError(f"No legend for the label maps in {shown(folder)}: {shown(legend)} does not exist. Give "
                            "--legend CSV, a file of `value,name` lines.")
    values, names = read_legend(legend)
    entries = {}
    for fid in corpus.files:
        stem = PurePosixPath(fid).with_suffix(".png")
        for candidate in (d / stem, d / f"{fid}.png"):
            if candidate.is_file():
                entries[fid] = str(candidate)
                break
    on_disk = sum(1 for _ in d.rglob("*.png"))
    return Source("label map", str(d), names, entries, values, unmatched=max(on_disk - len(entries), 0))


def _label_masks(path: Path, values: tuple[int, ...], size: tuple[int, int]) -> np.ndarray:
    from PIL import Image

    with Image.open(path) as img:
        if img.mode not in ("L", "P", "I", "I;16", "I;16B", "I;16L", "1"):
            raise UnitlensError(f"The label map {shown(path)} is {img.mode}; label maps hold one value per pixel "
                                "(8- or 16-bit grey, or palette indices). Save it as such a PNG.")
        a = np.asarray(img)  # (H, W): palette images give their indices
    if (a.shape[1], a.shape[0]) != tuple(size):
        raise UnitlensError(f"The label map {shown(path)} is {a.shape[1]}x{a.shape[0]} pixels, its image "
                            f"{size[0]}x{size[1]}; a label map has the image's size. Redraw it at that size.")
    return np.stack([a == v for v in values])  # (K, H, W)


# ----------------------------------------------------------------------------- COCO

def coco(path: str | Path, corpus) -> Source:
    """The COCO-format source of `path` for the images of `corpus` (matched by `file_name`)."""
    try:
        d = json.loads(Path(path).read_text())
    except FileNotFoundError:
        raise UnitlensError(f"COCO file {shown(path)} does not exist.") from None
    except (json.JSONDecodeError, UnicodeDecodeError) as e:
        raise UnitlensError(f"{shown(path)} is not JSON ({e}); give a COCO-format annotation file.") from None
    if not isinstance(d, dict) or not all(isinstance(d.get(k), list) for k in ("images", "categories")):
        raise UnitlensError(f"{shown(path)} is not a COCO-format file: it needs the lists `images`, `categories` "
                            "and `annotations`.")
    try:
        cats = sorted((int(c["id"]), str(c["name"])) for c in d["categories"])
        images = {int(im["id"]): (str(im["file_name"]), int(im["width"]), int(im["height"])) for im in d["images"]}
    except (KeyError, TypeError, ValueError) as e:
        raise UnitlensError(f"{shown(path)}: every category needs `id` and `name`, every image `id`, `file_name`, "
                            f"`width` and `height` ({e!r} is missing or wrong).") from None
    column = {cid: k for k, (cid, _) in enumerate(cats)}
    known = set(corpus.files)
    entries = {name: [] for name, _, _ in images.values() if name in known}
    sizes = {name: (w, h) for name, w, h in images.values() if name in known}
    for n, a in enumerate(d.get("annotations") or []):
        try:
            name = images[int(a["image_id"])][0]
            k = column[int(a["category_id"])]
        except (KeyError, TypeError, ValueError):
            raise UnitlensError(f"Annotation {n} of {shown(path)} names an image or category that the file does not "
                                "list; fix its `image_id` / `category_id`.") from None
        if name in entries:
            seg = a.get("segmentation")
            if isinstance(seg, dict) and isinstance(seg.get("counts"), str):
                _compressed_decoder(path)  # refuse now, not in the middle of the pass
            entries[name].append((k, a.get("segmentation"), a.get("bbox")))
    names = tuple(name for _, name in cats)
    if len(set(names)) != len(names):
        raise UnitlensError(f"{shown(path)} names two categories alike; give each category its own name.")
    return Source("coco", str(path), names, entries, sizes=sizes, unmatched=len(images) - len(entries))


def _compressed_decoder(path):
    try:
        from pycocotools import mask
    except ImportError:
        raise UnitlensError(f"{shown(path)} holds compressed run-length masks (`counts` as a string), which need "
                            "pycocotools to decode: `pip install pycocotools`, or save the masks as polygons or "
                            "uncompressed run lengths (`counts` as a list of numbers).") from None
    return mask


def _coco_masks(annotations: list, K: int, size: tuple[int, int]) -> np.ndarray:
    """Rasterise one image's annotations: polygons as Pillow draws them (vertices at pixel centres,
    edges included), a box [x, y, w, h] as the w x h pixels from (x, y), run lengths decoded."""
    from PIL import Image, ImageDraw

    W, H = size
    out = np.zeros((K, H, W), dtype=bool)
    for k, seg, box in annotations:
        if isinstance(seg, list) and seg:
            canvas = Image.new("1", (W, H))
            draw = ImageDraw.Draw(canvas)
            for poly in seg:
                if len(poly) >= 6:
                    draw.polygon([(float(x), float(y)) for x, y in zip(poly[0::2], poly[1::2])], fill=1, outline=1)
            out[k] |= np.asarray(canvas, dtype=bool)
        elif isinstance(seg, dict):
            out[k] |= _run_lengths(seg, (H, W))
        elif box:
            x, y, w, h = (round(float(v)) for v in box)
            out[k, max(y, 0):max(y + h, 0), max(x, 0):max(x + w, 0)] = True
    return out


def _run_lengths(seg: dict, shape: tuple[int, int]) -> np.ndarray:
    """COCO's run-length mask: alternating runs of 0 and 1, starting with 0, in column-major order."""
    h, w = (int(v) for v in seg.get("size", shape))
    if (h, w) != shape:
        raise UnitlensError(f"A run-length mask is {w}x{h} pixels, its image {shape[1]}x{shape[0]}; fix its `size`.")
    counts = seg["counts"]
    if isinstance(counts, str):
        m = _compressed_decoder("a COCO file")
        return m.decode(m.frPyObjects(seg, h, w)).astype(bool)
    runs = np.asarray(counts, dtype=np.int64)
    if runs.sum() != h * w:
        raise UnitlensError(f"A run-length mask's runs add up to {int(runs.sum())} pixels, not {h}x{w}; fix its `counts`.")
    flat = np.repeat(np.arange(len(runs)) % 2 == 1, runs)  # (h*w,)
    return flat.reshape((h, w), order="F")


# ----------------------------------------------------------------------------- tags

def read_tags(path: str | Path, corpus) -> tuple[dict[str, frozenset[str]], int]:
    """({corpus id: its tags}, lines naming images not in the corpus) from a CSV `image,tags`."""
    known = set(corpus.files)
    tags, unmatched = {}, 0
    rows = _csv_rows(path, "tags")
    for n, row in rows:
        if n == rows[0][0] and row[0].strip().lower() == "image" and row[0].strip() not in known:
            continue  # a header
        fid = row[0].strip()
        if fid not in known:
            unmatched += 1
            continue
        found = {t.strip() for t in (row[1] if len(row) > 1 else "").split(TAG_SEPARATOR) if t.strip()}
        tags[fid] = tags.get(fid, frozenset()) | found
    if not tags:
        raise UnitlensError(f"No line of {shown(path)} names an image of the corpus ({unmatched} name others). Each "
                            "line is `image,tags`, the image as its path within the corpus folder, e.g. "
                            f"`{corpus.files[0]},tag one;tag two`.")
    return tags, unmatched


def _csv_rows(path: str | Path, what: str) -> list[tuple[int, list[str]]]:
    try:
        with open(path, newline="", encoding="utf-8-sig") as f:
            rows = [(n, row) for n, row in enumerate(csv.reader(f), 1) if row and any(c.strip() for c in row)]
    except FileNotFoundError:
        raise UnitlensError(f"The {what} file {shown(path)} does not exist.") from None
    except (UnicodeDecodeError, csv.Error) as e:
        raise UnitlensError(f"The {what} file {shown(path)} is not a UTF-8 CSV file ({e}).") from None
    if not rows:
        raise UnitlensError(f"The {what} file {shown(path)} is empty.")
    return rows
