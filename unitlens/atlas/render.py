"""Write RUN/atlas/: a static folder that opens from file:// and never touches the network.

  index.html                 the run summary (plain HTML, works without scripts)
  layer-<layer>.html         one page per layer: unit cards, and the unit view at #unit-<channel>
  atlas.css, atlas.js, plots.js   shared by every page (plots.js: our inline-SVG plot renderer)
  data/<layer>.cards.js      what the cards need; data/<layer>.units.js what the unit view adds
  img/<layer>/               the sprite sheets and synthesised PNGs, hard-linked (or copied)

Data travels as scripts that assign a global, because browsers refuse fetch() of local files.
A layer is redrawn only when what it is drawn from changed, so calling render_atlas after each
finished layer of a long run costs little.
"""
from __future__ import annotations

import hashlib
import json
import math
import os
import shutil
from importlib import resources
from pathlib import Path

from ..errors import UnitlensError, closest
from ..links import stored_pairs
from ..store import Run, atomic_write, now, read_json, safe_name, write_json
from .data import layer_data
from .files import READABLE, STATE, place_all, write_if_changed
from .html import Html, index_page, join, js_data, layer_page, tag
from .paths import model_name
from .paths import strip_paths as _strip

STATIC = ("atlas.css", "atlas.js", "plots.js", "icon.png")  # the icon spares servers a favicon 404
OVERVIEW = 6  # pictures per layer on the index


def render_atlas(run: Run | str | os.PathLike, *, layers: list[str] | None = None,
                 strip_paths: bool | None = None) -> Path:
    """Draw (or bring up to date) the atlas of a run folder; returns the path of its index.html.

    `layers`: redraw only these (the index and navigation always list every layer). Given a
    comparison folder (compare.json, no manifest), it draws that folder's pages instead (with
    `strip_paths` as here).
    `strip_paths`: cut every absolute path on the pages and in their data to its last part, so the
    folder can be handed on; None keeps the choice the atlas was last drawn with.

    >>> render_atlas("runs/demo")                     # doctest: +SKIP
    PosixPath('runs/demo/atlas/index.html')
    """
    if not isinstance(run, Run) and (Path(run) / "compare.json").is_file() and not (Path(run) / "manifest.json").is_file():
        if layers is not None:
            raise UnitlensError(f"{run} is a comparison folder; its pages are drawn all at once. Leave out --layers.")
        return draw_comparison(run, strip_paths)
    run = run if isinstance(run, Run) else Run(run)
    m = run.manifest()
    known = _known_layers(m)
    if layers is not None:
        for name in layers:
            if name not in known:
                near = closest(name, known)
                hint = f" Closest: {', '.join(near)}." if near else ""
                raise UnitlensError(f"Layer '{name}' is neither mined nor synthesised in {run.path}.{hint} "
                                    f"Known: {', '.join(known) or 'none'}.")
    out = run.path / "atlas"
    out.mkdir(parents=True, exist_ok=True)
    version = _renderer_version()
    for name in STATIC:
        write_if_changed(out / name, resources.files(__package__).joinpath("static", name).read_bytes())

    state = read_json(out / STATE) or {}
    share = bool(state.get("strip_paths")) if strip_paths is None else strip_paths
    if state.get("renderer") != version or bool(state.get("strip_paths")) != share:
        state = {"renderer": version, "layers": {}, "strip_paths": share}
    pages = state["layers"]
    # the layers asked for, and any the atlas does not show yet (a new renderer redraws them all)
    todo = known if layers is None else list(dict.fromkeys([*layers, *(n for n in known if n not in pages)]))
    run_name = run.path.resolve().name
    drew = False
    for name in todo:
        key = _layer_key(run, name, m)
        old = pages.get(name)
        if old and old.get("key") == key and (old.get("href") is None or (out / old["cards"]).is_file()):
            continue
        pages[name] = _draw_layer(run, out, name, share) | {"key": key}
        drew = True
        write_json(out / STATE, state)  # a later call knows this layer is done even if this one dies
    for name in [n for n in pages if n not in known]:  # layers the run no longer has
        _remove_layer(out, name, pages.pop(name))
    keep = {Path(p[k]).name for p in pages.values() if p.get("href") for k in ("cards", "details")}
    for f in (out / "data").glob("*") if (out / "data").is_dir() else ():
        if f.name not in keep:  # left by an older renderer or a removed layer
            f.unlink()

    # every page lists every layer, so the shells are rewritten (only where that changes them)
    nav = [(n, pages[n]["href"], pages[n]["units"]) for n in known if n in pages and pages[n].get("href")]
    for name, href, _ in nav:
        p = pages[name]
        write_if_changed(out / href, layer_page(run_name, name, p["facts"], p["cards"], p["details"], nav).encode())
    rows = [_layer_row(n, m, pages.get(n)) for n in known]
    m = {**m, "model": {**(m.get("model") or {}), "name": model_name((m.get("model") or {}).get("spec", "?"))}}
    if share:
        m = _strip(m)
    index = out / "index.html"
    drawn = state.get("drawn", "")
    from .comparison_page import comparisons_section

    cmp = comparisons_section(run.path, out, share)  # the comparisons under RUN/compare/
    if drew or not index.is_file() or index.read_text() != index_page(m, rows, drawn, f"unitlens {version}", run_name, cmp):
        state["drawn"] = drawn = now()  # the date on the index is that of the atlas's last change
    write_if_changed(index, index_page(m, rows, drawn, f"unitlens {version}", run_name, cmp).encode())
    write_if_changed(out / STATE, json.dumps(state, indent=1).encode())
    return out / "index.html"


