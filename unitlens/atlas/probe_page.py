"""The one-unit page of `unitlens probe`: a static file in the atlas's look (its template, stylesheet
and escaping), no script, so it opens from file:// and asks nothing of the network."""
from __future__ import annotations

from importlib import resources
from pathlib import Path

from ..store import Run, atomic_write, safe_name
from .html import facts_list, join, page, tag
from ..summary import fires_label

TITLES = {"integrated-gradients": "integrated gradients", "gradient-x-input": "gradient × input",
          "smoothgrad": "SmoothGrad |mean gradient|"}

GAP_WARNING = 0.05  # integrated gradients further than this from completeness are flagged

# rules of this page only, appended to the atlas stylesheet
CSS = """
/* unitlens probe: one unit, its exemplars and their heat maps */
.pr-row { display: flex; flex-wrap: wrap; gap: 12px; align-items: flex-start; padding: 12px 0; border-bottom: 1px solid var(--soft); }
.pr-row figure { margin: 0; }
.pr-row figcaption { font-size: 12px; color: var(--muted); margin-top: 4px; max-width: 170px; }
.pr-facts { flex: 0 1 240px; min-width: 200px; font-size: 13px; }
.pr-facts .ex-file { display: block; margin-bottom: 4px; }
.pr-key { display: inline-block; width: 12px; height: 12px; border-radius: 2px; vertical-align: -1px; margin: 0 4px 0 10px; }
.pr-pos { background: rgb(232, 96, 28); } .pr-neg { background: rgb(24, 136, 196); } .pr-mag { background: rgb(250, 210, 40); }
.pr-thumbs { display: flex; flex-wrap: wrap; gap: 10px; }
.pr-row figcaption.warn { color: var(--warn); }
"""


def write_page(d: Path, run: Run, s: dict) -> Path:
    """Write d/index.html (+ the stylesheet and icon) for the probe summary `s`; returns its path."""
    static = resources.files("unitlens.atlas").joinpath("static")
    atomic_write(d / "atlas.css", lambda f: f.write(static.joinpath("atlas.css").read_bytes() + CSS.encode()))
    atomic_write(d / "icon.png", lambda f: f.write(static.joinpath("icon.png").read_bytes()))
    layer, unit, st = s["layer"], s["unit"], s["stats"]
    settings = s["settings"]
    facts = [("model", tag("code", s["model"])), ("run", tag("code", str(run.path))),
             ("images", f"{st['images']:,}"),
             ("per-image max", f"mean {st['mean_max']:.4g}, std {st['std_max']:.4g}, highest {st['max']:.4g}"),
             (fires_label(st), f"{100 * (st['fire_rate'] or 0):.1f}% of images"),
             ("class selectivity", f"{st['class_selectivity']:.3f}" if st.get("class_selectivity") is not None else None)]
    head = tag("section", tag("h1", f"{layer} · unit {unit}"),
               tag("p", "Its top exemplars from the corpus, which pixels of each crop drive it, and an image "
                        "synthesised to drive it.", class_="lede"), class_="pagehead")
    atlas = run.path / "atlas" / f"layer-{safe_name(layer)}.html"
    link = (tag("p", tag("a", "This unit in the run's atlas", href=f"../../atlas/{atlas.name}#unit-{unit}"))
            if atlas.is_file() else None)
    stats = tag("section", tag("h2", "Statistics"), facts_list(facts), link, class_="panel")
    synth = [tag("figure", tag("img", src=im["page_image"], width=160, height=160, alt=f"synthesised for unit {unit}"),
                 tag("figcaption", f"activation {im['max_activation']:.4g}" +
                     (f", {im['vs_best_exemplar']:.2f}× the best exemplar" if im.get("vs_best_exemplar") else "")),
                 class_="synth") for im in s["synth"] if im.get("page_image")]
    synth_sec = tag("section", tag("h2", "Synthesised"),
                    tag("div", *synth, class_="uv-heroes") if synth else
                    tag("p", "None yet: run `unitlens probe RUN LAYER:CHANNEL --synth` or `unitlens synth RUN`.",
                        class_="note"), class_="panel")
    methods = settings["methods"]
    legend = [tag("span", "", class_="pr-key pr-pos"), "raises the unit", tag("span", "", class_="pr-key pr-neg"),
              "lowers it"] if any(m != "smoothgrad" for m in methods) else []
    if "smoothgrad" in methods:
        legend += [tag("span", "", class_="pr-key pr-mag"), "SmoothGrad magnitude"]
    how = [f"Heat maps explain the unit's activation at each exemplar's argmax position, with respect to the "
           f"input pixels, over that position's receptive field (the crop). Shown: {', '.join(TITLES[m] for m in methods)}."]
    ig = settings.get("integrated_gradients")
    if ig:
        how.append(f"Integrated gradients (Sundararajan et al. 2017): {ig['baseline']} baseline, {ig['rule']} rule "
                   f"from {ig['steps']} steps (doubled up to {ig['max_steps']} until the sum is within "
                   f"{100 * (ig['tolerance'] or 0):g}% of f(x) − f(baseline)).")
    sg = settings.get("smoothgrad")
    if sg:
        how.append(f"SmoothGrad (Smilkov et al. 2017): {sg['samples']} copies, noise σ = {sg['noise']:g} × the "
                   "image's range.")
    how.append("Colours are capped at the 99th percentile of each map.")
    rows = [_exemplar_row(e, methods) for e in s["exemplars"] if e.get("attribution")]
    rest = [e for e in s["exemplars"] if not e.get("attribution")]
    thumbs = tag("div", *[_crop(e) for e in rest], class_="pr-thumbs") if rest else None
    ex_sec = tag("section", tag("h2", "Top exemplars"), tag("p", *legend, class_="note") if rows else None,
                 tag("p", " ".join(how), class_="note") if rows else None, *rows,
                 tag("h2", "More exemplars") if rows and rest else None, thumbs, class_="panel wide")
    main = join([head, tag("div", stats, synth_sec, class_="panels"), ex_sec])
    crumbs = [tag("span", run.path.resolve().name), "/", tag("span", f"{layer}:{unit}", class_="here")]
    path = d / "index.html"
    html = page(f"{layer}:{unit} · unitlens probe", "probe", crumbs, main)
    atomic_write(path, lambda f: f.write(html.encode()))
    return path


