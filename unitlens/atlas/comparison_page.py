"""Write COMPARE/atlas/: the pages of a comparison folder (what `compare` wrote), static like a run's.

  index.html            the two sides, the layer pairs with their figures, the cross-layer CKA
                        matrices as heatmaps (inline SVG drawn here: readable without scripts)
  pair-<layer>.html     one page per layer pair: CKA with its interval, the unit summary, and the
                        units ranked (most changed first) with A and B side by side; compare.js
                        draws the unit rows from data/pair-<layer>.js, which assigns a global
  img/a|b/<layer>/      the runs' sprite sheets and synthesised PNGs, hard-linked (or copied)
  img/thumbs-<corpus>/  whole-image thumbnails where no crop exists (two models, or no sheets)
The whole folder is redrawn on each call; unchanged files are not rewritten. A run's atlas index
lists the comparisons under RUN/compare/ (see `comparisons_section`).
"""
from __future__ import annotations

import json
import math
import os
import shutil
from importlib import resources
from pathlib import Path

from ..errors import UnitlensError
from ..store import read_json, safe_name
from .comparison_data import THUMB, find_sides, image_ids, make_thumbs, pair_data, rel_url, wanted_thumbs
from .html import Html, esc, facts_list, join, js_data, page, settings_table, tag, weights_cell
from .files import STATE, place_all, write_if_changed
from .paths import model_name
from .paths import strip_paths as _strip

STATIC = ("atlas.css", "compare.css", "plots.js", "compare.js", "icon.png")
CAUTION = ("CKA summarises a layer in one number: it can move while the network's function barely changes, "
           "and it under-weights low-variance directions. A unit's correlation and exemplar overlap are evidence "
           "of change, not an explanation of it.")


def _page(title: str, kind: str, crumbs, main, scripts=(), body_attrs: dict | None = None) -> str:
    return page(title, kind, crumbs, main, scripts, body_attrs, styles=["compare.css"])


def _fmt(x, digits: int = 3) -> str:
    return "–" if x is None else f"{x:.{digits}f}"


def _ci(ci) -> str:
    return f"{cka_text(ci[0])} – {cka_text(ci[1])}" if ci else "–"


def _changed(u: dict) -> bool:
    """Whether a unit counts as changed; comparisons written before the significance rule: change above 0."""
    return bool(u["changed"]) if "changed" in u else u["change"] > 0


def cka_text(x) -> str:
    """A similarity near 1 with enough digits to tell it from 1: 0.999 -> "0.999", 0.99997 -> "0.99997"."""
    if x is None:
        return "–"
    gap = 1 - abs(x)
    # d digits round by at most 0.5e-d, less than the gap: the text never reads 1 for a value below it
    digits = 3 if gap >= 0.01 or gap <= 0 else min(7, 1 + math.floor(-math.log10(gap)))
    return f"{x:.{digits}f}"


def _pair_label(e: dict) -> str:
    return e["layer"] if e["layer"] == e["layer_b"] else f"{e['layer']} ~ {e['layer_b']}"


def _page_names(layers: list[dict]) -> list[str]:
    names, seen = [], set()
    for i, e in enumerate(layers):
        name = f"pair-{safe_name(e['layer'])}" + ("" if e["layer"] == e["layer_b"] else f"~{safe_name(e['layer_b'])}")
        if name in seen:
            name += f"-{i + 1}"
        seen.add(name)
        names.append(name)
    return names


# -- figures drawn here ------------------------------------------------------------------------

def interval_bar(value, ci, label: str) -> Html:
    """A 0-to-1 scale with the estimate as a dot and its interval as a band."""
    W, H, left, right = 340, 40, 10, 10
    X = lambda v: left + max(0.0, min(1.0, v)) * (W - left - right)  # noqa: E731
    parts = [f'<line class="axis" x1="{left}" x2="{W - right}" y1="16" y2="16"/>']
    for t in (0, 0.25, 0.5, 0.75, 1):
        parts.append(f'<line class="axis" x1="{X(t):.1f}" x2="{X(t):.1f}" y1="16" y2="20"/>'
                     f'<text class="tick" x="{X(t):.1f}" y="33" text-anchor="middle">{t:g}</text>')
    if ci:
        parts.append(f'<rect class="ci" x="{X(ci[0]):.1f}" y="10" width="{max(1.5, X(ci[1]) - X(ci[0])):.1f}" height="12" rx="2">'
                     f'<title>{esc(label)}: interval {_ci(ci)}</title></rect>')
    if value is not None:
        parts.append(f'<circle class="est" cx="{X(value):.1f}" cy="16" r="5"><title>{esc(label)}: {value:.4f}</title></circle>')
    return Html(f'<svg class="plot ibar" viewBox="0 0 {W} {H}" width="{W}" height="{H}" role="img" '
                f'aria-label="{esc(label)}">{"".join(parts)}</svg>')


