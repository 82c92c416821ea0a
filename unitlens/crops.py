"""Exemplar crops: the receptive-field box of each kept exemplar, cut from the ORIGINAL file.

Crops are packed into sprite sheets, one JPEG per SHEET_ROWS units of a layer, so a 2,048-unit
layer with 16 exemplars is 64 files, not 32k. Cell (row, col) of sheet s holds unit number
s * SHEET_ROWS + row (position in the layer's unit list); columns 0..K-1 are the top exemplars
by rank, columns K..2K-1 the bottom ones (present when the layer goes negative).
"""
from __future__ import annotations

import sys
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import numpy as np
from PIL import Image

from .store import write_npz

SHEET_ROWS = 32
PAD_VALUE = 128  # neutral grey around crops that are not square


def input_box(field, y: int, x: int, size: int) -> tuple[float, float, float, float]:
    """Receptive-field box of feature position (y, x), in network-input pixels, clipped to the input."""
    if field is None:  # unknown field: the whole input is the honest answer
        return (0.0, 0.0, float(size), float(size))
    x0, y0, x1, y1 = field.box(int(y), int(x))
    return (float(max(x0, 0)), float(max(y0, 0)), float(min(x1, size)), float(min(y1, size)))


def _cell(img: Image.Image, box, thumb: int) -> np.ndarray:
    x0, y0, x1, y1 = box
    crop = img.crop((x0, y0, max(x1, x0 + 1), max(y1, y0 + 1)))
    s = thumb / max(crop.width, crop.height)
    w, h = max(1, round(crop.width * s)), max(1, round(crop.height * s))
    crop = crop.resize((w, h), Image.BILINEAR, reducing_gap=2.0)
    canvas = Image.new("RGB", (thumb, thumb), (PAD_VALUE,) * 3)
    canvas.paste(crop, ((thumb - w) // 2, (thumb - h) // 2))
    return np.asarray(canvas)


def _image_cells(path: Path, entries, field, size: int, thumb: int):
    """Decode one image once and cut every cell it is needed for. entries: [(row, col, y, x)]."""
    from .corpus import ImageProblem, decode_original, placement

    boxes_in = [input_box(field, y, x, size) for (_r, _c, y, x) in entries]
    smallest = min(max(1.0, min(b[2] - b[0], b[3] - b[1])) for b in boxes_in)
    # Decode only as large as the smallest crop needs to fill a thumbnail: an input-pixel box of
    # side b shows (short side / size) * b original pixels, so thumb * size / b pixels on the short side do.
    need = int(np.ceil(thumb * size / smallest))
    try:
        img, (W, H), (rx, ry) = decode_original(path, size=need)
    except ImageProblem as e:
        return None, None, e.reason
    place = placement(W, H, size)
    boxes = [place.to_original(b) for b in boxes_in]
    cells = [_cell(img, (b[0] * rx, b[1] * ry, b[2] * rx, b[3] * ry), thumb) for b in boxes]
    return boxes, cells, None


def cut_exemplars(run, model, corpus, layers, thumb: int, progress: bool = False) -> None:
    """Write the sprite sheets of every mined layer and add the boxes to its index."""
    from ._progress import Progress
    from .store import read_npz

    size = model.preprocess.size
    for lu in layers:
        d = run.layer_dir(lu.layer)
        idx = read_npz(d / "index.npz")
        field = model.layer(lu.layer).field
        if field is None:
            print(f"Warning: no receptive field known for {lu.layer}; its crops show the whole input.",
                  file=sys.stderr)
        U, K = idx["top_image"].shape
        negative = bool((idx["low"] < 0).any())
        kinds = [("top", 0)] + ([("bottom", K)] if negative else [])
        cols = K * len(kinds)
        boxes = {k: np.full((U, K, 4), -1, dtype=np.int64) for k, _ in kinds}
        n_sheets = (U + SHEET_ROWS - 1) // SHEET_ROWS
        bar = Progress(n_sheets, 0, f"crops {lu.layer}", "sheets") if progress else None
        for s in range(n_sheets):
            rows = range(s * SHEET_ROWS, min(U, (s + 1) * SHEET_ROWS))
            sheet = np.full((len(rows) * thumb, cols * thumb, 3), PAD_VALUE, dtype=np.uint8)
            wanted: dict[int, list] = {}
            for kind, c0 in kinds:
                img_a, y_a, x_a = idx[f"{kind}_image"], idx[f"{kind}_y"], idx[f"{kind}_x"]
                for u in rows:
                    for r in range(K):
                        i = int(img_a[u, r])
                        if i < len(corpus):  # empty slots hold a huge index
                            wanted.setdefault(i, []).append((u, c0 + r, int(y_a[u, r]), int(x_a[u, r]), kind, r))
            items = sorted(wanted.items())
            with ThreadPoolExecutor(max_workers=2) as pool:
                results = pool.map(
                    lambda it: _image_cells(corpus.path(it[0]), [e[:4] for e in it[1]], field, size, thumb),
                    items,
                )
                for (i, entries), (bxs, cells, err) in zip(items, results):
                    if err is not None:
                        print(f"Warning: no crop from {corpus.files[i]}: {err}", file=sys.stderr)
                        continue
                    for (u, col, _y, _x, kind, r), box, cell in zip(entries, bxs, cells):
                        row = u - rows.start
                        sheet[row * thumb:(row + 1) * thumb, col * thumb:(col + 1) * thumb] = cell
                        boxes[kind][u, r] = box
            Image.fromarray(sheet).save(d / f"sheet-{s:03d}.jpg", quality=88)
            if bar:
                bar.advance(s + 1)
        if bar:
            bar.close()
        idx.update({f"{k}_box": b for k, b in boxes.items()})
        idx.update(sheet_rows=np.array(SHEET_ROWS), sheet_cols=np.array(cols), thumb=np.array(thumb))
        write_npz(d / "index.npz", **idx)


def sheet_cell(position: int, col: int) -> tuple[str, int, int]:
    """(sheet file name, row, col) of a unit's crop; `position` is the unit's place in the layer list."""
    return f"sheet-{position // SHEET_ROWS:03d}.jpg", position % SHEET_ROWS, col
