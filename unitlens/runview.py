"""A run folder as Python objects, for notebooks and scripts: the run, a layer, a unit, its pictures.

    >>> run = load_run("unitlens-demo")                  # doctest: +SKIP
    >>> u = run.unit("block3:15"); u.exemplars[0].crop()  # doctest: +SKIP
    >>> run.units("block3").frame()                      # doctest: +SKIP

Every number is what `unitlens show --json` prints: a unit holds the dict of summary.unit_summary
as `.summary`, and a layer table's rows come from the same summary.unit_stats. Pictures are read
from the run's files (sprite sheets, synthesised PNGs) or cut from the original images. Nothing
here imports torch. Jupyter draws these objects with _view_html.py.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from functools import cached_property
from pathlib import Path
from typing import TYPE_CHECKING, Any

from .errors import UnitlensError, shown
from .store import Run

if TYPE_CHECKING:
    import pandas
    from PIL import Image


def load_run(path: str | Path) -> RunView:
    """Open a run folder (what `unitlens mine`, `run` or `demo` wrote) for reading.

    >>> load_run("runs/r18").unit("layer3:37").stats["fire_rate"]  # doctest: +SKIP
    """
    view = RunView(Run(path))
    _ = view.manifest  # a clear error now for a folder that is not a run
    return view


def _image(path: Path) -> Image.Image:
    """The whole original, upright and RGB, as mining saw it (corpus.decode_original at full size)."""
    from .corpus import ImageProblem, decode_original

    try:
        return decode_original(Path(path))[0]
    except ImageProblem as e:
        raise UnitlensError(f"Cannot read {shown(path)}: {e.reason}.") from None


@dataclass(frozen=True)
class Picture:
    """A corpus image: its id (path within the corpus), file and, for a nearest image, its similarity."""

    id: str
    path: Path
    similarity: float | None = None

    def image(self) -> Image.Image:
        return _image(self.path)


@dataclass(frozen=True)
class Exemplar:
    """One kept exemplar of a unit: `box` (x0, y0, x1, y1) is its receptive field in the original's pixels."""

    rank: int
    id: str
    path: Path
    score: float
    box: tuple[int, int, int, int] | None
    position: tuple[int, int]
    label: str | None = None
    negative: bool = False
    sheet: tuple[Path, int, int, int] | None = field(default=None, repr=False)  # (file, row, col, cell size)

    def crop(self, sheet: bool = False) -> Image.Image:
        """The receptive-field crop, cut from the original file at `box`; from the sprite sheet (the
        atlas's thumbnail, padded square) with `sheet=True` or when the original is gone."""
        if not sheet and self.box is not None and min(self.box) >= 0 and self.path.is_file():
            return _image(self.path).crop(self.box)
        if self.sheet is None or not self.sheet[0].is_file():
            raise UnitlensError(f"No crop of {shown(self.id)}: the original is missing or has no box, and the run "
                                "has no sprite sheet for it (crops are cut at the end of `unitlens mine`).")
        from PIL import Image

        path, row, col, t = self.sheet
        with Image.open(path) as im:
            return im.convert("RGB").crop((col * t, row * t, (col + 1) * t, (row + 1) * t))


@dataclass(frozen=True)
class Synthesised:
    """One synthesised image of a unit and its evidence (see synth/evidence.py); `record` is the entry
    of `show --json`'s "synth" list."""

    path: Path
    record: dict = field(repr=False)
    nearest: tuple[Picture, ...] = field(default=(), repr=False)

    def image(self) -> Image.Image:
        from PIL import Image

        with Image.open(self.path) as im:
            return im.convert("RGB")

    @property
    def evidence(self) -> dict:
        """The trust checks: activation, its ratio to the best exemplar, rank among the layer's channels
        on this image, activation under random warps (and whatever else the record carries)."""
        return {k: v for k, v in self.record.items() if k not in ("image", "trace", "nearest")}