def pair_bars(layers: list[dict], names: list[str], here: str) -> Html:
    """The CKA of every compared pair on one 0-to-1 scale, this page's pair marked, each a link."""
    labels = [_pair_label(e) for e in layers]
    lw = min(160, 16 + 7 * max(map(len, labels)))
    W, row = lw + 250, 18
    out = []
    for k, (e, name, label) in enumerate(zip(layers, names, labels)):
        y, v = 4 + k * row, e["cka"]
        width = 0 if v is None else max(1.0, min(1.0, v) * 200)
        out.append(f'<a href="{esc(name)}.html" class="pb-row{" here" if name == here else ""}">'
                   f'<text class="tick rowlabel" x="{lw - 6}" y="{y + 12}" text-anchor="end">{esc(label)}</text>'
                   f'<rect class="pb-bar" x="{lw}" y="{y + 3}" width="{width:.1f}" height="{row - 6}" rx="2"/>'
                   f'<text class="tick" x="{lw + width + 5:.1f}" y="{y + 12}">{cka_text(v)}</text>'
                   f'<title>{esc(label)}: CKA {_fmt(v, 4)}</title></a>')
    H = 8 + row * len(layers)
    return Html(f'<svg class="plot pairbars" viewBox="0 0 {W} {H}" width="{W}" height="{H}" role="img" '
                f'aria-label="CKA of every compared layer pair">{"".join(out)}</svg>')


