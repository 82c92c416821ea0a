"""Name what units detect, from the user's annotations (`unitlens label`).

Pixel concepts, after Bau et al. 2017 (CVPR, "Network Dissection"): per unit a threshold T at the
top 0.5% of all its activations over the corpus (every position of every image), then per concept
  IoU = sum over images |map above T AND mask| / sum over images |map above T OR mask|,
the map brought to the original image's pixels; a unit is labelled with its best concept when
that IoU is at least 0.04 (the paper's cut-off), else it has no concept.

Two passes over the corpus, each resumable, memory O(units x (bins + concepts)) plus one image:
  1. thresholds: a per-unit histogram of every activation, BINS equal bins between the unit's
     smallest and largest value (both known from mining); T is read off the histogram, within
     one bin width of numpy.quantile(..., method="inverted_cdf") (the bin holding the order
     statistic is exact: counts are exact);
  2. overlaps: per annotated image, intersections and unions added up; maps are never kept.
Image tags: per unit and tag, the ROC AUC of the per-image maxima mining stored (values.npy),
over the images the tags file lists; no pass.

How a map reaches the original's pixels: a pixel's centre goes through the input placement
(corpus.Placement: scale, centre crop) to network-input coordinates, then through the layer's
receptive field (geometry.Field: centre of position y is offset + y * stride) to map coordinates,
where the map is read bilinearly (edge values beyond the outer centres). Pixels outside the
centre crop were not seen by the network: they count neither for the map nor for the masks.
Without a known receptive field the map is stretched over the input, as torch's bilinear
interpolation does (align_corners=False).

Files: concepts/<layer>/threshold.npz, overlap.npz, tags.npz; the manifest's `concepts` entry.
"""
from __future__ import annotations

import json
import time
from dataclasses import dataclass, field

import numpy as np

from ._annotations import Source, coco, label_maps, read_tags
from .errors import UnitlensError, interrupted, log, shown
from .store import Run, read_npz, write_npz

TOP = 0.005  # share of a unit's activations above its threshold (Bau et al. 2017)
CUTOFF = 0.04  # least IoU for a label (Bau et al. 2017)
BINS = 8192  # histogram bins per unit for the threshold; the error bound is (max - min) / BINS


@dataclass(frozen=True)
class Annotations:
    """What the user annotated: pixel sources, and image tags ({corpus id: tags}) if given."""
    sources: tuple[Source, ...] = ()
    tags: dict | None = field(default=None, repr=False)
    tags_path: str | None = None
    tags_unmatched: int = 0
    stamp: str = ""  # the annotation files' paths, sizes and dates: a finished labelling with the same is not redone

    @property
    def concepts(self) -> tuple[str, ...]:
        return tuple(c for s in self.sources for c in s.concepts)


def read_annotations(corpus, masks=(), legends=(), coco_files=(), tags=None) -> Annotations:
    """Read and check every annotation file before any pass. `legends`: none (each folder's
    legend.csv), one for every folder, or one per folder in order."""
    masks, legends = list(masks), list(legends)
    if legends and len(legends) not in (1, len(masks)):
        raise UnitlensError(f"{len(legends)} legends for {len(masks)} label-map folders: give one legend for all "
                            "folders, or one per folder in the same order.")
    if legends and not masks:
        raise UnitlensError("A legend was given without label maps; give the folder with --masks DIR.")
    sources = [label_maps(d, legends[min(i, len(legends) - 1)] if legends else None, corpus)
               for i, d in enumerate(masks)]
    sources += [coco(f, corpus) for f in coco_files]
    if not sources and tags is None:
        raise UnitlensError("No annotations given. Give label maps (--masks DIR, with --legend CSV), a COCO file "
                            "(--coco JSON) or image tags (--tags CSV).")
    names = [c for s in sources for c in s.concepts]
    twice = sorted({c for c in names if names.count(c) > 1})
    if twice:
        raise UnitlensError(f"The concept name(s) {', '.join(map(repr, twice))} come from more than one source; "
                            "rename them in a legend or COCO file so that every concept has its own name.")
    for s in sources:
        if not s.entries:
            raise UnitlensError(f"No image of the corpus has an annotation in {shown(s.path)} ({s.unmatched} "
                                f"annotated images are not in it). Annotations are matched by the image's path "
                                f"within the corpus folder, e.g. {corpus.files[0]}.")
    _check_sizes(sources, corpus)
    tag_map, unmatched = read_tags(tags, corpus) if tags is not None else (None, 0)
    files = [p for s in sources for p in ([s.path] if s.kind == "coco" else s.entries.values())]
    files += [f"{d}/legend.csv" for d in masks] + list(map(str, legends)) + ([str(tags)] if tags is not None else [])
    return Annotations(tuple(sources), tag_map, None if tags is None else str(tags), unmatched, _stamp(files))


