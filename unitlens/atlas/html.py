"""HTML out of Python with escaping by default, and the two Python-built pages (run summary, layer shell).

Every string that reaches a page passes `esc` unless it is an `Html` built here: text from the
corpus, the model or the user (file names, layer names, labels, reasons) can never become markup.
The page skeleton (templates/page.html) is a Jinja2 template with autoescaping: there too, only
`Html` (which declares itself safe through MarkupSafe's `__html__`) goes in unescaped.
"""
from __future__ import annotations

import html as _html
import json
from functools import lru_cache

CAUTIONS = (
    "Exemplars and synthesised images are evidence about a unit, not proof of what it means. A unit "
    "can respond to several unrelated things, a synthesised image can be made to mislead, and the "
    "images that excite a unit most are a thin slice of its behaviour.",
    "This atlas shows pieces of the corpus it was made from (crops and file names). If those images "
    "are private, check before you share or publish it.",
    "Do not use it on its own to make decisions about people (medical, hiring, policing).",
)

# The page's own inline mark: a lens over a grid of units. The scripts also take the SVG
# namespace from it, so no file of the atlas needs to spell out a namespace address.
LOGO = ('<svg class="mark" viewBox="0 0 32 32" width="28" height="28" aria-hidden="true">'
        '<g class="mark-grid">' + "".join(f'<rect x="{3 + 7 * (i % 4)}" y="{3 + 7 * (i // 4)}" width="5" '
                                          'height="5" rx="1"/>' for i in range(16)) +
        '</g><circle class="mark-lens" cx="15" cy="15" r="8.5"/></svg>')

CSP = ("default-src 'none'; script-src 'self' file:; style-src 'self' file:; img-src 'self' file:; "
       "base-uri 'none'; form-action 'none'")


class Html(str):
    """Markup that is already safe (built by the helpers below)."""

    def __html__(self) -> str:  # MarkupSafe's protocol: Jinja2's autoescaping leaves it as it is
        return self


def esc(x) -> Html:
    return x if isinstance(x, Html) else Html(_html.escape(str(x), quote=True))


def tag(name: str, *children, **attrs) -> Html:
    """<name attrs>children</name>; attribute names: class_ -> class, data_unit -> data-unit."""
    parts = [name]
    for k, v in attrs.items():
        if v is None or v is False:
            continue
        k = k.rstrip("_").replace("_", "-")
        parts.append(k if v is True else f'{k}="{esc(v)}"')
    return Html(f"<{' '.join(parts)}>{join(children)}</{name}>")


def join(items) -> Html:
    return Html("".join(esc(c) for c in items if c is not None))


def js_data(name: str, obj) -> str:
    """`window.NAME = {...};` with every '<', '>' and '&' escaped, so no text can close a tag."""
    text = json.dumps(obj, ensure_ascii=True, separators=(",", ":"), allow_nan=False)
    text = text.replace("<", "\\u003c").replace(">", "\\u003e").replace("&", "\\u0026")
    return f"window.{name} = {text};\n"


@lru_cache(maxsize=None)
def _templates():
    """The page templates, autoescaping everything that is not `Html`; undefined names are errors."""
    import jinja2

    return jinja2.Environment(loader=jinja2.PackageLoader(__package__, "templates"), autoescape=True,
                              undefined=jinja2.StrictUndefined, keep_trailing_newline=True)


def page(title: str, kind: str, crumbs, main, scripts=(), body_attrs: dict | None = None, styles=()) -> str:
    """A whole page: `styles` are stylesheets to load after atlas.css."""
    attrs = " ".join(f'{k}="{esc(v)}"' for k, v in (body_attrs or {}).items())
    return _templates().get_template("page.html").render(
        title=esc(title), kind=esc(kind), csp=Html(CSP), logo=Html(LOGO), crumbs=join(crumbs), main=main,
        body_attrs=Html(attrs), cautions=esc(CAUTIONS[0].split(".")[0] + "."),
        styles=join(Html(f'<link rel="stylesheet" href="{esc(s)}">') for s in styles),
        scripts=join(Html(f'<script src="{esc(s)}"></script>') for s in scripts),
    )


# -- the run summary ------------------------------------------------------------------------

def facts_list(rows) -> Html:
    return tag("dl", *[join([tag("dt", k), tag("dd", v)]) for k, v in rows if v is not None], class_="facts")


def _value(v) -> Html:
    if isinstance(v, float):
        return tag("span", f"{v:.6g}", class_="num")
    if isinstance(v, (int, bool)) or v is None:
        return tag("span", json.dumps(v), class_="num")
    if isinstance(v, str):
        return esc(v)
    return tag("code", json.dumps(v))


def _flat(d, prefix="") -> list[tuple[str, object]]:
    out = []
    for k, v in (d or {}).items():
        if isinstance(v, dict) and v:
            out += _flat(v, f"{prefix}{k}.")
        else:
            out.append((f"{prefix}{k}", v))
    return out