class UnitView:
    """One unit of a run. `.summary` is exactly the object `unitlens show --json` prints."""

    def __init__(self, run: RunView, layer: str, channel: int):
        from .summary import unit_summary

        self.run, self.layer, self.channel = run, layer, channel
        self.summary: dict = unit_summary(run.folder, layer, channel)

    @property
    def name(self) -> str:
        return f"{self.layer}:{self.channel}"

    @property
    def stats(self) -> dict:
        return self.summary["stats"]

    @property
    def histogram(self) -> dict:
        """Counts of the per-image maxima between `edges` (the occupied span of the fixed bins)."""
        return self.summary["histogram"]

    @property
    def concepts(self) -> dict | None:
        """What the unit detects (`unitlens label`): label, IoU per concept, AUC per tag; None before."""
        return self.summary.get("concepts")

    def _exemplars(self, key: str, negative: bool) -> list[Exemplar]:
        sheets = self.run._sheets(self.layer)
        pos = sheets["pos"].get(self.channel) if sheets else None
        out = []
        for e in self.summary.get(key) or []:
            cell = None
            if pos is not None:
                col = e["rank"] - 1 + (sheets["k"] if negative else 0)
                cell = (sheets["dir"] / f"sheet-{pos // sheets['rows']:03d}.jpg", pos % sheets["rows"], col,
                        sheets["thumb"])
            out.append(Exemplar(rank=e["rank"], id=e["id"], path=Path(e["image"]), score=e["score"],
                                box=tuple(e["box"]) if e.get("box") else None, position=tuple(e["position"]),
                                label=e.get("label"), negative=negative, sheet=cell))
        return out

    @cached_property
    def exemplars(self) -> list[Exemplar]:
        return self._exemplars("exemplars", False)

    @cached_property
    def negative_exemplars(self) -> list[Exemplar]:
        """The images where the unit is lowest; [] for a layer that never goes negative."""
        return self._exemplars("negative_exemplars", True)

    @cached_property
    def synthesised(self) -> list[Synthesised]:
        corpus = self.run.corpus_files
        out = []
        for r in self.summary.get("synth") or []:
            near = tuple(Picture(n["id"], corpus.path(int(n["index"])), n.get("similarity"))
                         for n in r.get("nearest") or [] if int(n.get("index", len(corpus))) < len(corpus))
            out.append(Synthesised(Path(r["image"]), r, near))
        return out

    @property
    def nearest(self) -> list[Picture]:
        """The corpus images nearest the unit's synthesised images in the layer's embedding, most similar first."""
        seen: dict[str, Picture] = {}
        for s in self.synthesised:
            for p in s.nearest:
                if p.id not in seen or (p.similarity or 0) > (seen[p.id].similarity or 0):
                    seen[p.id] = p
        return sorted(seen.values(), key=lambda p: -(p.similarity or 0))

    @property
    def facets(self) -> list[list[Picture]]:
        """The unit's top images split into facets (groups that look alike in the layer's embedding)."""
        f = self.summary.get("facets")
        return [[Picture(m["id"], Path(m["image"])) for m in g] for g in f["groups"]] if f else []

    @property
    def feeders(self) -> Table:
        """The earlier units that feed this one, as `unitlens link` measured them: per linked layer, the
        strongest up (positive contribution) then down; [] before any link. Follow one with
        `run.layer(row["layer"]).unit(row["unit"])`."""
        rows = [{"layer": f["layer"], "unit": e["unit"], "direction": key, **{k: v for k, v in e.items() if k != "unit"},
                 "method": f["method"]}
                for f in (self.summary.get("links") or {}).get("feeders", []) for key in ("up", "down") for e in f[key]]
        return Table(rows, f"units feeding {self.name}")

    @property
    def feeds(self) -> Table:
        """The later units this one feeds most (by its signed share of their inputs); [] before any link."""
        rows = [{"layer": f["layer"], **e, "method": f["method"]}
                for f in (self.summary.get("links") or {}).get("feeds", []) for e in f["units"]]
        return Table(rows, f"units {self.name} feeds")

    def __repr__(self) -> str:
        st = self.stats
        parts = [f"peak {st['max']:.4g}" if st["max"] is not None else None,
                 f"mean max {st['mean_max']:.4g}" if st["mean_max"] is not None else None,
                 f"fires on {100 * st['fire_rate']:.0f}%" if st["fire_rate"] is not None else None,
                 f"{len(self.summary['exemplars'])} exemplars", f"{len(self.summary.get('synth') or [])} synthesised"]
        return f"<unit {shown(self.name)}: {', '.join(p for p in parts if p)}>"

    def _repr_html_(self) -> str:
        from ._view_html import unit_html

        return unit_html(self)


class Table(list):
    """Rows as a list of dicts (one per unit); `.frame()` gives a pandas DataFrame."""

    def __init__(self, rows, title: str = ""):
        super().__init__(rows)
        self.title = title

    def frame(self) -> pandas.DataFrame:
        try:
            import pandas
        except ImportError:
            raise UnitlensError("A DataFrame needs pandas, which is not installed. Install it (pip install "
                                "'unitlens[tables]'), or use the rows as they are: a list of dicts.") from None
        return pandas.DataFrame(list(self))

    def __repr__(self) -> str:
        cols = list(self[0]) if self else []
        return f"<table {shown(self.title)}: {len(self)} rows; columns {', '.join(cols)}>"

    def _repr_html_(self) -> str:
        from ._view_html import table_html

        return table_html(self)