def draw_comparison(folder: str | os.PathLike, strip_paths: bool | None = None) -> Path:
    """Draw the pages of a comparison folder (comparison_page.py), then redraw the atlas of the run it
    lies under (RUN/compare/NAME), whose index lists it; returns the path of the comparison's index.html."""
    from .comparison_page import render_comparison

    index = render_comparison(folder, strip_paths)
    folder = Path(folder).resolve()
    owner = folder.parent.parent
    if folder.parent.name == "compare" and (owner / "atlas" / "index.html").is_file() and \
            (owner / "manifest.json").is_file():
        render_atlas(Run(owner))
    return index


def _known_layers(m: dict) -> list[str]:
    """Every layer the run knows of: mined ones in manifest order, then layers only synthesised."""
    names = list((m.get("mine") or {}).get("layers", {}))
    names += [n for n in (m.get("synth") or {}).get("layers", {}) if n not in names]
    return names


def _renderer_version() -> str:
    """Package version + a hash of the renderer's own files: a new renderer redraws every page."""
    from .. import __version__

    h = hashlib.sha256()
    root = resources.files(__package__)
    for rel in ("render.py", "data.py", "link_data.py", "html.py", "templates/page.html", *(f"static/{s}" for s in STATIC)):
        h.update(root.joinpath(rel).read_bytes())
    return f"{__version__}+{h.hexdigest()[:10]}"


def _stat(p: Path):
    try:
        s = p.stat()
        return [p.name, s.st_size, s.st_mtime_ns]
    except FileNotFoundError:
        return None


def _layer_key(run: Run, name: str, m: dict) -> str:
    mdir, sdir = run.layer_dir(name), run.layer_dir(name, "synth")
    parts = [_stat(mdir / "index.npz"), _stat(run.path / "corpus.json"), _stat(sdir / "units.json"),
             [_stat(p) for p in sorted(mdir.glob("sheet-*.jpg"))],
             [_stat(p) for p in sorted(run.layer_dir(name, "concepts").glob("*.npz"))],
             (m.get("corpus") or {}).get("classes"),
             [_stat(p) + [p.parent.name] for p in stored_pairs(run)]]  # links to and from any layer
    return hashlib.sha256(json.dumps(parts).encode()).hexdigest()


