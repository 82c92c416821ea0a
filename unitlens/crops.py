"""Exemplar crops: the receptive-field box of each kept exemplar, cut from the ORIGINAL file.

Crops are packed into sprite sheets, one JPEG per SHEET_ROWS units of a layer, so a 2,048-unit
layer with 16 exemplars is 64 files, not 32k. Cell (row, col) of sheet s holds unit number
s * SHEET_ROWS + row (position in the layer's unit list); columns 0..K-1 are the top exemplars
by rank, columns K..2K-1 the bottom ones (present when the layer goes negative).

A cell shows the field with context: at least CONTEXT original pixels along each side (the whole
side when the image is smaller), centred on the field. The index keeps both boxes: `top_box` the
field, `top_view` what the cell shows (original pixels), so a page can outline the field.
"""
from __future__ import annotations

import os
import warnings
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import numpy as np
from PIL import Image

from .errors import UnitlensWarning, shown
from .store import write_npz

SHEET_ROWS = 32
CONTEXT = 32  # original pixels a crop shows at least along each side: a 3-9 px field alone is an unreadable blur
PAD_VALUE = 128  # neutral grey around crops that are not square
# Sheet pixels held at once: 32 default sheets (1,024 units, 16 exemplars each way, 96 px crops) fit.
# Originals that feed several groups are decoded once per group.
SHEET_MEMORY = 512 * 2**20
_WORKERS = min(8, os.cpu_count() or 1)  # Pillow decodes and resizes with the GIL released


def input_box(field, y: int, x: int, size) -> tuple[float, float, float, float]:
    """Receptive-field box of feature position (y, x), in network-input pixels, clipped to the input
    (`size`: an int, (height, width) or a corpus.Frame)."""
    from .corpus import as_frame

    f = as_frame(size)
    if field is None:  # unknown field: the whole input is the honest answer
        return (0.0, 0.0, float(f.width), float(f.height))
    x0, y0, x1, y1 = field.box(int(y), int(x))
    return (float(max(x0, 0)), float(max(y0, 0)), float(min(x1, f.width)), float(min(y1, f.height)))


def context_box(box, width: int, height: int, minimum: int) -> tuple[int, int, int, int]:
    """The box a crop shows for the field `box` (x0, y0, x1, y1 in original pixels, x1/y1 exclusive):
    each side widened to at least `minimum` pixels (at most the image's side), around the field's
    centre, then shifted to lie inside the image. It always contains `box`."""
    out = []
    for lo, hi, limit in ((box[0], box[2], width), (box[1], box[3], height)):
        side = max(hi - lo, min(minimum, limit))
        start = (lo + hi - side) // 2  # floor: never right of lo, and start + side >= hi
        out.append((min(max(start, 0), limit - side), side))
    (x0, w), (y0, h) = out
    return (x0, y0, x0 + w, y0 + h)


def outline_in_cell(box, view, thumb: int) -> list[float]:
    """Where the field `box` lies in the cell cut from `view` (both in original pixels), as fractions
    (x0, y0, x1, y1) of the cell's side: _cell scales the view to fit and centres it."""
    w, h = max(view[2] - view[0], 1), max(view[3] - view[1], 1)
    s = thumb / max(w, h)
    cw, ch = max(1, round(w * s)), max(1, round(h * s))
    ox, oy = (thumb - cw) // 2, (thumb - ch) // 2
    return [round((ox + (box[0] - view[0]) * cw / w) / thumb, 4), round((oy + (box[1] - view[1]) * ch / h) / thumb, 4),
            round((ox + (box[2] - view[0]) * cw / w) / thumb, 4), round((oy + (box[3] - view[1]) * ch / h) / thumb, 4)]


