"""Benchmark of the crop stage (`unitlens.crops.cut_exemplars`) on CPU, side by side in one run.

The current planner (every crop of the call planned first, each original decoded once per sheet
group by one thread pool) against the per-sheet strategy it replaced (`per_sheet_reference`
below: sheets cut one by one, an image decoded again for every sheet it appears in, a pool per
sheet). Both cut the same mined run; the sheets and index.npz they write are compared byte for
byte. The machine is noisy, so the two alternate and medians are reported. The network has
random weights: nothing can be downloaded here, and crop cost does not depend on weight values.

    python scripts/bench_crops.py            # resnet50 layer3 (1,024 units), 96 JPEGs, 224 px
    python scripts/bench_crops.py --quick    # resnet18 layer2 on 16 small images, a smoke test
"""
from __future__ import annotations

import argparse
import hashlib
import os
import statistics
import sys
import tempfile
import time
import warnings
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import numpy as np
import torch
from PIL import Image

import unitlens.corpus as ucorpus
import unitlens.crops as ucrops
from unitlens import MineConfig, load_model, mine, open_corpus, parse_layers
from unitlens.store import read_npz, write_npz

sys.path.insert(0, str(Path(__file__).parent))
from bench_mine import patched, table, write_jpegs  # noqa: E402

warnings.filterwarnings("ignore", message="receptive fields unavailable")


# ----------------------------------------------------------------------------- the strategy replaced

def _reference_image_cells(path, entries, field, size, thumb):
    """Decode one image for one sheet and cut its cells there. entries: [(row, col, y, x)]."""
    boxes_in = [ucrops.input_box(field, y, x, size) for (_r, _c, y, x) in entries]
    smallest = min(max(1.0, min(b[2] - b[0], b[3] - b[1])) for b in boxes_in)
    need = int(np.ceil(thumb * size / smallest))
    try:
        img, (W, H), (rx, ry) = ucorpus.decode_original(path, size=need)
    except ucorpus.ImageProblem as e:
        return None, None, None, e.reason
    place = ucorpus.placement(W, H, size)
    boxes = [place.to_original(b) for b in boxes_in]
    views = [ucrops.context_box(b, W, H, ucrops.CONTEXT) for b in boxes]
    cells = [ucrops._cell(img, (v[0] * rx, v[1] * ry, v[2] * rx, v[3] * ry), thumb) for v in views]
    return boxes, views, cells, None