def settings_table(title: str, d: dict) -> Html:
    rows = _flat(d)
    if not rows:
        return Html("")
    body = join(tag("tr", tag("th", k, scope="row"), tag("td", _value(v))) for k, v in rows)
    return tag("details", tag("summary", title), tag("table", tag("tbody", body), class_="params"))


def weights_cell(w: dict) -> Html:
    kind = w.get("kind", "none")
    if kind == "none":
        return Html("none (random initialisation)")
    where = w.get("path") or w.get("name") or ""
    parts = [tag("span", kind, class_="pill"), " ", tag("code", where)]
    if w.get("sha256"):
        parts += [tag("br"), "SHA-256 ", tag("code", w["sha256"], class_="hash")]
    return join(parts)


def _input_text(pre: dict) -> str:
    """'3 × 224 × 224 px' (channels × height × width; grey models have one channel)."""
    size = pre.get("size")
    if not size:
        return "unknown"
    h, w = (size, size) if isinstance(size, int) else size
    return f"{len(pre.get('mean') or (0, 0, 0))} × {h} × {w} px"


def index_page(m: dict, layers: list[dict], rendered: str, renderer: str, run_name: str,
               comparisons: Html = Html("")) -> str:
    """The run summary. `layers`: [{name, href|None, shape, mined, k, synthesised, synth_total, status}];
    `comparisons`: the section listing the run's comparisons (comparison_page.comparisons_section)."""
    model = m.get("model") or {}
    pre = model.get("preprocess") or {}
    corpus = m.get("corpus") or {}
    mine = m.get("mine") or {}
    synth = m.get("synth") or {}

    cautions = tag("aside", tag("h2", "Read this first"),
                   tag("ul", *[tag("li", c) for c in CAUTIONS]), class_="caution", role="note")
    mean = ", ".join(f"{v:g}" for v in pre.get("mean", []))
    std = ", ".join(f"{v:g}" for v in pre.get("std", []))
    model_s = tag("section", tag("h2", "Model and input"), facts_list([
        ("architecture", tag("code", model.get("spec", "unknown"))),
        ("weights", weights_cell(model.get("weights") or {})),
        ("constructor options", tag("code", json.dumps(model["arch_options"])) if model.get("arch_options") else None),
        ("input", _input_text(pre)),
        ("normalisation", f"mean ({mean}), std ({std})" if mean else None),
        ("preprocessing", pre.get("source")),
        ("cropping", f"scaled by one factor to cover the input ({pre.get('interpolation', 'bilinear')}), centred part "
                     "cut; exemplar crops are cut from the original files at the receptive-field box"
                     if pre.get("size") else None),
    ]), class_="panel")

    skipped = corpus.get("skipped") or []
    classes = corpus.get("classes") or []
    ignored = corpus.get("ignored") or []
    corpus_s = tag("section", tag("h2", "Corpus"), facts_list([
        ("images", join([tag("span", f"{corpus.get('count', 0) - len(skipped):,}", class_="num"), " of ",
                         tag("span", f"{corpus.get('count', 0):,}", class_="num"), " files read",
                         tag("a", f" ({len(skipped)} skipped)", href="#skipped") if skipped else ""])
         if corpus else "not read yet"),
        ("labels", (f"{len(classes)} classes from folder names: " + ", ".join(classes)) if corpus.get("labelled")
         else "none" if corpus else None),
        ("source", tag("code", corpus["source"]) if corpus.get("source") else None),
        ("fingerprint", tag("code", corpus["fingerprint"], class_="hash") if corpus.get("fingerprint") else None),
        ("not images", f"{len(ignored)} file(s) ignored" if ignored else None),
    ]), class_="panel")

    if skipped:
        rows = join(tag("tr", tag("td", tag("code", s.get("file", ""))), tag("td", s.get("reason", "")))
                    for s in skipped)
        skipped_s = tag("section", tag("h2", f"Skipped files ({len(skipped)})"),
                        tag("table", tag("thead", tag("tr", tag("th", "file"), tag("th", "reason"))),
                            tag("tbody", rows), class_="skipped"), class_="panel wide", id="skipped")
    else:
        skipped_s = Html("")

    if layers:
        rows = []
        for L in layers:
            name = tag("a", L["name"], href=L["href"]) if L.get("href") else esc(L["name"])
            rows.append(tag(
                "tr", tag("th", name, scope="row"),
                tag("td", "×".join(map(str, L["shape"])) if L.get("shape") else "–", class_="num"),
                tag("td", f"{L['mined']}" if L.get("mined") else "–", class_="num"),
                tag("td", f"{L['k']}" if L.get("k") else "–", class_="num"),
                tag("td", f"{L['synthesised']} / {L['synth_total']}" if L.get("synth_total") else "–", class_="num"),
                tag("td", L.get("status", "")),
                tag("td", L.get("overview") or "", class_="overview"),
                data_layer=L["name"]))
        head = tag("tr", *[tag("th", h, scope="col", class_="num" if 0 < k < 5 else None) for k, h in
                           enumerate(("layer", "C × H × W", "units mined", "exemplars per unit", "synthesised", "status", "a first look"))])
        layers_s = tag("section", tag("h2", "Layers"), tag("table", tag("thead", head), tag("tbody", *rows),
                                                           class_="layers"), class_="panel wide", id="layers")
    else:
        layers_s = tag("section", tag("h2", "Layers"), tag("p", "Nothing mined or synthesised yet."),
                       class_="panel wide", id="layers")

    params = [settings_table("Mining", {**(mine.get("config") or {}),
                                  "colour statistics": (mine.get("colour") or {}).get("source")})]
    ss = synth.get("settings") or {}
    if ss:
        params.append(settings_table("Synthesis", {**(ss.get("config") or {}), "goal": ss.get("goal"),
                                            "colour": (synth.get("colour") or {}).get("source") or ss.get("colour")}))
    params_s = tag("section", tag("details", tag("summary", tag("h2", "Settings"), " mining and synthesis, as run"),
                                  *params, class_="settings"), class_="panel wide")
    prov_s = tag("section", tag("h2", "Provenance"), facts_list([
        ("run started", tag("time", m.get("created", "?"))),
        ("last updated", tag("time", m.get("updated", "?"))),
        ("atlas drawn", tag("time", rendered)),
        ("written by", f"unitlens {m.get('unitlens', '?')}"),
        ("atlas renderer", renderer),
    ]), class_="panel")

    head = tag("header", tag("h1", run_name), tag("p", "unit atlas: what the channels of ", tag("code", model.get("name") or model.get("spec", "?")),
                                                  " respond to on this corpus", class_="lede"), class_="pagehead")
    grid = tag("div", model_s, corpus_s, prov_s, class_="panels")
    main = join([head, cautions, layers_s, comparisons, grid, skipped_s, params_s])
    return page(f"{run_name}: unit atlas", "index", [tag("span", run_name, class_="here")], main)


