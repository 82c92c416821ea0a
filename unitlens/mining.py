"""Pass 1: one sweep over the corpus keeps, per unit, the top-K and bottom-K images and statistics.

Memory is O(units x K) plus one batch, whatever the corpus size (the tallies: tally.py). The pass
checks its settings against the run folder, resumes from its checkpoint, sweeps the batches and
finishes (merge of the ranks, index, crops, embeddings, facets); see MiningPass.
"""
from __future__ import annotations

import json
import time
from collections.abc import Callable
from dataclasses import asdict, dataclass
from pathlib import Path

import numpy as np
import torch

from . import dist
from ._extract import forward_batch
from ._progress import Progress
from ._memory import heap_reuse
from .errors import UnitlensError, interrupted, log, shown
from .dedupe import THUMB, NearDuplicates, thumbnails
from .embedding import EMBED_DIM, needs_pooled
from .store import Run, disk_bytes, new_array, read_json, read_npz, space_for, write_json, write_npz
from .tally import HIST_BINS, LayerTally, colour_moments, index_arrays, merge_ranks
from .units import LayerUnits


@dataclass(frozen=True)
class MineConfig:
    top_k: int = 16
    batch_size: int = 32
    workers: int | None = None  # decoding processes; None: chosen from the core count
    checkpoint_seconds: float = 5.0
    keep_values: bool = True  # per-image maxima and means on disk (for compare and facets)
    thumb: int = 96  # exemplar crop size in the sprite sheets
    dedupe: bool = False  # near-identical images count once in a unit's exemplar lists (dedupe.py)
    dedupe_threshold: float = 0.99  # cosine between normalised 16x16 thumbnails


def _settings(model, corpus, layers, cfg) -> dict:
    return {
        "model": model.describe(),
        "corpus_fingerprint": corpus.fingerprint,
        "layers": {lu.layer: list(lu.units) for lu in layers},
        "top_k": cfg.top_k,
        "keep_values": cfg.keep_values,
        "thumb": cfg.thumb,
        **({"dedupe": cfg.dedupe_threshold} if cfg.dedupe else {}),
    }


def _same_settings(prev: dict | None, new: dict) -> bool:
    """Equal mining settings, the model compared by what it is (spec, weights' SHA-256, preprocessing),
    not by where its files lay: reinstalling a package moves them."""
    from .synth.results import same_model

    if not isinstance(prev, dict) or not isinstance(prev.get("model"), dict):
        return prev == new
    rest = lambda d: {k: v for k, v in d.items() if k != "model"}  # noqa: E731
    return same_model(prev["model"], new["model"]) and rest(prev) == rest(new)


def mined(out: str | Path, model, corpus, layers, config: MineConfig = MineConfig()) -> bool:
    """True when `out` holds a finished mining pass with these settings (so `mine` would do nothing)."""
    m = read_json(Run(out).manifest_path) or {}
    return bool((m.get("mine") or {}).get("done")) and _same_settings(m["mine"].get("settings"),
                                                                     _settings(model, corpus, layers, config))


@heap_reuse()
def mine(model, corpus, layers: tuple[LayerUnits, ...], out: str | Path, config: MineConfig = MineConfig(),
         *, progress: bool = False, force: bool = False, stop: Callable[[int], bool] | None = None) -> Run:
    """Mine exemplars for `layers` over `corpus` into the run folder `out`; resumes if interrupted.

    Returns the Run. Re-running a finished mining pass with the same settings does nothing. Refused
    up front when the disk lacks the space the pass will write; a disk that fills up during the
    pass is one UnitlensError, and the same call then resumes.

    `stop` is asked after each batch with the number of corpus images behind it; True saves a
    checkpoint and returns with the pass unfinished, as if interrupted (the next call resumes):

    >>> mine(model, corpus, layers, "runs/r", stop=lambda done: done >= 1000)   # doctest: +SKIP
    """
    run = Run(out)
    finished = not force and ((read_json(run.manifest_path) or {}).get("mine") or {}).get("done")
    need = 0 if finished else max(0, space_needed(model, corpus, layers, config) - disk_bytes(run.path / "mine"))
    with space_for(run.path, need, "this mining pass"):
        work = MiningPass(model, corpus, layers, run, config)
        if work.prepare(force=force) and work.sweep(progress=progress, stop=stop):
            work.finish(progress=progress)
    return run


