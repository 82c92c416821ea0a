"""What the atlas shows of the links between layers (links.py): per unit, the strip of units that feed
it and the strip of units it feeds, each item with a picture (its first synthesised image, else its
strongest crop in its own layer's sprite sheet), its signed contribution and the address of its own
unit view on its layer's page; and per unit the effective number of feeders, a card column the
layer page can order by. Reads the run folder only.
"""
from __future__ import annotations

from pathlib import Path

import numpy as np

from ..links import METHOD_NAMES, concentration, stale, stored_pairs
from ..store import Run, read_json, read_npz, safe_name
from ..summary import rounded as _f

SHOWN = 6  # units per strip (up, down, fed)


class _Pictures:
    """Where the atlas keeps a unit's picture, per layer (read once)."""

    def __init__(self, run: Run, known: set[str]):
        self.run, self.known, self.cache = run, known, {}

    def _layer(self, layer: str) -> dict:
        if layer not in self.cache:
            info = {"synth": {}, "pos": {}, "sheet": None}
            units = (read_json(self.run.layer_dir(layer, "synth") / "units.json") or {}).get("units") or {}
            for key, rec in units.items():
                files = [Path(str(im.get("file", ""))).name for im in rec.get("images", [])]
                if files and files[0]:
                    info["synth"][int(key)] = files[0]
            ipath = self.run.layer_dir(layer) / "index.npz"
            if ipath.is_file():
                idx = read_npz(ipath)
                info["pos"] = {int(u): p for p, u in enumerate(idx["units"])}
                if "thumb" in idx:
                    from ..crops import SHEET_ROWS

                    rows = int(idx["sheet_rows"]) if "sheet_rows" in idx else SHEET_ROWS
                    info["sheet"] = {"rows": rows, "cols": int(idx["sheet_cols"]), "thumb": int(idx["thumb"]),
                                     "units": len(idx["units"])}
            self.cache[layer] = info
        return self.cache[layer]

    def item(self, layer: str, unit: int, contribution: float, share: float, weight=None) -> list:
        """[unit, contribution, share, href or None, picture or None, weight or None]; a picture is
        ["img", src] or ["crop", sheet src, rows here, cols, row] (sources relative to the atlas)."""
        href = f"layer-{safe_name(layer)}.html#unit-{unit}" if layer in self.known else None
        info, pic = self._layer(layer), None
        d = f"img/{safe_name(layer)}"
        if href and unit in info["synth"]:
            pic = ["img", f"{d}/{info['synth'][unit]}"]
        elif href and info["sheet"] and unit in info["pos"]:
            s, p = info["sheet"], info["pos"][unit]
            sheet = p // s["rows"]
            name = f"sheet-{sheet:03d}.jpg"
            if (self.run.layer_dir(layer) / name).is_file():
                pic = ["crop", f"{d}/{name}", min(s["rows"], s["units"] - sheet * s["rows"]), s["cols"], p % s["rows"]]
        return [int(unit), _f(contribution), _f(share, 3), href, pic, None if weight is None else _f(weight)]


def link_payload(run: Run, layer: str, units: list[int]) -> tuple[dict, dict]:
    """(card columns, detail columns) for the units of `layer`; both empty where no links touch it."""
    pairs = stored_pairs(run)
    m = read_json(run.manifest_path) or {}
    known = [*((m.get("mine") or {}).get("layers") or {}), *((m.get("synth") or {}).get("layers") or {})]
    pics = _Pictures(run, set(known))
    place = {u: i for i, u in enumerate(units)}
    feeders: list[list] = [[] for _ in units]
    feeds: list[list] = [[] for _ in units]
    effective = [None] * len(units)
    used = []
    for path in pairs:
        z = read_npz(path)
        target, source = str(z["target"]), str(z["source"])
        if layer not in (target, source):
            continue
        used.append(path)
        done = z["done"].astype(bool)
        c = z["contribution"].astype(np.float64)  # (U, C_K)
        totals = np.abs(c).sum(1)
        share = np.divide(c, totals[:, None], out=np.zeros_like(c), where=totals[:, None] > 0)
        how = {"layer": source, "method": METHOD_NAMES[str(z["method"])], "baseline": str(z["baseline"]),
               "steps": int(z["steps"]) or None, "stale": stale(run, z)}
        if target == layer:
            eff = concentration(c)
            for p, u in enumerate(z["units"]):
                i = place.get(int(u))
                if i is None or not done[p] or not int(z["exemplars"][p]):
                    continue
                order = np.argsort(-c[p], kind="stable")
                w = z["weight"][p] if "weight" in z else z["weight_norm"][p] if "weight_norm" in z else None
                up = [k for k in order[:SHOWN] if c[p, k] > 0]
                down = [k for k in order[::-1][:SHOWN] if c[p, k] < 0]
                item = [pics.item(source, int(k), c[p, k], share[p, k], None if w is None else w[k]) for k in up + down]
                feeders[i].append(how | {
                    "exemplars": int(z["exemplars"][p]), "change": _f(z["change"][p]), "effective": _f(eff[p], 3),
                    "gap": None if np.isnan(z["gap"][p]) else _f(z["gap"][p], 3),
                    "weight": "w" if "weight" in z else "|w|" if "weight_norm" in z else None,
                    "up": item[:len(up)], "down": item[len(up):]})
                if effective[i] is None or len(feeders[i]) == 1:
                    effective[i] = _f(eff[p], 3)  # the first pair stored (in file order) orders the cards
        if source == layer and done.any():
            rows = np.flatnonzero(done)
            for i, u in enumerate(units):
                if u >= c.shape[1]:
                    continue
                s = share[rows, u]
                top = [j for j in np.argsort(-np.abs(s), kind="stable")[:SHOWN] if s[j] != 0]
                if top:
                    feeds[i].append({"layer": target, "method": how["method"],
                                     "units": [pics.item(target, int(z["units"][rows[j]]), c[rows[j], u], s[j])
                                               for j in top]})
    if not used:
        return {}, {}
    return ({"feeders": effective, "feeds_later": any(feeds)},
            {"feeders": [f or None for f in feeders], "feeds": [f or None for f in feeds]})