# -- a layer page (the cards and the unit view are drawn by atlas.js) -----------------------

SORTS = (("id", "unit id"), ("peak", "peak activation"), ("csi", "class selectivity"),
         ("ratio", "synthesised / natural"), ("fire", "firing rate"), ("trust", "synthesis trust (checks passed)"),
         ("own_rank", "rank on its own synthesised image"), ("robust", "synthesis robustness under warps"),
         ("feeders", "effective feeders (low: concentrated inputs)"),
         ("iou", "concept IoU"), ("concept", "concept name"))


def layer_page(run_name: str, layer: str, facts: list[str], cards_js: str, units_js: str,
               nav: list[tuple[str, str, int]]) -> str:
    """The shell of a layer page; `nav`: (layer, href, units) of every layer page of the run."""
    options = join(tag("option", label, value=key) for key, label in SORTS)
    toolbar = tag(
        "div",
        tag("label", "order by ", tag("select", options, id="sort"), class_="ctl"),
        tag("button", "↓ high first", type="button", id="dir", class_="ctl", aria_pressed="false",
            title="Reverse the order"),
        tag("label", "units ", tag("input", type="search", id="filter", placeholder="e.g. 12 or 10-40, 77",
                                   autocomplete="off", spellcheck="false", aria_describedby="filter-help"),
            class_="ctl grow"),
        tag("output", id="count", aria_live="polite"),
        tag("span", "press / to filter, Enter on a card to open it", id="filter-help", class_="hint"),
        class_="toolbar", role="toolbar", aria_label="Sort and filter units")
    links = [tag("a", name, tag("span", str(n), class_="n"), href=href, class_="here" if name == layer else None,
                 aria_current="page" if name == layer else None) for name, href, n in nav]
    head = tag("header", tag("h1", layer), tag("p", " · ".join(facts), class_="lede"),
               tag("nav", *links, class_="layer-nav", aria_label="Layers"), class_="pagehead")
    main = join([
        head, toolbar,
        tag("div", id="grid", class_="grid", aria_label="Units of this layer"),
        tag("section", id="unit", class_="unitview", hidden=True, tabindex="-1", aria_label="Unit view"),
        tag("noscript", tag("p", "The unit cards of this page are drawn by its scripts; "
                                 "enable JavaScript, or read the run summary on the index page.")),
    ])
    crumbs = [tag("a", run_name, href="index.html"), tag("span", "/", class_="sep"), tag("span", layer, class_="here")]
    return page(f"{layer} · {run_name}", "layer", crumbs, main,
                scripts=[cards_js, "plots.js", "atlas.js"], body_attrs={"data-details": units_js})