def _cell(img: Image.Image, box, thumb: int) -> np.ndarray:
    x0, y0, x1, y1 = box
    crop = img.crop((x0, y0, max(x1, x0 + 1), max(y1, y0 + 1)))
    s = thumb / max(crop.width, crop.height)
    w, h = max(1, round(crop.width * s)), max(1, round(crop.height * s))
    crop = crop.resize((w, h), Image.BILINEAR, reducing_gap=2.0)
    canvas = Image.new("RGB", (thumb, thumb), (PAD_VALUE,) * 3)
    canvas.paste(crop, ((thumb - w) // 2, (thumb - h) // 2))
    return np.asarray(canvas)


def image_cells(path: Path, entries, size, thumb: int, context: int = 0):
    """Decode one image and cut every cell it is needed for. entries: [(input-pixel box, need)],
    where `need` is the decode size (see _plan) the entry's sheet asks of this image; `context`:
    the least the cell shows around the field (see context_box), 0 for the field alone.

    JPEG draft decoding shrinks by 1, 2, 4 or 8 depending on the size asked for, and a smaller
    draft gives different pixels, so entries are grouped by the draft their `need` selects and the
    image is decoded once per group: once in all for formats without drafts, and in practice once
    for a JPEG unless its crops differ a lot in size. Returns (boxes, views, cells, reason): the
    fields and what the cells show, in original pixels."""
    from .corpus import ImageProblem, as_frame, decode_original, placement

    grey = as_frame(size).channels == 1  # a grey model's crops show what it saw, not the file's colours
    needs = sorted({n for *_, n in entries})
    key = {n: n for n in needs} if len(needs) == 1 else _draft_sizes(path, needs)
    boxes: list = [None] * len(entries)
    views: list = [None] * len(entries)
    cells: list = [None] * len(entries)
    for k in dict.fromkeys(key.values()):
        group = [j for j, (*_, n) in enumerate(entries) if key[n] == k]
        try:
            img, (W, H), (rx, ry) = decode_original(path, size=max(entries[j][1] for j in group))
        except ImageProblem as e:
            return None, None, None, e.reason
        if grey:
            img = img.convert("L").convert("RGB")
        place = placement(W, H, size)
        for j in group:
            b = place.to_original(entries[j][0])
            v = context_box(b, W, H, context) if context else b
            boxes[j], views[j] = b, v
            cells[j] = _cell(img, (v[0] * rx, v[1] * ry, v[2] * rx, v[3] * ry), thumb)
    return boxes, views, cells, None


def _draft_sizes(path: Path, needs) -> dict:
    """need -> the stored size a draft decode for it gives (header only: no pixels decoded). Files
    PIL cannot open map every need to one key; decode_original then reports why."""
    out = {}
    for n in needs:
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")  # decode_original warns, if there is reason to
                with Image.open(path) as im:
                    im.draft(None, (n, n))  # a no-op for formats without drafts: one key for all
                    out[n] = im.size
        except Exception:  # noqa: BLE001  (damaged or hostile files: decode_original gives the reason)
            out[n] = None
    return out


def _plan(idx, n_images: int, field, size, thumb: int):
    """Every crop of one layer's index: (kinds, cols, {sheet: {image: [(u, col, kind, r, box, need)]}}).

    `box` is in network-input pixels. `need` is the decode size of the (sheet, image) pair: only as
    large as its smallest crop needs to fill a thumbnail. An input-pixel box of side b shows at most
    (short side / side) * b original pixels (side: the input's longer side), so thumb * side / b
    pixels on the short side do."""
    from .corpus import as_frame

    side = as_frame(size).side
    U, K = idx["top_image"].shape
    negative = bool((idx["low"] < 0).any())
    kinds = [("top", 0)] + ([("bottom", K)] if negative else [])
    wanted: dict[int, dict[int, list]] = {}
    for kind, c0 in kinds:
        img_a, y_a, x_a = idx[f"{kind}_image"], idx[f"{kind}_y"], idx[f"{kind}_x"]
        for u, r in zip(*np.nonzero(img_a < n_images)):  # empty slots hold a huge index
            u, r = int(u), int(r)
            wanted.setdefault(u // SHEET_ROWS, {}).setdefault(int(img_a[u, r]), []).append(
                (u, c0 + r, kind, r, input_box(field, y_a[u, r], x_a[u, r], size)))
    for per_image in wanted.values():
        for i, es in per_image.items():
            smallest = min(max(1.0, min(b[2] - b[0], b[3] - b[1])) for *_, b in es)
            need = int(np.ceil(thumb * side / smallest))
            per_image[i] = [(*e, need) for e in es]
    return kinds, K * len(kinds), wanted


def cut_exemplars(run, model, corpus, layers, thumb: int, progress: bool = False,
                  memory: int = SHEET_MEMORY) -> None:
    """Write the sprite sheets of every mined layer and add the boxes to its index.

    All crops of the call are planned first. Sheets are then filled in groups of at most `memory`
    bytes of pixels (one sheet at least); within a group one task per original, on one thread
    pool for the whole call, decodes it (see image_cells) and cuts every cell it gives to any
    sheet of any layer. Peak memory: the group's sheets plus one decoded original per thread."""
    from ._progress import Progress
    from .store import read_npz

    size = model.preprocess.frame
    plans, sheets = [], []  # sheets: (plan number, sheet number, rows)
    for lu in layers:
        idx = read_npz(run.layer_dir(lu.layer) / "index.npz")
        field = model.layer(lu.layer).field
        if field is None:
            warnings.warn(f"no receptive field known for {shown(lu.layer)}; its crops show the whole input.",
                          UnitlensWarning, stacklevel=2)
        kinds, cols, wanted = _plan(idx, len(corpus), field, size, thumb)
        U, K = idx["top_image"].shape
        n_sheets = (U + SHEET_ROWS - 1) // SHEET_ROWS
        plans.append(dict(layer=lu.layer, idx=idx, cols=cols, wanted=wanted, left=n_sheets,
                          boxes={k: np.full((U, K, 4), -1, dtype=np.int64) for k, _ in kinds},
                          views={k: np.full((U, K, 4), -1, dtype=np.int64) for k, _ in kinds}))
        sheets += [(len(plans) - 1, s, min(SHEET_ROWS, U - s * SHEET_ROWS)) for s in range(n_sheets)]
        if n_sheets == 0:  # no units: an index without crops, as for any layer
            _write_index(run, plans[-1], thumb)
    bar = Progress(len(sheets), 0, "crops", "sheets") if progress else None
    failed: set[int] = set()
    done = 0
    with ThreadPoolExecutor(max_workers=_WORKERS) as pool:
        for group in _groups(sheets, lambda sh: sh[2] * thumb * plans[sh[0]]["cols"] * thumb * 3, memory):
            arrays = {(p, s): np.full((rows * thumb, plans[p]["cols"] * thumb, 3), PAD_VALUE, dtype=np.uint8)
                      for p, s, rows in group}
            by_image: dict[int, list] = {}  # image -> [(plan, sheet, u, col, kind, r, box, need)]
            for p, s, _rows in group:
                for i, es in plans[p]["wanted"].get(s, {}).items():
                    by_image.setdefault(i, []).extend((p, s, *e) for e in es)
            items = sorted(by_image.items())
            results = pool.map(lambda it: image_cells(corpus.path(it[0]), [e[-2:] for e in it[1]], size, thumb,
                                                      CONTEXT), items)
            for (i, todo), (bxs, vws, cells, err) in zip(items, results):
                if err is not None:
                    if i not in failed:
                        warnings.warn(f"no crop from {shown(corpus.files[i])}: {err}", UnitlensWarning, stacklevel=2)
                        failed.add(i)
                    continue
                for (p, s, u, col, kind, r, _b, _n), box, view, cell in zip(todo, bxs, vws, cells):
                    row = u - s * SHEET_ROWS
                    arrays[p, s][row * thumb:(row + 1) * thumb, col * thumb:(col + 1) * thumb] = cell
                    plans[p]["boxes"][kind][u, r] = box
                    plans[p]["views"][kind][u, r] = view
            for (p, s), sheet in arrays.items():
                Image.fromarray(sheet).save(run.layer_dir(plans[p]["layer"]) / f"sheet-{s:03d}.jpg", quality=88)
                plans[p]["left"] -= 1
                if plans[p]["left"] == 0:  # the layer's last sheet: its index is complete
                    _write_index(run, plans[p], thumb)
            done += len(group)
            if bar:
                bar.advance(done)
    if bar:
        bar.close()


def _write_index(run, pl: dict, thumb: int) -> None:
    idx = pl["idx"]
    idx.update({f"{k}_box": b for k, b in pl["boxes"].items()})
    idx.update({f"{k}_view": b for k, b in pl["views"].items()})
    idx.update(sheet_rows=np.array(SHEET_ROWS), sheet_cols=np.array(pl["cols"]), thumb=np.array(thumb),
               context=np.array(CONTEXT))
    write_npz(run.layer_dir(pl["layer"]) / "index.npz", **idx)


def _groups(items: list, nbytes, budget: int):
    """Consecutive runs of `items` whose nbytes(item) add up to at most `budget` (one item at least)."""
    group, used = [], 0
    for it in items:
        if group and used + nbytes(it) > budget:
            yield group
            group, used = [], 0
        group.append(it)
        used += nbytes(it)
    if group:
        yield group


def sheet_cell(position: int, col: int) -> tuple[str, int, int]:
    """(sheet file name, row, col) of a unit's crop; `position` is the unit's place in the layer list."""
    return f"sheet-{position // SHEET_ROWS:03d}.jpg", position % SHEET_ROWS, col