def space_needed(model, corpus, layers: tuple[LayerUnits, ...], config: MineConfig) -> int:
    """About how many bytes a whole mining pass writes: per-image rows, checkpoint and index, crop
    sheets, embeddings (an estimate for the free-space check; the rows are exact)."""
    N, n_classes = len(corpus), max(len(corpus.classes), 1)
    total = N * 3 * THUMB * THUMB if config.dedupe else 0
    for lu in layers:
        U, C = len(lu.units), model.layer(lu.layer).channels
        if config.keep_values:
            total += N * (2 * U + (C if needs_pooled(lu.units, C) else 0)) * _VALUE_BYTES
            total += N * EMBED_DIM * 2 if C > EMBED_DIM else 0  # the PCA embedding (float16)
        tally = U * 8 * (6 * config.top_k + HIST_BINS + 8 + n_classes)  # LayerTally.STATE, 8-byte numbers
        total += 3 * tally  # the checkpoint, its temporary copy while it is written, the index
        # crop sheets: JPEG at quality 88 taken as 1/8 of raw RGB (measured 1/8.8 on crops of noise images,
        # which compress worst; an estimate, not a bound)
        total += U * 2 * config.top_k * config.thumb * config.thumb * 3 // 8
    return total


@dataclass(frozen=True)
class MiningState:
    """What a checkpoint holds: the tallies, colour sums and skipped files of whole batches, and the
    corpus position after them. A batch makes a new state from copies (`LayerTally.added`), which
    replaces the old one in a single assignment, so an interrupt anywhere in between leaves the state
    before that batch, never half of it."""

    tallies: dict[str, LayerTally]
    colour: tuple  # sum (C,), sum xx^T (C, C), pixels: RGB or grey
    skipped: tuple[tuple[str, str], ...]
    next: int  # the resume point: every corpus index below it is tallied (or skipped)

    def save(self, path: Path, batch_size: int) -> None:
        """Write the state to `path` (.npz) and its resume point also to the .json beside it, each atomically."""
        meta = {"next": self.next, "skipped": self.skipped, "colour_n": self.colour[2], "batch_size": batch_size}
        arrays = {f"{name}/{k}": v for name, t in self.tallies.items() for k, v in t.state().items()}
        # The resume point goes into the npz too: a process killed between the two writes must not
        # resume new tallies from an old point (it would count a batch twice).
        arrays.update(colour_sum=self.colour[0].numpy(), colour_outer=self.colour[1].numpy(),
                      meta=np.array(json.dumps(meta)))
        write_npz(path, **arrays)
        write_json(path.with_suffix(".json"), meta)

    def load(self, path: Path) -> "MiningState":
        """The state saved at `path`, into this state's (fresh) tallies; the resume point saved with the
        tallies wins over the .json, which may be older."""
        st = read_npz(path)
        meta = json.loads(str(st["meta"])) if "meta" in st else read_json(path.with_suffix(".json"))
        for name, t in self.tallies.items():
            t.load({k: st[f"{name}/{k}"] for k in LayerTally.STATE})
        return MiningState(self.tallies, (torch.from_numpy(st["colour_sum"]), torch.from_numpy(st["colour_outer"]),
                                          int(meta["colour_n"])),
                           tuple(tuple(s) for s in meta["skipped"]), int(meta["next"]))