class LayerView:
    """One layer of a run: its units (mined and synthesised) and their table."""

    def __init__(self, run: RunView, name: str):
        self.run, self.name = run, name

    @cached_property
    def info(self) -> dict:
        """The manifest's entry of the layer (shape, units, done) under mining."""
        return ((self.run.manifest.get("mine") or {}).get("layers") or {}).get(self.name) or {}

    @cached_property
    def shape(self) -> list[int] | None:
        """C, H, W of the layer's feature map at the run's input size (None for a layer never mined)."""
        if self.name not in self.run.folder.mined_layers():
            return None
        idx = self.run.folder.index(self.name)
        return [int(v) for v in idx["shape"]] if "shape" in idx else None

    def unit(self, channel: int) -> UnitView:
        return UnitView(self.run, self.name, int(channel))

    def table(self) -> Table:
        return self.run.units(self.name) if self.name in self.run.folder.mined_layers() else Table([], self.name)

    @cached_property
    def concepts(self) -> dict | None:
        """Units with a concept, distinct concepts, share per concept (`unitlens label`); None before."""
        from .concepts import layer_concepts

        c = layer_concepts(self.run.folder, self.name) if self.name in self.run.folder.mined_layers() else None
        return c["summary"] if c else None

    def __repr__(self) -> str:
        t = self.table()
        synth = sum(1 for r in t if r.get("synthesised"))
        return f"<layer {shown(self.name)}: {len(t)} units mined, {synth} synthesised>"

    def _repr_html_(self) -> str:
        from ._view_html import layer_html

        return layer_html(self)


class RunView:
    """A run folder: model, layers, corpus summary, settings; `unit("layer3:37")`, `units("layer3")`."""

    def __init__(self, folder: Run):
        self.folder = folder
        self._cache: dict[str, Any] = {}

    @property
    def path(self) -> Path:
        return self.folder.path

    @cached_property
    def manifest(self) -> dict:
        return self.folder.manifest()

    @property
    def model(self) -> dict:
        """Architecture spec, weights (kind, path, SHA-256) and preprocessing."""
        return self.manifest.get("model") or {}

    @property
    def corpus(self) -> dict:
        """The corpus summary: source, count, classes, skipped files (with reasons), fingerprint."""
        return self.manifest.get("corpus") or {}

    @cached_property
    def corpus_files(self):
        return self.folder.corpus()

    @property
    def settings(self) -> dict:
        """{"mine": mining settings, "synth": synthesis settings (goal, basis, warps, colour)}."""
        m = self.manifest
        return {"mine": (m.get("mine") or {}).get("config") or {},
                "synth": (m.get("synth") or {}).get("settings") or {}}

    @property
    def layers(self) -> list[str]:
        """Mined layers, then layers that were only synthesised."""
        mined = self.folder.mined_layers()
        synth = list((self.manifest.get("synth") or {}).get("layers") or {})
        return mined + [s for s in synth if s not in mined]

    def layer(self, name: str) -> LayerView:
        if name not in self.layers:
            raise UnitlensError(f"No layer {shown(name)!r} in {shown(self.path)}. Layers: "
                                f"{', '.join(map(shown, self.layers)) or 'none yet (mine first)'}.")
        return LayerView(self, name)

    def unit(self, unit: str | tuple[str, int]) -> UnitView:
        """`unit("layer3:37")` or `unit(("layer3", 37))`."""
        from .units import parse_unit

        layer, channel = parse_unit(unit) if isinstance(unit, str) else unit
        return UnitView(self, layer, int(channel))

    def units(self, layer: str) -> Table:
        """One row per mined unit of `layer`: unit, peak, mean (of per-image maxima), fire_rate,
        class_selectivity, synthesised (images), ratio (best synthesised / best natural), and parity
        where the synthesised images carry one. The numbers are summary.unit_stats', as in `show --json`."""
        from .summary import layer_firing, unit_stats
        from .synth.results import layer_images, parity_share

        from .concepts import layer_concepts

        idx = self.folder.index(layer)
        classes = self.corpus.get("classes") or []
        synth = layer_images(self.folder, layer)
        firing = layer_firing(idx)  # one threshold for the layer, computed once
        named = layer_concepts(self.folder, layer)  # None until `unitlens label` has run
        rows = []
        for u, ch in enumerate(int(c) for c in idx["units"]):
            st = unit_stats(idx, u, classes, firing)
            ims = synth.get(ch, [])
            ratios = [r["vs_best_exemplar"] for r in ims if r.get("vs_best_exemplar") is not None]
            row = {"unit": ch, "peak": st["max"], "mean": st["mean_max"], "fire_rate": st["fire_rate"],
                   "class_selectivity": st["class_selectivity"], "synthesised": len(ims),
                   "ratio": max(ratios) if ratios else None}
            share = parity_share(ims)  # the share of the unit's images that reach their best natural exemplar
            if share is not None:
                row["parity"] = share
            if named:
                row.update(concept=named["label"][u], iou=named["iou"][u])
            rows.append(row)
        return Table(rows, title=f"{self.path.name} / {layer}")

    def _sheets(self, layer: str) -> dict | None:
        """Where the layer's crops lie in its sprite sheets (see crops.py), or None before crops are cut."""
        if layer not in self._cache:
            idx = self.folder.index(layer)
            self._cache[layer] = None if "thumb" not in idx else {
                "dir": self.folder.layer_dir(layer), "thumb": int(idx["thumb"]),
                "rows": int(idx["sheet_rows"]), "k": int(idx["top_image"].shape[1]),
                "pos": {int(c): p for p, c in enumerate(idx["units"])}}
        return self._cache[layer]

    def __repr__(self) -> str:
        c = self.corpus
        return (f"<run {shown(self.path)}: {shown(self.model.get('spec', '?'))}, {c.get('count', 0)} images, "
                f"layers {', '.join(map(shown, self.layers)) or 'none'}>")

    def _repr_html_(self) -> str:
        from ._view_html import run_html

        return run_html(self)


