"""How a run, a layer, a unit, a table, a probe and a comparison draw themselves in Jupyter.

Built from the atlas's escaped HTML pieces (atlas/html.py) and its stylesheet, scoped to one wrapper
element so it cannot restyle the notebook around it. No script and no network: pictures are
inline data URIs, each bounded in size, and a unit shows at most SHOW_TOP exemplars (and
SHOW_NEGATIVE negative ones), so a unit of any K stays a few hundred kilobytes at most.
"""
from __future__ import annotations

import base64
import io
import re
from functools import lru_cache
from importlib import resources

from .atlas.html import Html, facts_list, join, tag
from .summary import fires_label

SHOW_TOP = 16  # exemplars drawn per unit; the rest are counted
SHOW_NEGATIVE = 8
SHOW_ROWS = 200  # rows of a table drawn inline
CROP_PX = 96  # longest side of an inline crop
SYNTH_PX = 160
NEAR_PX = 56
FACET_PX = 56
SHOW_PER_FACET = 4
SHOW_NEAR = 6
SCOPE = "unitlens-nb"

CSS_EXTRA = f"""
.{SCOPE} {{ background: var(--paper); color: var(--ink); font: 14px/1.45 var(--sans); padding: 10px 12px; border-radius: 6px; }}
.{SCOPE} h3 {{ margin: 0 0 6px; font: 600 16px var(--serif); }}
.{SCOPE} h4 {{ margin: 10px 0 6px; font-size: 13px; color: var(--muted); }}
.{SCOPE} table.nb-table {{ border-collapse: collapse; font-size: 12.5px; }}
.{SCOPE} table.nb-table td, .{SCOPE} table.nb-table th {{ padding: 2px 8px; border-bottom: 1px solid var(--soft); text-align: right; }}
.{SCOPE} .nb-side {{ display: grid; grid-template-columns: 1fr 1fr; gap: 12px; }}
.{SCOPE} .nb-bars {{ display: flex; align-items: flex-end; gap: 1px; height: 40px; }}
.{SCOPE} .syn .near img {{ outline: none; }}  /* natural images beside a synthesised one: not drawn as synthesised */
.{SCOPE} .nb-bars span {{ display: block; width: 6px; background: var(--nat); }}
"""


def _scope(css: str, scope: str) -> str:
    """Prefix every selector of `css` with `.scope` (`:root`, `html` and `body` become the scope itself);
    at-rules that hold rules (@media, @supports) are scoped inside."""
    out, i = [], 0
    while i < len(css):
        j = css.find("{", i)
        if j < 0:
            break
        head = css[i:j].strip()
        depth, k = 1, j + 1
        while depth and k < len(css):
            depth += {"{": 1, "}": -1}.get(css[k], 0)
            k += 1
        body = css[j + 1:k - 1]
        head = re.sub(r"/\*.*?\*/", "", head, flags=re.DOTALL).strip()
        if head.startswith(("@media", "@supports")):
            out.append(f"{head} {{ {_scope(body, scope)} }}")
        elif head.startswith("@"):
            out.append(f"{head} {{{body}}}")
        else:
            sels = []
            for s in head.split(","):
                s = s.strip()
                s = re.sub(r"^(:root|html|body)\b", "", s).strip()
                sels.append(f".{scope} {s}" if s else f".{scope}")
            out.append(f"{', '.join(sels)} {{{body}}}")
        i = k
    return "\n".join(out)


@lru_cache(maxsize=1)
def stylesheet() -> Html:
    css = resources.files("unitlens.atlas").joinpath("static/atlas.css").read_text()
    return Html(f"<style>{_scope(css, SCOPE)}{CSS_EXTRA}</style>")


def wrap(*children) -> str:
    return str(join([stylesheet(), tag("div", *children, class_=SCOPE)]))


def data_uri(img, px: int) -> str:
    """A PIL image shrunk to at most `px` on its longest side, as a JPEG data URI (a few kilobytes)."""
    img = img.convert("RGB")
    img.thumbnail((px, px))
    buf = io.BytesIO()
    img.save(buf, format="JPEG", quality=82)
    return "data:image/jpeg;base64," + base64.b64encode(buf.getvalue()).decode("ascii")


def _num(v, fmt: str = ".4g") -> str:
    return "–" if v is None else format(v, fmt) if isinstance(v, float) else str(v)


def _picture(get, px: int, alt: str):
    """An <img> of get()'s picture, or a note saying why there is none (a missing or unreadable file)."""
    from .errors import UnitlensError

    try:
        return tag("img", src=data_uri(get(), px), alt=alt, loading="lazy")
    except (UnitlensError, OSError) as e:
        return tag("span", f"no picture: {e}", class_="missing")


