"""The run folder on disk: a versioned JSON manifest, arrays as .npz/.npy, written atomically.

Layout (every file readable without unitlens):
  manifest.json                 model, preprocessing, corpus summary, parameters, stage status
  corpus.json                   the image ids in corpus order (+ labels)
  mine/state.npz, state.json    checkpoint of an unfinished mining pass
  mine/<layer>/index.npz        top/bottom exemplars, boxes, statistics, histograms
  mine/<layer>/values.npy       per-image spatial maxima (N, U) float32 (float16 in older runs)
  mine/<layer>/means.npy        per-image spatial means (N, U) float32 (pooled embedding)
  mine/<layer>/sheet-NNN.jpg    exemplar crops, one row per unit (see crops.py)
  mine/<layer>/pooled.npy, embed.npy, embed-basis.npz, facets.npz   embedding (embedding.py) and facets (facets.py)
  mine/thumbs.npy               near-duplicate thumbnails (N, 768) uint8, with --dedupe
  links/<layer>/from-<layer>.npz   how the channels of an earlier layer feed each unit (links.py)
  concepts/<layer>/*.npz        thresholds, overlaps with annotated concepts, tag AUCs (concepts.py)
"""
from __future__ import annotations

import contextlib
import datetime as _dt
import errno
import json
import os
import re
import tempfile
from pathlib import Path

import numpy as np

from .errors import UnitlensError, shown

FORMAT = 2  # 2: synthesis settings under the names of synth/ (goal, basis, warps); 1 is read by _from_format_1
_UMASK = os.umask(0)
os.umask(_UMASK)


def atomic_write(path: Path, write) -> None:
    """Write `path` whole or not at all: `write(f)` fills a temporary file beside it (binary), which
    replaces `path` once synced, so a reader or a killed process never sees half a file."""
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.", suffix=".tmp")
    try:
        with os.fdopen(fd, "wb") as f:
            write(f)
            f.flush()
            os.fsync(f.fileno())
        os.chmod(tmp, 0o666 & ~_UMASK)  # mkstemp makes private files; a run folder is shared like any
        os.replace(tmp, path)
    except BaseException as e:
        Path(tmp).unlink(missing_ok=True)
        if isinstance(e, OSError) and e.filename is None:  # a failed write names no file; say which
            raise OSError(e.errno, e.strerror, str(path)) from None
        raise


def new_array(path: Path, shape, dtype) -> np.memmap:
    """A new .npy memory map whose blocks are taken on disk now. A sparse one takes them at the first
    write into each page, and on a full disk that write kills the process (SIGBUS), not an error."""
    a = np.lib.format.open_memmap(path, mode="w+", dtype=dtype, shape=tuple(shape))
    try:
        with open(path, "r+b") as f:
            size = os.fstat(f.fileno()).st_size
            if hasattr(os, "posix_fallocate"):
                os.posix_fallocate(f.fileno(), 0, size)  # glibc writes the blocks where the file system cannot
            else:  # write the zeros of the data area (after the .npy header) for real
                f.seek(size - a.nbytes)
                for left in range(a.nbytes, 0, -(1 << 24)):
                    f.write(bytes(min(left, 1 << 24)))
                f.flush()
                os.fsync(f.fileno())
    except OSError as e:
        del a
        Path(path).unlink(missing_ok=True)
        raise OSError(e.errno, e.strerror, str(path)) from None  # posix_fallocate names no file
    return a


def disk_bytes(folder: Path) -> int:
    """Bytes the files under `folder` take on disk (0 if it does not exist)."""
    total = 0
    for p in Path(folder).rglob("*"):
        if p.is_file():
            st = p.lstat()
            total += st.st_blocks * 512 if hasattr(st, "st_blocks") else st.st_size
    return total


def _size(n: float) -> str:
    for unit in ("bytes", "KB", "MB", "GB"):
        if n < 1000 or unit == "GB":
            return f"{n:.0f} {unit}" if unit == "bytes" else f"{n:.3g} {unit}"
        n /= 1000
    raise AssertionError("unreachable")