class MiningPass:
    """One mining pass over a run folder: `prepare` (settings, resume point, per-image files),
    `sweep` (the batches; checkpoints), `finish` (merge the ranks, index, crops, embeddings, facets)."""

    def __init__(self, model, corpus, layers: tuple[LayerUnits, ...], run: Run, config: MineConfig):
        self.model, self.corpus, self.layers, self.run, self.config = model, corpus, layers, run, config
        self.g = dist.group()  # one process, or this rank of a torchrun job: it mines every world-th batch
        self.mdir = run.path / "mine"
        self.state_path = self.g.part(self.mdir / "state.npz")
        self.values: dict[str, tuple] = {}  # per-image rows per layer; with several ranks each writes its own part
        self.row_files: list[Path] = []
        self.dedupe: NearDuplicates | None = None

    # -- prepare --------------------------------------------------------------------------------
    def prepare(self, force: bool = False) -> bool:
        """Check the settings against the folder, claim it, and load the checkpoint; False when
        this pass is already finished (nothing to do)."""
        if self.config.dedupe and self.g.world > 1:
            raise UnitlensError("Near-duplicate suppression (--dedupe) needs every image in one process, in corpus "
                                f"order; run it without torchrun (this job has {self.g.world} ranks).")
        if not self._claim(force):
            return False
        self.state = self._resume()
        self._open_rows(fresh=self.state.next == 0)
        return True

    def _claim(self, force: bool) -> bool:
        run, corpus, g = self.run, self.corpus, self.g
        settings = _settings(self.model, corpus, self.layers, self.config)
        old = read_json(run.manifest_path)
        prev_corpus = read_json(run.path / "corpus.json")
        if prev_corpus and prev_corpus.get("fingerprint") != corpus.fingerprint and not force:
            change = corpus.describe_change(prev_corpus.get("files", []), prev_corpus.get("fingerprint", ""),
                                            prev_corpus.get("stamps"))
            raise UnitlensError(f"The corpus changed since this run started ({change}). Use --force to start over.")
        if not old and self.mdir.exists() and any(self.mdir.iterdir()):
            raise UnitlensError(f"{shown(run.path)} holds a mine/ folder but no manifest.json, so unitlens did not "
                                "write it (or its manifest was lost); nothing was changed. Move that folder away, or "
                                "give --out a new or empty folder.")
        if old and old.get("mine") and not force:
            prev = old["mine"].get("settings")
            if not _same_settings(prev, settings):
                raise UnitlensError(
                    f"{run.path} already holds a mining pass with other settings ({_diff(prev, settings)}). "
                    "Use another --out folder, or --force to start that folder over."
                )
            if old["mine"].get("done"):
                if g.main:  # a process stopped during the final clean-up left its checkpoint behind
                    run.remove_stage("mine", (), _CHECKPOINTS)
                return False
        g.agree((corpus.fingerprint, settings, force), "the corpus or the mining settings")
        if g.main:  # the other ranks write only files of their own (dist.py)
            if force and old and old.get("mine"):  # only what the manifest says this stage wrote
                m = old["mine"]
                run.remove_stage("mine", {*m.get("layers", {}), *(m.get("settings") or {}).get("layers", {})},
                                 (*_CHECKPOINTS, "thumbs.npy"))
            run.path.mkdir(parents=True, exist_ok=True)
            run.save_corpus(corpus)
            manifest = old if old and not force else {}
            manifest.update(model=self.model.describe(), corpus=_corpus_summary(corpus, []))
            manifest["mine"] = {"settings": settings, "done": False,
                                "layers": {lu.layer: {"units": len(lu.units), "done": False} for lu in self.layers}}
            run.save_manifest(manifest)
        g.check_shared(run.path)
        return True

    def _resume(self) -> MiningState:
        """The saved state, or an empty one."""
        g, mdir, cfg = self.g, self.mdir, self.config
        C = self.model.preprocess.channels
        tallies = {lu.layer: LayerTally(lu.units, self.model.layer(lu.layer).channels, self.model.layer(lu.layer).width,
                                        cfg.top_k, len(self.corpus.classes)) for lu in self.layers}
        state = MiningState(tallies, (torch.zeros(C, dtype=torch.float64), torch.zeros(C, C, dtype=torch.float64), 0),
                            (), 0)
        if g.stray(mdir, "state", ".json"):
            raise UnitlensError(f"{mdir} holds checkpoints of a launch with another number of processes "
                                f"({', '.join(g.stray(mdir, 'state', '.json'))}); resume with that number, or use "
                                "--force to start over.")
        meta = read_json(self.state_path.with_suffix(".json"))
        if meta and g.world > 1 and meta.get("batch_size") != cfg.batch_size:  # it decides the shards
            raise UnitlensError(f"This mining pass was started with --batch-size {meta.get('batch_size')} on "
                                f"{g.world} processes; resume it with that batch size, or use --force to start over.")
        return state.load(self.state_path) if meta and self.state_path.is_file() else state

    def _open_rows(self, fresh: bool) -> None:
        """The memory-mapped per-image files (and, with dedupe, the thumbnails and their groups)."""
        g, N, cfg = self.g, len(self.corpus), self.config
        self.shard = g.blocks(N, cfg.batch_size)

        def rows_file(path, width):
            self.row_files.append(path)
            return open_rows(g.part(path), (len(self.shard), width), fresh=fresh)

        if cfg.keep_values:
            for lu in self.layers:
                d = self.run.layer_dir(lu.layer)
                d.mkdir(parents=True, exist_ok=True)
                C = self.model.layer(lu.layer).channels
                self.values[lu.layer] = tuple(rows_file(d / f"{kind}.npy", len(lu.units)) for kind in ("values", "means"))
                if needs_pooled(lu.units, C):  # embedding source (embedding.py)
                    self.values[lu.layer] += (rows_file(d / "pooled.npy", C),)
        if cfg.dedupe:
            C = self.model.preprocess.channels
            self.dedupe = NearDuplicates(open_rows(self.mdir / "thumbs.npy", (N, C * THUMB * THUMB), fresh, np.uint8),
                                         cfg.dedupe_threshold)
            self.dedupe.extend(self.state.next)  # groups of the images before a resume point are recomputed
            for t in self.state.tallies.values():
                t.groups = self.dedupe.groups

    # -- sweep ----------------------------------------------------------------------------------
    def checkpoint(self) -> None:
        """Save the state of the whole batches done, after the per-image rows it refers to."""
        for vm in self.values.values():
            for a in vm:
                a.flush()
        if self.dedupe:
            self.dedupe.flush()
        self.state.save(self.state_path, self.config.batch_size)
        self.g.check("while mining")  # stop early if another rank died

    def sweep(self, progress: bool = False, stop: Callable[[int], bool] | None = None) -> bool:
        """Tally the batches from the resume point on; True when the corpus is done, False when `stop`
        ended the pass. Ctrl-C saves a checkpoint and raises `interrupted`."""
        from .corpus import batches

        corpus, model, cfg, g = self.corpus, self.model, self.config, self.g
        N = len(corpus)
        class_of = None
        if corpus.labels is not None:
            lookup = {c: i for i, c in enumerate(corpus.classes)}
            class_of = torch.tensor([lookup.get(c, -1) if c is not None else -1 for c in corpus.labels])
        extractor = model.extractor([lu.layer for lu in self.layers])
        start = self.state.next
        # Under torchrun only rank 0 draws the bar; batches are dealt in turn, so its place in the corpus
        # is the job's progress to within a batch per rank.
        bar = Progress(N, start, "mining", "img") if progress and g.main else None
        last_save = time.monotonic()
        stopped = False
        try:
            for batch in batches(corpus, model.preprocess.frame, start=start, batch_size=cfg.batch_size,
                                 workers=cfg.workers, indices=self.shard):
                state = self.state
                for i, reason in batch.failures:
                    log.warning(f"Skipped {shown(corpus.files[i])}: {reason}")
                # The resume point after this batch; recorded only once the batch is tallied.
                upto = max([state.next, *(batch.indices + 1).tolist(), *(i + 1 for i, _ in batch.failures)])
                tallies, colour = state.tallies, state.colour
                if len(batch.indices):
                    tallies, colour = self._tally(batch, state, class_of, extractor, upto)
                self.state = MiningState(tallies, colour, state.skipped + tuple(
                    (corpus.files[i], reason) for i, reason in batch.failures), upto)  # the batch counts from here on
                if bar:
                    bar.advance(upto)
                if time.monotonic() - last_save > cfg.checkpoint_seconds:
                    self.checkpoint()
                    last_save = time.monotonic()
                if stop is not None and stop(upto):
                    self.checkpoint()
                    return False
        except KeyboardInterrupt:
            stopped = True
        finally:
            if bar:
                bar.close()
        self.checkpoint()
        if stopped:
            raise interrupted(f"after {self.state.next} of {N} images; state saved. Run the same command to resume.")
        return True

    def _tally(self, batch, state: MiningState, class_of, extractor, upto: int):
        """The tallies and colour sums with `batch` added (new objects; `state` is unchanged), and its
        per-image rows written."""
        ids = batch.indices
        s, o, n = colour_moments(batch.images)
        colour = (state.colour[0] + s, state.colour[1] + o, state.colour[2] + n)
        if self.dedupe:
            self.dedupe.thumbs[ids.numpy()] = thumbnails(batch.images)
            self.dedupe.extend(upto)
        with torch.inference_mode():
            feats = forward_batch(extractor, self.model.normalize(batch.images))
            cls = class_of[ids] if class_of is not None else None
            tallies = dict(state.tallies)
            for name, t in tallies.items():
                tallies[name], mx, mean = t.added(feats[name], ids, cls)
                if name in self.values:
                    rows = self.g.row(ids.numpy(), self.config.batch_size)
                    rows_of = (mx, mean)
                    if len(self.values[name]) > 2:
                        rows_of += (mean if t.all_units else feats[name].float().mean((2, 3)),)
                    for a, x in zip(self.values[name], rows_of):
                        a[rows] = _fit(x, a.dtype)
        return tallies, colour

    # -- finish ---------------------------------------------------------------------------------
    def finish(self, progress: bool = False) -> None:
        """Merge the ranks' tallies and rows (rank 0), then write the index, crops, embeddings and facets."""
        g, corpus, st = self.g, self.corpus, self.state
        merged = merge_ranks(g, st.tallies, list(st.colour), list(st.skipped), corpus.files)
        if g.main:
            _check_usable(corpus, merged[0], merged[2])
            for path in self.row_files:
                dist.assemble_rows(g, path, len(corpus), self.config.batch_size)
            _finish(self.run, self.model, corpus, self.layers, *merged, self.config, progress,
                    self.dedupe.groups.numpy() if self.dedupe else None)
            if g.world > 1:  # the merged files are complete: the ranks' parts and checkpoints can go
                for path in self.row_files + [self.mdir / "state.npz", self.mdir / "state.json"]:
                    for p in g.parts(path):
                        p.unlink(missing_ok=True)
            for p in self.mdir.rglob(".*.tmp"):  # half-written files of a process killed mid-write (atomic_write)
                p.unlink(missing_ok=True)
        g.barrier("the end of mining")