def per_sheet_reference(run, model, corpus, layers, thumb: int) -> None:
    """The per-sheet crop stage, kept here only to measure against."""
    size, R = model.preprocess.side, ucrops.SHEET_ROWS
    for lu in layers:
        d = run.layer_dir(lu.layer)
        idx = read_npz(d / "index.npz")
        field = model.layer(lu.layer).field
        U, K = idx["top_image"].shape
        kinds = [("top", 0)] + ([("bottom", K)] if bool((idx["low"] < 0).any()) else [])
        cols = K * len(kinds)
        boxes = {k: np.full((U, K, 4), -1, dtype=np.int64) for k, _ in kinds}
        views = {k: np.full((U, K, 4), -1, dtype=np.int64) for k, _ in kinds}
        for s in range((U + R - 1) // R):
            rows = range(s * R, min(U, (s + 1) * R))
            sheet = np.full((len(rows) * thumb, cols * thumb, 3), ucrops.PAD_VALUE, dtype=np.uint8)
            wanted: dict[int, list] = {}
            for kind, c0 in kinds:
                img_a, y_a, x_a = idx[f"{kind}_image"], idx[f"{kind}_y"], idx[f"{kind}_x"]
                for u in rows:
                    for r in range(K):
                        i = int(img_a[u, r])
                        if i < len(corpus):
                            wanted.setdefault(i, []).append((u, c0 + r, int(y_a[u, r]), int(x_a[u, r]), kind, r))
            items = sorted(wanted.items())
            with ThreadPoolExecutor(max_workers=2) as pool:
                results = pool.map(lambda it, field=field: _reference_image_cells(
                    corpus.path(it[0]), [e[:4] for e in it[1]], field, size, thumb), items)
                for (_, entries), (bxs, vws, cells, err) in zip(items, results):
                    if err is not None:
                        continue
                    for (u, col, _y, _x, kind, r), box, view, cell in zip(entries, bxs, vws, cells):
                        row = u - rows.start
                        sheet[row * thumb:(row + 1) * thumb, col * thumb:(col + 1) * thumb] = cell
                        boxes[kind][u, r] = box
                        views[kind][u, r] = view
            Image.fromarray(sheet).save(d / f"sheet-{s:03d}.jpg", quality=88)
        idx.update({f"{k}_box": b for k, b in boxes.items()})
        idx.update({f"{k}_view": v for k, v in views.items()})
        idx.update(sheet_rows=np.array(R), sheet_cols=np.array(cols), thumb=np.array(thumb),
                   context=np.array(ucrops.CONTEXT))
        write_npz(d / "index.npz", **idx)


# ----------------------------------------------------------------------------- measurement

def digest(run, layers) -> str:
    """One hash over every sheet file and every index array of the layers."""
    h = hashlib.sha256()
    for lu in layers:
        d = run.layer_dir(lu.layer)
        for f in sorted(d.glob("sheet-*.jpg")):
            h.update(f.name.encode() + f.read_bytes())
        idx = read_npz(d / "index.npz")
        for k in sorted(idx):
            h.update(k.encode() + np.ascontiguousarray(idx[k]).tobytes())
    return h.hexdigest()


def timed(cut, run, model, corpus, layers, thumb) -> tuple[float, int, int]:
    """(seconds, decodes, distinct images decoded) of one crop stage."""
    decodes, real = [], ucorpus._decode

    def counting(path, *a, **kw):
        decodes.append(path)
        return real(path, *a, **kw)

    with patched(ucorpus, "_decode", counting):
        t = time.perf_counter()
        cut(run, model, corpus, layers, thumb)
        took = time.perf_counter() - t
    return took, len(decodes), len(set(decodes))


def main() -> None:
    p = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    p.add_argument("--quick", action="store_true", help="tiny smoke run (well under a minute)")
    p.add_argument("--images", type=int, default=96, help="JPEGs in the corpus (every 4th is 1600x1200)")
    p.add_argument("--model", default="resnet50", help="torchvision architecture")
    p.add_argument("--size", type=int, default=224, help="input size")
    p.add_argument("--layers", nargs="+", default=["layer3"], help="layers to crop (all their channels)")
    p.add_argument("--reps", type=int, default=3, help="repetitions per strategy (median reported)")
    p.add_argument("--threads", type=int, default=2, help="torch threads for the mining pass")
    args = p.parse_args()
    if args.quick:
        args.images, args.model, args.size, args.layers, args.reps = 16, "resnet18", 64, ["layer1", "layer2"], 1
    torch.set_num_threads(args.threads)
    torch.manual_seed(0)
    print(f"unitlens crop-stage benchmark: {args.model} {' '.join(args.layers)}, {args.images} JPEGs, "
          f"{args.size} px; load average at the start {os.getloadavg()[0]:.1f} on {os.cpu_count()} cores")
    with tempfile.TemporaryDirectory(prefix="bench_crops_") as tmp:
        folder = Path(tmp) / "jpegs"
        folder.mkdir()
        write_jpegs(folder, args.images, big_every=4)
        model = load_model(f"torchvision:{args.model}", size=args.size)
        corpus, layers = open_corpus(folder), parse_layers(model, args.layers)
        cfg = MineConfig(top_k=16, workers=0)
        with patched(ucrops, "cut_exemplars", lambda *a, **k: None):  # mine without the crop stage
            t = time.perf_counter()
            run = mine(model, corpus, layers, Path(tmp) / "run", cfg)
            mining = time.perf_counter() - t
        runs = {"per-sheet (reference)": per_sheet_reference, "planned (cut_exemplars)": ucrops.cut_exemplars}
        res: dict[str, list] = {k: [] for k in runs}
        digests: dict[str, set] = {k: set() for k in runs}
        for rep in range(args.reps):  # alternate, the starting strategy too
            for name in (list(runs) if rep % 2 == 0 else list(runs)[::-1]):
                res[name].append(timed(runs[name], run, model, corpus, layers, cfg.thumb))
                digests[name].add(digest(run, layers))
    med = {k: statistics.median(t for t, *_ in v) for k, v in res.items()}
    old, new = med["per-sheet (reference)"], med["planned (cut_exemplars)"]
    n_units = sum(len(lu.units) for lu in layers)
    table(f"Crop stage, {n_units} units, top-16 exemplars (bottom too where negative), {cfg.thumb} px cells "
          f"(seconds, median of {args.reps}; mining alone took {mining:.1f} s)",
          ["strategy", "s", "decodes", "images decoded"],
          [[k, med[k], res[k][0][1], res[k][0][2]] for k in runs])
    same = len(digests["per-sheet (reference)"] | digests["planned (cut_exemplars)"]) == 1
    print(f"\nSummary\n  per-sheet / planned = {old / new:.2f} x faster; outputs "
          f"{'byte-identical' if same else 'DIFFER'}; load average at the end {os.getloadavg()[0]:.1f}")
    if not same:
        sys.exit(1)


if __name__ == "__main__":
    main()