def _exemplar(e) -> Html:
    caption = [tag("span", tag("span", f"#{e.rank}", class_="ex-rank"), tag("span", f"{e.score:.4g}", class_="ex-score"),
                   class_="ex-line"), tag("span", e.id, class_="ex-file")]
    if e.label is not None:
        caption.append(tag("span", e.label, class_="ex-label"))
    prefer_sheet = e.sheet is not None and e.sheet[0].is_file()  # already a thumbnail: no decode of the original
    return tag("figure", _picture(lambda: e.crop(sheet=prefer_sheet), CROP_PX, f"exemplar {e.rank}"),
               tag("figcaption", *caption), class_="ex")


def _exemplars(title: str, items: list, limit: int) -> Html:
    if not items:
        return Html("")
    more = tag("p", f"{len(items) - limit} more not drawn here (the object lists them all).", class_="note") \
        if len(items) > limit else None
    return join([tag("h4", f"{title} ({len(items)})"), tag("div", *[_exemplar(e) for e in items[:limit]],
                                                           class_="ex-grid"), more])


def _facets(u) -> Html:
    """Each facet of the unit's top images: its size and up to SHOW_PER_FACET of its kept exemplars' crops
    (more crops are not cut for facets, as in the atlas)."""
    if len(u.facets) < 2:
        return Html("")
    by_id = {e.id: e for e in u.exemplars}
    groups = []
    for k, g in enumerate(u.facets):
        kept = [by_id[p.id] for p in g if p.id in by_id][:SHOW_PER_FACET]
        crops = [_picture(lambda e=e: e.crop(sheet=e.sheet is not None and e.sheet[0].is_file()), FACET_PX,
                          f"exemplar {e.rank}") for e in kept]
        groups.append(tag("div", tag("p", f"facet {k + 1}: {len(g)} images, {len(kept)} kept exemplars shown",
                                     class_="note"), tag("div", *crops, class_="facet-grid"), class_="facet"))
    return join([tag("h4", f"facets of the top images ({len(u.facets)})"), tag("div", *groups, class_="panels")])


def _bars(hist: dict) -> Html:
    counts = hist.get("counts") or []
    if not counts:
        return Html("")
    top = max(counts)
    bars = [tag("span", style=f"height:{max(1, round(40 * c / top)) if c else 0}px", title=f"{c}") for c in counts[:96]]
    edges = hist["edges"]
    return join([tag("div", *bars, class_="nb-bars", aria_label="histogram of per-image maxima"),
                 tag("p", f"per-image maximum, {edges[0]:.3g} to {edges[-1]:.3g}", class_="note")])


def _synth(s) -> Html:
    r = s.record
    facts = [("spatial max", _num(r.get("max_activation"))),
             ("vs best exemplar", _num(r.get("vs_best_exemplar"), ".2f") + "×" if r.get("vs_best_exemplar") else None),
             ("rank among channels", f"{r['rank']} of {r['channels']}" if r.get("rank") is not None else None),
             ("under random warps", f"{_num((r.get('robustness') or {}).get('relative'), '.2f')} of it"
              if (r.get("robustness") or {}).get("relative") is not None else None),
             ("parity with the best exemplar", ("reached" if r["parity"].get("reached") else "not reached")
              + (f" at step {r['parity']['step']}" if r["parity"].get("step") is not None else ""))
             if r.get("parity") else (None, None),
             ("steps", _num(r.get("steps")))]
    near = [tag("figure", _picture(p.image, NEAR_PX, "nearest natural image"),
                tag("figcaption", f"{p.similarity:.2f}" if p.similarity is not None else "", title=p.id), class_="near")
            for p in s.nearest[:SHOW_NEAR]]
    return tag("figure", _picture(s.image, SYNTH_PX, "synthesised image"),
               tag("figcaption", facts_list([f for f in facts if f[0]]),
                   tag("div", *near, class_="facet-grid") if near else None), class_="syn")


def unit_html(u) -> str:
    return wrap(_unit_body(u))


def _unit_body(u) -> Html:
    st = u.stats
    facts = facts_list([
        ("images", f"{st['images']:,}"),
        ("per-image max", (f"mean {_num(st['mean_max'])}, std {_num(st['std_max'])}, "
                           f"range {_num(st['min'])} .. {_num(st['max'])}")),
        (fires_label(st), f"{100 * st['fire_rate']:.1f}% of images" if st["fire_rate"] is not None else None),
        ("class selectivity", _num(st["class_selectivity"], ".3f") if st["class_selectivity"] is not None else None),
    ])
    synth = [_synth(s) for s in u.synthesised]
    return join([tag("h3", tag("span", u.layer, class_="uv-layer"), " · unit ", tag("span", u.channel, class_="uv-unit")),
                tag("div", tag("section", facts, _bars(u.histogram), class_="panel"),
                    tag("section", tag("h4", "synthesised"), tag("div", *synth, class_="syn-grid"), class_="panel")
                    if synth else None, class_="panels"),
                _facets(u),
                _exemplars("top exemplars", u.exemplars, SHOW_TOP),
                _exemplars("most negative", u.negative_exemplars, SHOW_NEGATIVE)])