def heatmap(matrix, rows: list[str], cols: list[str], hrefs: dict[int, str], title: str) -> Html:
    """Linear CKA of every layer of A (rows) against every layer of B (columns), 0 to 1 as the
    opacity of one colour; the compared pairs are outlined and link to their pages."""
    n = max(len(rows), len(cols), 1)
    cell = max(18, min(52, 560 // n))
    lw = min(150, 14 + 7 * max(len(r) for r in rows))
    longest = max(len(c) for c in cols)
    turn = longest * 6.5 > cell - 4  # column labels wider than a cell are set at an angle
    th = 34 + (min(100, 5 * longest) if turn else 0)
    W, H = lw + cell * len(cols) + 10, th + cell * len(rows) + 58
    out = [f'<text class="axislabel" x="{lw}" y="12">{esc(title)} (columns: B)</text>']
    for j, c in enumerate(cols):
        x = lw + j * cell + cell / 2
        out.append(f'<text class="tick collabel" transform="translate({x:.1f},{th - 7}) rotate(-40)">{esc(c)}</text>' if turn
                   else f'<text class="tick" x="{x:.1f}" y="{th - 7}" text-anchor="middle">{esc(c)}</text>')
    for i, r in enumerate(rows):
        y = th + i * cell
        out.append(f'<text class="tick rowlabel" x="{lw - 6}" y="{y + cell / 2 + 4:.1f}" text-anchor="end">{esc(r)}</text>')
        for j, c in enumerate(cols):
            v = matrix[i][j] if matrix and i < len(matrix) and j < len(matrix[i]) else None
            x = lw + j * cell
            shade = "0" if v is None else f"{0.06 + 0.94 * max(0.0, min(1.0, v)):.3f}"
            tip = f"A {r} × B {c}: linear CKA {'undefined' if v is None else f'{v:.4f}'}"
            cellsvg = (f'<rect class="hm-cell{" none" if v is None else ""}" x="{x}" y="{y}" width="{cell}" height="{cell}" '
                       f'fill-opacity="{shade}"><title>{esc(tip)}</title></rect>')
            if cell >= 30:
                dark = " on-dark" if v is not None and v > 0.55 else ""
                cellsvg += (f'<text class="hm-val{dark}" x="{x + cell / 2:.1f}" y="{y + cell / 2 + 4:.1f}" '
                            f'text-anchor="middle">{"–" if v is None else f"{v:.2f}"}</text>')
            if i == j and i in hrefs:
                cellsvg = (f'<a href="{esc(hrefs[i])}" class="hm-pair">{cellsvg}<rect class="hm-ring" x="{x + 1}" y="{y + 1}" '
                           f'width="{cell - 2}" height="{cell - 2}"/></a>')
            out.append(cellsvg)
    ly = th + cell * len(rows) + 22  # the legend: ten steps of the scale
    steps = 10
    lx, lwid = lw, min(220, max(120, cell * len(cols)))
    for s in range(steps):
        v = (s + 0.5) / steps
        out.append(f'<rect class="hm-cell" x="{lx + s * lwid / steps:.1f}" y="{ly}" width="{lwid / steps + 0.3:.1f}" '
                   f'height="10" fill-opacity="{0.06 + 0.94 * v:.3f}"/>')
    for t in (0, 0.5, 1):
        out.append(f'<text class="tick" x="{lx + t * lwid:.1f}" y="{ly + 23}" text-anchor="middle">{t:g}</text>')
    out.append(f'<text class="axislabel" x="{lx + lwid + 10:.1f}" y="{ly + 9}">linear CKA (rows: A)</text>')
    return Html(f'<svg class="plot heatmap" viewBox="0 0 {W + 120} {H}" width="{W + 120}" height="{H}" role="img" '
                f'aria-label="{esc(title)}: linear CKA of every layer of A against every layer of B">{"".join(out)}</svg>')


# -- pages -------------------------------------------------------------------------------------

def _side_panel(side, d: dict, out: Path) -> Html:
    model = d.get("model") or {}
    run = side.run
    where = None
    if run is not None:
        where = (tag("a", str(d.get("run")), href=rel_url(side.atlas / "index.html", out)) if side.atlas
                 else tag("code", str(d.get("run"))))
    return tag("section", tag("h2", tag("span", side.key.upper(), class_=f"side-tag {side.key}"), " ", side.label), facts_list([
        ("source", "a mined run" if d.get("source") == "run" else "a model"),
        ("run folder", where),
        ("architecture", tag("code", model.get("spec", "?"))),
        ("weights", weights_cell(model.get("weights") or {})),
        ("note", side.note),
    ]), class_=f"panel side {side.key}")


def index_page(summary: dict, sides: dict, names: list[str], folder_name: str, out: Path) -> str:
    corpus = summary.get("corpus") or {}
    rows = []
    for e, name in zip(summary["layers"], names):
        pair = _pair_label(e)
        rows.append(tag(
            "tr", tag("th", tag("a", pair, href=f"{name}.html"), scope="row"),
            tag("td", f"{e['channels']}" + ("" if e["channels"] == e["channels_b"] else f" / {e['channels_b']}"), class_="num"),
            tag("td", tag("b", cka_text(e["cka"])), " ", tag("span", f"[{_ci(e['cka_ci'])}]", class_="ci-text"), class_="num"),
            tag("td", cka_text(e.get("cka_full_maps")), class_="num"),
            tag("td", str(e["units_compared"]), class_="num"),
            tag("td", _fmt(e.get("mean_corr")), class_="num"),
            tag("td", _fmt(e.get("mean_jaccard")), class_="num"),
            tag("td", str(e["dead"]), class_="num"),
            tag("td", ", ".join(map(str, e["most_changed"][:6])) or (e.get("units_note") or "none")),
            data_layer=e["layer"]))
    head = tag("tr", *[tag("th", h, scope="col", class_="num" if 0 < k < 8 else None) for k, h in enumerate(
        ("layer pair", "channels", "CKA [95% interval]", "whole-map CKA", "units", "mean corr", "mean Jaccard",
         "dead", "most changed units"))])
    pairs_s = tag("section", tag("h2", "Layer pairs"), tag("table", tag("thead", head), tag("tbody", *rows), class_="pairs"),
                  class_="panel wide", id="pairs")
    mat = summary.get("cka_matrix") or {}
    la, lb = mat.get("layers_a") or [], mat.get("layers_b") or []
    hrefs = {i: f"{n}.html" for i, n in enumerate(names)}
    maps = [heatmap(mat["pooled"], la, lb, hrefs, "channel means")] if mat.get("pooled") else []
    if mat.get("full_maps"):
        maps.append(heatmap(mat["full_maps"], la, lb, hrefs, "whole feature maps"))
    heat_s = tag("section", tag("h2", "Every layer of A against every layer of B"),
                 tag("p", "Outlined cells are the compared pairs (click for their page); hover a cell for its value. "
                          "Read the row of an A layer: the B layer it resembles most is its darkest cell.", class_="note"),
                 tag("div", *maps, class_="heatmaps"), class_="panel wide", id="matrix")
    skipped = corpus.get("skipped") or []
    corpus_s = tag("section", tag("h2", "Probe corpus"), facts_list([
        ("images used", join([tag("span", f"{corpus.get('images_used', 0):,}", class_="num"), " of ",
                              tag("span", f"{corpus.get('count', 0):,}", class_="num")])),
        ("skipped", f"{len(skipped)} file(s)" if skipped else None),
        ("source", tag("code", corpus.get("source", "?"))),
        ("fingerprint", tag("code", corpus.get("fingerprint", "?"), class_="hash")),
        ("compared", tag("time", summary.get("created", "?"))),
        ("written by", f"unitlens {summary.get('unitlens', '?')}"),
    ]), class_="panel")
    recomputed = summary.get("recomputed") or []
    notes = [tag("li", f"{r['model'].upper()}, {r['layer'] or 'every layer'}: recomputed {r['what']} ({r['why']})")
             for r in recomputed]
    rec_s = tag("section", tag("h2", "Recomputed from the models"), tag("ul", *notes), class_="panel") if notes else Html("")
    settings = {k: v for k, v in (summary.get("settings") or {}).items() if k != "ranking"}
    params_s = tag("section", tag("h2", "Settings"), tag("p", (summary.get("settings") or {}).get("ranking", ""), class_="note"),
                   settings_table("Comparison", settings), class_="panel wide")
    title = f"{sides['a'].label} vs {sides['b'].label}"
    head = tag("header", tag("h1", tag("span", "A", class_="side-tag a"), " ", sides["a"].label, " ",
                             tag("span", "vs", class_="vs"), " ", tag("span", "B", class_="side-tag b"), " ", sides["b"].label),
               tag("p", "which layers and which units changed between the two, measured on ",
                   f"{corpus.get('images_used', 0):,} probe images", class_="lede"), class_="pagehead")
    caution = tag("aside", tag("h2", "Read this first"), tag("p", CAUTION), class_="caution", role="note")
    grid = tag("div", _side_panel(sides["a"], summary.get("a") or {}, out), _side_panel(sides["b"], summary.get("b") or {}, out),
               corpus_s, class_="panels")
    main = join([head, caution, pairs_s, heat_s, grid, rec_s, params_s])
    return _page(f"{title}: comparison", "cmp-index", [tag("span", folder_name, class_="here")], main)


SORTS = (("rank", "most changed first"), ("unit", "unit id"), ("corr", "correlation"), ("jaccard", "exemplar overlap"),
         ("best_match_corr", "best-match correlation"), ("mean_change", "change of mean"),
         ("fire_rate_change", "change of firing rate"))
SHOWS = (("all", "all units"), ("changed", "changed (significantly)"), ("dead", "dead in A or B"),
         ("moved", "best match elsewhere in B"))


def pair_page(summary: dict, e: dict, sides: dict, folder_name: str, data_js: str, names: list[str], here: str,
              crops: bool) -> str:
    """The shell of a layer pair's page; `crops`: whether either side shows receptive-field crops."""
    pair = _pair_label(e)
    sim = [tag("div", tag("span", "CKA, channel means", class_="fig-label"), tag("span", cka_text(e["cka"]), class_="fig big"),
               tag("span", f"95% interval {_ci(e['cka_ci'])}", class_="fig-sub"), interval_bar(e["cka"], e["cka_ci"], "CKA"),
               class_="figure")]
    if e.get("cka_full_maps") is not None:
        sim.append(tag("div", tag("span", "CKA, whole feature maps", class_="fig-label"),
                       tag("span", cka_text(e["cka_full_maps"]), class_="fig big"),
                       tag("span", f"interval {_ci(e.get('cka_full_maps_ci'))} (over minibatches)", class_="fig-sub"),
                       interval_bar(e["cka_full_maps"], e.get("cka_full_maps_ci"), "whole-map CKA"), class_="figure"))
    sim_s = tag("section", tag("h2", "How similar the layer is"), tag("div", *sim, class_="figures"),
                tag("p", e.get("cka_ci_method") or "no interval (bootstrap off)", class_="note"),
                tag("h3", "Beside the other compared pairs", class_="minor"), pair_bars(summary["layers"], names, here),
                class_="panel")
    units = e["units"]
    dead_a = sum(u["dead_a"] and not u["dead_b"] for u in units)
    dead_b = sum(u["dead_b"] and not u["dead_a"] for u in units)
    both = sum(u["dead_a"] and u["dead_b"] for u in units)
    moved = sum(u["best_match"] is not None and u["best_match"] != u["unit"] for u in units)
    sum_s = tag("section", tag("h2", "Units"), facts_list([
        ("compared", f"{e['units_compared']} of {e['channels']}" if units else
         f"none: {e.get('units_note') or 'no unit table'}; the layers are compared as wholes only"),
        ("mean correlation", _fmt(e.get("mean_corr")) if units else None),
        ("mean exemplar overlap", f"{_fmt(e.get('mean_jaccard'))} (Jaccard of the top {e['top_k']})" if units else None),
        ("changed", f"{sum(_changed(u) for u in units)} of {len(units)}" if units else None),
        ("dead", f"{e['dead']}: {dead_a} in A only, {dead_b} in B only, {both} in both" if units else None),
        ("best match elsewhere", f"{moved} unit(s) correlate most with another unit of B" if units else None),
    ]), tag("div", id="change-hist", class_="plotbox"),
        tag("p", "change = 1 − (max(corr, 0) + Jaccard) / 2: 0 when A and B order the images alike and share their "
                 "top set; a unit dead on one side only counts 1. Changed: "
                 + (summary.get("settings") or {}).get("changed", "change above 0") + "." if units else "", class_="note"),
        class_="panel")
    nav = [tag("a", _pair_label(x), href=f"{p}.html", class_="here" if p == here else None,
               aria_current="page" if p == here else None) for x, p in zip(summary["layers"], names)]
    head = tag("header", tag("h1", tag("span", "layer pair", class_="kicker"), pair), tag("p", tag("span", "A", class_="side-tag a"), " ", sides["a"].label, " · ",
                                              tag("span", "B", class_="side-tag b"), " ", sides["b"].label, class_="lede"),
               tag("nav", *nav, class_="layer-nav", aria_label="Layer pairs"), class_="pagehead")
    options = join(tag("option", label, value=key) for key, label in SORTS)
    shows = join(tag("option", label, value=key) for key, label in SHOWS)
    toolbar = tag(
        "div", tag("label", "order ", tag("select", options, id="sort"), class_="ctl"),
        tag("button", "⇅ reverse", type="button", id="dir", class_="ctl", aria_pressed="false", title="Reverse the order"),
        tag("label", "show ", tag("select", shows, id="show"), class_="ctl"),
        tag("label", "units ", tag("input", type="search", id="filter", placeholder="e.g. 12 or 10-40, 77", autocomplete="off",
                                   spellcheck="false"), class_="ctl grow"),
        tag("output", id="count", aria_live="polite"), class_="toolbar", role="toolbar", aria_label="Order and filter units")
    legend = tag("p", tag("span", "", class_="shared-dot"), " in both top sets", *(
        [tag("span", "synth", class_="badge-s"), " synthesised image", tag("span", "thumb", class_="badge-t"),
         " whole image where the run has no crop"] if crops else
        ["; exemplars are whole images (the centred square the networks see): crops need two mined runs"]),
        class_="legend note")
    body = [toolbar, legend, tag("div", id="rows", class_="rows", aria_label="Units, A and B side by side")] if units else []
    main = join([head, tag("div", sim_s, sum_s, class_="panels two"), *body,
                 tag("noscript", tag("p", "The unit rows are drawn by this page's scripts; the numbers are also in "
                                          "compare.json and the units_<layer>.csv tables."))])
    crumbs = [tag("a", folder_name, href="index.html"), tag("span", "/", class_="sep"), tag("span", pair, class_="here")]
    return _page(f"{pair} · {folder_name}", "cmp-pair", crumbs, main, scripts=[data_js, "plots.js", "compare.js"])


# -- the folder --------------------------------------------------------------------------------

def render_comparison(folder: str | os.PathLike, strip_paths: bool | None = None) -> Path:
    """Draw the pages of a comparison folder into FOLDER/atlas/; returns the path of its index.html.

    `strip_paths`: cut every absolute path on the pages and in their data to its last part (as for a
    run's atlas); None keeps the choice the pages were last drawn with. compare.json keeps its paths:
    the pages are redrawn from it and find the runs by them.

    >>> render_comparison("runs/base/compare/tuned")      # doctest: +SKIP
    PosixPath('runs/base/compare/tuned/atlas/index.html')
    """
    folder = Path(folder)
    summary = read_json(folder / "compare.json")
    if not summary or summary.get("kind") != "unitlens comparison":
        raise UnitlensError(f"{folder} holds no comparison (no compare.json written by `unitlens compare`). "
                            "Run `unitlens compare A B --out DIR` first, or give a run folder to draw its atlas.")
    out = folder / "atlas"
    out.mkdir(parents=True, exist_ok=True)
    for name in STATIC:
        write_if_changed(out / name, resources.files(__package__).joinpath("static", name).read_bytes())
    share = bool((read_json(out / STATE) or {}).get("strip_paths")) if strip_paths is None else strip_paths
    sides = find_sides(summary, folder, out)  # from the paths as recorded
    shown = _strip(summary) if share else summary  # what the pages say
    if share:
        for side in sides.values():
            side.note = _strip(side.note)
    corpus = read_json(folder / "corpus.json")
    names = _page_names(summary["layers"])
    payloads, places = [], {}
    for i in range(len(summary["layers"])):
        payload, place = pair_data(summary, i, sides, out)
        payloads.append(payload)
        places.update(place)
    for rel, files in places.items():
        if files or (out / rel).is_dir():
            place_all({p.name: p for p in files}, out / rel)
        if not files and (out / rel).is_dir():
            (out / rel).rmdir()
    for d in [*(out / "img").glob("a/*"), *(out / "img").glob("b/*")]:
        if f"img/{d.parent.name}/{d.name}" not in places:  # a layer this comparison no longer has
            shutil.rmtree(d)
    thumbs = f"img/thumbs-{str((corpus or {}).get('fingerprint', 'none'))[:12]}"
    have = make_thumbs(corpus, wanted_thumbs(payloads), out / thumbs)
    for d in (out / "img").glob("thumbs-*"):
        if d.name != Path(thumbs).name:
            place_all({}, d)
            d.rmdir()
    keep = set()
    for e, name, payload in zip(summary["layers"], names, payloads):
        used = {x[0] for u in payload["units"] for k in ("a", "b") for x in u[f"ex_{k}"] if x[1] < 0}
        payload["thumbs"] = {"dir": thumbs, "have": sorted(used & have), "size": THUMB}
        payload["ids"] = image_ids(corpus, payload)
        if share:
            payload, e = _strip(payload), _strip(e)
        data_js = f"data/{name}.js"
        write_if_changed(out / data_js, js_data("UNITLENS_PAIR", payload).encode())
        write_if_changed(out / f"{name}.html",
                         pair_page(shown, e, sides, folder.resolve().name, data_js, names, name,
                                    any(v["sheets"] for v in payload["sides"].values())).encode())
        keep |= {f"{name}.html", f"{name}.js"}
    for f in [*out.glob("pair-*.html"), *(out / "data").glob("*.js")]:
        if f.name not in keep:  # pages of layer pairs this comparison no longer has
            f.unlink()
    write_if_changed(out / "index.html", index_page(shown, sides, names, folder.resolve().name, out).encode())
    write_if_changed(out / STATE, json.dumps({"strip_paths": share}).encode())
    return out / "index.html"


def comparisons_section(run_path: Path, atlas: Path, share: bool = False) -> Html:
    """The part of a run's atlas index that lists the comparisons under RUN/compare/ ('' if none);
    `share`: the run's atlas is drawn without absolute paths."""
    rows = []
    for cmp in sorted((run_path / "compare").glob("*/compare.json")) if (run_path / "compare").is_dir() else ():
        try:
            s = json.loads(cmp.read_text())
        except (OSError, ValueError):
            continue
        if s.get("kind") != "unitlens comparison":
            continue
        index = cmp.parent / "atlas" / "index.html"
        name = cmp.parent.name
        link = tag("a", name, href=rel_url(index, atlas)) if index.is_file() else join(
            [esc(name), tag("span", f" (no pages yet: unitlens atlas {_strip(str(cmp.parent)) if share else cmp.parent})",
                            class_="note")])
        b = s.get("b") or {}
        other = Path(str(b.get("run"))).name if b.get("source") == "run" else model_name((b.get("model") or {}).get("spec", "?"))
        cka = ", ".join(f"{e['layer']} {cka_text(e['cka'])}" for e in s.get("layers", [])[:8])
        rows.append(tag("tr", tag("th", link, scope="row"), tag("td", tag("code", other)), tag("td", tag("code", cka)),
                        tag("td", tag("time", s.get("created", "?")))))
    if not rows:
        return Html("")
    head = tag("tr", *[tag("th", h, scope="col") for h in ("comparison", "against (B)", "CKA per layer", "compared")])
    return tag("section", tag("h2", "Comparisons with this run"), tag("table", tag("thead", head), tag("tbody", *rows),
                                                                       class_="layers"), class_="panel wide", id="comparisons")