_CHECKPOINTS = ("state.npz", "state.json", "state-rank*of*.npz", "state-rank*of*.json")


def _check_usable(corpus, tallies: dict, skipped: list) -> None:
    """Refuse to finish a pass that tallied no image: every page and synthesis would be empty."""
    if any(int(t.count) for t in tallies.values()):
        return
    shown_files = "; ".join(f"{shown(f)}: {r}" for f, r in skipped[:5])
    more = f"; and {len(skipped) - 5} more" if len(skipped) > 5 else ""
    raise UnitlensError(f"No usable image in {shown(corpus.root)}: all {len(corpus)} file(s) were skipped "
                        f"({shown_files}{more}). Fix or replace them, or give --corpus another folder, then "
                        "run again with --force.")


_VALUE_BYTES = 4  # per-image rows are float32 (_fit)


def _fit(t: torch.Tensor, dtype) -> np.ndarray:
    """Rows for a per-image file. float32 keeps activations of any size (float16 read 65504 above its
    range and 0 below 6e-8); float16 files come from older runs being resumed."""
    if dtype == np.float16:
        t = t.clamp(-65504, 65504)
    return t.numpy().astype(dtype)


def open_rows(path: Path, shape, fresh: bool, dtype=np.float32):
    """A per-image rows file as a writable memory map: a new one when `fresh`, else the one a stopped
    pass left (refused when missing or of another shape: its earlier rows would read as zeros)."""
    if fresh:
        return new_array(path, shape, dtype)
    a = np.load(path, mmap_mode="r+") if path.is_file() else None
    older = dtype == np.float32 and a is not None and a.dtype == np.float16  # written by an earlier version
    if a is None or a.shape != shape or (a.dtype != dtype and not older):
        # Resuming over a missing or foreign file would leave zeros in the rows mined before.
        found = "is missing" if a is None else f"holds {a.dtype} {a.shape}, not {np.dtype(dtype)} {tuple(shape)}"
        raise UnitlensError(f"Cannot resume mining: {path} {found}. Use --force to start this run's mining over.")
    return a