# -- results of probe() and compare(): the same dicts as their JSON, with a view -----------------

class Probed(dict):
    """What `probe` returns: the object of `probe --json` (a plain dict, so JSON as before), plus
    `.unit` (the UnitView of the run it read) and an inline display with the exemplars' heat maps."""

    @property
    def folder(self) -> Path:
        """The probe's page folder (its crops and heat maps)."""
        return Path(self["page"]).parent

    @cached_property
    def unit(self) -> UnitView:
        return load_run(self["run"]).unit((self["layer"], int(self["unit"])))

    def __repr__(self) -> str:
        st = self["stats"]
        return (f"<probe {shown(self['layer'])}:{self['unit']} of {shown(self.get('model', '?'))}: "
                f"{len(self['exemplars'])} exemplars with heat maps, peak {st['max']:.4g}; page {shown(self['page'])}>")

    def _repr_html_(self) -> str:
        from ._view_html import probe_html

        return probe_html(self)


@dataclass(frozen=True)
class UnitPair:
    """One unit of a comparison: its row of the layer's unit table, and each side's unit where that
    side is a run folder holding it (None otherwise)."""

    layer: str
    unit: int
    row: dict
    a: UnitView | None
    b: UnitView | None

    def _repr_html_(self) -> str:
        from ._view_html import pair_html

        return pair_html(self)


class Comparison(dict):
    """What `compare` returns: the object of `compare --json` (a plain dict), plus tables and views."""

    def layers(self) -> Table:
        """One row per compared layer pair: CKA with its interval, units compared, mean correlation and
        overlap, dead units."""
        rows = []
        for e in self["layers"]:
            lo, hi = e.get("cka_ci") or (None, None)
            rows.append({"layer": e["layer"], "layer_b": e["layer_b"], "cka": e["cka"], "cka_low": lo, "cka_high": hi,
                         "cka_full_maps": e.get("cka_full_maps"), "units": e["units_compared"],
                         "mean_corr": e["mean_corr"], "mean_jaccard": e["mean_jaccard"], "dead": e["dead"]})
        return Table(rows, title="comparison")

    def _entry(self, layer: str) -> dict:
        for e in self["layers"]:
            if e["layer"] == layer:
                return e
        raise UnitlensError(f"No layer {shown(layer)!r} in this comparison. Layers: "
                            f"{', '.join(shown(e['layer']) for e in self['layers'])}.")

    def units(self, layer: str) -> Table:
        """The unit table of one layer pair (as units_<layer>.csv): most changed first."""
        return Table(sorted(self._entry(layer)["units"], key=lambda r: r["rank"]), title=f"comparison / {layer}")

    def pair(self, layer: str, unit: int) -> UnitPair:
        """Unit `unit` of `layer`, A and B side by side."""
        e = self._entry(layer)
        row = next((r for r in e["units"] if r["unit"] == unit), None)
        if row is None:
            raise UnitlensError(f"Unit {unit} of {shown(layer)} was not compared ({e['units_compared']} units were"
                                f"{'; ' + e['units_note'] if e.get('units_note') else ''}).")
        views = []
        for side, name in (("a", e["layer"]), ("b", e["layer_b"])):
            s = self[side]
            try:
                views.append(load_run(s["run"]).unit((name, unit)) if s.get("source") == "run" else None)
            except UnitlensError:  # the side's run did not mine this unit
                views.append(None)
        return UnitPair(layer, unit, row, *views)

    def __repr__(self) -> str:
        parts = [f"{shown(e['layer'])} {e['cka']:.3f}" if e["cka"] is not None else shown(e["layer"])
                 for e in self["layers"]]
        return f"<comparison, CKA per layer: {', '.join(parts)}>"

    def _repr_html_(self) -> str:
        from ._view_html import comparison_html

        return comparison_html(self)