def _table(rows: list[dict], limit: int = SHOW_ROWS) -> Html:
    if not rows:
        return tag("p", "No rows.", class_="note")
    cols = list(dict.fromkeys(k for r in rows for k in r))
    body = [tag("tr", *[tag("td", _num(r.get(c)) if not isinstance(r.get(c), (list, dict)) else str(r.get(c)),
                            class_="num") for c in cols]) for r in rows[:limit]]
    more = tag("p", f"First {limit} of {len(rows)} rows; the object holds them all.", class_="note") \
        if len(rows) > limit else None
    return join([tag("table", tag("thead", tag("tr", *[tag("th", c) for c in cols])), tag("tbody", *body),
                     class_="nb-table"), more])


def table_html(t) -> str:
    return wrap(tag("h3", t.title), _table(t))


def layer_html(layer) -> str:
    t = layer.table()
    shape = layer.shape
    facts = [f"{len(t)} units mined", "×".join(map(str, shape)) if shape else None]
    return wrap(tag("h3", layer.name), tag("p", " · ".join(f for f in facts if f), class_="note"), _table(t))


def run_html(run) -> str:
    m, c = run.model, run.corpus
    facts = facts_list([("folder", tag("code", str(run.path))), ("model", tag("code", m.get("spec", "?"))),
                 ("weights", (m.get("weights") or {}).get("kind")),
                 ("corpus", f"{c.get('count', 0):,} images, {len(c.get('skipped') or [])} skipped"
                  + (f", {len(c.get('classes') or [])} classes" if c.get("classes") else "")),
                 ("atlas", tag("code", str(run.path / "atlas" / "index.html"))
                  if (run.path / "atlas" / "index.html").is_file() else None)])
    rows = []
    for name in run.layers:
        L = run.layer(name)
        synth = ((run.manifest.get("synth") or {}).get("layers") or {}).get(name) or {}
        rows.append({"layer": name, "units mined": L.info.get("units"), "synthesised": synth.get("units")})
    return wrap(tag("h3", run.path.name), tag("section", facts, class_="panel"), _table(rows))


def _read(path):
    from PIL import Image

    with Image.open(path) as im:  # closed at once, not when the collector gets to it
        return im.convert("RGB")


def probe_html(p) -> str:
    """A probe result: the unit (as unit_html) with each exemplar's heat maps."""
    rows = []
    base = p.folder
    for e in p["exemplars"][:SHOW_TOP]:
        pics = []
        for name, a in (e.get("attribution") or {}).items():
            f = base / a["file"] if base else None
            if f is not None and f.is_file():
                pics.append(tag("figure", _picture(lambda f=f: _read(f), CROP_PX, name), tag("figcaption", name),
                                class_="ex"))
        rows.append(tag("div", tag("p", f"#{e['rank']} {e['score']:.4g} ", tag("code", e["id"])),
                        tag("div", *pics, class_="ex-grid") if pics else None))
    return wrap(_unit_body(p.unit), tag("h4", "heat maps of the top exemplars"), *rows)


def comparison_html(c) -> str:
    rows = [{"layer": e["layer"], "layer_b": e["layer_b"], "cka": e["cka"],
             "cka_low": (e.get("cka_ci") or [None, None])[0], "cka_high": (e.get("cka_ci") or [None, None])[1],
             "units": e["units_compared"], "mean_corr": e["mean_corr"], "mean_jaccard": e["mean_jaccard"],
             "dead": e["dead"], "most_changed": ", ".join(map(str, e["most_changed"][:8]))} for e in c["layers"]]
    return wrap(tag("h3", "comparison"), tag("p", f"A: {_side(c['a'])} · B: {_side(c['b'])}", class_="note"),
                _table(rows))


def _side(s: dict) -> str:
    return s.get("run") or (s.get("model") or {}).get("spec") or "?"


def pair_html(pair) -> str:
    """A unit of a comparison, A and B side by side: its numbers, and each side's unit where a run holds it."""
    sides = []
    for label, u in (("A", pair.a), ("B", pair.b)):
        inner = _unit_body(u) if u is not None else tag("p", "No run folder on this side: numbers only.",
                                                             class_="note")
        sides.append(tag("section", tag("h4", label), inner))
    return wrap(tag("h3", f"{pair.layer} · unit {pair.unit}"), facts_list([(k, _num(v)) for k, v in pair.row.items()]),
                tag("div", *sides, class_="nb-side"))