def _diff(prev: dict | None, new: dict) -> str:
    if not prev:
        return "unknown settings"
    keys = [k for k in {**prev, **new} if prev.get(k) != new.get(k)]
    return "differs in " + ", ".join(keys)


def _corpus_summary(corpus, skipped) -> dict:
    return {
        "source": str(corpus.root),
        "count": len(corpus),
        "fingerprint": corpus.fingerprint,
        "classes": list(corpus.classes),
        "labelled": corpus.labels is not None,
        "ignored": list(corpus.ignored),
        "skipped": [{"file": f, "reason": r} for f, r in skipped],
    }


def _finish(run, model, corpus, layers, tallies, colour, skipped, config, progress, groups=None) -> None:
    from .crops import cut_exemplars
    from .facets import finish_layers

    n = max(colour[2], 1)
    mu = colour[0] / n
    cov = colour[1] / n - torch.outer(mu, mu)
    for lu in layers:
        t = tallies[lu.layer]
        info = model.layer(lu.layer)
        write_npz(run.layer_dir(lu.layer) / "index.npz", **index_arrays(t, info, lu))
    cut_exemplars(run, model, corpus, layers, config.thumb, progress=progress)
    m = run.manifest()
    m["corpus"] = _corpus_summary(corpus, skipped)
    m["mine"]["colour"] = {"mean": mu.tolist(), "cov": cov.tolist(), "pixels": colour[2],
                           "source": f"measured on this run's corpus (network inputs, {'RGB' if len(mu) == 3 else 'grey'} in [0, 1])"}
    m["mine"]["config"] = asdict(config)
    run.save_manifest(m)
    for name, entry in finish_layers(run, corpus, layers, skipped, groups).items():
        m["mine"]["layers"][name].update(entry)
    m["mine"]["dedupe"] = _dedupe_summary(config, groups)
    # Done only now: a run stopped during embeddings or facets finishes them when run again.
    m["mine"]["done"] = True
    for lu in layers:
        m["mine"]["layers"][lu.layer]["done"] = True
    run.save_manifest(m)
    for lu in layers:  # a PCA embedding replaces the pooled features, once the run says so
        if (run.layer_dir(lu.layer) / "embed.npy").is_file():
            (run.layer_dir(lu.layer) / "pooled.npy").unlink(missing_ok=True)
    (run.path / "mine" / "state.npz").unlink(missing_ok=True)
    (run.path / "mine" / "state.json").unlink(missing_ok=True)


def _dedupe_summary(config: MineConfig, groups: np.ndarray | None) -> dict:
    if groups is None:
        return {"on": False}
    seen = groups >= 0
    return {"on": True, "threshold": config.dedupe_threshold,
            "thumbnail": f"{THUMB}x{THUMB} RGB of the network input, minus its mean, L2-normalised",
            "duplicates": int((seen & (groups != np.arange(len(groups)))).sum()),
            "thumbnails": "mine/thumbs.npy"}