def _draw_layer(run: Run, out: Path, name: str, share: bool = False) -> dict:
    """Images and data of one layer; returns what its page shell and the index need."""
    safe = safe_name(name)
    img_rel = f"img/{safe}"
    data = layer_data(run, name, img_rel)
    if data is None:
        _remove_layer(out, name, {"href": f"layer-{safe}.html"})
        return {"href": None, "units": 0}
    if share:
        data.cards, data.details = _strip(data.cards), _strip(data.details)
    wanted = {p.name: p for p in data.sheets + data.images}
    w = data.details.get("whole")
    per = w["cols"] * w["rows"] if w else 1
    whole = [f"whole-{s:03d}.jpg" for s in range(-(-len(data.whole) // per))]
    place_all(wanted, out / img_rel, keep=(("facets.jpg",) if data.facet_thumbs else ()) + tuple(whole))
    if data.facet_thumbs:
        spec = data.details["facet_sheet"]
        _thumb_sheet(data.facet_thumbs, out / img_rel / "facets.jpg", spec["thumb"], spec["cols"])
    if w:
        w["names"] = whole
        for s, name in enumerate(whole):  # per cell: where the letterboxed original lies, and its size
            w["sizes"] += _thumb_sheet(data.whole[s * per:(s + 1) * per], out / img_rel / name, w["thumb"], w["cols"],
                                       whole=True)
    cards_js, units_js = f"data/{safe}.cards.js", f"data/{safe}.units.js"
    # the details go first: a page whose cards are new must never find old details
    write_if_changed(out / units_js, js_data("UNITLENS_UNITS", data.details).encode())
    write_if_changed(out / cards_js, js_data("UNITLENS_CARDS", data.cards).encode())
    c = data.cards
    facts = [f"{data.units} unit{'s' if data.units != 1 else ''}"]
    if c.get("shape"):
        facts.append("feature map " + " × ".join(map(str, c["shape"])))
    if c.get("mined"):
        facts.append(f"{c['k']} exemplars per unit from {c['images']:,} images")
        if c.get("context"):
            facts.append(f"each crop shows at least {c['context']} × {c['context']} original pixels around its receptive "
                         "field (outlined)")
        if c.get("fire_at") is not None:
            facts.append(f"“fires” = per-image maximum ≥ {c['fire_at']:.3g}, the layer's "
                         f"{round(100 * c['fire_q'])}th percentile over all its units")
    else:
        facts.append("not mined yet: no exemplars or statistics")
    facts.append(f"{c['synthesised']} synthesised" if c["synthesised"] else "no synthesised images yet")
    return {"href": f"layer-{safe}.html", "facts": facts, "cards": cards_js, "details": units_js, "units": data.units, "mined": sum(p is not None for p in c.get("pos", [])),
            "synthesised": c["synthesised"], "shape": c.get("shape"), "k": c.get("k"),
            "overview": _overview(c, f"layer-{safe}.html")}


def _overview(c: dict, href: str, n: int = OVERVIEW) -> list[dict]:
    """Up to `n` pictures of a layer for the index: the synthesised images that beat the best natural
    exemplar by the widest margin, or (no synthesis) the best crop of the most class-selective units
    (strongest peak where selectivity is not defined)."""
    U = len(c["units"])
    S = c.get("sheets")
    if any(c["synth_src"]):
        pick = sorted((i for i in range(U) if c["synth_src"][i]), key=lambda i: -(c["ratio"][i] or 0))
    elif S and c.get("mined"):
        key = c["csi"] if any(v is not None for v in c["csi"]) else c["peak"]
        pick = sorted((i for i in range(U) if c["filled"][i] > 0 and S["names"][c["pos"][i] // S["rows"]]),
                      key=lambda i: -(key[i] if key[i] is not None else -math.inf))
    else:
        return []
    out = []
    for i in pick[:n]:
        u = c["units"][i]
        item = {"unit": u, "href": f"{href}#unit-{u}"}
        if c["synth_src"][i]:
            item["src"] = f"{c['img_dir']}/{c['synth_src'][i]}"
        else:  # the unit's best crop: its cell of the sprite sheet, shown through an SVG view box
            p, t = c["pos"][i], S["thumb"]
            rows_here = min(S["rows"], S["units"] - p // S["rows"] * S["rows"])
            item.update(sheet=f"{S['dir']}/{S['names'][p // S['rows']]}", y=p % S["rows"] * t, thumb=t,
                        w=S["cols"] * t, h=rows_here * t)
        out.append(item)
    return out


def _overview_html(items: list[dict], size: int = 48) -> Html:
    pics = []
    for it in items:
        label = f"unit {it['unit']}"
        if "src" in it:
            pic = tag("img", src=it["src"], width=size, height=size, alt=label, loading="lazy")
        else:  # no inline style (the pages' policy forbids it): the crop is a view box on the sheet
            t = it["thumb"]
            pic = tag("svg", tag("image", href=it["sheet"], width=it["w"], height=it["h"]), width=size, height=size,
                      viewBox=f"0 {it['y']} {t} {t}", role="img", aria_label=label)
        pics.append(tag("a", pic, href=it["href"], title=label, class_="ov"))
    return join(pics)


def _layer_row(name: str, m: dict, page: dict | None) -> dict:
    ml = (m.get("mine") or {}).get("layers", {}).get(name)
    sl = (m.get("synth") or {}).get("layers", {}).get(name)
    status = []
    if ml:
        status.append("mined" if ml.get("done") else "mining in progress")
    if sl:
        status.append("synthesised" if sl.get("complete") else f"synthesis: {sl.get('done', 0)} of {sl.get('units', '?')}")
    page = page or {}
    return {"name": name, "href": page.get("href"), "shape": page.get("shape"), "mined": page.get("mined"),
            "overview": _overview_html(page.get("overview") or []),
            "k": page.get("k"), "synthesised": page.get("synthesised", 0),
            "synth_total": sl.get("units") if sl else None, "status": ", ".join(status)}


def _remove_layer(out: Path, name: str, page: dict) -> None:
    safe = safe_name(name)
    for rel in (page.get("href"), f"data/{safe}.cards.js", f"data/{safe}.units.js"):
        if rel:
            (out / rel).unlink(missing_ok=True)
    shutil.rmtree(out / "img" / safe, ignore_errors=True)


def _thumb_sheet(files: list[Path], path: Path, t: int, cols: int, whole: bool = False) -> list:
    """Thumbnails of `files`, row by row, t px cells: the centred square (as the network sees it), or
    with `whole` the whole original (upright, as mining saw it) scaled into the cell and centred.
    Returns, for `whole`, [x, y, w, h, width, height] per cell: where the picture lies in its cell
    and the original's size (None: the file cannot be read now; its cell stays grey)."""
    from PIL import Image, ImageOps

    from ..corpus import ImageProblem, decode_original

    rows = -(-len(files) // cols)
    sheet = Image.new("RGB", (cols * t, rows * t), (128, 128, 128))  # grey: a file that cannot be read now
    placed: list = []
    for n, f in enumerate(files):
        at = (n % cols * t, n // cols * t)
        if not whole:
            try:
                with Image.open(f) as im:
                    sheet.paste(ImageOps.fit(im.convert("RGB"), (t, t)), at)
            except OSError:
                pass
            continue
        try:
            img, (W, H), _ = decode_original(Path(f), size=t)
        except ImageProblem:
            placed.append(None)
            continue
        s = t / max(W, H)
        w, h = max(1, round(W * s)), max(1, round(H * s))
        x, y = (t - w) // 2, (t - h) // 2
        sheet.paste(img.convert("RGB").resize((w, h), Image.BILINEAR, reducing_gap=2.0), (at[0] + x, at[1] + y))
        placed.append([x, y, w, h, W, H])
    atomic_write(path, lambda fh: sheet.save(fh, format="JPEG", quality=85))
    os.chmod(path, READABLE)
    return placed