def _free(path: Path) -> int:
    import shutil

    path = Path(os.path.abspath(path))
    while not path.exists():  # the run folder may not exist yet: the disk it will be on
        path = path.parent
    return shutil.disk_usage(path).free


@contextlib.contextmanager
def space_for(path: Path, need: int, what: str):
    """Refuse to start `what` when the disk of `path` has less than `need` bytes free, and turn a
    full disk met inside (ENOSPC, a quota) into one UnitlensError: a rerun resumes from what was saved."""
    free = _free(path)
    if free < need:
        raise UnitlensError(f"Not enough free space for {what} in {shown(path)}: it needs about {_size(need)}, and "
                            f"the disk has {_size(free)} free. Free some space (or give --out a folder on another "
                            "disk) and run the same command; it resumes from what is saved.")
    try:
        yield
    except OSError as e:
        if e.errno not in (errno.ENOSPC, errno.EDQUOT):
            raise
        raise UnitlensError(f"The disk holding {shown(path)} filled up ({e.strerror}, writing {shown(e.filename or '?')}): "
                            f"{what} needed about {_size(need)} when it started, and the disk has "
                            f"{_size(_free(path))} free now. Free some space and run the same command; it resumes "
                            "from what is saved.") from None


def write_json(path: Path, obj) -> None:
    atomic_write(Path(path), lambda f: f.write(json.dumps(obj, indent=1, default=_jsonable).encode()))


def read_json(path: Path):
    try:
        return json.loads(Path(path).read_text())
    except FileNotFoundError:
        return None
    except json.JSONDecodeError as e:
        raise UnitlensError(f"{path} is damaged ({e}). Remove it or start a new run folder.") from None


def write_npz(path: Path, **arrays) -> None:
    atomic_write(Path(path), lambda f: np.savez(f, **arrays))


def read_npz(path: Path) -> dict[str, np.ndarray]:
    import zipfile
    import zlib

    try:
        with np.load(path, allow_pickle=False) as z:
            return {k: z[k] for k in z.files}
    except (zipfile.BadZipFile, zlib.error, EOFError, ValueError) as e:  # cut short or overwritten
        raise UnitlensError(f"{shown(path)} is damaged ({e}). Run the command that wrote it again with --force "
                            "to rebuild it.") from None


def _jsonable(o):
    if isinstance(o, np.generic):
        return o.item()
    if isinstance(o, np.ndarray):
        return o.tolist()
    if isinstance(o, Path):
        return str(o)
    raise TypeError(f"not JSON serialisable: {type(o).__name__}")


def safe_name(layer: str) -> str:
    """A layer name as a folder name (module names are dotted identifiers; be safe anyway)."""
    return re.sub(r"[^A-Za-z0-9._-]", "_", layer) or "_"


def now() -> str:
    return _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds")


def check_folder(path: Path) -> None:
    """Refuse an output or run folder that is an existing file (it would fail on the first write)."""
    if path.exists() and not path.is_dir():
        raise UnitlensError(f"{shown(path)} is a file, not a folder. Give a folder path (a new one is created), "
                            "or move the file away.")