def _crop(e: dict):
    if not e.get("crop"):
        return tag("p", f"#{e['rank']} {e['id']}: {e.get('problem', 'no crop')}", class_="missing")
    return tag("figure", tag("img", src=e["crop"], width=112, height=112, alt=f"exemplar {e['rank']}"),
               tag("figcaption", f"#{e['rank']}  {e['score']:.4g}  {e['id']}"), class_="ex")


def _exemplar_row(e: dict, methods: list[str]):
    figs = [tag("figure", tag("img", src=e["crop"], width=160, height=160, alt=f"exemplar {e['rank']}"),
                tag("figcaption", "crop from the original file"))]
    for m in methods:
        a = e["attribution"].get(m)
        if not a:
            continue
        cap, warn = TITLES[m], False
        if a.get("completeness_gap") is not None:
            cap += f": sum {a['sum']:.4g} vs {a['score'] - a['baseline_score']:.4g} ({100 * a['completeness_gap']:.1f}% apart, {a['steps']} steps)"
            warn = a["completeness_gap"] > GAP_WARNING
            cap += "; more steps would make it more faithful (--ig-max-steps)" if warn else ""
        figs.append(tag("figure", tag("img", src=a["file"], width=160, height=160, alt=f"{TITLES[m]}, exemplar {e['rank']}"),
                        tag("figcaption", cap, class_="warn" if warn else None)))
    label = tag("span", e["label"], class_="ex-label") if e.get("label") else None
    facts = tag("div", tag("span", f"#{e['rank']}", class_="ex-rank"), " ",
                tag("span", f"{e['score']:.4g}", class_="ex-score num"),
                tag("span", e["id"], class_="ex-file"), label and tag("div", label),
                tag("div", f"box {e['box']} (original pixels), position {e['position']}", class_="num"),
                tag("p", e["problem"], class_="note warn") if e.get("problem") else None, class_="pr-facts")
    return tag("div", facts, *figs, class_="pr-row")

