"""The run folder on disk: a versioned JSON manifest, arrays as .npz/.npy, written atomically.

Layout (every file readable without unitlens):
  manifest.json                 model, preprocessing, corpus summary, parameters, stage status
  corpus.json                   the image ids in corpus order (+ labels)
  mine/state.npz, state.json    checkpoint of an unfinished mining pass
  mine/<layer>/index.npz        top/bottom exemplars, boxes, statistics, histograms
  mine/<layer>/values.npy       per-image spatial maxima (N, U) float32 (float16 in older runs)
  mine/<layer>/means.npy        per-image spatial means (N, U) float32 (pooled embedding)
  mine/<layer>/sheet-NNN.jpg    exemplar crops, one row per unit (see crops.py)
  mine/<layer>/pooled.npy, embed.npy, embed-basis.npz, facets.npz   embedding and facets (facets.py)
  mine/thumbs.npy               near-duplicate thumbnails (N, 768) uint8, with --dedupe
"""
from __future__ import annotations

import datetime as _dt
import json
import os
import re
import tempfile
from pathlib import Path

import numpy as np

from .errors import UnitlensError

FORMAT = 1
_UMASK = os.umask(0)
os.umask(_UMASK)


def _atomic(path: Path, write) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.", suffix=".tmp")
    try:
        with os.fdopen(fd, "wb") as f:
            write(f)
            f.flush()
            os.fsync(f.fileno())
        os.chmod(tmp, 0o666 & ~_UMASK)  # mkstemp makes private files; a run folder is shared like any
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise


def write_json(path: Path, obj) -> None:
    _atomic(Path(path), lambda f: f.write(json.dumps(obj, indent=1, default=_jsonable).encode()))


def read_json(path: Path):
    try:
        return json.loads(Path(path).read_text())
    except FileNotFoundError:
        return None
    except json.JSONDecodeError as e:
        raise UnitlensError(f"{path} is damaged ({e}). Remove it or start a new run folder.") from None


def write_npz(path: Path, **arrays) -> None:
    _atomic(Path(path), lambda f: np.savez(f, **arrays))


def read_npz(path: Path) -> dict[str, np.ndarray]:
    with np.load(path, allow_pickle=False) as z:
        return {k: z[k] for k in z.files}


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


class Run:
    """A run folder. Each stage reads what earlier stages wrote and writes its own part."""

    def __init__(self, path: str | Path):
        self.path = Path(path)

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
        return m

    def save_manifest(self, m: dict) -> None:
        from . import __version__

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