class Run:
    """A run folder. Each stage reads what earlier stages wrote and writes its own part."""

    def __init__(self, path: str | Path):
        self.path = Path(path)
        check_folder(self.path)

    @property
    def manifest_path(self) -> Path:
        return self.path / "manifest.json"

    def exists(self) -> bool:
        return self.manifest_path.is_file()

    def manifest(self) -> dict:
        m = read_json(self.manifest_path)
        if m is None:
            raise UnitlensError(
                f"{self.path} is not a unitlens run folder (no manifest.json). "
                "Create one with `unitlens mine ... --out DIR`."
            )
        if m.get("format", 0) > FORMAT:
            raise UnitlensError(f"{self.path} was written by a newer unitlens (format {m['format']}).")
        return _current(m)

    def save_manifest(self, m: dict) -> None:
        from . import __version__

        m.update(_current(m))  # a manifest read as a plain file is written back under today's names
        m["format"] = FORMAT
        m["unitlens"] = __version__
        m.setdefault("created", now())
        m["updated"] = now()
        write_json(self.manifest_path, m)

    def update_manifest(self, **parts) -> dict:
        m = read_json(self.manifest_path) or {}
        m.update(parts)
        self.save_manifest(m)
        return m

    def remove_stage(self, stage: str, layers, files=()) -> None:
        """Delete what a stage wrote, as its manifest entry names it: the folders of `layers` under
        stage/, the `files` (glob patterns) there and half-written temporary files; the stage folder
        itself only once empty. Anything else in it (the user's) stays."""
        import shutil

        d = self.path / stage
        for name in layers:
            shutil.rmtree(d / safe_name(name), ignore_errors=True)
        for p in [*(q for pattern in files for q in d.glob(pattern)), *d.rglob(".*.tmp")]:
            p.unlink(missing_ok=True)
        try:
            d.rmdir()
        except OSError:  # missing, or holds what we did not write
            pass

    def layer_dir(self, layer: str, stage: str = "mine") -> Path:
        return self.path / stage / safe_name(layer)

    def corpus(self):
        from .corpus import Corpus

        d = read_json(self.path / "corpus.json")
        if d is None:
            raise UnitlensError(f"{self.path} holds no corpus (corpus.json missing): mine first.")
        return Corpus.from_json(d)

    def save_corpus(self, corpus) -> None:
        write_json(self.path / "corpus.json", corpus.to_json())

    def mined_layers(self) -> list[str]:
        m = self.manifest().get("mine") or {}
        return [name for name, d in m.get("layers", {}).items() if d.get("done")]

    def index(self, layer: str) -> dict[str, np.ndarray]:
        path = self.layer_dir(layer) / "index.npz"
        if not path.is_file():
            mined = self.mined_layers()
            raise UnitlensError(
                f"Layer '{layer}' has not been mined in {self.path}. Mined: {', '.join(mined) or 'none'}."
            )
        return read_npz(path)


# Format 1 named the synthesis settings otherwise; every reader of a manifest goes through
# Run.manifest, so this is the one place that maps them.
_CONFIG_1 = {"param": "basis", "blur_every": "blur_period", "decorrelate": "whiten_colour", "decay": "falloff",
             "transforms": "warps"}


def _current(m: dict) -> dict:
    return _from_format_1(m) if m.get("format", FORMAT) < 2 else m


def _from_format_1(m: dict) -> dict:
    """A format-1 manifest with its synthesis settings under today's names (a copy; the file is left as it is)."""
    settings = (m.get("synth") or {}).get("settings")
    if not settings or "objective" not in settings:
        return m
    config = {_CONFIG_1.get(k, k): v for k, v in (settings.get("config") or {}).items()}
    new = {"config": config, "goal": _goal_from_terms(settings.get("objective") or []),
           **{k: v for k, v in settings.items() if k not in ("config", "objective")}}
    return {**m, "synth": {**m["synth"], "settings": new}}


def _goal_from_terms(terms: list[dict]) -> dict:
    """Format 1's weighted terms as the plain fields of a goal (synth/goal.py, Goal.record)."""
    g = {"reduce": "mean", "position": None, "direction": None, "drive": "up", "diversity": 0.0,
         "diversity_layer": None, "smoothness": 0.0, "tv_beta": 2.0, "grey_pull": 0.0, "grey_power": 2.0}
    for t in terms:
        w, kind = float(t.get("weight", 1.0)), t.get("term")
        if kind in ("channel", "neuron") and w:
            g["drive"] = "up" if w > 0 else "down"
            if kind == "neuron":
                y, x = t.get("y"), t.get("x")
                g.update(reduce="centre") if y is None and x is None else g.update(reduce="at", position=[y, x])
        elif kind == "diversity":
            g.update(diversity=w, diversity_layer=t.get("layer"))
        elif kind == "total_variation":
            g.update(smoothness=-w, tv_beta=float(t.get("beta", 2.0)))
        elif kind == "pixel_norm":
            g.update(grey_pull=-w, grey_power=float(t.get("p", 2.0)))
    return g