def _stamp(files) -> str:
    import hashlib
    import os

    h = hashlib.sha256()
    for f in files:
        try:
            st = os.stat(f)
            h.update(f"{f}\0{st.st_size}\0{st.st_mtime_ns}\n".encode())
        except OSError:
            h.update(f"{f}\0missing\n".encode())
    return h.hexdigest()


def _check_sizes(sources, corpus) -> None:
    """Refuse masks of another size than their image before the passes start (headers only)."""
    from PIL import Image

    from .corpus import upright_size

    for s in sources:
        for fid in list(s.entries)[:: max(len(s.entries) // 200, 1)]:  # a sample: the pass checks every one
            try:
                w, h = upright_size(corpus.root / fid)  # an absolute id replaces the root, as in Corpus.path
                declared = s.sizes.get(fid)
                if declared is None:
                    with Image.open(s.entries[fid]) as m:
                        declared = m.size
            except OSError:
                continue  # an unreadable image is skipped by the pass, as by mining
            if tuple(declared) != (w, h):
                raise UnitlensError(f"{shown(s.path)} gives {fid} as {declared[0]}x{declared[1]} pixels, but the "
                                    f"image is {w}x{h}; annotations are in the image's own pixels. Fix that entry.")


# ----------------------------------------------------------------------------- thresholds

class ThresholdTally:
    """Per-unit histogram of every activation, BINS equal bins over [low, high] of each unit."""

    def __init__(self, low: np.ndarray, high: np.ndarray, bins: int = BINS):
        import torch

        self.low = torch.as_tensor(np.asarray(low, dtype=np.float64))
        self.width = torch.as_tensor((np.asarray(high, dtype=np.float64) - self.low.numpy()) / bins)
        self.bins = bins
        self.counts = torch.zeros((len(self.low), bins), dtype=torch.long)

    def add(self, f) -> None:
        """Count a batch of maps f (B, U, H, W)."""
        import torch

        x = f.transpose(0, 1).reshape(f.shape[1], -1).double()  # (U, B*H*W)
        j = torch.floor((x - self.low[:, None]) / self.width.clamp(min=1e-300)[:, None])
        j = j.nan_to_num(0).clamp_(0, self.bins - 1).long()  # values beyond [low, high] go to the end bins
        offs = torch.arange(len(self.low))[:, None] * self.bins
        self.counts.view(-1).index_add_(0, (j + offs).view(-1), torch.ones(j.numel(), dtype=torch.long))

    def threshold(self, top: float = TOP) -> tuple[np.ndarray, np.ndarray]:
        """(T, error bound) per unit: T estimates the value with a share `top` of the activations
        above it, numpy.quantile(a, 1 - top, method="inverted_cdf"), to within one bin width."""
        counts = self.counts.numpy()
        n = counts.sum(1)  # (U,)
        k = np.ceil(n * (1 - top)).astype(np.int64) - 1  # 0-based rank of the order statistic
        cum = counts.cumsum(1)
        b = (cum <= k[:, None]).sum(1)  # its bin: the first whose cumulative count passes k
        b = np.minimum(b, self.bins - 1)
        before = np.where(b > 0, np.take_along_axis(cum, np.maximum(b - 1, 0)[:, None], 1)[:, 0], 0)
        inside = np.take_along_axis(counts, b[:, None], 1)[:, 0]
        frac = (k - before + 0.5) / np.maximum(inside, 1)  # place within the bin by rank
        w = self.width.numpy()
        return self.low.numpy() + (b + np.clip(frac, 0, 1)) * w, w


# ----------------------------------------------------------------------------- maps on the original

def resampling(n: int, frame_len: int, scale: float, shift: float, map_len: int,
               stride: float | None, offset: float) -> tuple[np.ndarray, np.ndarray]:
    """Bilinear weights (n, map_len) that bring one axis of a map to the n pixels of the original,
    and which of those pixels the network saw (n,). `scale`, `shift`: corpus.Placement's scale and
    left (or top); `stride`, `offset`: the receptive field's along this axis (None: unknown)."""
    centre = (np.arange(n) + 0.5) * scale - shift  # pixel centres in network-input coordinates
    seen = (centre >= 0) & (centre < frame_len)
    if stride:  # centre of map position y: offset + y * stride, input pixel i centred at i
        g = (centre - 0.5 - offset) / stride
    else:  # no field, or one box for every position: stretch the map over the input
        g = centre * map_len / frame_len - 0.5
    g = np.clip(g, 0, map_len - 1)
    i0 = np.floor(g).astype(np.int64)
    i1 = np.minimum(i0 + 1, map_len - 1)
    t = g - i0
    A = np.zeros((n, map_len), dtype=np.float32)
    rows = np.arange(n)
    np.add.at(A, (rows, i0), 1 - t)
    np.add.at(A, (rows, i1), t)
    A[~seen] = 0
    return A, seen


def overlaps(fmap, thr, masks: np.ndarray, place, frame, fld) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """One image: (|above T AND mask| (U, K), |above T| (U,), |mask| (K,)) over the pixels of the
    original the network saw. fmap (U, h, w) float (array or tensor); thr (U,); masks (K, H, W) bool; place:
    corpus.Placement; frame: corpus.Frame; fld: geometry.Field or None."""
    U, h, w = fmap.shape
    K, H, W = masks.shape
    stride = fld.stride if fld is not None else (None, None)
    offset = fld.offset if fld is not None else (0.0, 0.0)
    Ay, sy = resampling(H, frame.height, place.scale, place.top, h, stride[0], offset[0])
    Ax, sx = resampling(W, frame.width, place.scale, place.left, w, stride[1], offset[1])
    m = masks & sy[None, :, None] & sx[None, None, :]  # (K, H, W): the pixels the network saw
    f = np.asarray(fmap, dtype=np.float32)  # (U, h, w)
    thr = np.asarray(thr, dtype=np.float32)
    inter = np.zeros((U, K), dtype=np.int64)
    act = np.zeros(U, dtype=np.int64)
    # Bilinear values are convex combinations of map values: a pixel can be above T only where it
    # draws on a map position above T. So per unit only the pixel rows and columns that draw on such
    # positions are brought to the image (the sums are the same as over the whole image), and a
    # unit whose map stays at or below T in this image is skipped. Small arrays: numpy, not torch.
    uses_y, uses_x = Ay > 0, Ax > 0  # (H, h), (W, w): which map rows / columns a pixel draws on
    hot = f > thr[:, None, None]  # (U, h, w)
    for u in np.flatnonzero(hot.reshape(U, -1).any(1)):
        rows = np.flatnonzero(uses_y[:, hot[u].any(1)].any(1) & sy)
        cols = np.flatnonzero(uses_x[:, hot[u].any(0)].any(1) & sx)
        up = Ay[rows] @ f[u] @ Ax[cols].T  # (r, c)
        above = up > thr[u]  # (r, c)
        inter[u] = (m[np.ix_(np.arange(K), rows, cols)] & above).sum((1, 2))
        act[u] = above.sum()
    return inter, act, m.sum((1, 2))


# ----------------------------------------------------------------------------- the passes

def label(run: Run | str, annotations: Annotations, layers=None, *, batch_size: int = 16, workers: int | None = None,
          checkpoint_seconds: float = 5.0, progress: bool = False, force: bool = False, model=None,
          _stop_after: int | None = None) -> dict:
    """Label the mined units of `layers` (default: every mined layer) of a run with the concepts of
    `annotations`; writes concepts/<layer>/*.npz and the manifest's `concepts` entry, returns it.
    Resumes an interrupted pass. `model`: the run's LoadedModel if already loaded.

    >>> label("runs/r18", read_annotations(corpus, masks=["masks"]))  # doctest: +SKIP
    """
    run = run if isinstance(run, Run) else Run(run)
    m = run.manifest()
    mined = run.mined_layers()
    layers = list(layers or mined)
    for name in layers:
        if name not in mined:
            raise UnitlensError(f"Layer '{name}' has not been mined in {shown(run.path)} (mined: "
                                f"{', '.join(mined) or 'none'}). Label mined layers only.")
    corpus = run.corpus()
    skipped = {s["file"] for s in (m.get("corpus") or {}).get("skipped", [])}
    key = {"layers": {n: _units(run, n).tolist() for n in layers}, "corpus": corpus.fingerprint,
           "annotations": annotations.stamp, "top": TOP, "bins": BINS}
    old = m.get("concepts") or {}
    if old.get("done") and old.get("key") == key and not force:
        return old  # labelled already with these very files
    entry = {"top": TOP, "cutoff": CUTOFF, "bins": BINS, "layers": {}, "mapping": _MAPPING, "key": key,
             "sources": [_source_entry(s, corpus) for s in annotations.sources]}
    if annotations.sources:
        if model is None:
            from .synth.pipeline import model_from_run

            model = model_from_run(run)
        thresholds = _thresholds(run, model, corpus, layers, batch_size, workers, checkpoint_seconds, progress,
                                 force, _stop_after)
        if thresholds is None:
            return {}
        done = _overlap_pass(run, model, corpus, layers, annotations, thresholds, batch_size, workers,
                             checkpoint_seconds, progress, _stop_after)
        if not done:
            return {}
        for name in layers:
            _outlines(run, name, annotations, corpus)
    if annotations.tags is not None:
        entry["tags"] = _tag_aucs(run, corpus, layers, annotations, skipped)
    for name in layers:
        entry["layers"][name] = layer_concepts(run, name)["summary"]
    entry["done"] = True
    m = run.manifest()
    m["concepts"] = entry
    run.save_manifest(m)
    for p in (run.path / "concepts").glob("state*"):
        p.unlink(missing_ok=True)
    return entry


_MAPPING = ("original pixel centre -> network input (placement: scale, centre crop) -> map position (receptive "
            "field centre offset + y * stride), bilinear; pixels outside the crop not counted")


def _source_entry(s: Source, corpus) -> dict:
    return {"kind": s.kind, "path": s.path, "concepts": list(s.concepts), "annotated": len(s.entries),
            "unannotated": len(corpus) - len(s.entries), "unmatched": s.unmatched}


def _units(run: Run, name: str) -> np.ndarray:
    return run.index(name)["units"]


def _checkpointed(run: Run, stage: str, key: dict):
    """(next corpus index, arrays) saved for this stage and settings, or (0, None)."""
    path = run.path / "concepts" / f"state-{stage}.npz"
    if not path.is_file():
        return 0, None
    st = read_npz(path)
    meta = json.loads(str(st.pop("meta")))
    if meta.get("key") != key:
        log.warning(f"Started the {stage} pass over: its saved state was made with other settings.")
        return 0, None
    return int(meta["next"]), st


def _save(run: Run, stage: str, key: dict, upto: int, arrays: dict) -> None:
    write_npz(run.path / "concepts" / f"state-{stage}.npz", meta=np.array(json.dumps({"key": key, "next": upto})),
              **arrays)


def _sweep(run, model, corpus, layers, indices, start, stage, key, state, add, batch_size, workers,
           checkpoint_seconds, progress, _stop_after) -> dict | None:
    """Forward the images `indices` (None: all) from corpus index `start` on. `state`: {layer: {name:
    array}}; `add(layer, its state, maps (B, U, H, W), batch)` returns that state with the batch added
    (new arrays). Returns the final state; None when stopped early (tests)."""
    import torch

    from ._extract import forward_batch
    from ._progress import Progress
    from .corpus import batches

    extractor = model.extractor(layers)
    units = {n: torch.from_numpy(_units(run, n)) for n in layers}
    bar = Progress(len(corpus), start, stage, "img") if progress else None
    flat = lambda st: {f"{n}/{k}": v for n in layers for k, v in st[n].items()}  # noqa: E731
    # Whole batches only: the new state and its resume point replace the old in one assignment.
    done, last = (state, start), time.monotonic()
    try:
        for batch in batches(corpus, model.preprocess.frame, start=start, batch_size=batch_size, workers=workers,
                             indices=indices):
            st, upto = done
            nxt = max([upto, *(batch.indices + 1).tolist(), *(i + 1 for i, _ in batch.failures)])
            if len(batch.indices):
                with torch.inference_mode():
                    feats = forward_batch(extractor, model.normalize(batch.images))
                    st = {n: add(n, st[n], feats[n].index_select(1, units[n]).float(), batch) for n in layers}
            done = (st, nxt)
            if bar:
                bar.advance(nxt)
            stop = _stop_after is not None and nxt >= _stop_after
            if time.monotonic() - last > checkpoint_seconds or stop:
                _save(run, stage, key, done[1], flat(done[0]))
                last = time.monotonic()
                if stop:
                    return None
    except KeyboardInterrupt:
        _save(run, stage, key, done[1], flat(done[0]))
        raise interrupted(f"while finding {stage} after image {done[1]} of {len(corpus)}; state saved. Run the "
                          "same command to resume.") from None
    finally:
        if bar:
            bar.close()
    return done[0]


def _thresholds(run, model, corpus, layers, batch_size, workers, checkpoint_seconds, progress, force,
                _stop_after) -> dict | None:
    """{layer: (T (U,), error (U,))}, from concepts/<layer>/threshold.npz when made for this corpus."""
    import torch

    out, todo = {}, []
    for name in layers:
        p = run.layer_dir(name, "concepts") / "threshold.npz"
        z = read_npz(p) if p.is_file() and not force else None
        if z is not None and str(z["corpus"]) == corpus.fingerprint and np.array_equal(z["units"], _units(run, name)):
            out[name] = (z["threshold"], z["error"])
        else:
            todo.append(name)
    if not todo:
        return out
    key = {"layers": {n: _units(run, n).tolist() for n in todo}, "corpus": corpus.fingerprint, "bins": BINS}
    idx = {n: run.index(n) for n in todo}
    tallies = {n: ThresholdTally(idx[n]["low"], idx[n]["high"]) for n in todo}
    start, st = _checkpointed(run, "thresholds", key)
    state = {n: {"counts": st[f"{n}/counts"] if st is not None else tallies[n].counts.numpy()} for n in todo}

    def add(name, st, f, batch):
        t = tallies[name]
        t.counts = torch.from_numpy(st["counts"].copy())
        t.add(f)
        return {"counts": t.counts.numpy()}

    state = _sweep(run, model, corpus, todo, None, start, "thresholds", key, state, add, batch_size, workers,
                   checkpoint_seconds, progress, _stop_after)
    if state is None:
        return None
    for n in todo:
        tallies[n].counts = torch.from_numpy(state[n]["counts"])
        thr, err = tallies[n].threshold()
        write_npz(run.layer_dir(n, "concepts") / "threshold.npz", units=_units(run, n), threshold=thr, error=err,
                  low=idx[n]["low"], high=idx[n]["high"], count=state[n]["counts"].sum(1), top=np.array(TOP),
                  corpus=np.array(corpus.fingerprint))
        out[n] = (thr, err)
    return out


def _overlap_pass(run, model, corpus, layers, ann: Annotations, thresholds, batch_size, workers,
                  checkpoint_seconds, progress, _stop_after) -> bool:

    K, S = len(ann.concepts), len(ann.sources)
    first = np.cumsum([0, *(len(s.concepts) for s in ann.sources)])  # first concept of each source
    at = {f: i for i, f in enumerate(corpus.files)}
    indices = sorted({at[f] for s in ann.sources for f in s.entries})
    key = {"layers": {n: _units(run, n).tolist() for n in layers}, "corpus": corpus.fingerprint,
           "sources": [_source_entry(s, corpus) for s in ann.sources],
           "thresholds": {n: float(np.sum(thresholds[n][0])) for n in layers}}
    start, st = _checkpointed(run, "overlaps", key)
    zero = {n: {"inter": np.zeros((len(_units(run, n)), K), np.int64), "act": np.zeros((len(_units(run, n)), S), np.int64),
                "pixels": np.zeros(K, np.int64), "images": np.zeros(S, np.int64)} for n in layers}
    state = zero if st is None else {n: {k: st[f"{n}/{k}"] for k in zero[n]} for n in layers}
    frame = model.preprocess.frame

    def add(name, st, f, batch):
        s = {k: v.copy() for k, v in st.items()}
        fld = model.layer(name).field
        for b, i in enumerate(batch.indices.tolist()):
            fid, place = corpus.files[i], batch.placements[b]
            mine = [j for j, src in enumerate(ann.sources) if fid in src.entries]
            masks = np.concatenate([ann.sources[j].masks(fid, (place.width, place.height)) for j in mine])
            cols = np.concatenate([np.arange(first[j], first[j + 1]) for j in mine])
            inter, act, px = overlaps(f[b].numpy(), thresholds[name][0], masks, place, frame, fld)
            s["inter"][:, cols] += inter
            s["pixels"][cols] += px
            for j in mine:
                s["act"][:, j] += act
                s["images"][j] += 1
        return s

    sums = _sweep(run, model, corpus, layers, indices, start, "overlaps", key, state, add, batch_size, workers,
                  checkpoint_seconds, progress, _stop_after)
    if sums is None:
        return False
    src_of = np.repeat(np.arange(S), np.diff(first))  # (K,)
    for n in layers:
        s = sums[n]
        union = s["act"][:, src_of] + s["pixels"][None, :] - s["inter"]  # (U, K)
        iou = np.where(union > 0, s["inter"] / np.maximum(union, 1), 0.0)
        write_npz(run.layer_dir(n, "concepts") / "overlap.npz", units=_units(run, n),
                  concepts=np.array(ann.concepts, dtype=str), source=src_of, intersection=s["inter"], union=union,
                  iou=iou, images=s["images"][src_of], pixels=s["pixels"], threshold=thresholds[n][0],
                  threshold_error=thresholds[n][1])
    return True


# ----------------------------------------------------------------------------- outlines for the atlas

OUTLINE_GRID = 24  # a labelled unit's concept mask, per top exemplar, sampled on this grid over the crop box


def _outlines(run: Run, layer: str, ann: Annotations, corpus) -> None:
    """concepts/<layer>/outlines.npz: for every unit with a concept, its mask inside each top
    exemplar's crop box (idx top_view, what the crop shows; top_box, the field, in older runs; original
    pixels), sampled at OUTLINE_GRID x OUTLINE_GRID cell
    centres; `known` is False where the source does not annotate that image."""
    from .corpus import upright_size

    z = read_npz(run.layer_dir(layer, "concepts") / "overlap.npz")
    idx = run.index(layer)
    named = layer_concepts(run, layer)
    U, K = idx["top_image"].shape
    G = OUTLINE_GRID
    grid = np.zeros((U, K, G, G), dtype=bool)
    known = np.zeros((U, K), dtype=bool)
    boxes = idx.get("top_view", idx.get("top_box"))  # the crop shows the field with its context
    if boxes is None:
        return
    where = {c: (int(z["source"][k]), k - int(np.flatnonzero(z["source"] == z["source"][k])[0]))
             for k, c in enumerate(z["concepts"].tolist())}
    cache: dict = {}
    for u, c in enumerate(named["label"]):
        if c is None or c not in where:
            continue
        s, k = where[c]
        src = ann.sources[s]
        for r in range(K):
            i = int(idx["top_image"][u, r])
            if i >= len(corpus) or corpus.files[i] not in src.entries:
                continue
            x0, y0, x1, y1 = (int(v) for v in boxes[u, r])
            if x1 <= x0 or y1 <= y0:
                continue
            if (s, i) not in cache:  # masks are in original pixels: the size only, from the header
                cache = {(s, i): src.masks(corpus.files[i], upright_size(corpus.path(i)))}  # one image's at a time
            m = cache[(s, i)][k]
            ys = np.minimum(y0 + ((np.arange(G) + 0.5) * (y1 - y0) / G).astype(int), m.shape[0] - 1)
            xs = np.minimum(x0 + ((np.arange(G) + 0.5) * (x1 - x0) / G).astype(int), m.shape[1] - 1)
            grid[u, r] = m[np.ix_(ys, xs)]
            known[u, r] = True
    write_npz(run.layer_dir(layer, "concepts") / "outlines.npz", units=idx["units"], known=known,
              grid=np.packbits(grid, axis=-1), size=np.array(G))


# ----------------------------------------------------------------------------- tags

def roc_auc(scores: np.ndarray, positive: np.ndarray) -> np.ndarray:
    """ROC AUC of each column of `scores` (n, U) for the boolean labels `positive` (n,), as the
    Mann-Whitney statistic with tied scores sharing their average rank; NaN without both classes."""
    n1 = int(positive.sum())
    n0 = len(positive) - n1
    if n1 == 0 or n0 == 0:
        return np.full(scores.shape[1], np.nan)
    order = np.argsort(scores, axis=0, kind="stable")
    s = np.take_along_axis(scores, order, 0)
    ranks = np.empty(scores.shape, dtype=np.float64)
    for u in range(scores.shape[1]):
        col = s[:, u]
        starts = np.r_[True, col[1:] != col[:-1]]
        first = np.flatnonzero(starts)
        last = np.r_[first[1:], len(col)] - 1
        ranks[order[:, u], u] = ((first + last) / 2 + 1)[np.cumsum(starts) - 1]
    return (ranks[positive].sum(0) - n1 * (n1 + 1) / 2) / (n1 * n0)


def _tag_aucs(run: Run, corpus, layers, ann: Annotations, skipped: set) -> dict:
    rows = [i for i, f in enumerate(corpus.files) if f in ann.tags and f not in skipped]
    names = sorted({t for ts in ann.tags.values() for t in ts})
    for n in layers:
        path = run.layer_dir(n) / "values.npy"
        if not path.is_file():
            raise UnitlensError(f"Layer '{n}' of {shown(run.path)} has no per-image maxima (mine/{n}/values.npy): it "
                                "was mined without them. Mine it again with the default settings to score tags.")
        v = np.asarray(np.load(path, mmap_mode="r")[rows], dtype=np.float64)  # (n, U)
        pos = np.array([[t in ann.tags[corpus.files[i]] for t in names] for i in rows], dtype=bool).reshape(len(rows), -1)
        auc = np.stack([roc_auc(v, pos[:, j]) for j in range(len(names))], 1) if names else np.zeros((v.shape[1], 0))
        write_npz(run.layer_dir(n, "concepts") / "tags.npz", units=_units(run, n), tags=np.array(names, dtype=str),
                  auc=auc, positives=pos.sum(0), negatives=len(rows) - pos.sum(0))
    return {"path": ann.tags_path, "images": len(rows), "tags": names, "unmatched": ann.tags_unmatched,
            "untagged": len(corpus) - len(rows)}


# ----------------------------------------------------------------------------- reading

def _num(x) -> float | None:
    x = float(x)
    return None if np.isnan(x) else x


def layer_concepts(run: Run | str, layer: str) -> dict | None:
    """The labels of a layer's units: {"units", "label" (name or None), "iou", "summary"}, or None when
    the layer was not labelled. The summary: units with a concept, distinct concepts, share per concept."""
    run = run if isinstance(run, Run) else Run(run)
    d = run.layer_dir(layer, "concepts")
    if not (d / "overlap.npz").is_file() and not (d / "tags.npz").is_file():
        return None
    units = run.index(layer)["units"].tolist()
    labels, best = [None] * len(units), [None] * len(units)
    summary = {"units": len(units), "labelled": 0, "concepts": 0, "share": {}, "cutoff": CUTOFF}
    if (d / "overlap.npz").is_file():
        z = read_npz(d / "overlap.npz")
        iou = z["iou"]
        if iou.shape[1]:
            j = iou.argmax(1)
            best = [float(iou[u, j[u]]) for u in range(len(units))]
            labels = [str(z["concepts"][j[u]]) if best[u] >= CUTOFF else None for u in range(len(units))]
        named = [x for x in labels if x is not None]
        summary.update(labelled=len(named), concepts=len(set(named)),
                       share={c: named.count(c) / len(units) for c in sorted(set(named), key=named.count, reverse=True)})
    return {"units": units, "label": labels, "iou": best, "summary": summary}


def unit_concepts(run: Run | str, layer: str, channel: int, top: int = 5) -> dict | None:
    """What a unit detects: {"label", "iou", "concepts": [{name, iou, images}] best first (at most
    `top`), "tags": [{name, auc, images}] best first}; None when the layer was not labelled."""
    run = run if isinstance(run, Run) else Run(run)
    d = run.layer_dir(layer, "concepts")
    out = None
    if (d / "overlap.npz").is_file():
        z = read_npz(d / "overlap.npz")
        at = np.flatnonzero(z["units"] == channel)
        if len(at):
            row = z["iou"][at[0]]
            order = np.argsort(-row, kind="stable")[:top]
            concepts = [{"name": str(z["concepts"][k]), "iou": float(row[k]), "images": int(z["images"][k])}
                        for k in order]
            best = concepts[0] if concepts else None
            out = {"label": best["name"] if best and best["iou"] >= CUTOFF else None,
                   "iou": best["iou"] if best else None, "cutoff": CUTOFF, "concepts": concepts,
                   "threshold": float(z["threshold"][at[0]]), "threshold_error": float(z["threshold_error"][at[0]])}
    if (d / "tags.npz").is_file():
        z = read_npz(d / "tags.npz")
        at = np.flatnonzero(z["units"] == channel)
        if len(at):
            row = z["auc"][at[0]]
            order = np.argsort(-np.nan_to_num(row, nan=-1), kind="stable")[:top]
            out = out or {"label": None, "iou": None, "cutoff": CUTOFF, "concepts": []}
            out["tags"] = [{"name": str(z["tags"][k]), "auc": _num(row[k]),
                            "images": int(z["positives"][k] + z["negatives"][k]), "tagged": int(z["positives"][k])}
                           for k in order]
    return out


def concepts_text(c: dict | None) -> list[str]:
    """The lines `unitlens show` prints for unit_concepts(...)."""
    if not c:
        return []
    lines = []
    if c.get("concepts"):
        head = f"detects {shown(c['label'])!s}" if c["label"] else f"no concept (best IoU below {c['cutoff']})"
        lines.append(f"  concepts: {head}")
        lines += [f"   {x['iou']:>7.3f}  IoU  {shown(x['name'])}  ({x['images']} images annotated)" for x in c["concepts"]]
    if c.get("tags"):
        lines.append("  tags (ROC AUC of the per-image maximum):")
        lines += [f"   {x['auc']:>7.3f}  AUC  {shown(x['name'])}  ({x['tagged']} of {x['images']} images)"
                  if x["auc"] is not None else f"      --  AUC  {shown(x['name'])}  (one class only)"
                  for x in c["tags"]]
    return lines


def labels_text(run: Run | str) -> str:
    """What `unitlens label` prints: per layer, units with a concept and the commonest concepts."""
    run = run if isinstance(run, Run) else Run(run)
    entry = run.manifest().get("concepts") or {}
    lines = []
    for s in entry.get("sources", []):
        lines.append(f"{s['kind']} {shown(s['path'])}: {len(s['concepts'])} concepts, {s['annotated']} images "
                     f"annotated, {s['unannotated']} without annotations (those count for none of its concepts)"
                     + (f"; {s['unmatched']} annotated images not in the corpus" if s["unmatched"] else ""))
    if entry.get("tags"):
        t = entry["tags"]
        lines.append(f"tags {shown(t['path'])}: {len(t['tags'])} tags over {t['images']} images; {t['untagged']} "
                     "images not listed (they count for no tag)")
    for name, s in (entry.get("layers") or {}).items():
        share = ", ".join(f"{shown(c)} {100 * v:.0f}%" for c, v in list(s["share"].items())[:5])
        lines.append(f"{shown(name)}: {s['labelled']} of {s['units']} units detect a concept (IoU >= {s['cutoff']}), "
                     f"{s['concepts']} distinct" + (f": {share}" if share else ""))
    return "\n".join(lines)

